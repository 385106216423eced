"""Cancel latency in every phase of a large fit (not a test: figures for
docs/reliability.md).

    PGHOST=... PGPORT=... python3 bench/cancel_phases.py [rows]

Builds a table of ordinary rows (default 20,000,000: 1M users, 256k items),
then runs the same implicit_als fit once per phase and sends
pg_cancel_backend from a second session when the backend's process title
(/proc/<pid>/cmdline, rewritten by set_ps_display) shows the phase: reading
rows (the title is the query's own), building the interaction matrix, the
first sweep, writing the model.  Prints the seconds from the cancel to the
error reaching the client.  The server must run on this machine.
"""

import sys
import threading
import time

import psycopg2

ROWS = int(sys.argv[1]) if len(sys.argv) > 1 else 20000000
FIT = """SELECT affinity.fit(u, i, w, '{"factors": 32, "iterations": 3}') IS NULL FROM cancel_rows"""
PHASES = [("reading rows", None, 3.0), ("matrix build", "building the interaction matrix", 0.3),
          ("sweep 1", "sweep 1 of", 0.5), ("writing the model", "writing the model", 0.0)]


def title(pid):
    try:
        with open("/proc/%d/cmdline" % pid, "rb") as f:
            return f.read().decode("utf-8", "replace")
    except OSError:
        return ""


def main():
    conn = psycopg2.connect("")
    conn.autocommit = True
    cur = conn.cursor()
    other = psycopg2.connect("")
    other.autocommit = True
    ocur = other.cursor()
    cur.execute("SET max_parallel_workers_per_gather = 0")
    t = time.monotonic()
    cur.execute("DROP TABLE IF EXISTS cancel_rows")
    cur.execute("""CREATE UNLOGGED TABLE cancel_rows AS
                   SELECT (hashint4(g) & 1048575)::bigint AS u, (hashint4(g * 7 + 1) & 262143)::bigint AS i,
                          (1 + g %% 5)::real AS w FROM generate_series(1, %d) g""" % ROWS)
    print("%d rows in %.1f s" % (ROWS, time.monotonic() - t))
    cur.execute("SELECT pg_backend_pid()")
    pid = cur.fetchone()[0]
    for name, marker, delay in PHASES:
        res = {}

        def run():
            try:
                cur.execute(FIT)
                res["outcome"] = "finished"
            except psycopg2.errors.QueryCanceled:
                res["outcome"] = "cancelled"
            res["end"] = time.monotonic()

        th = threading.Thread(target=run)
        start = time.monotonic()
        th.start()
        while th.is_alive() and marker is not None and marker not in title(pid):
            time.sleep(0.002)
        time.sleep(delay)
        sent = time.monotonic()
        ocur.execute("SELECT pg_cancel_backend(%s)", (pid,))
        th.join()
        print("%-18s cancel sent %6.2f s after start: %s %.3f s later"
              % (name, sent - start, res.get("outcome"), res["end"] - sent))
    cur.execute("DROP TABLE cancel_rows")


if __name__ == "__main__":
    main()
