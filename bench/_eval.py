"""bench/eval driver: the README's held-out evaluation and option grid, timed as the README
writes them and against the same work on saved models, side by side in one run.

Each form of each statement runs under EXPLAIN (ANALYZE, BUFFERS, TIMING OFF), timed on the
client; the top plan node's "Temp Read Blocks" (cumulative over the whole plan, subplans and
CTEs included) times the block size gives the temporary bytes read. The forms:

  join        the statement as the README wrote it up to version 1.2: the fitted models joined
              with the held-out rows (FROM models m, held-out t GROUP BY ...)
  subquery    the statement as the README writes it now: one correlated subquery per model over
              the held-out rows, so the model is a parameter of the subplan, passed by reference
  saved       the models fitted into a table first (CREATE TABLE AS), then the join over that
              table (a TOAST pointer per row, a few bytes); its time is the sum of both steps

The subquery and saved forms are checked to give the same metrics (jsonb equality; the fits are
deterministic). The grid runs twice: at default settings, and with parallel query off (which the
README advises for fits of plain tables), where the planner puts the models on the inner side.
A statement of the join form that passes --timeout seconds is cancelled and reported as such.

Data: the open Online Retail data when present (tests/online_retail.sql's cleaning), its last
days held out; otherwise invented purchases of a similar size (bench/gen_purchases.sql). Both are
shown to the statements as demo.purchases(customer_id, product_id, quantity, bought_at) with the
split at DATE '2025-12-01', so the README's text runs unchanged.
"""

import argparse
import json
import os
import sys
import time

import psycopg2

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _bench as B  # noqa: E402

sys.path.insert(0, os.path.join(B.REPO_DIR, "tests"))

ap = argparse.ArgumentParser()
ap.add_argument("--json")
ap.add_argument("--timeout", type=int, default=120,
                help="seconds before a join-form statement is cancelled (default 120)")
ap.add_argument("--repeat", type=int, default=3,
                help="runs of the subquery and saved forms; the median is reported (default 3)")
ap.add_argument("--split", default="2011-09-26",
                help="first held-out day of the open data (default 2011-09-26)")
ap.add_argument("--invented", action="store_true", help="use invented data even if the open data is there")
args = ap.parse_args()

SPLIT = "DATE '2025-12-01'"

# The fit of each method, as one branch of the README's models CTE.
FITS = {
    "implicit_als": "affinity.fit(customer_id, product_id, quantity::real)",
    "popularity": "affinity.fit(customer_id, product_id, quantity::real, '{\"method\": \"popularity\"}')",
    "ease": "affinity.fit(customer_id, product_id, quantity::real, '{\"method\": \"ease\"}')",
    "item_knn": "affinity.fit(customer_id, product_id, quantity::real, '{\"method\": \"item_knn\"}')",
}


def models_cte(methods):
    return "\n       UNION ALL\n       ".join(
        "SELECT '%s' AS method, %s AS model FROM train" % (m, FITS[m]) for m in methods)


def eval_statements(methods):
    """The README's evaluation over the given methods: (join, subquery, saved fit, saved eval)."""
    head = ("WITH train AS (SELECT * FROM demo.purchases WHERE bought_at <  %s),\n" % SPLIT)
    join = (head +
              "     test  AS (SELECT * FROM demo.purchases WHERE bought_at >= %s),\n"
              "     models AS (\n       %s)\n"
              "SELECT m.method, affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10) AS metrics\n"
              "FROM models m, test t GROUP BY m.method" % (SPLIT, models_cte(methods)))
    subquery = (head +
                "     models AS (\n       %s)\n"
                "SELECT m.method,\n"
                "       (SELECT affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10)\n"
                "          FROM demo.purchases t WHERE t.bought_at >= %s) AS metrics\n"
                "FROM models m" % (models_cte(methods), SPLIT))
    saved_fit = ("CREATE TABLE bench_saved AS\n" + head +
                 "     models AS (\n       %s)\nSELECT method, model FROM models" % models_cte(methods))
    saved_eval = ("SELECT m.method, affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10) AS metrics\n"
                  "FROM bench_saved m, demo.purchases t WHERE t.bought_at >= %s GROUP BY m.method" % SPLIT)
    return join, subquery, saved_fit, saved_eval


GRID_MODELS = """WITH grid AS (SELECT * FROM (VALUES (32, 10.0), (64, 30.0), (64, 100.0)) g(factors, lambda)),
     models AS (
       SELECT g.factors, g.lambda,
              affinity.fit(p.customer_id, p.product_id, p.quantity::real,
                           jsonb_build_object('factors', g.factors, 'regularization', g.lambda)) AS model
       FROM demo.purchases p CROSS JOIN grid g
       WHERE p.bought_at < DATE '2025-12-01'
       GROUP BY g.factors, g.lambda)
"""


def grid_statements():
    join = (GRID_MODELS +
              "SELECT m.factors, m.lambda,\n"
              "       affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10)->'recall' AS recall_at_10\n"
              "FROM models m, demo.purchases t\n"
              "WHERE t.bought_at >= DATE '2025-12-01'\n"
              "GROUP BY m.factors, m.lambda ORDER BY recall_at_10 DESC")
    subquery = (GRID_MODELS +
                "SELECT m.factors, m.lambda,\n"
                "       (SELECT affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10)\n"
                "          FROM demo.purchases t WHERE t.bought_at >= DATE '2025-12-01')->'recall' AS recall_at_10\n"
                "FROM models m ORDER BY recall_at_10 DESC")
    saved_fit = "CREATE TABLE bench_saved AS\n" + GRID_MODELS + "SELECT factors, lambda, model FROM models"
    saved_eval = ("SELECT m.factors, m.lambda,\n"
                  "       affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 10)->'recall' AS recall_at_10\n"
                  "FROM bench_saved m, demo.purchases t\n"
                  "WHERE t.bought_at >= DATE '2025-12-01'\n"
                  "GROUP BY m.factors, m.lambda ORDER BY recall_at_10 DESC")
    return join, subquery, saved_fit, saved_eval


def explain(conn, sql, timeout=None):
    """(seconds, temp bytes read) of sql under EXPLAIN ANALYZE; (None, None) when cancelled."""
    with conn.cursor() as cur:
        cur.execute("SET statement_timeout = %d" % (1000 * timeout if timeout else 0))
        t0 = time.perf_counter()
        try:
            cur.execute("EXPLAIN (ANALYZE, BUFFERS, TIMING OFF, FORMAT JSON) " + sql)
        except psycopg2.errors.QueryCanceled:
            return None, None
        finally:
            seconds = time.perf_counter() - t0
        plan = cur.fetchone()[0][0]["Plan"]
        cur.execute("SET statement_timeout = 0")
    return seconds, int(plan.get("Temp Read Blocks", 0)) * 8192


def run_case(conn, name, stmts, setting=None):
    """Time the forms of one statement; setting (a SET command) applies to every form."""
    join, subquery, saved_fit, saved_eval = stmts
    res = {"name": name, "setting": setting,
           "statements": {"join": join, "subquery": subquery,
                          "saved_fit": saved_fit, "saved_eval": saved_eval}}
    if setting:
        B.query(conn, setting)
    runs = {"subquery": [], "saved": [], "saved_fit": [], "saved_eval": []}
    temp = {}
    for _ in range(args.repeat):
        B.query(conn, "DROP TABLE IF EXISTS bench_saved")
        s1, t1 = explain(conn, saved_fit)      # EXPLAIN ANALYZE runs it: the table stays
        s2, t2 = explain(conn, saved_eval)
        runs["saved_fit"].append(s1)
        runs["saved_eval"].append(s2)
        runs["saved"].append(s1 + s2)
        temp["saved"] = t1 + t2
        s, t = explain(conn, subquery)
        runs["subquery"].append(s)
        temp["subquery"] = t
    res["seconds"] = {k: B.median(v) for k, v in runs.items()}
    res["runs"] = runs
    # the same metrics, exactly (the saved models are those of the last run; fits are deterministic)
    a = B.query(conn, "SELECT * FROM (%s) s ORDER BY 1, 2" % subquery)
    b = B.query(conn, "SELECT * FROM (%s) s ORDER BY 1, 2" % saved_eval)
    res["same_metrics"] = a == b
    res["metrics"] = [list(map(lambda x: x if isinstance(x, (int, float, str, dict)) else str(x), r)) for r in a]
    s, t = explain(conn, join, args.timeout)
    res["seconds"]["join"] = s
    temp["join"] = t
    res["temp_read_bytes"] = temp
    B.query(conn, "DROP TABLE IF EXISTS bench_saved")
    if setting:
        B.query(conn, "RESET ALL")
    sec = res["seconds"]
    B.log("  %s: subquery %.2f s, saved %.2f s (fit %.2f + eval %.2f): ratio %.2fx; same metrics: %s"
          % (name, sec["subquery"], sec["saved"], sec["saved_fit"], sec["saved_eval"],
             sec["subquery"] / sec["saved"], res["same_metrics"]))
    if sec["join"] is None:
        B.log("  %s: join form cancelled after %d s" % (name, args.timeout))
    else:
        B.log("  %s: join form %.2f s: ratio %.2fx to saved, temp read %.1f MB"
              % (name, sec["join"], sec["join"] / sec["saved"], temp["join"] / 1e6))
    B.log("  %s: temp read subquery %.1f MB, saved %.1f MB"
          % (name, temp["subquery"] / 1e6, temp["saved"] / 1e6))
    return res


def load_data(conn):
    import _common
    have = False
    if not args.invented:
        try:
            _common.online_retail_path()
            have = True
        except SystemExit:
            have = False
    B.query(conn, "DROP SCHEMA IF EXISTS demo CASCADE")
    B.query(conn, "CREATE SCHEMA demo")
    if have:
        B.query(conn, "DROP TABLE IF EXISTS raw, purchases, products, lines")
        B.query(conn, "DROP FUNCTION IF EXISTS retail_weights(timestamp, text)")
        with conn.cursor() as cur:
            _common.clean_online_retail(cur)
        B.query(conn, "CREATE TABLE demo.purchases AS SELECT user_id AS customer_id, item_id AS product_id, "
                      "quantity, bought_at::date + (DATE '2025-12-01' - %s::date) AS bought_at FROM lines",
                (args.split,))
        src = "Online Retail (open data), held out from %s" % args.split
    else:
        B.generate("bench_eval_lines", 265000, 3600, 3500)
        # a day out of 1,000 per line, from the line's ids alone; the last 30 (3%, about the
        # open data's share) from 2025-12-01 on are held out
        B.query(conn, "CREATE TABLE demo.purchases AS SELECT user_id AS customer_id, item_id AS product_id, "
                      "greatest(1, weight::int) AS quantity, DATE '2025-12-01' - 970 + "
                      "(abs(hashint8extended(user_id * 1000003 + item_id, 7)) % 1000)::int AS bought_at "
                      "FROM bench_eval_lines")
        src = "invented (bench/gen_purchases.sql: 265,000 lines, 3,600 customers, 3,500 products)"
    B.query(conn, "ANALYZE demo.purchases")
    r = B.query(conn, "SELECT count(*) FILTER (WHERE bought_at < DATE '2025-12-01'), "
                      "count(*) FILTER (WHERE bought_at >= DATE '2025-12-01'), "
                      "count(DISTINCT customer_id), count(DISTINCT product_id) FROM demo.purchases")[0]
    return {"source": src, "train_rows": r[0], "held_out_rows": r[1], "customers": r[2], "products": r[3]}


def main():
    res = {"args": vars(args)}
    conn = B.connect()
    res["machine"] = m = B.machine(conn)
    B.log("== machine: %s CPUs (%s), %s; OpenBLAS core %s; load %s"
          % (m["nproc"], m["cpu"], m["postgres"].split(",")[0], m["blas_core"], m["loadavg_start"]))
    B.log("== checkout %s (%s)%s" % (m["git"]["head"], m["git"]["subject"],
                                     "; uncommitted in src: " + ", ".join(m["git"]["uncommitted_in_src"])
                                     if m["git"]["uncommitted_in_src"] else ""))
    res["settings"] = {k: B.one(conn, "SHOW " + k) for k in ("work_mem", "max_parallel_workers_per_gather",
                                                             "shared_buffers", "affinity.threads")}
    B.log("== settings: %s" % json.dumps(res["settings"]))
    res["data"] = d = load_data(conn)
    B.log("== data: %s; %d training lines, %d held-out lines, %d customers, %d products"
          % (d["source"], d["train_rows"], d["held_out_rows"], d["customers"], d["products"]))
    sizes = [(k, B.one(conn, "SELECT pg_column_size(%s) FROM demo.purchases WHERE bought_at < %s"
                          % (FITS[k], SPLIT))) for k in ("implicit_als", "ease", "item_knn", "popularity")]
    res["model_bytes"] = dict(sizes)
    B.log("== model sizes (bytes): %s" % json.dumps(res["model_bytes"]))
    res["cases"] = []
    B.log("== the README's evaluation: implicit_als against popularity")
    res["cases"].append(run_case(conn, "evaluation", eval_statements(["implicit_als", "popularity"])))
    B.log("== the same with ease and item_knn added")
    res["cases"].append(run_case(conn, "evaluation, four methods",
                                 eval_statements(["implicit_als", "popularity", "ease", "item_knn"])))
    B.log("== the README's grid: three implicit_als points")
    res["cases"].append(run_case(conn, "grid", grid_statements()))
    B.log("== the grid with parallel query off (the README's advice for fits of plain tables)")
    res["cases"].append(run_case(conn, "grid, parallel query off", grid_statements(),
                                 "SET max_parallel_workers_per_gather = 0"))
    res["machine"]["loadavg_end"] = B.loadavg()
    B.log("== load average: %s at the start, %s at the end" % (m["loadavg_start"], m["loadavg_end"]))
    B.write_json(args.json, res)


if __name__ == "__main__":
    main()
