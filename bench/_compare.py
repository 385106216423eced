"""The driver of bench/compare: the same figures from two builds, old and new interleaved.

Run by bench/compare, which starts one throwaway cluster per build and exports AFF_OLD_HOST,
AFF_OLD_PORT, AFF_NEW_HOST, AFF_NEW_PORT (and PGDATABASE). Every figure is measured on both
builds one right after the other, the order alternating between repetitions; the summary gives
each build's median, new/old of the medians and the range of the per-repetition ratios.
"""

import argparse
import json
import os
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _bench as B  # noqa: E402

ap = argparse.ArgumentParser()
ap.add_argument("--reps", type=int, default=5)
ap.add_argument("--rows", type=int, default=1_000_000)
ap.add_argument("--users", type=int, default=100_000)
ap.add_argument("--items", type=int, default=20_000)
ap.add_argument("--calls", type=int, default=1500, help="calls per pgbench run")
ap.add_argument("--batch-users", type=int, default=10000)
ap.add_argument("--knn-items", type=int, default=3000,
                help="ease and item_knn are fitted on the rows of items 1..N")
ap.add_argument("--only", default=None, help="comma-separated figure groups: fit,serve,batch")
ap.add_argument("--json")
args = ap.parse_args()

BUILDS = ("old", "new")
ENV = {b: {"PGHOST": os.environ["AFF_%s_HOST" % b.upper()],
           "PGPORT": os.environ["AFF_%s_PORT" % b.upper()]} for b in BUILDS}
GROUPS = set((args.only or "fit,serve,batch").split(","))


def use(build):
    """Point libpq (psycopg2, psql, pgbench) at one build's cluster."""
    os.environ.update(ENV[build])


def connect(build):
    use(build)
    return B.connect()


FIT_SQL = "SELECT affinity.describe(affinity.fit(user_id, item_id, weight, %s::jsonb)) FROM {t}"


def fit(conn, table, opts):
    secs, rows = B.timed(conn, FIT_SQL.format(t=table), (json.dumps(opts),))
    d = rows[0][0]
    sw = d["sweep_seconds"]
    return {"statement": secs, "fit_seconds": d["fit_seconds"], "sweeps": sw,
            "sweep_median": B.median(sw) if sw else None,
            "outside_final_step": secs - d["fit_seconds"],
            "build": d["fit_seconds"] - sum(sw)}


def pgbench(build, script_text, calls, tag):
    use(build)
    script = os.path.join(B.WORK, "%s_%s.sql" % (tag, build))
    with open(script, "w") as fh:
        fh.write(script_text)
    prefix = os.path.join(B.WORK, "pgb_%s_%s" % (tag, build))
    r = subprocess.run(["pgbench", "-n", "-c", "1", "-t", str(calls), "-f", script,
                        "--log", "--log-prefix=" + prefix], capture_output=True, text=True)
    if r.returncode != 0:
        sys.exit("pgbench failed:\n" + r.stdout + r.stderr)
    lat = []
    for name in os.listdir(B.WORK):
        if name.startswith(os.path.basename(prefix) + "."):
            with open(os.path.join(B.WORK, name)) as fh:
                lat.extend(int(line.split()[2]) / 1000.0 for line in fh)
            os.unlink(os.path.join(B.WORK, name))
    warm = sorted(lat[10:])

    def pct(p):
        return warm[min(len(warm) - 1, int(round(p / 100.0 * (len(warm) - 1))))]
    return {"p50": pct(50), "p95": pct(95), "p99": pct(99)}


# figure name -> {"old": [...], "new": [...]}, and how to read it
FIG = {}
UNIT = {}


def record(name, build, value, unit):
    FIG.setdefault(name, {b: [] for b in BUILDS})[build].append(value)
    UNIT[name] = unit


def setup(build, rates):
    conn = connect(build)
    info = B.one(conn, "SELECT affinity.runtime()")
    ver = B.one(conn, "SELECT extversion FROM pg_extension WHERE extname = 'affinity'")
    B.log("== %s: affinity %s, runtime %s" % (build, ver, json.dumps(info)))
    data = B.generate("purchases", args.rows, args.users, args.items)
    t0 = time.perf_counter()
    B.query(conn, "CREATE UNLOGGED TABLE purchases_text AS SELECT 'customer-' || user_id AS user_id, "
                  "'sku-' || item_id AS item_id, weight FROM purchases")
    B.query(conn, "CREATE UNLOGGED TABLE purchases_small AS SELECT * FROM purchases WHERE item_id <= %s",
            (args.knn_items,))
    for t in ("purchases_text", "purchases_small"):
        B.query(conn, "VACUUM (FREEZE, ANALYZE) %s" % t)
    B.query(conn, "CREATE INDEX ON purchases (user_id)")
    B.query(conn, "CREATE TABLE models (method text PRIMARY KEY, model affinity.model)")
    for method, table, opts in (("implicit_als", "purchases", {"factors": 64, "iterations": 2, "threads": 2}),
                                ("ease", "purchases_small", {"method": "ease"}),
                                ("item_knn", "purchases_small", {"method": "item_knn"})):
        s, _r = B.timed(conn, "INSERT INTO models SELECT %s, affinity.fit(user_id, item_id, weight, "
                              "%s::jsonb) FROM " + table, (method, json.dumps(opts)))
        d = B.one(conn, "SELECT affinity.describe(model) FROM models WHERE method = %s", (method,))
        B.log("  %s: %s users, %s items, %.1f MB, fitted and stored in %.1f s"
              % (method, d["users"], d["items"], d["size_bytes"] / 1e6, s))
    small = B.one(conn, "SELECT count(*) FROM purchases_small")
    B.log("  text copy, small copy (%d rows), index, models: %.1f s" % (small, time.perf_counter() - t0))
    conn.close()
    return {"version": ver, "runtime": info, "data": data, "small_rows": small}


def rep_fit(build, r):
    conn = connect(build)
    B.query(conn, "SET max_parallel_workers_per_gather = 0")
    for t, tag in (("purchases", "bigint"), ("purchases_text", "text")):
        s, _r = B.timed(conn, "SELECT count(*), sum(weight) FROM %s" % t)
        record("count(*), sum(weight), %s keys, serial" % tag, build, s, "s")
        f = fit(conn, t, {"iterations": 1, "factors": 1, "threads": 2})
        record("ingest, %s keys, serial" % tag, build, f["outside_final_step"], "s")
        record("ingest / count(*), %s keys, serial" % tag, build, f["outside_final_step"] / s, "x")
        record("matrix build, %s keys" % tag, build, f["build"], "s")
        if tag == "bigint":
            ingest_serial = f["outside_final_step"]
    B.query(conn, "RESET max_parallel_workers_per_gather")
    for t, tag in (("purchases", "bigint"), ("purchases_text", "text")):
        f = fit(conn, t, {"iterations": 1, "factors": 1, "threads": 2})
        record("ingest, %s keys, parallel plan" % tag, build, f["outside_final_step"], "s")
    B.query(conn, "SET max_parallel_workers_per_gather = 0")
    f = fit(conn, "purchases", {"factors": 64, "solver": "cg", "threads": 2, "iterations": 3})
    record("sweep, f=64 cg, 2 threads", build, f["sweep_median"], "s")
    record("model write (f=64 minus f=1, outside the final step)", build,
           f["outside_final_step"] - ingest_serial, "s")
    f = fit(conn, "purchases", {"factors": 64, "solver": "cg", "threads": 1, "iterations": 2})
    record("sweep, f=64 cg, 1 thread", build, f["sweep_median"], "s")
    f = fit(conn, "purchases", {"factors": 64, "solver": "cholesky", "threads": 2, "iterations": 2})
    record("sweep, f=64 cholesky, 2 threads", build, f["sweep_median"], "s")
    s, _r = B.timed(conn, "SELECT affinity.describe(affinity.forget_user(model, 1))->>'users' "
                          "FROM models WHERE method = 'implicit_als'")
    record("forget_user (read, rebuild, describe), ALS f=64", build, s, "s")
    conn.close()


TOP = ("\\set u random(1, %d)\nSELECT r.item_id FROM models m, affinity.top_items(m.model, :u, 10) r "
       "WHERE m.method = 'implicit_als';\n")
BASKET = ("\\set a random(1, %d)\n\\set b random(1, %d)\n\\set c random(1, %d)\n"
          "SELECT r.item_id FROM models m, affinity.top_items(m.model, ARRAY[:a, :b, :c]::bigint[], 10) r "
          "WHERE m.method = 'implicit_als';\n")
LIKE = ("\\set i random(1, %d)\nSELECT r.item_id FROM models m, affinity.items_like(m.model, :i::bigint, 10) r "
        "WHERE m.method = 'implicit_als';\n")


def rep_serve(build, r):
    n_i = args.items // 2        # ids every model knows (low ids are the best-sellers)
    for tag, script in (("top_items", TOP % args.users), ("basket top_items", BASKET % (n_i, n_i, n_i)),
                        ("items_like", LIKE % n_i)):
        p = pgbench(build, script, args.calls, tag.replace(" ", "_"))
        record("%s p50, warm" % tag, build, p["p50"], "ms")
        record("%s p95, warm" % tag, build, p["p95"], "ms")
    firsts = []
    for _ in range(3):
        c = connect(build)
        s, _r = B.timed(c, "SELECT r.item_id FROM models m, affinity.top_items(m.model, 1, 10) r "
                           "WHERE m.method = 'implicit_als'")
        firsts.append(s * 1e3)
        c.close()
    record("first top_items of a session (reads the model)", build, B.median(firsts), "ms")


def rep_batch(build, r, ids, rates):
    conn = connect(build)
    for method in ("implicit_als", "ease", "item_knn"):
        n_items, f = DIMS[build][method]
        for threads in (2, 1):
            B.query(conn, "SET affinity.threads = %d" % threads)
            s, _r = B.timed(conn, "SELECT count(*) FROM models m, affinity.top_items_for_all(m.model, "
                                  "10, true, %s) r WHERE m.method = %s", (ids, method))
            record("top_items_for_all %s, %d thread%s" % (method, threads, "s" if threads > 1 else ""),
                   build, len(ids) / s, "users/s")
            if method == "implicit_als":
                g = 2.0 * len(ids) * n_items * f / s / 1e9
                sg = B.rate_of(rates, "sgemm", threads)
                record("top_items_for_all ALS GFLOP/s share of sgemm, %d thread%s"
                       % (threads, "s" if threads > 1 else ""), build, g / sg, "share")
    B.query(conn, "RESET affinity.threads")
    conn.close()


DIMS = {}


def main():
    res = {"args": vars(args), "loadavg_start": B.loadavg(), "cpu": B.cpu_model(),
           "nproc": os.cpu_count()}
    B.log("== %d CPUs (%s); load average %s" % (res["nproc"], res["cpu"], res["loadavg_start"]))
    B.log("== sgemm reference (OpenBLAS, square 2048)")
    rates = B.sgemm_rates()
    res["sgemm"] = [rates]
    res["builds"] = {}
    for b in BUILDS:
        res["builds"][b] = setup(b, rates)
        conn = connect(b)
        DIMS[b] = {}
        for method in ("implicit_als", "ease", "item_knn"):
            d = B.one(conn, "SELECT affinity.describe(model) FROM models WHERE method = %s", (method,))
            DIMS[b][method] = (d["items"], d["options"].get("factors") or 0)
        ids = B.one(conn, "SELECT array_agg(user_id ORDER BY user_id) FROM (SELECT DISTINCT user_id "
                          "FROM purchases_small ORDER BY user_id LIMIT %s) s", (args.batch_users,))
        conn.close()
    res["loads"] = []
    for r in range(args.reps):
        order = BUILDS if r % 2 == 0 else BUILDS[::-1]
        t0 = time.perf_counter()
        if "fit" in GROUPS:
            for b in order:
                rep_fit(b, r)
        if "serve" in GROUPS:
            for b in order:
                rep_serve(b, r)
        if "batch" in GROUPS:
            for b in order:
                rep_batch(b, r, ids, rates)
            rates = B.sgemm_rates()
            res["sgemm"].append(rates)
        res["loads"].append(B.loadavg())
        B.log("-- repetition %d of %d (%s first): %.0f s, load average %s"
              % (r + 1, args.reps, order[0], time.perf_counter() - t0, res["loads"][-1]))

    rows = []
    res["figures"] = {}
    for name, v in FIG.items():
        o, n = B.median(v["old"]), B.median(v["new"])
        per = sorted(b / a for a, b in zip(v["old"], v["new"]) if a)
        q1, q3 = (per[len(per) // 4], per[(3 * len(per)) // 4]) if per else (float("nan"),) * 2
        res["figures"][name] = {"unit": UNIT[name], "old": v["old"], "new": v["new"],
                                "ratio_of_medians": n / o if o else None,
                                "median_per_rep_ratio": B.median(per), "per_rep_ratios": per}
        fmt = "%.3f" if UNIT[name] in ("s", "ms", "x", "share") else "%.0f"
        rows.append([name, UNIT[name], fmt % o, fmt % n, "%.3f" % (n / o if o else float("nan")),
                     "%.3f" % B.median(per), "%.2f-%.2f" % (q1, q3),
                     "%.2f-%.2f" % (per[0], per[-1]) if per else "-"])
    res["loadavg_end"] = B.loadavg()
    B.log("\n== old %s, new %s; %d repetitions, interleaved; load average %s at the start, %s at the end"
          % (res["builds"]["old"]["version"], res["builds"]["new"]["version"], args.reps,
             res["loadavg_start"], res["loadavg_end"]))
    B.log("OpenBLAS core: old %s, new %s"
          % (res["builds"]["old"]["runtime"].get("blas_core"), res["builds"]["new"]["runtime"].get("blas_core")))
    B.log("new/old: of the medians; per repetition (old and new measured one right after the "
          "other): median, interquartile range, whole range. Lower is better for s and ms, higher "
          "for users/s and share.")
    B.log(B.md_table(["figure", "unit", "old (median)", "new (median)", "new/old",
                      "per-rep new/old", "per-rep IQR", "per-rep range"], rows))
    B.write_json(args.json, res)


if __name__ == "__main__":
    main()
