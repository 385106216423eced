"""Shared helpers of bench/fit and bench/serving (a module, not a benchmark of its own).

Connection settings come from the libpq environment that bench/lib.sh exports (PGHOST, PGPORT,
PGUSER); the database is $PGDATABASE (bench/lib.sh creates `affinity_bench`).
"""

import datetime
import json
import os
import platform
import signal
import statistics
import subprocess
import sys
import tempfile
import time

import psycopg2

BENCH_DIR = os.path.dirname(os.path.abspath(__file__))
REPO_DIR = os.path.dirname(BENCH_DIR)
WORK = os.environ.get("AFF_BENCH_WORK") or tempfile.gettempdir()
LIBRARY = None       # what pin_library found, set by the drivers


def log(msg):
    print(msg, flush=True)


def connect():
    conn = psycopg2.connect("")
    conn.autocommit = True
    return conn


def query(conn, sql, args=None):
    with conn.cursor() as cur:
        cur.execute(sql, args)
        return cur.fetchall() if cur.description else None


def one(conn, sql, args=None):
    rows = query(conn, sql, args)
    return rows[0][0] if rows else None


def timed(conn, sql, args=None):
    """(seconds, rows) of one statement, timed on the client around the round trip."""
    with conn.cursor() as cur:
        t0 = time.perf_counter()
        cur.execute(sql, args)
        rows = cur.fetchall() if cur.description else None
        return time.perf_counter() - t0, rows


def median(xs):
    return statistics.median(xs) if xs else float("nan")


def loadavg():
    try:
        with open("/proc/loadavg") as fh:
            return " ".join(fh.read().split()[:3])
    except OSError:
        return "?"


def cpu_model():
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "?"


def numpy_blas():
    """numpy's BLAS as threadpoolctl sees it (in a child, so this process keeps no BLAS pool)."""
    code = ("import json, numpy\n"
            "try:\n"
            "    from threadpoolctl import threadpool_info\n"
            "    print(json.dumps([{k: d.get(k) for k in ('internal_api', 'version', 'architecture',"
            " 'num_threads', 'filepath')} for d in threadpool_info()]))\n"
            "except ImportError:\n"
            "    numpy.show_config()\n")
    r = subprocess.run(["/usr/bin/python3", "-c", code], capture_output=True, text=True)
    try:
        return json.loads(r.stdout)
    except ValueError:
        return r.stdout.strip()


def pin_library(conn):
    """Copy the affinity.so this backend has mapped (it may be replaced on disk by a later
    install while the run goes on) and give it to perf's build-id cache, so that profiles name
    its functions. Returns the copy's path and build id, or None."""
    pid = one(conn, "SELECT pg_backend_pid()")
    one(conn, "SELECT affinity.runtime()")          # loads the library
    try:
        with open("/proc/%d/maps" % pid) as fh:
            maps = [ln.split() for ln in fh if "affinity.so" in ln]
    except OSError:
        return None
    if not maps:
        return None
    src = "/proc/%d/map_files/%s" % (pid, maps[0][0])
    dst = os.path.join(WORK, "affinity.so")
    try:
        with open(src, "rb") as a, open(dst, "wb") as b:
            b.write(a.read())
    except OSError:
        return None
    bid = subprocess.run(["perf", "buildid-list", "-i", dst], capture_output=True, text=True)
    subprocess.run(["perf", "buildid-cache", "-a", dst], capture_output=True)
    return {"copy": dst, "mapped_from": " ".join(maps[0][5:]),
            "build_id": bid.stdout.split()[0] if bid.stdout.split() else None}


def git_state():
    def run(*a):
        r = subprocess.run(["git", "-C", REPO_DIR] + list(a), capture_output=True, text=True)
        return r.stdout.strip()
    dirty = [ln for ln in run("status", "--short", "--", "src", "Makefile").splitlines()]
    return {"head": run("rev-parse", "--short", "HEAD"), "subject": run("log", "-1", "--format=%s"),
            "uncommitted_in_src": dirty}


def machine(conn):
    rt = json.loads(json.dumps(one(conn, "SELECT affinity.runtime()")))
    return {
        "date": datetime.datetime.now().astimezone().isoformat(timespec="seconds"),
        "nproc": os.cpu_count(),
        "nproc_online": int(subprocess.run(["nproc"], capture_output=True, text=True).stdout or 0),
        "cpu": cpu_model(),
        "kernel": platform.release(),
        "postgres": one(conn, "SELECT version()"),
        "affinity_runtime": rt,
        "blas_core": rt.get("blas_core"),
        "numpy_blas": numpy_blas(),
        "loadavg_start": loadavg(),
        "git": git_state(),
        "library": pin_library(conn),
    }


def sgemm_rates():
    """Run bench/sgemm_rate (compiled by bench/lib.sh into $AFF_SGEMM_BIN)."""
    exe = os.environ.get("AFF_SGEMM_BIN")
    if not exe or not os.path.exists(exe):
        log("sgemm_rate was not built; no reference rate")
        return []
    r = subprocess.run([exe, "2048", "1", "2"], capture_output=True, text=True, check=True)
    rates = [json.loads(line) for line in r.stdout.splitlines() if line.startswith("{")]
    for x in rates:
        if x["routine"] == "triad":
            log("  triad threads=%d: %.1f GB/s (memory bandwidth, 12 bytes an element)"
                % (x["threads"], x["gbytes_per_s"]))
        else:
            log("  %s n=%d threads=%d: %.1f GFLOP/s (%s kernel)"
                % (x["routine"], x["n"], x["threads"], x["gflops"], x["core"]))
    return rates


def rate_of(rates, routine, threads):
    """GFLOP/s of sgemm or dgemm, GB/s of the triad, at a thread count."""
    for x in rates:
        if x["routine"] == routine and x["threads"] == threads:
            return x["gbytes_per_s"] if routine == "triad" else x["gflops"]
    return None


def generate(table, rows, users, items, parts=2, seed=1):
    """Fill `table` with bench/gen_purchases.sql, `parts` sessions side by side; returns seconds."""
    conn = connect()
    query(conn, "DROP TABLE IF EXISTS %s" % table)
    query(conn, "CREATE UNLOGGED TABLE %s (user_id bigint NOT NULL, item_id bigint NOT NULL, "
                "weight real NOT NULL)" % table)
    t0 = time.perf_counter()
    procs = [subprocess.Popen(["psql", "-X", "-q", "-v", "ON_ERROR_STOP=1",
                               "-v", "tbl=" + table, "-v", "rows=%d" % rows,
                               "-v", "users=%d" % users, "-v", "items=%d" % items,
                               "-v", "part=%d" % p, "-v", "parts=%d" % parts,
                               "-v", "seed=%d" % seed,
                               "-f", os.path.join(BENCH_DIR, "gen_purchases.sql")],
                              env=dict(os.environ, PGOPTIONS="-c client_min_messages=warning"))
             for p in range(parts)]
    for p in procs:
        if p.wait() != 0:
            sys.exit("generating %s failed" % table)
    gen = time.perf_counter() - t0
    t0 = time.perf_counter()
    query(conn, "VACUUM (FREEZE, ANALYZE) %s" % table)   # hint bits set once, not by the first scan
    vac = time.perf_counter() - t0
    size = one(conn, "SELECT pg_size_pretty(pg_table_size(%s::regclass))", (table,))
    conn.close()
    log("  %s: %d rows, %d users, %d items: generated in %.1f s (%d sessions), vacuum %.1f s, %s"
        % (table, rows, users, items, gen, parts, vac, size))
    return {"table": table, "rows": rows, "users": users, "items": items,
            "generate_seconds": gen, "vacuum_seconds": vac, "size": size, "sessions": parts}


class Perf:
    """perf record -g on one backend while a statement runs; report() gives the top symbols."""

    def __init__(self, pid, out, freq=999):
        self.out = out
        self.proc = None
        try:
            self.proc = subprocess.Popen(["perf", "record", "-q", "-g", "-e", "cpu-clock",
                                          "-F", str(freq), "-p", str(pid), "-o", out],
                                         stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
            time.sleep(0.5)
            if self.proc.poll() is not None:
                log("  perf did not start: " + self.proc.stderr.read().decode()[-300:])
                self.proc = None
        except FileNotFoundError:
            log("  perf is not installed; no profile")

    def stop(self):
        if self.proc is None:
            return False
        self.proc.send_signal(signal.SIGINT)
        try:
            self.proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        return os.path.exists(self.out)

    def _entries(self, sort):
        r = subprocess.run(["perf", "report", "-i", self.out, "--stdio", "--no-children",
                            "-g", "none", "--sort", sort, "--percent-limit", "0"],
                           capture_output=True, text=True)
        out = []
        for ln in r.stdout.splitlines():
            if not ln.strip() or ln.startswith("#") or "%" not in ln:
                continue
            pct, rest = ln.split("%", 1)
            try:
                out.append((float(pct), " ".join(rest.split()).replace(" - -", "")))
            except ValueError:
                pass
        return out

    def report(self, library=None, limit=0.5):
        """(top functions, top source lines inside affinity) as text lines. Addresses that perf
        cannot name (the library was replaced on disk while it ran) are named from `library`,
        the copy pin_library made, with addr2line, inlined functions included."""
        funcs, inner = {}, {}
        unresolved = []
        for pct, rest in self._entries("dso,symbol"):
            parts = rest.split()
            dso = parts[0]
            sym = parts[-1]
            if "affinity.so" in dso and sym.startswith("0x") and library:
                unresolved.append((pct, sym))
                continue
            key = "%s %s" % (dso.replace("(deleted)", ""), " ".join(parts[1:]))
            funcs[key] = funcs.get(key, 0) + pct
        if unresolved:
            r = subprocess.run(["addr2line", "-a", "-f", "-i", "-e", library]
                               + [a for _p, a in unresolved], capture_output=True, text=True)
            chains, cur = [], None
            for ln in r.stdout.splitlines():
                if ln.startswith("0x"):
                    cur = []
                    chains.append(cur)
                elif cur is not None:
                    cur.append(ln.strip())
            for (pct, _a), ch in zip(unresolved, chains):
                pairs = list(zip(ch[0::2], ch[1::2]))      # (function, file:line), innermost first
                if not pairs:
                    continue
                outer = pairs[-1][0]
                key = "affinity.so [.] %s" % outer
                funcs[key] = funcs.get(key, 0) + pct
                fn, where = pairs[0]
                where = os.path.basename(where.split(" ")[0])
                k2 = "%s (%s)%s" % (where, fn, "" if fn == outer else " in " + outer)
                inner[k2] = inner.get(k2, 0) + pct
        else:
            for pct, rest in self._entries("srcline"):
                if ".c:" in rest:
                    inner[rest] = inner.get(rest, 0) + pct
        top = ["%6.2f%%  %s" % (v, k) for k, v in sorted(funcs.items(), key=lambda x: -x[1])
               if v >= limit]
        lines = ["%6.2f%%  %s" % (v, k) for k, v in sorted(inner.items(), key=lambda x: -x[1])
                 if v >= limit]
        return top, lines


def md_table(header, rows):
    out = ["| " + " | ".join(header) + " |", "| " + " | ".join("---" for _ in header) + " |"]
    for r in rows:
        out.append("| " + " | ".join(str(c) for c in r) + " |")
    return "\n".join(out)


def write_json(path, obj):
    if not path:
        return
    with open(path, "w") as fh:
        json.dump(obj, fh, indent=1, default=str)
    log("figures written to %s" % path)
