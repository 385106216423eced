#!/usr/bin/python3
"""Driver of bench/sequences: fit_sequences throughput against a plain scan (see bench/sequences)."""

import argparse
import os
import statistics
import time

import psycopg2


def timed(cur, sql):
    t0 = time.perf_counter()
    cur.execute(sql)
    row = cur.fetchone()
    return time.perf_counter() - t0, row


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--events", type=int, default=1000000)
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args()
    conn = psycopg2.connect("")
    conn.autocommit = True
    cur = conn.cursor()
    cur.execute("SET max_parallel_workers_per_gather = 0")
    cur.execute("SET work_mem = '256MB'")
    # visits of 1..19 views; item = floor(20000 * u^3): a skewed popularity
    cur.execute("""
        CREATE TABLE views AS
        SELECT v AS visit, (floor(20000 * power(random(), 3)))::bigint AS sku,
               timestamptz '2025-01-01' + (v * 60 + s) * interval '1 second' AS viewed_at
          FROM generate_series(1, %d) v, generate_series(1, 1 + (v %% 19)) s
         LIMIT %d""" % (a.events // 10 + 1, a.events))
    cur.execute("ALTER TABLE views ADD COLUMN visit_text text, ADD COLUMN sku_text text")
    cur.execute("UPDATE views SET visit_text = 'visit-' || visit, sku_text = 'FH-' || sku")
    cur.execute("VACUUM ANALYZE views")
    cur.execute("SELECT count(*), count(DISTINCT visit), count(DISTINCT sku) FROM views")
    n, visits, items = cur.fetchone()
    print("events %d, visits %d, items %d; load average %s" % (n, visits, items, os.getloadavg()))
    stmts = {
        "scan": "SELECT count(*), max(viewed_at) FROM views",
        "bigint keys": "SELECT affinity.describe(affinity.fit_sequences(visit, sku, viewed_at))->>'fit_seconds' FROM views",
        "text keys": "SELECT affinity.describe(affinity.fit_sequences(visit_text, sku_text, viewed_at))->>'fit_seconds' FROM views",
    }
    secs = {k: [] for k in stmts}
    build = {k: [] for k in stmts}
    for _ in range(a.repeats):
        for k, sql in stmts.items():
            s, row = timed(cur, sql)
            secs[k].append(s)
            if k != "scan":
                build[k].append(float(row[0]))
    scan = statistics.median(secs["scan"])
    print("%-12s %9s %12s %10s %9s" % ("statement", "seconds", "events/s", "vs scan", "build s"))
    for k in stmts:
        m = statistics.median(secs[k])
        print("%-12s %9.3f %12.0f %10.1f %9s" % (
            k, m, n / m, m / scan, "%.3f" % statistics.median(build[k]) if build[k] else "-"))
    print("medians of %d alternating repetitions; load average after: %s" % (a.repeats, os.getloadavg()))


if __name__ == "__main__":
    main()
