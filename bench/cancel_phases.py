"""Cancel latency in every phase of a large fit, and of a big value's text
output and input (not a test: figures for docs/reliability.md).

    PGHOST=... PGPORT=... python3 bench/cancel_phases.py [rows [value_bytes]]

Builds a table of ordinary rows (default 20,000,000: 1M users, 256k items),
runs the implicit_als fit once uncancelled, timing each phase from the
backend's process title (/proc/<pid>/cmdline, rewritten by set_ps_display),
then once per phase with a pg_cancel_backend from a second session sent
when the title shows the phase: reading rows (the title is the query's
own), building the interaction matrix, the first sweep, writing the model.
The uncancelled run also times what follows the write: the title is the
query's again while PostgreSQL copies the aggregate's result
(finalize_aggregate's datumCopy) and frees the fit's memory.

Then a value of value_bytes (default 720 MiB, the largest the type takes;
0 skips this part), laid out by tests/digest/big_value.c, goes in through
COPY FROM, and `(model::text)::affinity.model` (model_out, then model_in
with full validation and the digest check) runs uncancelled and then with
a cancel at a quarter, half and three quarters of its uncancelled time.
Prints the seconds from the cancel to the error reaching the client.  The
server must run on this machine.
"""

import base64
import os
import subprocess
import sys
import tempfile
import threading
import time

import psycopg2

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests"))
from _common import build_engine_program  # noqa: E402

ROWS = int(sys.argv[1]) if len(sys.argv) > 1 else 20000000
VALUE_BYTES = int(sys.argv[2]) if len(sys.argv) > 2 else 720 * 1024 * 1024
FIT = """SELECT affinity.fit(u, i, w, '{"factors": 32, "iterations": 3}') IS NULL FROM cancel_rows"""
PHASES = [("reading rows", None, 3.0), ("matrix build", "building the interaction matrix", 0.3),
          ("sweep 1", "sweep 1 of", 0.5), ("writing the model", "writing the model", 0.2)]
MARKERS = [("reading rows", None), ("matrix build", "building the interaction matrix"),
           ("sweeps", "sweep 1 of"), ("writing the model", "writing the model")]
ROUND_TRIP = "SELECT (model::text)::affinity.model IS NULL FROM cancel_big"


def title(pid):
    try:
        with open("/proc/%d/cmdline" % pid, "rb") as f:
            return f.read().decode("utf-8", "replace")
    except OSError:
        return ""


def run_cancelled(cur, ocur, pid, sql, wait):
    """Run sql in a thread, call wait() (returns when to cancel), cancel,
    and return (outcome, seconds from start to cancel, latency)."""
    res = {}

    def run():
        try:
            cur.execute(sql)
            res["outcome"] = "finished"
        except psycopg2.errors.QueryCanceled:
            res["outcome"] = "cancelled"
        res["end"] = time.monotonic()

    th = threading.Thread(target=run)
    start = time.monotonic()
    th.start()
    wait(th, start)
    sent = time.monotonic()
    ocur.execute("SELECT pg_cancel_backend(%s)", (pid,))
    th.join()
    return res.get("outcome"), sent - start, res["end"] - sent


def timed_fit(cur, pid):
    """One uncancelled fit; the seconds spent in each phase."""
    seen = {}
    done = {}

    def run():
        cur.execute(FIT)
        done["end"] = time.monotonic()

    th = threading.Thread(target=run)
    start = time.monotonic()
    th.start()
    seen["reading rows"] = start
    after_write = None
    while th.is_alive():
        t = title(pid)
        now = time.monotonic()
        for name, marker in MARKERS:
            if marker is not None and marker in t and name not in seen:
                seen[name] = now
        if "writing the model" in seen and after_write is None and "affinity.fit" not in t:
            after_write = now
        time.sleep(0.001)
    th.join()
    order = [n for n, _ in MARKERS] + ["result copy and clean-up"]
    if after_write is not None:
        seen["result copy and clean-up"] = after_write
    seen["end"] = done["end"]
    names = [n for n in order if n in seen] + ["end"]
    for a, b in zip(names, names[1:]):
        print("  %-26s %6.3f s" % (a, seen[b] - seen[a]))


def big_value(cur, tmp):
    """Load a value of VALUE_BYTES into cancel_big through COPY FROM."""
    exe = os.path.join(tmp, "big_value")
    rc, out = build_engine_program(exe, "tests/digest/big_value.c", ())
    if rc != 0:
        raise SystemExit("cannot build big_value: " + out[-2000:])
    path = os.path.join(tmp, "big.bin")
    subprocess.run([exe, str(VALUE_BYTES), path], stdout=subprocess.DEVNULL, check=True)
    with open(path, "rb") as f:
        text = base64.b64encode(f.read())
    os.unlink(path)
    cpath = os.path.join(tmp, "big.copy")
    with open(cpath, "wb") as f:
        f.write(text + b"\n")
    del text
    cur.execute("DROP TABLE IF EXISTS cancel_big")
    cur.execute("CREATE UNLOGGED TABLE cancel_big (model affinity.model)")
    t = time.monotonic()
    with open(cpath, "rb") as f:
        cur.copy_expert("COPY cancel_big FROM STDIN", f)
    os.unlink(cpath)
    print("COPY FROM of a %d-byte value (text input, validation, digest): %.2f s"
          % (VALUE_BYTES, time.monotonic() - t))


def main():
    conn = psycopg2.connect("")
    conn.autocommit = True
    cur = conn.cursor()
    other = psycopg2.connect("")
    other.autocommit = True
    ocur = other.cursor()
    cur.execute("SET max_parallel_workers_per_gather = 0")
    cur.execute("SELECT pg_backend_pid()")
    pid = cur.fetchone()[0]
    if ROWS > 0:
        t = time.monotonic()
        cur.execute("DROP TABLE IF EXISTS cancel_rows")
        cur.execute("""CREATE UNLOGGED TABLE cancel_rows AS
                       SELECT (hashint4(g) & 1048575)::bigint AS u, (hashint4(g * 7 + 1) & 262143)::bigint AS i,
                              (1 + g %% 5)::real AS w FROM generate_series(1, %d) g""" % ROWS)
        print("%d rows in %.1f s" % (ROWS, time.monotonic() - t))
        print("uncancelled fit, by phase:")
        timed_fit(cur, pid)
        for name, marker, delay in PHASES:
            def wait(th, start, marker=marker, delay=delay):
                while th.is_alive() and marker is not None and marker not in title(pid):
                    time.sleep(0.002)
                time.sleep(delay)
            outcome, at, late = run_cancelled(cur, ocur, pid, FIT, wait)
            print("%-18s cancel sent %6.2f s after start: %s %.3f s later" % (name, at, outcome, late))
        cur.execute("DROP TABLE cancel_rows")
    if VALUE_BYTES > 0:
        with tempfile.TemporaryDirectory() as tmp:
            big_value(cur, tmp)
        t = time.monotonic()
        cur.execute(ROUND_TRIP)
        whole = time.monotonic() - t
        print("model_out then model_in of the value, uncancelled: %.2f s" % whole)
        for frac in (0.25, 0.5, 0.75):
            def wait(th, start, frac=frac):
                time.sleep(frac * whole)
            outcome, at, late = run_cancelled(cur, ocur, pid, ROUND_TRIP, wait)
            print("text round trip    cancel sent %6.2f s after start: %s %.3f s later"
                  % (at, outcome, late))
        cur.execute("DROP TABLE cancel_big")


if __name__ == "__main__":
    main()
