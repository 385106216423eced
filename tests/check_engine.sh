#!/usr/bin/env bash
# tests/check_engine.sh: the engine's own test program (tests/engine/test_engine.c), no server.
#
# Builds the engine sources (src/core/*.c) and the test with -DAFF_ASSERTS, AddressSanitizer
# and UndefinedBehaviorSanitizer (clang-14, clang or gcc), links OpenBLAS, runs it, and fails on
# a failed check or on any sanitizer report. Exit 77 when no compiler can build with sanitizers.

set -uo pipefail

repo=${AFFINITY_REPO:-$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd -P)}
tmp=${AFFINITY_TEST_TMP:-$(mktemp -d)}
blas_cflags=$(pkg-config --cflags openblas 2>/dev/null)
blas_libs=$(pkg-config --libs openblas 2>/dev/null || echo -lopenblas)

cc=""
for c in clang-14 clang gcc; do
	command -v "$c" >/dev/null 2>&1 || continue
	printf 'int main(void) { return 0; }\n' >"$tmp/probe.c"
	if "$c" -fsanitize=address,undefined "$tmp/probe.c" -o "$tmp/probe" >/dev/null 2>&1; then
		cc=$c
		break
	fi
done
[ -n "$cc" ] || { echo "skipped: no compiler with AddressSanitizer and UBSan"; exit 77; }

bin=$tmp/test_engine
# shellcheck disable=SC2086
if ! "$cc" -std=gnu11 -g -O1 -fno-omit-frame-pointer -fsanitize=address,undefined \
	-fno-sanitize-recover=undefined -DAFF_ASSERTS -DAFF_NO_CLONES -pthread $blas_cflags \
	-I"$repo/src/core" "$repo/tests/engine/test_engine.c" "$repo"/src/core/*.c \
	$blas_libs -lm -o "$bin" >"$tmp/build.log" 2>&1; then
	cat "$tmp/build.log"
	echo "FAILED: the engine test does not build with $cc"
	exit 1
fi
echo "built $bin with $($cc --version | head -n 1)"

log=$tmp/run.log
ASAN_OPTIONS=detect_leaks=1:abort_on_error=0 UBSAN_OPTIONS=print_stacktrace=1:halt_on_error=1 \
	OPENBLAS_NUM_THREADS=1 "$bin" >"$log" 2>&1
rc=$?
cat "$log"
if grep -q -E 'ERROR: (AddressSanitizer|LeakSanitizer)|runtime error:' "$log"; then
	echo "FAILED: sanitizer report"
	exit 1
fi
[ "$rc" -eq 0 ] || { echo "FAILED: exit $rc"; exit 1; }
exit 0
