"""The driver of bench/shards: a fit's ingest over postgres_fdw shards against a local table.
Run by bench/shards inside its throwaway cluster (the coordinator).
"""

import argparse
import io
import json
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "tests"))
import _bench as B  # noqa: E402
import _clusters  # noqa: E402

ap = argparse.ArgumentParser()
ap.add_argument("--users", type=int, default=100_000)
ap.add_argument("--items", type=int, default=20_000)
ap.add_argument("--rows", type=int, default=1_000_000)
ap.add_argument("--reps", type=int, default=3)
ap.add_argument("--json")
args = ap.parse_args()

DB = os.environ.get("PGDATABASE", "affinity_bench")
FIT = ("SELECT affinity.describe(affinity.fit(user_id, item_id, weight, "
       "'{\"iterations\": 1, \"factors\": 1, \"threads\": 1}'))->>'%s' FROM %s")
PATHS = [("local table", "purchases_local", None),
         ("shards, fetch_size 100 (default)", "purchases_sharded", {"fetch_size": "100", "async_capable": "false"}),
         ("shards, fetch_size 10000", "purchases_sharded", {"fetch_size": "10000", "async_capable": "false"}),
         ("shards, fetch_size 10000, async", "purchases_sharded", {"fetch_size": "10000", "async_capable": "true"})]


def make_shards(conn):
    half = args.users // 2
    shards = []
    for k, (lo, hi) in enumerate([(1, half + 1), (half + 1, args.users + 1)]):
        cl = _clusters.Cluster("shard%d" % (k + 1)).initdb()
        cl.start()
        c0 = cl.connect()
        B.query(c0, "CREATE DATABASE %s" % DB)
        c0.close()
        sc = cl.connect(DB)
        B.query(sc, "CREATE TABLE purchases (user_id bigint NOT NULL, item_id bigint NOT NULL, "
                    "weight real NOT NULL)")
        buf = io.StringIO()
        with conn.cursor() as cur:
            cur.copy_expert("COPY (SELECT * FROM purchases_local WHERE user_id >= %d AND user_id < %d) "
                            "TO STDOUT" % (lo, hi), buf)
        buf.seek(0)
        with sc.cursor() as cur:
            cur.copy_expert("COPY purchases FROM STDIN", buf)
        B.query(sc, "VACUUM (FREEZE, ANALYZE) purchases")
        n = B.one(sc, "SELECT count(*) FROM purchases")
        B.log("  shard %d (port %d): customers %d to %d, %d rows" % (k + 1, cl.port, lo, hi - 1, n))
        B.query(conn, "CREATE SERVER shard%d FOREIGN DATA WRAPPER postgres_fdw "
                      "OPTIONS (host %%s, port %%s, dbname %%s)" % (k + 1), (cl.sock, str(cl.port), DB))
        B.query(conn, "CREATE USER MAPPING FOR CURRENT_USER SERVER shard%d OPTIONS (user 'postgres')"
                % (k + 1))
        B.query(conn, "CREATE FOREIGN TABLE purchases_shard%d PARTITION OF purchases_sharded "
                      "FOR VALUES FROM (%d) TO (%d) SERVER shard%d OPTIONS (table_name 'purchases')"
                % (k + 1, lo, hi, k + 1))
        shards.append((cl, sc))
    return shards


def set_options(conn, opts):
    for k in (1, 2):
        for name, value in opts.items():
            exists = B.one(conn, "SELECT count(*) FROM pg_foreign_server s, unnest(s.srvoptions) o "
                                 "WHERE s.srvname = %s AND o LIKE %s", ("shard%d" % k, name + "=%"))
            B.query(conn, "ALTER SERVER shard%d OPTIONS (%s %s '%s')"
                    % (k, "SET" if exists else "ADD", name, value))


def main():
    res = {"args": vars(args)}
    conn = B.connect()
    res["machine"] = m = B.machine(conn)
    B.log("== machine: %s CPUs (%s), %s; load %s"
          % (m["nproc"], m["cpu"], m["postgres"].split(",")[0], B.loadavg()))
    B.log("== checkout %s (%s)" % (m["git"]["head"], m["git"]["subject"]))
    res["data"] = B.generate("purchases_local", args.rows, args.users, args.items)
    B.query(conn, "CREATE EXTENSION IF NOT EXISTS postgres_fdw")
    B.query(conn, "CREATE TABLE purchases_sharded (user_id bigint NOT NULL, item_id bigint NOT NULL, "
                  "weight real NOT NULL) PARTITION BY RANGE (user_id)")
    shards = make_shards(conn)
    B.query(conn, "SET max_parallel_workers_per_gather = 0")
    fps = {}
    for label, table, opts in PATHS:
        if opts:
            set_options(conn, opts)
        fps[label] = B.one(conn, FIT % ("fingerprint", table))
    B.log("  fingerprints: %s" % json.dumps(fps))
    res["same_model"] = len(set(fps.values())) == 1
    figures = {label: {"scan": [], "fit": [], "ingest": []} for label, _t, _o in PATHS}
    for rep in range(args.reps):
        order = PATHS if rep % 2 == 0 else PATHS[::-1]
        for label, table, opts in order:
            if opts:
                set_options(conn, opts)
            s, _r = B.timed(conn, "SELECT count(*), sum(weight) FROM %s" % table)
            f, rows = B.timed(conn, FIT % ("fit_seconds", table))
            figures[label]["scan"].append(s)
            figures[label]["fit"].append(f)
            figures[label]["ingest"].append(f - float(rows[0][0]))
        B.log("  repetition %d done (load %s)" % (rep + 1, B.loadavg()))
    base = B.median(figures["local table"]["ingest"])
    res["paths"] = {}
    B.log("-- medians of %d repetitions (serial plans)" % args.reps)
    for label, _t, _o in PATHS:
        f = figures[label]
        row = {"scan_s": B.median(f["scan"]), "fit_s": B.median(f["fit"]),
               "ingest_s": B.median(f["ingest"]), "ingest_vs_local": B.median(f["ingest"]) / base,
               "all": f}
        res["paths"][label] = row
        B.log("  %-34s count+sum %.3f s, fit statement %.3f s, ingest %.3f s = %.2fx local"
              % (label, row["scan_s"], row["fit_s"], row["ingest_s"], row["ingest_vs_local"]))
    res["load_end"] = B.loadavg()
    for cl, sc in shards:
        sc.close()
        cl.remove()
    if args.json:
        B.write_json(args.json, res)


main()
