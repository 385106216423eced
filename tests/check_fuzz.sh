#!/usr/bin/env bash
# tests/check_fuzz.sh: fuzz the model validator (aff_model_validate) and the serving kernels
# it lets models through to, for a bounded time.
#
# Builds tests/fuzz/fuzz_model.c with clang's libFuzzer, AddressSanitizer and
# UndefinedBehaviorSanitizer (the engine's sources compiled as they are, outside the server), builds a seed corpus with tests/fuzz/seeds.py (models fitted by the extension
# through the PG* connection, synthesized models of every method layout, crafted bad values),
# and runs the fuzzer for AFFINITY_FUZZ_SECONDS (default 20) seconds on one core.
#
# Exit 0: the run ended with no crash, leak, sanitizer report or timeout; prints the number of
# executions. Exit 77: no clang with libFuzzer here (the reason is the last line). Else failed:
# the sanitizer's report is printed with the crashing input in base64, ready to paste into
# SELECT '...'::affinity.model.
#
# Environment (scripts/test sets them): PGHOST, PGPORT, PGUSER, PGDATABASE, AFFINITY_REPO,
# AFFINITY_TEST_TMP. scripts/fuzz runs this for longer.

set -uo pipefail

repo=${AFFINITY_REPO:-$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd -P)}
tmp=${AFFINITY_TEST_TMP:-$(mktemp -d)}
seconds=${AFFINITY_FUZZ_SECONDS:-20}
python=/usr/bin/python3

skip()
{
	echo "skipped: $*"
	exit 77
}

# A clang whose libFuzzer runtime is installed (Debian: clang-14 and libclang-rt-14-dev).
find_clang()
{
	local c
	for c in clang-14 clang; do
		command -v "$c" >/dev/null 2>&1 || continue
		printf 'int LLVMFuzzerTestOneInput(const unsigned char *d, unsigned long n) { return 0; }\n' \
			>"$tmp/probe.c"
		if "$c" -fsanitize=fuzzer,address,undefined "$tmp/probe.c" -o "$tmp/probe" \
			>"$tmp/probe.log" 2>&1; then
			echo "$c"
			return 0
		fi
	done
	return 1
}

cc=$(find_clang)
if [ -z "$cc" ] && [ "$(id -u)" -eq 0 ] && command -v apt-get >/dev/null 2>&1; then
	echo "clang with libFuzzer not found; installing clang-14 and libclang-rt-14-dev with apt-get"
	{ apt-get update && DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends \
		clang-14 libclang-rt-14-dev; } >"$tmp/apt.log" 2>&1 || true
	cc=$(find_clang)
fi
if [ -z "$cc" ]; then
	[ -f "$tmp/probe.log" ] && tail -n 5 "$tmp/probe.log"
	skip "no clang with libFuzzer (Debian packages clang-14 and libclang-rt-14-dev) to build the fuzzer"
fi

bin=$tmp/fuzz_model
# the validator reads the method table, so the whole engine is linked (with OpenBLAS)
blas_cflags=$(pkg-config --cflags openblas 2>/dev/null)
blas_libs=$(pkg-config --libs openblas 2>/dev/null || echo -lopenblas)
# shellcheck disable=SC2086
if ! "$cc" -g -O1 -fsanitize=fuzzer,address,undefined -fno-sanitize-recover=undefined \
	-DAFF_ASSERTS -pthread $blas_cflags -I"$repo/src/core" "$repo/tests/fuzz/fuzz_model.c" \
	"$repo"/src/core/*.c $blas_libs -lm -o "$bin" >"$tmp/build.log" 2>&1; then
	cat "$tmp/build.log"
	echo "FAILED: the fuzz target does not build with $cc"
	exit 1
fi
echo "built $bin with $($cc --version | head -n 1)"

seeds=$tmp/seeds
corpus=$tmp/corpus
rm -rf "$seeds" "$corpus" "$tmp"/crash-* "$tmp"/leak-* "$tmp"/timeout-* "$tmp"/oom-*
mkdir -p "$corpus"
if ! "$python" "$repo/tests/fuzz/seeds.py" corpus "$seeds"; then
	echo "FAILED: tests/fuzz/seeds.py could not build the seed corpus"
	exit 1
fi
n_seeds=$(find "$seeds" -type f | wc -l)

# New inputs go to the first directory; the seeds stay as they are. One process, one core:
# the machine is shared. -timeout: a single input taking 10 s is a hang. -max_len: room for
# the largest seed and for growth (a model of a few hundred users).
log=$tmp/fuzz.log
ASAN_OPTIONS=detect_leaks=1:abort_on_error=0 UBSAN_OPTIONS=print_stacktrace=1 \
	"$bin" -max_total_time="$seconds" -timeout=10 -rss_limit_mb=2048 -max_len=65536 \
	-print_final_stats=1 -artifact_prefix="$tmp/" "$corpus" "$seeds" >"$log" 2>&1
rc=$?

execs=$(sed -n 's/^stat::number_of_executed_units: *//p' "$log" | tail -n 1)
rate=$(sed -n 's/^stat::average_exec_per_sec: *//p' "$log" | tail -n 1)
n_corpus=$(find "$corpus" -type f | wc -l)
cov=$(grep -o 'cov: [0-9]*' "$log" | tail -n 1)
artifacts=$(find "$tmp" -maxdepth 1 -type f \( -name 'crash-*' -o -name 'leak-*' -o \
	-name 'timeout-*' -o -name 'oom-*' \) | sort)

if [ "$rc" -ne 0 ] || [ -n "$artifacts" ]; then
	echo "---- fuzzer report (exit $rc) ----"
	grep -v -E '^#[0-9]+' "$log" | tail -n 80
	for a in $artifacts; do
		echo "---- input $(basename "$a") ($(stat -c %s "$a") bytes), base64 ----"
		base64 -w 0 "$a" | head -c 20000
		echo
	done
	echo "FAILED: the fuzzer found a fault after ${execs:-?} executions (seeds: $n_seeds)"
	exit 1
fi

echo "fuzz: ${execs:-0} executions in $seconds s (${rate:-?}/s), $n_seeds seeds," \
	"$n_corpus new inputs kept, ${cov:-cov: ?} edges; no crash"
[ "${execs:-0}" -gt 0 ] || { echo "FAILED: the fuzzer ran no input"; exit 1; }
exit 0
