#!/usr/bin/env bash
# deploy/test.sh runs freshet's whole test suite against real servers: it
# installs and starts Redis (Debian's redis-server) and a single-node Kafka
# broker (KRaft, jars from Maven Central), runs vet, gofmt, the unit and
# integration tests with -race, the scalar-fallback and SIMD builds of the
# model tests, and a one-iteration smoke run of every benchmark; then it stops
# both servers. Each stage prints its duration.
#
# Environment: FRESHET_TEST_SKIP_SERVERS=1 runs without Kafka and Redis (the
# integration tests then skip); FRESHET_REQUIRE_DATA=1 makes the open-data
# tests fail instead of skip when ../shared/data is missing.
set -euo pipefail
cd "$(dirname "$0")/.."

total_start=$(date +%s)
stage() { # stage NAME CMD...
	local name=$1
	shift
	local t0
	t0=$(date +%s)
	echo "=== stage: $name"
	if "$@"; then
		echo "=== stage: $name: ok in $(($(date +%s) - t0))s"
	else
		local rc=$?
		echo "=== stage: $name: FAILED (exit $rc) after $(($(date +%s) - t0))s"
		exit "$rc"
	fi
}

stop_servers() {
	bash deploy/kafka.sh stop >/dev/null 2>&1 || true
	bash deploy/redis.sh stop >/dev/null 2>&1 || true
}

if [ "${FRESHET_TEST_SKIP_SERVERS:-0}" != 1 ]; then
	trap stop_servers EXIT
	stage "start redis" bash deploy/redis.sh start
	stage "start kafka" bash deploy/kafka.sh start
	# Each script's env prints NAME=value lines; set -a exports them.
	set -a
	eval "$(bash deploy/redis.sh env)"
	eval "$(bash deploy/kafka.sh env)"
	set +a
fi

stage "go vet" go vet ./...
stage "gofmt" bash -c 'out=$(gofmt -l $(git ls-files "*.go")); if [ -n "$out" ]; then echo "gofmt would change:"; echo "$out"; exit 1; fi'
stage "tests (-race, integration -p 1)" go test -race -p 1 -count=1 -timeout 40m ./...
stage "model tests, SIMD build" env GOEXPERIMENT=simd go test -count=1 ./online/
stage "benchmarks (smoke, -benchtime=1x)" go test -run '^$' -bench . -benchtime=1x -short -count=1 ./...
echo "=== all stages passed in $(($(date +%s) - total_start))s"
