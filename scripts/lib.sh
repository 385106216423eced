#!/usr/bin/env bash
# scripts/lib.sh: shared helpers for the build, test and demo scripts of affinity.
#
# Sourced, not run. It provides:
#   repo_root            the checkout's top directory, found from this file's own location
#   ensure_deps          install the Debian packages the project needs, if any are missing
#   build_install        build the extension with PGXS and install it into PostgreSQL 15
#   cluster_start        start a throwaway PostgreSQL 15 cluster on a private socket and port,
#                        with pg_cron preloaded when it is installed (AFFINITY_CRON_DB below)
#   cluster_stop         stop it and remove its files (also run automatically on exit)
#   cluster_log_tail [N] print the last N lines of the server log
#   as_pg CMD...         run a command as the user that owns the cluster
#   work_dir             create $AFF_WORK, a scratch directory for this run's logs
#   on_exit CMD          register a command to run when the calling script exits
#   run_exit_cmds STATUS run the registered commands now (to print a last line after them)
# It works when run as root (the server then runs as the `postgres` user) and as an ordinary user.

set -euo pipefail

AFFINITY_PG_BIN=${AFFINITY_PG_BIN:-/usr/lib/postgresql/15/bin}
PG_CONFIG=${PG_CONFIG:-$AFFINITY_PG_BIN/pg_config}
export AFFINITY_PG_BIN PG_CONFIG

AFFINITY_DEPS=(build-essential postgresql-15 postgresql-contrib postgresql-server-dev-15
	libopenblas-dev python3 python3-numpy python3-scipy python3-sklearn python3-psycopg2
	python3-matplotlib xz-utils clang-14 libclang-rt-14-dev)

# Wanted but not required: without them the cluster still starts and the tests that need them
# skip, saying why. postgresql-15-cron is the job scheduler the scheduled-refresh test drives.
AFFINITY_OPTIONAL_DEPS=(postgresql-15-cron)

# The database in which pg_cron keeps its jobs and runs them (its cron.database_name; pg_cron
# runs jobs only there). scripts/test sets it to its test database, affinity_test, and creates
# that database as soon as the server is up; `AFFINITY_CRON_DB=affinity_demo scripts/demo --psql`
# gives the demo database a scheduler. The default is postgres because it always exists: while
# its database is missing, the pg_cron launcher exits and restarts every second, logging an error
# each time.
AFFINITY_CRON_DB=${AFFINITY_CRON_DB:-postgres}

# Print a progress line in a recognisable form.
say()
{
	printf '==> %s\n' "$*"
}

# Print an error line and exit 1.
die()
{
	printf 'error: %s\n' "$*" >&2
	exit 1
}

# The top directory of the checkout: this file lives in <repo>/scripts/.
repo_root()
{
	local here
	here=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd -P)
	dirname "$here"
}

is_root()
{
	[ "$(id -u)" -eq 0 ]
}

# ---------------------------------------------------------------------------
# Exit handling: commands registered with on_exit run in reverse order when the script exits,
# whether it finished, failed or was interrupted. The script's exit status is in $AFF_EXIT_STATUS.

_AFF_EXIT_CMDS=()
AFF_EXIT_STATUS=0

on_exit()
{
	_AFF_EXIT_CMDS+=("$1")
}

_aff_run_exit_cmds()
{
	AFF_EXIT_STATUS=$1
	local i
	trap - EXIT
	trap '' PIPE INT	# finish cleaning up even if output is gone or Ctrl-C is pressed again
	for ((i = ${#_AFF_EXIT_CMDS[@]} - 1; i >= 0; i--)); do
		eval "${_AFF_EXIT_CMDS[i]}" || true
	done
	_AFF_EXIT_CMDS=()
}

# Run the registered exit commands now (for a script that wants to print its last line after
# them); the EXIT trap is cleared, so they do not run twice.
run_exit_cmds()
{
	_aff_run_exit_cmds "${1:-0}"
}

trap '_aff_run_exit_cmds $?' EXIT
trap 'echo "interrupted" >&2; exit 130' INT
trap 'echo "terminated" >&2; exit 143' TERM
trap 'exit 129' HUP
trap 'trap "" PIPE; exit 141' PIPE	# output closed (piped into head): still clean up

# A private scratch directory for logs of this run ($AFF_WORK), created by work_dir on first use
# (call it directly, not in $(...), so the variable is set in the script itself). It is removed
# on exit, except after a failure, when its path is printed so that the logs can be read.
AFF_WORK=""

work_dir()
{
	if [ -z "$AFF_WORK" ]; then
		AFF_WORK=$(mktemp -d "${TMPDIR:-/tmp}/affinity-run.XXXXXX")
		on_exit '_aff_drop_work_dir'
	fi
}

_aff_drop_work_dir()
{
	[ -n "$AFF_WORK" ] && [ -d "$AFF_WORK" ] || return 0
	if [ "$AFF_EXIT_STATUS" -ne 0 ] && [ -z "${AFFINITY_DROP_LOGS:-}" ]; then
		echo "logs kept in $AFF_WORK"
	else
		rm -rf "$AFF_WORK"
	fi
}

# ---------------------------------------------------------------------------
# Dependencies

# Install whatever is missing of the Debian packages the project needs. Checks with dpkg first
# and only touches apt when something is missing; as root directly, otherwise through sudo
# (non-interactive) when available, else it names the packages to install and exits 1.
ensure_deps()
{
	local missing=() p
	for p in "${AFFINITY_DEPS[@]}"; do
		if ! dpkg -s "$p" 2>/dev/null | grep -q '^Status: install ok installed'; then
			missing+=("$p")
		fi
	done
	local optional=()
	for p in "${AFFINITY_OPTIONAL_DEPS[@]}"; do
		if ! dpkg -s "$p" 2>/dev/null | grep -q '^Status: install ok installed'; then
			optional+=("$p")
		fi
	done
	if [ ${#missing[@]} -eq 0 ] && [ ${#optional[@]} -eq 0 ]; then
		say "dependencies: all $((${#AFFINITY_DEPS[@]} + ${#AFFINITY_OPTIONAL_DEPS[@]})) Debian packages already installed"
		return 0
	fi

	local sudo=() can_install=1
	if ! is_root; then
		if command -v sudo >/dev/null 2>&1 && sudo -n true 2>/dev/null; then
			sudo=(sudo -n)
		else
			can_install=0
		fi
	fi
	command -v apt-get >/dev/null 2>&1 || can_install=0
	if [ "$can_install" -eq 0 ]; then
		[ ${#missing[@]} -eq 0 ] ||
			die "missing Debian packages: ${missing[*]}; install them with: sudo apt-get install ${missing[*]}"
		say "dependencies: optional ${optional[*]} not installed and no way to install them here (the tests that need them skip)"
		return 0
	fi

	local log
	work_dir
	log="$AFF_WORK/apt.log"
	if ! "${sudo[@]}" apt-get update >"$log" 2>&1; then
		if [ ${#missing[@]} -gt 0 ]; then
			tail -n 40 "$log"
			die "apt-get update failed; cannot install: ${missing[*]}"
		fi
		# the package lists may still be good enough for the optional packages
	fi
	if [ ${#missing[@]} -gt 0 ]; then
		if ! "${sudo[@]}" env DEBIAN_FRONTEND=noninteractive apt-get install -y \
			--no-install-recommends "${missing[@]}" >>"$log" 2>&1; then
			tail -n 40 "$log"
			die "apt-get could not install: ${missing[*]}"
		fi
		say "dependencies: installed ${missing[*]}"
	fi
	if [ ${#optional[@]} -gt 0 ]; then
		if "${sudo[@]}" env DEBIAN_FRONTEND=noninteractive apt-get install -y \
			--no-install-recommends "${optional[@]}" >>"$log" 2>&1; then
			say "dependencies: installed ${optional[*]}"
		else
			say "dependencies: could not install optional ${optional[*]} (the tests that need them skip)"
		fi
	fi
}

# ---------------------------------------------------------------------------
# Build

# Build the extension with PGXS and install it. Output goes to a log; its tail is shown on
# failure. `make install` goes through sudo when not root and the install tree is not writable.
build_install()
{
	local repo log sudo=()
	repo=$(repo_root)
	work_dir
	log="$AFF_WORK/build.log"
	[ -f "$repo/Makefile" ] || die "no Makefile in $repo: nothing to build"

	if ! make -C "$repo" -j"$(nproc)" PG_CONFIG="$PG_CONFIG" >"$log" 2>&1; then
		echo "---- build log (tail) ----"
		tail -n 60 "$log"
		die "build failed (full log: $log)"
	fi
	if ! is_root && [ ! -w "$("$PG_CONFIG" --pkglibdir)" ]; then
		if command -v sudo >/dev/null 2>&1 && sudo -n true 2>/dev/null; then
			sudo=(sudo -n)
		else
			die "cannot write to $("$PG_CONFIG" --pkglibdir); run 'make install PG_CONFIG=$PG_CONFIG' as root"
		fi
	fi
	if ! "${sudo[@]}" make -C "$repo" install PG_CONFIG="$PG_CONFIG" >>"$log" 2>&1; then
		echo "---- build log (tail) ----"
		tail -n 60 "$log"
		die "make install failed (full log: $log)"
	fi
	local warnings
	warnings=$(grep -c 'warning:' "$log" || true)
	say "built and installed affinity into $("$PG_CONFIG" --sharedir)/extension ($warnings compiler warnings)"
}

# ---------------------------------------------------------------------------
# A throwaway cluster

AFF_CLUSTER_DIR=""	# holds data/ and sock/
AFF_CLUSTER_DATA=""
AFF_CLUSTER_UP=0

# Run a command as the owner of the cluster: `postgres` when we are root, else ourselves.
as_pg()
{
	if is_root; then
		runuser -u postgres -- "$@"
	else
		"$@"
	fi
}

# True when something answers on TCP port $1 of the loopback address.
_aff_port_busy()
{
	(exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null
}

# Start a private cluster: initdb into a fresh temporary directory, start the server on a private
# port (AFFINITY_TEST_PORT, default 54329, or the next free one) with its socket in a private
# directory and no TCP listener. Exports PGHOST, PGPORT, PGUSER for psql and friends. The
# cluster is stopped and its directory removed when the script exits; after a failure the tail
# of the server log is printed first.
#
# When pg_cron is installed it is preloaded, with cron.database_name = $AFFINITY_CRON_DB (create
# that database right after this function returns) and cron.host = the socket directory, since
# the server has no TCP listener and pg_cron opens an ordinary client connection for each job.
# AFF_PG_CRON is 1 when pg_cron is preloaded, else 0.
AFF_PG_CRON=0
cluster_start()
{
	local base port
	base=$(mktemp -d "${TMPDIR:-/tmp}/affpg.XXXXXX")
	if [ ${#base} -gt 80 ]; then	# a socket path has to fit in 107 bytes
		rmdir "$base"
		base=$(mktemp -d /tmp/affpg.XXXXXX)
	fi
	AFF_CLUSTER_DIR=$base
	AFF_CLUSTER_DATA=$base/data
	mkdir -p "$base/data" "$base/sock"
	chmod 700 "$base/data"
	if is_root; then
		id postgres >/dev/null 2>&1 || die "no 'postgres' user to run the server as (is postgresql-15 installed?)"
		chown -R postgres: "$base"
	fi
	on_exit 'cluster_stop'

	if ! as_pg "$AFFINITY_PG_BIN/initdb" -D "$AFF_CLUSTER_DATA" --auth=trust -U postgres \
		--no-locale --encoding=UTF8 >"$base/initdb.log" 2>&1; then
		cat "$base/initdb.log"
		die "initdb failed"
	fi
	# Throwaway data: durability buys nothing here, speed does.
	as_pg sh -c "printf '%s\n' 'fsync = off' 'synchronous_commit = off' 'full_page_writes = off' >> '$AFF_CLUSTER_DATA/postgresql.conf'"
	AFF_PG_CRON=0
	if [ -f "$("$PG_CONFIG" --pkglibdir)/pg_cron.so" ]; then
		[[ $AFFINITY_CRON_DB =~ ^[A-Za-z0-9_]+$ ]] ||
			die "AFFINITY_CRON_DB must be a plain database name, not '$AFFINITY_CRON_DB'"
		as_pg sh -c "printf '%s\n' \"shared_preload_libraries = 'pg_cron'\" \
			\"cron.database_name = '$AFFINITY_CRON_DB'\" \"cron.host = '$base/sock'\" \
			>> '$AFF_CLUSTER_DATA/postgresql.conf'"
		AFF_PG_CRON=1
	fi

	port=${AFFINITY_TEST_PORT:-54329}
	for _ in 1 2 3 4 5 6 7 8 9 10; do
		while _aff_port_busy "$port"; do
			port=$((port + 1))
		done
		if as_pg "$AFFINITY_PG_BIN/pg_ctl" -D "$AFF_CLUSTER_DATA" \
			-o "-p $port -k $base/sock -c listen_addresses=''" \
			-l "$AFF_CLUSTER_DATA/log" -w -t 60 start >"$base/pg_ctl.log" 2>&1; then
			AFF_CLUSTER_UP=1
			break
		fi
		if [ "$AFF_PG_CRON" -eq 1 ] && grep -q 'pg_cron' "$AFF_CLUSTER_DATA/log" 2>/dev/null; then
			# a broken pg_cron must not keep the server down: the last setting wins
			say "the server did not start with pg_cron preloaded; starting it without pg_cron"
			tail -n 5 "$AFF_CLUSTER_DATA/log"
			as_pg sh -c "echo \"shared_preload_libraries = ''\" >> '$AFF_CLUSTER_DATA/postgresql.conf'"
			AFF_PG_CRON=0
			continue
		fi
		port=$((port + 1))
	done
	if [ "$AFF_CLUSTER_UP" -ne 1 ]; then
		cat "$base/pg_ctl.log"
		die "the server did not start (see the log above)"
	fi

	unset PGHOSTADDR PGSERVICE PGDATABASE PGPASSWORD PGSSLMODE
	export PGHOST=$base/sock PGPORT=$port PGUSER=postgres
	export PATH="$AFFINITY_PG_BIN:$PATH"
	if [ "$AFF_PG_CRON" -eq 1 ]; then
		say "PostgreSQL $("$AFFINITY_PG_BIN/postgres" -V | awk '{print $3}') running: socket $PGHOST, port $PGPORT; pg_cron preloaded for database $AFFINITY_CRON_DB"
	else
		say "PostgreSQL $("$AFFINITY_PG_BIN/postgres" -V | awk '{print $3}') running: socket $PGHOST, port $PGPORT; pg_cron not installed"
	fi
}

# Print the last lines of the server log (for failures).
cluster_log_tail()
{
	local n=${1:-40}
	if [ -n "$AFF_CLUSTER_DATA" ] && [ -f "$AFF_CLUSTER_DATA/log" ]; then
		echo "---- server log (last $n lines) ----"
		tail -n "$n" "$AFF_CLUSTER_DATA/log"
		echo "----"
	fi
}

# Stop the cluster and remove its directory. Idempotent. When the script is failing (or when
# called with a non-zero argument) the server log's tail is printed first.
cluster_stop()
{
	local status=${1:-$AFF_EXIT_STATUS}
	[ -n "$AFF_CLUSTER_DIR" ] || return 0
	if [ "$status" -ne 0 ]; then
		cluster_log_tail 40
	fi
	if [ "$AFF_CLUSTER_UP" -eq 1 ]; then
		if ! as_pg "$AFFINITY_PG_BIN/pg_ctl" -D "$AFF_CLUSTER_DATA" -m fast -w -t 30 stop >/dev/null 2>&1; then
			as_pg "$AFFINITY_PG_BIN/pg_ctl" -D "$AFF_CLUSTER_DATA" -m immediate -w -t 30 stop >/dev/null 2>&1 || true
		fi
		AFF_CLUSTER_UP=0
	fi
	rm -rf "$AFF_CLUSTER_DIR"
	AFF_CLUSTER_DIR=""
	AFF_CLUSTER_DATA=""
}
