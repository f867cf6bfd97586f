#!/usr/bin/env bash
# deploy/bench.sh runs freshet's benchmarks at full length and writes their
# raw output to testdata/bench/, each file headed by a description of the
# machine. Run it on a quiet machine: the figures that matter are ratios
# between variants measured in the same run (SIMD against the scalar
# reference, the writer against a raw client loop, the pipeline against a
# raw consume loop), but absolute numbers move with the load.
#
#   bash deploy/bench.sh            model, decode and snapshot benchmarks
#   bash deploy/bench.sh servers    also Kafka and Redis (starts both)
set -euo pipefail
cd "$(dirname "$0")/.."
out=testdata/bench
mkdir -p "$out"

machine() {
	echo "# machine: $(nproc) cores, $(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2 | sed 's/^ //'),"\
		"$(grep -o -m1 -w 'avx2' /proc/cpuinfo || echo 'no avx2'), $(free -g | awk '/Mem:/ {print $2}') GiB;"\
		"$(go version | cut -d' ' -f3-); $(date -u +%Y-%m-%dT%H:%MZ); load $(cut -d' ' -f1-3 /proc/loadavg)"
}

run() { # run FILE CMD... : append the command and its output to FILE
	local f=$1
	shift
	{
		echo "# \$ $*"
		"$@" 2>&1
		echo
	} >>"$f"
}

f=$out/online-step.txt
machine >"$f"
run "$f" env GOEXPERIMENT=simd go test -run '^$' -bench 'BenchmarkStep$' -count=3 ./online/
run "$f" go test -run '^$' -bench 'BenchmarkStep$' -count=3 ./online/
run "$f" env GOEXPERIMENT=simd go test -run '^$' -bench 'BenchmarkKernels|BenchmarkStepImplicit|BenchmarkScoresTo' -count=3 ./online/

f=$out/online-trainer.txt
machine >"$f"
run "$f" env GOEXPERIMENT=simd go test -run '^$' -bench 'BenchmarkTrainer$' -benchtime=1x -count=5 ./online/

f=$out/online-index.txt
machine >"$f"
run "$f" go test -run '^$' -bench 'BenchmarkIndex' -count=3 ./online/

f=$out/online-snapshot.txt
machine >"$f"
run "$f" env GOEXPERIMENT=simd go test -run '^$' -bench 'BenchmarkSnapshotStall' -benchtime=1x -count=3 ./online/
run "$f" go test -run '^$' -bench 'BenchmarkSnapshotWrite' -benchtime=1x -count=2 ./sink/checkpoint/ \
	-args -checkpoint.users=2000000 -checkpoint.items=200000 -checkpoint.rank=64

f=$out/stream-decode.txt
machine >"$f"
run "$f" go test -run '^$' -bench . -count=5 ./stream/

if [ "${1:-}" = servers ]; then
	trap 'bash deploy/kafka.sh stop >/dev/null 2>&1 || true; bash deploy/redis.sh stop >/dev/null 2>&1 || true' EXIT
	bash deploy/redis.sh start
	bash deploy/kafka.sh start
	set -a
	eval "$(bash deploy/redis.sh env)"
	eval "$(bash deploy/kafka.sh env)"
	set +a
	f=$out/kafka-pipeline.txt
	machine >"$f"
	run "$f" go test -run '^$' -bench 'Pipeline/compare' -benchtime=1x -count=3 ./cmd/freshet/
	f=$out/redis.txt
	machine >"$f"
	run "$f" go test -run '^$' -bench 'FlushVsRaw|Freshness' -benchtime=5x -count=3 ./sink/serving/
	run "$f" go test -run '^$' -bench 'Offer' -benchtime=0.2s ./sink/serving/
fi
echo "raw outputs in $out/"
