#!/usr/bin/env bash
# deploy/kafka.sh: a real single-node Apache Kafka broker for freshet's tests.
#
#   deploy/kafka.sh start    fetch the jars (Maven, cached in ~/.m2), format a KRaft
#                            storage directory with a SCRAM test user, start one
#                            combined broker+controller on 127.0.0.1 and wait until a
#                            metadata request lists it
#   deploy/kafka.sh stop     stop the broker by PID and remove its state
#   deploy/kafka.sh status   exit 0 when the broker is running, 3 when not
#   deploy/kafka.sh env      print the test environment, one NAME=value a line:
#                              export $(deploy/kafka.sh env)
#
# Needs only bash, Java 17 and mvn. Settings (environment, with defaults):
#   FRESHET_KAFKA_PORT=19092             PLAINTEXT listener
#   FRESHET_KAFKA_SASL_PORT=19094        SASL_PLAINTEXT listener (SCRAM-SHA-256/512, PLAIN)
#   FRESHET_KAFKA_CONTROLLER_PORT=19093  KRaft controller listener
#   FRESHET_KAFKA_SASL_USER=freshet-test, FRESHET_KAFKA_SASL_PASSWORD=freshet-test-secret
#   FRESHET_KAFKA_RUN=deploy/.run/kafka  state: config, data, log, PID (removed by stop)
#   FRESHET_KAFKA_LIBS=deploy/.run/kafka-libs-<version>  jars (kept across stop)
#   FRESHET_KAFKA_HEAP=512m              broker heap
#   FRESHET_KAFKA_WAIT=60                seconds to wait for the broker to come up
#   FRESHET_KAFKA_STOP_WAIT=5            seconds stop waits after SIGTERM before SIGKILL
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
conf="$here/kafka"
version="$(sed -n 's:.*<kafka.version>\(.*\)</kafka.version>.*:\1:p' "$conf/pom.xml")"

port="${FRESHET_KAFKA_PORT:-19092}"
sasl_port="${FRESHET_KAFKA_SASL_PORT:-19094}"
controller_port="${FRESHET_KAFKA_CONTROLLER_PORT:-19093}"
sasl_user="${FRESHET_KAFKA_SASL_USER:-freshet-test}"
sasl_password="${FRESHET_KAFKA_SASL_PASSWORD:-freshet-test-secret}"
run="${FRESHET_KAFKA_RUN:-$here/.run/kafka}"
libs="${FRESHET_KAFKA_LIBS:-$here/.run/kafka-libs-$version}"
heap="${FRESHET_KAFKA_HEAP:-512m}"
wait_s="${FRESHET_KAFKA_WAIT:-60}"
stop_wait="${FRESHET_KAFKA_STOP_WAIT:-5}"
node_id=1

say() { printf 'kafka.sh: %s\n' "$*" >&2; }
die() { say "error: $*"; exit 1; }

# pid prints the broker's PID when it is running.
pid() {
	[[ -f "$run/broker.pid" ]] || return 1
	local p
	p="$(cat "$run/broker.pid")"
	[[ -n "$p" ]] && kill -0 "$p" 2>/dev/null || return 1
	printf '%s\n' "$p"
}

# fetch_jars copies the broker and its runtime dependencies into $libs once.
fetch_jars() {
	if [[ -f "$libs/.complete" ]]; then
		return
	fi
	command -v mvn >/dev/null || die "mvn not found (needed to fetch the Kafka jars)"
	say "fetching Kafka $version jars with mvn (cached in ~/.m2)"
	rm -rf "$libs.tmp"
	mkdir -p "$libs.tmp"
	if ! mvn -q -B -f "$conf/pom.xml" dependency:copy-dependencies \
		-DincludeScope=runtime -DoutputDirectory="$libs.tmp" >"$libs.tmp.mvn.log" 2>&1; then
		tail -n 40 "$libs.tmp.mvn.log" >&2
		die "mvn could not resolve org.apache.kafka:kafka_2.13:$version"
	fi
	ls "$libs.tmp"/kafka_2.13-*.jar >/dev/null 2>&1 || die "mvn copied no kafka_2.13 jar into $libs.tmp"
	rm -f "$libs.tmp.mvn.log"
	touch "$libs.tmp/.complete"
	rm -rf "$libs"
	mv "$libs.tmp" "$libs"
}

# port_open reports whether something listens on 127.0.0.1:$1.
port_open() { (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null; }

java_cmd() {
	java -Dlog4j.configuration="file:$conf/log4j.properties" \
		-Dfreshet.kafka.log="$run/broker.log" "$@"
}

write_config() {
	local data="$run/data"
	sed -e "s|@PORT@|$port|g" -e "s|@SASL_PORT@|$sasl_port|g" \
		-e "s|@CONTROLLER_PORT@|$controller_port|g" -e "s|@DATA_DIR@|$data|g" \
		-e "s|@SASL_USER@|$sasl_user|g" -e "s|@SASL_PASSWORD@|$sasl_password|g" \
		"$conf/server.properties.in" >"$run/server.properties"
}

fail_start() {
	say "error: $*"
	if [[ -f "$run/broker.log" ]]; then
		say "last lines of $run/broker.log:"
		tail -n 40 "$run/broker.log" >&2
	fi
	if [[ -s "$run/broker.out" ]]; then
		say "last lines of $run/broker.out:"
		tail -n 20 "$run/broker.out" >&2
	fi
	stop_broker quiet
	exit 1
}

start() {
	if p="$(pid)"; then
		say "already running (PID $p) on 127.0.0.1:$port"
		return
	fi
	command -v java >/dev/null || die "java not found (Java 17 is needed)"
	for p in "$port" "$sasl_port" "$controller_port"; do
		port_open "$p" && die "port $p on 127.0.0.1 is already in use"
	done
	local t0=$SECONDS
	fetch_jars
	rm -rf "$run"
	mkdir -p "$run/data"
	write_config

	local cluster
	cluster="$(java_cmd -cp "$libs/*" kafka.tools.StorageTool random-uuid)" ||
		fail_start "StorageTool random-uuid failed"
	java_cmd -cp "$libs/*" kafka.tools.StorageTool format -t "$cluster" \
		-c "$run/server.properties" \
		--add-scram "SCRAM-SHA-256=[name=$sasl_user,password=$sasl_password]" \
		--add-scram "SCRAM-SHA-512=[name=$sasl_user,password=$sasl_password]" \
		>"$run/format.out" 2>&1 || { cat "$run/format.out" >&2; fail_start "StorageTool format failed"; }

	# setsid: the broker outlives this shell and its process group.
	setsid java -Xms"$heap" -Xmx"$heap" -XX:+UseG1GC -Djava.awt.headless=true \
		-Dlog4j.configuration="file:$conf/log4j.properties" \
		-Dfreshet.kafka.log="$run/broker.log" \
		-cp "$libs/*" kafka.Kafka "$run/server.properties" \
		</dev/null >"$run/broker.out" 2>&1 &
	echo $! >"$run/broker.pid"

	# Wait for the listener (cheap), then for a metadata request that lists
	# the broker (one JVM per try).
	local deadline=$((SECONDS + wait_s)) msg=""
	while ((SECONDS < deadline)); do
		pid >/dev/null || fail_start "the broker exited during start-up"
		if port_open "$port" && port_open "$sasl_port"; then
			if msg="$(java -Dlog4j.configuration="file:$conf/log4j.properties" \
				-Dfreshet.kafka.log="$run/ready.log" -cp "$libs/*" \
				"$conf/Ready.java" "127.0.0.1:$port" "$node_id" 2>&1)"; then
				say "$msg; up in $((SECONDS - t0)) s (PID $(cat "$run/broker.pid"))"
				return
			fi
		fi
		sleep 1
	done
	fail_start "the broker did not come up within $wait_s s${msg:+ ($msg)}"
}

stop_broker() {
	local p
	if p="$(pid)"; then
		# The state is deleted next, so a slow controlled shutdown buys
		# nothing: give SIGTERM a few seconds, then SIGKILL.
		kill "$p" 2>/dev/null || true
		for _ in $(seq 1 $((stop_wait * 5))); do
			kill -0 "$p" 2>/dev/null || break
			sleep 0.2
		done
		if kill -0 "$p" 2>/dev/null; then
			[[ "${1:-}" == quiet ]] || say "broker PID $p still running ${stop_wait} s after SIGTERM; killing it"
			kill -9 "$p" 2>/dev/null || true
			for _ in $(seq 1 50); do
				kill -0 "$p" 2>/dev/null || break
				sleep 0.1
			done
		fi
		[[ "${1:-}" == quiet ]] || say "stopped broker PID $p"
	else
		[[ "${1:-}" == quiet ]] || say "not running"
	fi
	rm -rf "$run"
}

status() {
	if p="$(pid)"; then
		echo "running: PID $p, PLAINTEXT 127.0.0.1:$port, SASL_PLAINTEXT 127.0.0.1:$sasl_port"
	else
		echo "not running"
		exit 3
	fi
}

env_lines() {
	echo "FRESHET_TEST_KAFKA=127.0.0.1:$port"
	echo "FRESHET_TEST_KAFKA_SASL=127.0.0.1:$sasl_port"
	echo "FRESHET_TEST_KAFKA_SASL_USER=$sasl_user"
	echo "FRESHET_TEST_KAFKA_SASL_PASSWORD=$sasl_password"
}

case "${1:-}" in
start) start ;;
stop) stop_broker ;;
status) status ;;
env) env_lines ;;
*)
	echo "usage: $0 start|stop|status|env" >&2
	exit 2
	;;
esac
