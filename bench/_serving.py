"""The driver of bench/serving: per-call latency of top_items, the plain-SQL equivalent, and the
batch function's throughput. Run by bench/serving inside its throwaway cluster.
"""

import argparse
import json
import os
import subprocess
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _bench as B  # noqa: E402

ap = argparse.ArgumentParser()
ap.add_argument("--users", type=int, default=200_000)
ap.add_argument("--items", type=int, default=50_000)
ap.add_argument("--rows", type=int, default=2_000_000)
ap.add_argument("--factors", type=int, default=64)
ap.add_argument("--calls", type=int, default=3000, help="top_items calls timed by pgbench")
ap.add_argument("--sql-users", type=int, default=5, help="users ranked by the plain SQL query")
ap.add_argument("--batch-users", type=int, default=20000)
ap.add_argument("--no-profile", action="store_true")
ap.add_argument("--json")
args = ap.parse_args()


def pct(xs, p):
    xs = sorted(xs)
    if not xs:
        return float("nan")
    i = min(len(xs) - 1, max(0, int(round(p / 100.0 * (len(xs) - 1)))))
    return xs[i]


def pgbench(script_text, calls, tag):
    """Per-transaction latencies (ms) of `calls` runs of a one-statement script, one client."""
    script = os.path.join(B.WORK, "%s.sql" % tag)
    with open(script, "w") as fh:
        fh.write(script_text)
    # warm-up, not logged: the model is read into the backend's cache by a first call, but
    # every pgbench run is a new connection, so the timed run warms up itself (see below)
    prefix = os.path.join(B.WORK, "pgb_" + tag)
    r = subprocess.run(["pgbench", "-n", "-c", "1", "-t", str(calls), "-f", script,
                        "--log", "--log-prefix=" + prefix], capture_output=True, text=True)
    if r.returncode != 0:
        sys.exit("pgbench failed:\n" + r.stdout + r.stderr)
    lat = []
    for name in os.listdir(B.WORK):
        if name.startswith("pgb_" + tag + "."):
            with open(os.path.join(B.WORK, name)) as fh:
                for line in fh:
                    f = line.split()
                    lat.append(int(f[2]) / 1000.0)
            os.unlink(os.path.join(B.WORK, name))
    first = lat[0] if lat else float("nan")
    warm = lat[10:]       # the first calls of the connection load the model; the rest are warm
    out = {"calls": len(lat), "first_call_ms": first, "warm_calls": len(warm),
           "p50_ms": pct(warm, 50), "p90_ms": pct(warm, 90), "p99_ms": pct(warm, 99),
           "mean_ms": sum(warm) / len(warm) if warm else float("nan"), "max_ms": max(warm)}
    B.log("  %s: %d calls; first call %.2f ms; warm p50 %.3f ms, p90 %.3f ms, p99 %.3f ms, "
          "mean %.3f ms" % (tag, out["calls"], first, out["p50_ms"], out["p90_ms"],
                            out["p99_ms"], out["mean_ms"]))
    return out


PLAIN_SQL = """
SELECT iv.item_id, sum(t.a::float8 * t.b::float8) AS score
FROM serving_item_vectors iv,
     (SELECT affinity.user_vector(model, %(u)s) AS v FROM serving_model) u,
     unnest(iv.vector, u.v) AS t(a, b)
WHERE iv.item_id NOT IN (SELECT item_id FROM purchases_serving WHERE user_id = %(u)s)
GROUP BY iv.item_id
ORDER BY score DESC, iv.item_id
LIMIT 10
"""

TOP_SQL = """
SELECT r.item_id FROM serving_model m, affinity.top_items(m.model, %(u)s, 10) r ORDER BY r.rank
"""


def main():
    res = {"args": vars(args)}
    conn = B.connect()
    res["machine"] = m = B.machine(conn)
    B.log("== machine: %s CPUs (%s), %s; OpenBLAS core %s"
          % (m["nproc"], m["cpu"], m["postgres"].split(",")[0], m["blas_core"]))
    B.log("== checkout %s (%s)%s; library measured: %s"
          % (m["git"]["head"], m["git"]["subject"],
             "; uncommitted in src: " + ", ".join(m["git"]["uncommitted_in_src"])
             if m["git"]["uncommitted_in_src"] else "", json.dumps(m["library"])))
    B.log("== sgemm reference (OpenBLAS, square 2048)")
    rates = res["sgemm"] = B.sgemm_rates()

    B.log("== the model: %d users, %d items, %d factors" % (args.users, args.items, args.factors))
    res["data"] = B.generate("purchases_serving", args.rows, args.users, args.items)
    B.query(conn, "CREATE INDEX ON purchases_serving (user_id)")
    secs, _r = B.timed(conn, "CREATE TABLE serving_model AS SELECT affinity.fit(user_id, item_id, "
                             "weight, %s::jsonb) AS model FROM purchases_serving",
                       (json.dumps({"factors": args.factors, "iterations": 2, "threads": 2}),))
    d = B.one(conn, "SELECT affinity.describe(model) FROM serving_model")
    res["model"] = {"fit_statement_seconds": secs, "users": d["users"], "items": d["items"],
                    "factors": d["options"]["factors"], "size_bytes": d["size_bytes"],
                    "interactions": d["interactions"]}
    B.log("  fitted (2 sweeps) and stored in %.1f s: %d users, %d items, %.0f MB"
          % (secs, d["users"], d["items"], d["size_bytes"] / 1e6))
    n_items, f = d["items"], d["options"]["factors"]

    B.log("-- top_items per call (pgbench, one connection, random users)")
    top_script = ("\\set u random(1, %d)\n"
                  "SELECT r.item_id, r.score, r.rank FROM serving_model m, "
                  "affinity.top_items(m.model, :u, 10) r;\n" % args.users)
    res["baseline_select1"] = pgbench("SELECT 1;\n", args.calls, "select1")
    res["top_items"] = pgbench(top_script, args.calls, "top_items")
    res["score"] = pgbench("\\set u random(1, %d)\n\\set i random(1, %d)\n"
                           "SELECT affinity.score(m.model, :u, :i) FROM serving_model m;\n"
                           % (args.users, args.items), args.calls, "score")
    # a fresh session pays for reading the model once
    fresh = []
    for _ in range(3):
        c = B.connect()
        s1, _r = B.timed(c, TOP_SQL, {"u": 1})
        s2, _r = B.timed(c, TOP_SQL, {"u": 2})
        fresh.append((s1, s2))
        c.close()
    res["fresh_session"] = {"first_ms": B.median([a for a, _b in fresh]) * 1e3,
                            "second_ms": B.median([b for _a, b in fresh]) * 1e3}
    B.log("  fresh session: first call %.1f ms (reads the model into the backend's cache), "
          "second %.2f ms" % (res["fresh_session"]["first_ms"], res["fresh_session"]["second_ms"]))
    # many users in one query: the model is read once per query
    s, _r = B.timed(conn, "SELECT count(*) FROM serving_model m, generate_series(1, 10000) u, "
                          "affinity.top_items(m.model, u, 10) r")
    res["lateral_10000_users_ms_per_user"] = s / 10000 * 1e3
    B.log("  10,000 users in one LATERAL query: %.3f ms per user" % (s / 10))

    B.log("-- the same top 10 in plain SQL over exported vectors")
    B.timed(conn, "CREATE TABLE serving_item_vectors AS SELECT * FROM affinity.item_vectors("
                  "(SELECT model FROM serving_model))")
    B.query(conn, "ANALYZE serving_item_vectors")
    users = [1 + (k * 39989) % args.users for k in range(args.sql_users)]
    sql_times, agree = [], []
    for u in users:
        s, rows = B.timed(conn, PLAIN_SQL, {"u": u})
        _s, top = B.timed(conn, TOP_SQL, {"u": u})
        sql_times.append(s)
        a = [x[0] for x in rows]
        b = [x[0] for x in top]
        agree.append(len(set(a) & set(b)))
        B.log("  user %d: plain SQL %.1f ms; same items as top_items: %d of 10"
              % (u, s * 1e3, agree[-1]))
    res["plain_sql"] = {"users": users, "seconds": sql_times, "median_ms": B.median(sql_times) * 1e3,
                        "agreement": agree}
    res["plain_sql_ratio"] = res["plain_sql"]["median_ms"] / res["top_items"]["p50_ms"]
    B.log("  plain SQL median %.1f ms per user = %.0fx top_items p50"
          % (res["plain_sql"]["median_ms"], res["plain_sql_ratio"]))

    B.log("-- top_items_for_all")
    exists = B.one(conn, "SELECT count(*) FROM pg_proc WHERE proname = 'top_items_for_all' "
                         "AND pronamespace = 'affinity'::regnamespace")
    if not exists:
        B.log("  affinity.top_items_for_all does not exist in this build: skipped")
        res["batch"] = None
    else:
        res["batch"] = []
        ids = B.one(conn, "SELECT array_agg(user_id ORDER BY user_id) FROM (SELECT DISTINCT "
                          "user_id FROM purchases_serving ORDER BY user_id LIMIT %s) s",
                    (args.batch_users,))
        runs = [(len(ids), 2, ids), (len(ids), 1, ids)]
        for n, threads, arr in runs:
            B.query(conn, "SET affinity.threads = %d" % threads)
            s, r = B.timed(conn, "SELECT count(*) FROM serving_model m, "
                                 "affinity.top_items_for_all(m.model, 10, true, %s) r", (arr,))
            g = 2.0 * n * n_items * f / s / 1e9
            sg = B.rate_of(rates, "sgemm", threads)
            res["batch"].append({"users": n, "threads": threads, "seconds": s, "rows": r[0][0],
                                 "users_per_s": n / s, "gflops": g, "sgemm_gflops": sg,
                                 "share_of_sgemm": g / sg if sg else None})
            B.log("  %d users, threads %d: %.2f s, %.0f users/s, %.1f GFLOP/s (scores only: "
                  "2 x users x items x factors) = %.0f%% of sgemm at %d threads"
                  % (n, threads, s, n / s, g, 100 * g / sg if sg else 0, threads))
        B.query(conn, "RESET affinity.threads")
        per_user = res["batch"][0]["seconds"] / res["batch"][0]["users"]
        if per_user * d["users"] < 240:
            s, r = B.timed(conn, "SELECT count(*) FROM serving_model m, "
                                 "affinity.top_items_for_all(m.model, 10, true) r")
            g = 2.0 * d["users"] * n_items * f / s / 1e9
            sg = B.rate_of(rates, "sgemm", 2)
            res["batch"].append({"users": d["users"], "threads": 2, "seconds": s,
                                 "rows": r[0][0], "users_per_s": d["users"] / s, "gflops": g,
                                 "sgemm_gflops": sg, "share_of_sgemm": g / sg if sg else None})
            B.log("  all %d users, threads 2: %.1f s, %.0f users/s, %.1f GFLOP/s = %.0f%% of sgemm"
                  % (d["users"], s, d["users"] / s, g, 100 * g / sg if sg else 0))
        if not args.no_profile:
            pid = B.one(conn, "SELECT pg_backend_pid()")
            p = B.Perf(pid, os.path.join(B.WORK, "perf_batch.data"))
            B.timed(conn, "SELECT count(*) FROM serving_model m, "
                          "affinity.top_items_for_all(m.model, 10, true, %s) r", (ids,))
            if p.stop():
                top, lines = p.report((m["library"] or {}).get("copy"), 1.0)
                res["batch_profile"] = {"functions": top, "lines": lines}
                B.log("  profile of top_items_for_all (%d users, 2 threads):" % len(ids))
                for ln in top[:12]:
                    B.log("    " + ln)
                B.log("  by source line inside affinity:")
                for ln in lines[:8]:
                    B.log("    " + ln)

    res["machine"]["loadavg_end"] = B.loadavg()
    B.log("== load average at the start %s, at the end %s"
          % (res["machine"]["loadavg_start"], res["machine"]["loadavg_end"]))
    B.log("\n== summary")
    t = res["top_items"]
    B.log("top_items warm p50 %.3f ms (p90 %.3f, p99 %.3f); target < 3 ms: %s"
          % (t["p50_ms"], t["p90_ms"], t["p99_ms"], "met" if t["p50_ms"] < 3 else "not met"))
    B.log("plain SQL / top_items p50 = %.0fx; target >= 100x: %s"
          % (res["plain_sql_ratio"], "met" if res["plain_sql_ratio"] >= 100 else "not met"))
    if res["batch"]:
        b = res["batch"][0]
        B.log("top_items_for_all %.1f GFLOP/s = %.0f%% of sgemm (2 threads); target >= 50%%: %s"
              % (b["gflops"], 100 * b["share_of_sgemm"],
                 "met" if b["share_of_sgemm"] >= 0.5 else "not met"))
    B.write_json(args.json, res)


if __name__ == "__main__":
    main()
