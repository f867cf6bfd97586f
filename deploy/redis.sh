#!/usr/bin/env bash
# deploy/redis.sh: a throwaway Redis for freshet's integration tests.
#
#   deploy/redis.sh start   install redis-server if missing, start it on a loopback
#                           port with persistence off, wait until it answers PING
#   deploy/redis.sh stop    stop the server started by "start" (by its PID)
#   deploy/redis.sh env     print the variable the tests read
#
# Environment:
#   FRESHET_REDIS_PORT  port to listen on (default 16379)
#   FRESHET_REDIS_RUN   directory for the pidfile and log (default deploy/.run/redis)
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
port="${FRESHET_REDIS_PORT:-16379}"
run="${FRESHET_REDIS_RUN:-$here/.run/redis}"
pidfile="$run/redis-$port.pid"
logfile="$run/redis-$port.log"

die() { echo "redis.sh: $*" >&2; exit 1; }

install_server() {
	command -v redis-server >/dev/null 2>&1 && return 0
	echo "redis.sh: installing redis-server" >&2
	local sudo=""
	[ "$(id -u)" -eq 0 ] || sudo="sudo"
	# Another install may hold the dpkg lock; try a few times, refreshing the
	# package lists after the first failure.
	local i
	for i in 1 2 3 4 5; do
		if DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -q redis-server >&2; then
			break
		fi
		DEBIAN_FRONTEND=noninteractive $sudo apt-get update -q >&2 || true
		sleep "$i"
	done
	command -v redis-server >/dev/null 2>&1 || die "redis-server could not be installed"
}

ping() {
	redis-cli -h 127.0.0.1 -p "$port" PING 2>/dev/null | grep -q PONG
}

running() {
	[ -f "$pidfile" ] && kill -0 "$(cat "$pidfile")" 2>/dev/null
}

start() {
	install_server
	mkdir -p "$run"
	if running && ping; then
		echo "redis.sh: already running on 127.0.0.1:$port (pid $(cat "$pidfile"))" >&2
		return 0
	fi
	redis-server --bind 127.0.0.1 --port "$port" --protected-mode yes \
		--save "" --appendonly no --dir "$run" \
		--daemonize yes --pidfile "$pidfile" --logfile "$logfile"
	local i
	for i in $(seq 1 100); do
		if ping; then
			echo "redis.sh: redis-server on 127.0.0.1:$port (pid $(cat "$pidfile"))" >&2
			return 0
		fi
		sleep 0.1
	done
	[ -f "$logfile" ] && tail -n 20 "$logfile" >&2
	die "redis-server on port $port did not answer PING within 10 s"
}

stop() {
	if [ ! -f "$pidfile" ]; then
		echo "redis.sh: not running (no $pidfile)" >&2
		return 0
	fi
	local pid
	pid="$(cat "$pidfile")"
	if kill -0 "$pid" 2>/dev/null; then
		kill "$pid"
		local i
		for i in $(seq 1 50); do
			kill -0 "$pid" 2>/dev/null || break
			sleep 0.1
		done
		kill -0 "$pid" 2>/dev/null && kill -9 "$pid"
	fi
	rm -f "$pidfile"
	echo "redis.sh: stopped (pid $pid)" >&2
}

case "${1:-}" in
start) start ;;
stop) stop ;;
env) echo "FRESHET_TEST_REDIS=127.0.0.1:$port" ;;
*) echo "usage: $0 start|stop|env" >&2; exit 2 ;;
esac
