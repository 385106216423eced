#!/usr/bin/env bash
# bench/lib.sh: what bench/fit and bench/serving share. Sourced, not run.
#
# Reuses scripts/lib.sh (dependencies, build and install, throwaway cluster) and adds:
#   bench_setup         ensure_deps, build_install, cluster_start, a database `affinity_bench` with
#                       the extension, and bench/sgemm_rate.c compiled (AFF_SGEMM_BIN)
#   bench_python ARGS   run a Python driver with the system interpreter (Debian's numpy and scipy)
# Scratch files (exports, perf data) go to $AFF_WORK, removed on exit (kept after a failure).

# shellcheck source=scripts/lib.sh
source "$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd -P)/scripts/lib.sh"

BENCH_DIR=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd -P)
BENCH_PYTHON=/usr/bin/python3
export PYTHONDONTWRITEBYTECODE=1

bench_setup()
{
	ensure_deps
	command -v perf >/dev/null 2>&1 || say "perf is not installed: no profile (apt-get install linux-perf)"
	build_install
	cluster_start
	work_dir
	export AFF_BENCH_WORK=$AFF_WORK AFF_CLUSTER_LOG=$AFF_CLUSTER_DATA/log
	export PGDATABASE=affinity_bench
	createdb affinity_bench
	psql -X -q -v ON_ERROR_STOP=1 -c 'CREATE EXTENSION affinity' >/dev/null
	AFF_SGEMM_BIN=$AFF_WORK/sgemm_rate
	if ! cc -O2 -o "$AFF_SGEMM_BIN" "$BENCH_DIR/sgemm_rate.c" $(pkg-config --cflags --libs openblas 2>/dev/null || echo -lopenblas) 2>"$AFF_WORK/sgemm_build.log"; then
		cat "$AFF_WORK/sgemm_build.log"
		die "could not build bench/sgemm_rate.c"
	fi
	export AFF_SGEMM_BIN
	say "load average before the run: $(cut -d' ' -f1-3 /proc/loadavg) on $(nproc) CPUs (other work on this machine skews every figure)"
}

bench_python()
{
	"$BENCH_PYTHON" "$@"
}
