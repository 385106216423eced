"""Ranking quality of every method on the open Online Retail data, written up as docs/quality.md.

Run by bench/quality (which builds, installs and starts a throwaway cluster first); this file
expects the libpq environment (PGHOST, PGPORT, PGUSER, PGDATABASE) of a database with the
extension created.

Steps:
  1. load the Online Retail CSV and clean it with tests/online_retail.sql (through
     tests/_common.py), the same SQL the Online Retail checks use;
  2. split in time: fit on purchases up to 2011-07-31, hold out each returning customer's
     purchases of August and September 2011;
  3. fit the whole grid of methods and options in one statement (a grid table CROSS JOINed with
     the training rows, GROUP BY the grid point);
  4. evaluate every model with affinity.ranking_metrics at k = 10 and 20 (one statement);
  5. per method, take the grid point with the best recall@20 and draw recall@k for k = 1..50
     from one top-50 list per held-out customer (top_items_for_all), cross-checked against
     ranking_metrics at k = 10, 20 and 50;
  6. a validation split (fit to 2011-06-30, validate on July 2011) that picks the grid points
     without looking at August-September, and the seed spread of the best implicit_als point;
  7. write docs/quality.md and docs/quality_recall.png.

Options: --out DIR (default: docs/ of the checkout), --json FILE (every figure),
         --no-validation (skip step 6's validation split).
"""

import argparse
import datetime
import json
import math
import os
import platform
import sys
import time

import psycopg2

BENCH_DIR = os.path.dirname(os.path.abspath(__file__))
REPO_DIR = os.path.dirname(BENCH_DIR)
sys.path.insert(0, os.path.join(REPO_DIR, "tests"))
import _common as C  # noqa: E402  (data lookup, loading and cleaning shared with the checks)

TRAIN_END = "2011-08-01"    # training: bought_at < this, i.e. up to 2011-07-31
TEST_END = "2011-10-01"     # held out: August and September 2011
VAL_TRAIN_END = "2011-07-01"  # validation split: fit up to 2011-06-30 ...
VAL_END = "2011-08-01"        # ... validate on July 2011
KS = (10, 20)
PICK_K = 20                 # grid points are chosen by recall at this k
CURVE_K = 50
METRICS = ("precision", "recall", "ndcg", "map", "hit_rate", "coverage")
METHODS = ("popularity", "item_knn", "ease", "implicit_als")


def grid_points():
    """(method, options) of every grid point, in report order."""
    pts = [("popularity", {"method": "popularity"})]
    for nb in (50, 200):
        for a in (1, 5):
            pts.append(("item_knn", {"method": "item_knn", "neighbors": nb, "alpha": a,
                                     "confidence": "log"}))
    for reg in (100, 500, 2000):
        pts.append(("ease", {"method": "ease", "regularization": reg}))
    for f in (32, 64, 128):
        for reg in (10, 30, 100):
            pts.append(("implicit_als", {"method": "implicit_als", "factors": f,
                                         "regularization": reg, "alpha": 5, "iterations": 15}))
    return pts


SETTING_NAMES = (("factors", "factors"), ("regularization", "lambda"), ("neighbors", "neighbors"),
                 ("alpha", "alpha"), ("confidence", "confidence"), ("iterations", "iterations"))


def settings(options):
    """The options of a grid point without the method, as a short text in a fixed order."""
    parts = ["%s %s" % (label, options[k]) for k, label in SETTING_NAMES if k in options]
    return ", ".join(parts) if parts else "no options"


def grid_edges(models, best):
    """Per method, the options of the best point that sit at the end of their grid range."""
    out = {}
    for method, b in best.items():
        pts = [r for r in models.values() if r["method"] == method]
        edges = []
        for key, label in SETTING_NAMES:
            vals = sorted({r["options"][key] for r in pts if key in r["options"]}, key=str)
            if len(vals) < 2 or not all(isinstance(v, (int, float)) for v in vals):
                continue
            vals = sorted(vals)
            v = b["options"][key]
            if v == vals[0]:
                edges.append("%s %s is the smallest value tried" % (label, v))
            elif v == vals[-1]:
                edges.append("%s %s is the largest value tried" % (label, v))
        if edges:
            out[method] = edges
    return out


def n(x):
    """An integer with thousands separators."""
    return "{:,}".format(x)


def log(msg):
    print(msg, flush=True)


class DB:
    def __init__(self):
        self.conn = psycopg2.connect("")
        self.conn.autocommit = True
        self.cur = self.conn.cursor()

    def run(self, sql, args=None):
        t0 = time.perf_counter()
        self.cur.execute(sql, args)
        rows = self.cur.fetchall() if self.cur.description else None
        return rows, time.perf_counter() - t0

    def rows(self, sql, args=None):
        return self.run(sql, args)[0]

    def one(self, sql, args=None):
        r = self.rows(sql, args)
        return r[0][0] if r else None


def as_json(v):
    return json.loads(v) if isinstance(v, str) else v


# --------------------------------------------------------------------------------------------
# Data

def prepare(db, facts):
    t0 = time.perf_counter()
    facts["data_file"] = os.path.basename(C.online_retail_path())
    # tables purchases, products (stock code -> item_id) and lines, by tests/online_retail.sql
    facts["rows_loaded"] = C.clean_online_retail(db.cur)
    n, u, i, lo, hi = db.rows("SELECT count(*), count(DISTINCT user_id), count(DISTINCT item_id),"
                              " min(bought_at)::date, max(bought_at)::date FROM lines")[0]
    facts["clean"] = {"lines": n, "customers": u, "items": i, "first": str(lo), "last": str(hi)}
    facts["split"] = split(db, "", TRAIN_END, TEST_END)
    facts["split_val"] = split(db, "_val", VAL_TRAIN_END, VAL_END)
    facts["prepare_seconds"] = time.perf_counter() - t0
    log("data: %d rows loaded, %d purchase lines after cleaning, %d customers, %d items (%.1f s)"
        % (facts["rows_loaded"], n, u, i, facts["prepare_seconds"]))


RELEVANT_SQL = """CREATE TABLE relevant{s} AS
SELECT h.user_id, h.item_id FROM heldout{s} h
 WHERE NOT EXISTS (SELECT 1 FROM train{s} t WHERE t.user_id = h.user_id AND t.item_id = h.item_id)"""


def split(db, suffix, train_end, test_end):
    """train<suffix>(user_id, item_id, weight) and heldout<suffix>(user_id, item_id)."""
    # weight of a (customer, item) pair: the number of purchase lines (see docs/quality.md),
    # from retail_weights() of tests/online_retail.sql
    C.retail_train(db.cur, "train" + suffix, train_end, "lines")
    db.run("CREATE UNIQUE INDEX ON train%s (user_id, item_id)" % suffix)
    db.run("CREATE INDEX ON train%s (item_id)" % suffix)
    db.run("ANALYZE train%s" % suffix)
    # held out: every distinct (customer, item) bought in the period by a customer who is in
    # the training data; ranking_metrics itself leaves out the pairs already seen in training
    db.run("""CREATE TABLE heldout%s AS
              SELECT DISTINCT l.user_id, l.item_id
                FROM lines l
               WHERE l.bought_at >= %%s AND l.bought_at < %%s
                 AND l.user_id IN (SELECT user_id FROM train%s)""" % (suffix, suffix),
           (train_end, test_end))
    db.run("CREATE INDEX ON heldout%s (user_id, item_id)" % suffix)
    db.run("ANALYZE heldout%s" % suffix)
    # the relevant pairs as ranking_metrics defines them (held out, not seen in training), for
    # the recall curve computed in SQL
    db.run(RELEVANT_SQL.format(s=suffix))
    db.run("CREATE UNIQUE INDEX ON relevant%s (user_id, item_id)" % suffix)
    db.run("ANALYZE relevant%s" % suffix)
    s = {"train_end": train_end, "test_end": test_end}
    s["train_pairs"], s["train_users"], s["train_items"], s["train_lines"] = db.rows(
        "SELECT count(*), count(DISTINCT user_id), count(DISTINCT item_id), sum(weight)::bigint"
        " FROM train%s" % suffix)[0]
    s["period_customers"] = db.one(
        "SELECT count(DISTINCT user_id) FROM lines WHERE bought_at >= %s AND bought_at < %s",
        (train_end, test_end))
    s["heldout_pairs"], s["heldout_users"] = db.rows(
        "SELECT count(*), count(DISTINCT user_id) FROM heldout%s" % suffix)[0]
    s["repeat_pairs"] = db.one(
        "SELECT count(*) FROM heldout%s h JOIN train%s t USING (user_id, item_id)"
        % (suffix, suffix))
    s["new_item_pairs"] = db.one(
        "SELECT count(*) FROM heldout%s h WHERE NOT EXISTS"
        " (SELECT 1 FROM train%s t WHERE t.item_id = h.item_id)" % (suffix, suffix))
    s["relevant_pairs"] = s["heldout_pairs"] - s["repeat_pairs"]
    log("split to %s: train %d pairs (%d customers, %d items); held out %s..%s: %d pairs of "
        "%d returning customers (%d repeats, %d of items new to the catalogue)"
        % (train_end, s["train_pairs"], s["train_users"], s["train_items"], train_end, test_end,
           s["heldout_pairs"], s["heldout_users"], s["repeat_pairs"], s["new_item_pairs"]))
    return s


# --------------------------------------------------------------------------------------------
# Grid

def grid_sql(points):
    """The statements that create the grid table, as run and as shown in the report."""
    values = ",\n".join("  (%d, '%s', '%s')" % (no, method, json.dumps(opts))
                         for no, (method, opts) in enumerate(points, 1))
    return ("CREATE TABLE grid (point integer PRIMARY KEY, method text, options jsonb);\n"
            "INSERT INTO grid VALUES\n" + values + ";")


FIT_SQL = """CREATE TABLE models{s} AS
SELECT g.point, g.method, g.options,
       affinity.fit(t.user_id, t.item_id, t.weight, g.options) AS model
  FROM train{s} t CROSS JOIN grid g
 GROUP BY g.point, g.method, g.options"""

EVAL_SQL = """SELECT m.point, k.k,
       affinity.ranking_metrics(m.model, h.user_id, h.item_id, k.k) AS metrics
  FROM models{s} m CROSS JOIN heldout{s} h CROSS JOIN (VALUES (10), (20)) AS k(k)
 GROUP BY m.point, k.k"""

# recall@1..50 from one top-50 list per held-out customer, against relevant{s} (made in split()).
# recall@k = mean over customers of hits at rank <= k / |R|, i.e. the running sum over ranks
# r <= k of gain(r) = sum of 1 / |R| over the customers with a hit at rank r, divided by the
# number of customers.
CURVE_SQL = """WITH sizes AS (SELECT user_id, count(*) AS n FROM relevant{s} GROUP BY user_id),
     lists AS (
       SELECT l.user_id, l.item_id, l.rank
         FROM models{s} m,
              affinity.top_items_for_all(m.model, 50,
                                         users => (SELECT array_agg(user_id) FROM sizes)) l
        WHERE m.point = %(point)s),
     gain AS (
       SELECT l.rank, sum(1::float8 / s.n) AS gain
         FROM lists l JOIN relevant{s} r USING (user_id, item_id) JOIN sizes s USING (user_id)
        GROUP BY l.rank)
SELECT k, sum(coalesce(g.gain, 0)) OVER (ORDER BY k) / (SELECT count(*) FROM sizes) AS recall
  FROM generate_series(1, 50) AS k LEFT JOIN gain g ON g.rank = k
 ORDER BY k"""

# per-customer recall@k of two models, for the paired difference
PAIRED_SQL = """WITH sizes AS (SELECT user_id, count(*) AS n FROM relevant{s} GROUP BY user_id),
     per_model AS (
       SELECT m.point, l.user_id, count(r.item_id) AS hits
         FROM models{s} m,
              affinity.top_items_for_all(m.model, %(k)s,
                                         users => (SELECT array_agg(user_id) FROM sizes)) l
         LEFT JOIN relevant{s} r USING (user_id, item_id)
        WHERE m.point IN (%(a)s, %(b)s)
        GROUP BY m.point, l.user_id)
SELECT s.user_id,
       coalesce(max(p.hits) FILTER (WHERE p.point = %(a)s), 0)::float8 / s.n,
       coalesce(max(p.hits) FILTER (WHERE p.point = %(b)s), 0)::float8 / s.n
  FROM sizes s LEFT JOIN per_model p USING (user_id)
 GROUP BY s.user_id, s.n"""


def create_grid(db, points):
    db.run(grid_sql(points))


def fit_grid(db, suffix):
    _, wall = db.run(FIT_SQL.format(s=suffix))
    rows = db.rows("SELECT point, method, options, affinity.describe(model) FROM models%s "
                   "ORDER BY point" % suffix)
    out = {}
    for point, method, opts, d in rows:
        d = as_json(d)
        out[point] = {"point": point, "method": method, "options": as_json(opts),
                      "fit_seconds": d.get("fit_seconds"), "items": d.get("items"),
                      "users": d.get("users"), "size_bytes": d.get("size_bytes"),
                      "fingerprint": d.get("fingerprint"), "metrics": {}}
    log("fitted %d models on train%s in one statement: %.1f s (sum of fit_seconds %.1f s)"
        % (len(out), suffix, wall, sum(r["fit_seconds"] or 0 for r in out.values())))
    return out, wall


def evaluate_grid(db, suffix, models):
    rows, wall = db.run(EVAL_SQL.format(s=suffix))
    for point, k, m in rows:
        models[point]["metrics"][k] = as_json(m)
    log("evaluated %d models at k = 10, 20 in one statement: %.1f s" % (len(models), wall))
    return wall


def best_per_method(models, k=PICK_K):
    best = {}
    for r in models.values():
        b = best.get(r["method"])
        if b is None or r["metrics"][k]["recall"] > b["metrics"][k]["recall"]:
            best[r["method"]] = r
    return best


def curves(db, best):
    """recall@1..50 of the best points, from one top-50 list per customer; plus timing of the
    alternative, one ranking_metrics call per k (measured at k = 50 and scaled by 50)."""
    out = {}
    for method in METHODS:
        point = best[method]["point"]
        rows, wall = db.run(CURVE_SQL.format(s=""), {"point": point})
        rm, rm_wall = db.run("SELECT affinity.ranking_metrics(m.model, h.user_id, h.item_id, 50)"
                             " FROM models m CROSS JOIN heldout h WHERE m.point = %s", (point,))
        rm = as_json(rm[0][0])
        curve = [float(r) for _, r in rows]
        check = {10: best[method]["metrics"][10]["recall"],
                 20: best[method]["metrics"][20]["recall"], 50: rm["recall"]}
        worst = max(abs(curve[k - 1] - v) for k, v in check.items())
        out[method] = {"point": point, "recall": curve, "sql_seconds": wall,
                       "ranking_metrics_k50_seconds": rm_wall, "max_diff_vs_ranking_metrics": worst,
                       "metrics50": rm}
        log("%s (point %d): recall@1..50 in %.2f s from top-50 lists; one ranking_metrics call "
            "%.2f s; largest difference to ranking_metrics at k = 10/20/50: %.1e"
            % (method, point, wall, rm_wall, worst))
    return out


def known_items(db, best):
    """recall@PICK_K of the best points with the held-out items new to the catalogue left out
    (as tests/check_online_retail.py counts)."""
    out = {}
    for method in METHODS:
        m = db.one("SELECT affinity.ranking_metrics(m.model, h.user_id, h.item_id, %s)"
                   "  FROM models m CROSS JOIN heldout h"
                   " WHERE m.point = %s"
                   "   AND EXISTS (SELECT 1 FROM train t WHERE t.item_id = h.item_id)",
                   (PICK_K, best[method]["point"]))
        out[method] = as_json(m)
    return out


def paired(db, a, b, k=PICK_K):
    """Mean and standard error of the per-customer difference recall_a - recall_b."""
    rows = db.rows(PAIRED_SQL.format(s=""), {"a": a, "b": b, "k": k})
    d = [ra - rb for _, ra, rb in rows]
    n = len(d)
    mean = sum(d) / n
    var = sum((x - mean) ** 2 for x in d) / (n - 1)
    return {"n": n, "mean": mean, "se": math.sqrt(var / n),
            "better": sum(1 for x in d if x > 0), "worse": sum(1 for x in d if x < 0)}


def seed_spread(db, options, seeds=(1, 2, 3)):
    out = []
    for s in seeds:
        o = dict(options, seed=s)
        db.run("DROP TABLE IF EXISTS seed_model")
        db.run("CREATE TABLE seed_model AS SELECT affinity.fit(user_id, item_id, weight, %s::jsonb)"
               " AS model FROM train", (json.dumps(o),))
        m = db.one("SELECT affinity.ranking_metrics(s.model, h.user_id, h.item_id, %s)"
                   " FROM seed_model s CROSS JOIN heldout h", (PICK_K,))
        out.append({"seed": s, "recall": as_json(m)["recall"]})
    db.run("DROP TABLE seed_model")
    log("implicit_als seeds %s: recall@%d %s" % (list(seeds), PICK_K,
                                                 ", ".join("%.4f" % x["recall"] for x in out)))
    return out


# --------------------------------------------------------------------------------------------
# Machine

def cpu_model():
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def mem_total():
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemTotal:"):
                    return "%.1f GB" % (int(line.split()[1]) / 1024 / 1024)
    except OSError:
        pass
    return "unknown"


def loadavg():
    try:
        with open("/proc/loadavg") as fh:
            return " ".join(fh.read().split()[:3])
    except OSError:
        return "unknown"


def os_name():
    try:
        with open("/etc/os-release") as fh:
            for line in fh:
                if line.startswith("PRETTY_NAME="):
                    return line.split("=", 1)[1].strip().strip('"')
    except OSError:
        pass
    return platform.system()


def machine(db):
    rt = as_json(db.one("SELECT affinity.runtime()"))
    return {"date": datetime.datetime.now().astimezone().strftime("%Y-%m-%d %H:%M %Z"),
            "cpu": cpu_model(), "cpus": os.cpu_count(), "memory": mem_total(),
            "os": os_name(), "kernel": platform.release(),
            "postgres": db.one("SHOW server_version"),
            "runtime": rt, "loadavg_start": loadavg()}


# --------------------------------------------------------------------------------------------
# Plot

def plot(path, best, curve, n_users):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    style = {"implicit_als": ("tab:blue", "o"), "ease": ("tab:orange", "s"),
             "item_knn": ("tab:green", "^"), "popularity": ("tab:gray", "x")}
    fig, ax = plt.subplots(figsize=(8.5, 5.2), dpi=130)
    ks = list(range(1, CURVE_K + 1))
    for method in ("implicit_als", "ease", "item_knn", "popularity"):
        c, mk = style[method]
        label = method if method == "popularity" else \
            "%s (%s)" % (method, settings(best[method]["options"]))
        ax.plot(ks, curve[method]["recall"], color=c, marker=mk, markevery=(4, 5), markersize=5,
                linewidth=1.8, label=label)
    ax.axvline(PICK_K, color="0.75", linestyle=":", linewidth=1)
    ax.set_xlabel("k (length of the top-k list)", fontsize=11)
    ax.set_ylabel("recall@k (mean over %d customers)" % n_users, fontsize=11)
    ax.set_title("Online Retail: fit to 2011-07-31, held-out purchases of Aug-Sep 2011\n"
                 "best grid point per method by recall@%d, items bought before left out" % PICK_K, fontsize=11)
    ax.set_xlim(0, CURVE_K + 1)
    ax.set_ylim(bottom=0)
    ax.grid(True, color="0.9")
    ax.legend(loc="upper left", fontsize=9, frameon=True)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


# --------------------------------------------------------------------------------------------
# Report

def f4(x):
    return "%.4f" % x


def md_table(header, rows, align=None):
    out = ["| " + " | ".join(header) + " |",
           "| " + " | ".join(align or ["---"] * len(header)) + " |"]
    for r in rows:
        out.append("| " + " | ".join(str(c) for c in r) + " |")
    return "\n".join(out)


def metric_cells(r, k):
    m = r["metrics"][k]
    return [f4(m[x]) for x in METRICS]


def grid_table(models, k, best):
    header = ["#", "method", "settings", "fit s"] + ["%s@%d" % (x, k) for x in METRICS]
    rows = []
    for p in sorted(models):
        r = models[p]
        mark = " **(best)**" if best[r["method"]]["point"] == p else ""
        rows.append([p, r["method"] + mark, settings(r["options"]), "%.2f" % r["fit_seconds"]]
                    + metric_cells(r, k))
    return md_table(header, rows, ["--:", "---", "---", "--:"] + ["--:"] * len(METRICS))


def write_report(path, png_name, F):
    models, best, curve = F["models"], F["best"], F["curves"]
    sp, sv, cl, mc = F["split"], F["split_val"], F["clean"], F["machine"]
    rt = mc["runtime"]
    pop = best["popularity"]
    pop20 = pop["metrics"][PICK_K]["recall"]
    users = pop["metrics"][PICK_K]["users"]
    no_new = pop["metrics"][PICK_K]["users_without_new_items"]
    L = []
    w = L.append
    w("# Ranking quality on the Online Retail data")
    w("")
    w("Generated by `bench/quality` on %s; every figure below comes from that one run "
      "(%.1f minutes from start to this report, build and data loading included). "
      "Benchmarks are not tests: the figures depend on the data, the split and the seed, and "
      "the seconds on the machine and whatever else ran on it." % (mc["date"], F["elapsed"] / 60))
    w("")
    w("![recall@k for k = 1..50, best grid point per method](%s)" % png_name)
    w("")
    w("## Summary")
    w("")
    for method in ("implicit_als", "ease", "item_knn"):
        b = best[method]
        r20 = b["metrics"][PICK_K]["recall"]
        pr = F["paired"][method]
        verdict = "beats" if r20 > pop20 and pr["mean"] - 1.96 * pr["se"] > 0 else (
            "is ahead of, but not clearly above," if r20 > pop20 else "does **not** beat")
        w("- **%s** (%s) %s popularity: recall@%d %s against %s, %.2fx, %+.4f "
          "(per-customer paired difference %+.4f +- %.4f, 95%% interval; better for %d customers, "
          "worse for %d)."
          % (method, settings(b["options"]), verdict, PICK_K, f4(r20), f4(pop20),
             r20 / pop20 if pop20 else float("inf"), r20 - pop20, pr["mean"], 1.96 * pr["se"],
             pr["better"], pr["worse"]))
    V = F.get("validation")
    if V:
        w("- These grid points were chosen on the evaluation months themselves, so the figures "
          "are optimistic. Chosen on July 2011 instead (validation split below), the Aug-Sep "
          "recall@%d is %s, against popularity %s."
          % (PICK_K, "; ".join("%s %s (%.2fx)" % (
              m, f4(models[V["best"][m]["point"]]["metrics"][PICK_K]["recall"]),
              models[V["best"][m]["point"]]["metrics"][PICK_K]["recall"] / pop20)
              for m in ("implicit_als", "ease", "item_knn")), f4(pop20)))
    else:
        w("- These grid points were chosen on the evaluation months themselves (no separate "
          "validation data), so the figures are optimistic (the validation split was skipped "
          "in this run: --no-validation).")
    w("")
    w("## What was run")
    w("")
    w("**Data.** The open *Online Retail* data set (UCI Machine Learning Repository, CC BY 4.0; "
      "Chen, Sain, Guo 2012), the extract `%s`: purchase lines of a UK online gift retailer "
      "from 2010-12-01 to 2011-09-30, found through `AFFINITY_DATA_DIR` (default "
      "`../shared/data` beside the checkout) and never part of the repository. %s lines were "
      "loaded with COPY." % (F["data_file"], n(F["rows_loaded"])))
    w("")
    w("**Cleaning** (`tests/online_retail.sql`, the same SQL as the checks): cancellations (invoice numbers "
      "starting with C) and lines without a positive quantity dropped, guest orders (no "
      "customer id) dropped, and only product stock codes kept (five leading digits; postage, "
      "carriage, fees and manual adjustments are not products). Left: %s purchase lines of %s "
      "customers and %s items, %s to %s. Stock codes are numbered densely as bigint item ids."
      % (n(cl["lines"]), n(cl["customers"]), n(cl["items"]), cl["first"], cl["last"]))
    w("")
    w("**Weight.** A (customer, item) pair's weight is its number of purchase lines (how many "
      "order lines contained the item), not the summed quantity: quantities run into the "
      "thousands for wholesale buyers, and repeated lines are the better measure of repeated "
      "interest. The methods that use confidence (implicit_als, item_knn) apply "
      "c = 1 + alpha log(1 + w); EASE and popularity use the pairs as binary.")
    w("")
    w("**Split in time.** Fit on purchases up to 2011-07-31: %s (customer, item) pairs from %s "
      "purchase lines, %s customers, %s items. Held out: every distinct (customer, item) bought "
      "in August or September 2011 by a customer who is in the training data: %s pairs of %s "
      "returning customers (%s customers bought in the period in all; the others are new and "
      "no model knows them). `ranking_metrics` leaves out the %s pairs the customer had "
      "already bought in training (the lists never show them), which leaves %s relevant "
      "pairs; %s customers had only repeats and are not averaged, so every metric is a mean "
      "over **%s customers**. %s of the relevant pairs (%.1f%%) are items new to the catalogue "
      "in the period; no model can rank them, they stay relevant (a real model misses them "
      "too), so recall here is lower than in `tests/check_online_retail.py`, which leaves "
      "them out. Without them, recall@%d of the best points below would be: %s."
      % (n(sp["train_pairs"]), n(sp["train_lines"]), n(sp["train_users"]), n(sp["train_items"]),
         n(sp["heldout_pairs"]), n(sp["heldout_users"]), n(sp["period_customers"]),
         n(sp["repeat_pairs"]), n(sp["relevant_pairs"]), n(no_new), n(users),
         n(sp["new_item_pairs"]), 100.0 * sp["new_item_pairs"] / sp["relevant_pairs"], PICK_K,
         ", ".join("%s %s" % (m, f4(F["known_items"][m]["recall"]))
                   for m in ("implicit_als", "ease", "item_knn", "popularity"))))
    w("")
    w("**Grid.** popularity; item_knn with neighbors 50 and 200 x alpha 1 and 5 (log "
      "confidence); ease with regularization (lambda) 100, 500 and 2000 (%s items, far below "
      "max_items 20000, so no item was dropped); implicit_als with factors 32, 64, 128 x "
      "lambda 10, 30, 100, alpha 5 (log confidence), 15 iterations, conjugate-gradient solver, "
      "seed 42. Everything else is the default. The fits ran on %s threads."
      % (n(sp["train_items"]), rt.get("fit_threads")))
    w("")
    w("All %d grid points are fitted by **one statement**: a table of grid points CROSS JOINed "
      "with the training rows and grouped by grid point, so the aggregate builds one model per "
      "group. It took %.1f s (the models' own `fit_seconds` add up to %.1f s; the rest is the "
      "aggregate reading %d x %s rows):"
      % (len(models), F["fit_wall"], sum(r["fit_seconds"] for r in models.values()),
         len(models), n(sp["train_pairs"])))
    w("")
    w("```sql")
    w(grid_sql(grid_points()))
    w("")
    w(FIT_SQL.format(s="") + ";")
    w("```")
    w("")
    w("and every model is evaluated at k = 10 and 20 by one more (%.1f s):" % F["eval_wall"])
    w("")
    w("```sql")
    w(EVAL_SQL.format(s="") + ";")
    w("```")
    w("")
    w("Definitions of the metrics are in the README (*Ranking metrics*): precision, recall, "
      "NDCG with binary gains and a log2 discount (Jarvelin and Kekalainen 2002), MAP, hit rate "
      "(share of customers with at least one hit) and coverage (distinct items recommended to "
      "any evaluated customer / items in the model). Items a customer bought in training are "
      "never recommended.")
    w("")
    w("## Best grid point per method (by recall@%d)" % PICK_K)
    w("")
    hdr = ["method", "settings", "fit s"] + ["%s@10" % x for x in METRICS] + \
        ["%s@20" % x for x in METRICS] + ["recall@20 / popularity"]
    rows = []
    for method in ("implicit_als", "ease", "item_knn", "popularity"):
        b = best[method]
        rows.append([method, settings(b["options"]), "%.2f" % b["fit_seconds"]]
                    + metric_cells(b, 10) + metric_cells(b, 20)
                    + ["%.2fx" % (b["metrics"][20]["recall"] / pop20)])
    w(md_table(hdr, rows, ["---", "---", "--:"] + ["--:"] * (2 * len(METRICS) + 1)))
    w("")
    w("## The full grid")
    w("")
    w("Fit seconds are `describe(model)->'fit_seconds'`. At k = 10:")
    w("")
    w(grid_table(models, 10, best))
    w("")
    w("At k = 20:")
    w("")
    w(grid_table(models, 20, best))
    w("")
    w("## recall@k for k = 1..50")
    w("")
    c_sql = sum(c["sql_seconds"] for c in curve.values())
    c_rm = sum(c["ranking_metrics_k50_seconds"] for c in curve.values())
    w("The plot at the top shows recall@k of the four best points. The curves come from **one "
      "top-50 list per held-out customer** (`top_items_for_all(model, 50, users => ...)`) and "
      "SQL that counts, for every k, the hits at rank k or better: %.1f s for the four models. "
      "One `ranking_metrics` call per k would rank every customer 50 times: one call took "
      "%.1f s for the four models at k = 50, so about %.0f s for k = 1..50. The SQL curve "
      "agrees with `ranking_metrics` at k = 10, 20 and 50 to %.0e (largest difference)."
      % (c_sql, c_rm, 50 * c_rm,
         max(max(c["max_diff_vs_ranking_metrics"] for c in curve.values()), 1e-16)))
    w("")
    w("```sql")
    w(RELEVANT_SQL.format(s="") + ";")
    w("")
    w(CURVE_SQL.format(s="").replace("%(point)s", ":point") + ";")
    w("```")
    w("")
    sel = [1, 5, 10, 20, 30, 50]
    w(md_table(["method"] + ["recall@%d" % k for k in sel],
               [[m] + [f4(curve[m]["recall"][k - 1]) for k in sel]
                for m in ("implicit_als", "ease", "item_knn", "popularity")],
               ["---"] + ["--:"] * len(sel)))
    w("")
    if F.get("validation"):
        V = F["validation"]
        w("## A validation split")
        w("")
        w("To choose the grid points without looking at August-September, the same grid was "
          "fitted on purchases up to 2011-06-30 (%s pairs, %s customers, %s items; one "
          "statement, %.1f s) and evaluated on July 2011 (%s returning customers, %s averaged "
          "after leaving out repeats). The point with the best July recall@%d per method was "
          "then taken to the test: its model fitted up to 2011-07-31 and evaluated on "
          "August-September is the grid model of the main run (same rows, options and seed "
          "give the same model), so it is not fitted again."
          % (n(sv["train_pairs"]), n(sv["train_users"]), n(sv["train_items"]), V["fit_wall"],
             n(sv["heldout_users"]), n(V["users"]), PICK_K))
        w("")
        rows = []
        for method in ("implicit_als", "ease", "item_knn", "popularity"):
            vb = V["best"][method]
            tb = models[vb["point"]]
            ob = best[method]
            rows.append([method, settings(vb["options"]), f4(vb["metrics"][20]["recall"]),
                         f4(tb["metrics"][20]["recall"]), f4(tb["metrics"][20]["ndcg"]),
                         "%.2fx" % (tb["metrics"][20]["recall"] / pop20),
                         settings(ob["options"]) if ob["point"] != vb["point"] else "same",
                         f4(ob["metrics"][20]["recall"])])
        w(md_table(["method", "chosen on July", "July recall@20", "Aug-Sep recall@20",
                    "Aug-Sep ndcg@20", "vs popularity", "chosen on Aug-Sep", "its recall@20"],
                   rows, ["---", "---", "--:", "--:", "--:", "--:", "---", "--:"]))
        w("")
        w("The full July grid (recall@%d):" % PICK_K)
        w("")
        rows = [[p, V["models"][p]["method"], settings(V["models"][p]["options"]),
                 f4(V["models"][p]["metrics"][20]["recall"]),
                 f4(models[p]["metrics"][20]["recall"])] for p in sorted(V["models"])]
        w(md_table(["#", "method", "settings", "July recall@20", "Aug-Sep recall@20"], rows,
                   ["--:", "---", "---", "--:", "--:"]))
        w("")
    if F.get("seeds"):
        b = best["implicit_als"]
        rs = [x["recall"] for x in F["seeds"]] + [b["metrics"][PICK_K]["recall"]]
        w("## Seed spread")
        w("")
        w("implicit_als starts from random factors. The best point (%s) refitted with seeds %s "
          "gives recall@%d %s (seed 42: %s): a spread of %.4f, against which small differences "
          "between grid points should be read. EASE, item_knn and popularity have no random "
          "start."
          % (settings(b["options"]), ", ".join(str(x["seed"]) for x in F["seeds"]), PICK_K,
             ", ".join(f4(x["recall"]) for x in F["seeds"]), f4(b["metrics"][PICK_K]["recall"]),
             max(rs) - min(rs)))
        w("")
    w("## Reading")
    w("")
    for line in F["reading"]:
        w(line)
        w("")
    w("## Machine")
    w("")
    w(md_table(["", ""], [
        ["date", mc["date"]],
        ["CPU", "%s, %d logical CPUs (%s online for the fits)" % (mc["cpu"], mc["cpus"],
                                                                 rt.get("online_cpus"))],
        ["CPU features", ", ".join(rt.get("cpu_features") or [])],
        ["memory", mc["memory"]],
        ["system", "%s, kernel %s" % (mc["os"], mc["kernel"])],
        ["PostgreSQL", mc["postgres"]],
        ["affinity", rt.get("version")],
        ["BLAS", "%s; kernel (core) chosen: **%s**; %s"
         % (rt.get("blas"), rt.get("blas_core"), rt.get("blas_config"))],
        ["threads", "fit_threads %s, threads setting %s, max_threads %s"
         % (rt.get("fit_threads"), rt.get("threads"), rt.get("max_threads"))],
        ["load average", "%s at the start, %s at the end (other work on the machine slows the "
         "fits)" % (mc["loadavg_start"], mc["loadavg_end"])],
    ], ["---", "---"]))
    w("")
    w("`affinity.runtime()` as reported:")
    w("")
    w("```json")
    w(json.dumps(rt, sort_keys=True))
    w("```")
    w("")
    with open(path, "w") as fh:
        fh.write("\n".join(L))


def reading(F):
    """The plain-language reading, computed from the figures."""
    best, models = F["best"], F["models"]
    pop20 = best["popularity"]["metrics"][PICK_K]["recall"]
    order = sorted(("implicit_als", "ease", "item_knn"),
                   key=lambda m: -best[m]["metrics"][PICK_K]["recall"])
    out = []
    beat = [m for m in order if best[m]["metrics"][PICK_K]["recall"] > pop20]
    miss = [m for m in order if m not in beat]
    s = ("On this split %s popularity on recall@%d" %
         ("all three personalised methods beat" if not miss else
          ("%s beat%s" % (" and ".join(beat), "s" if len(beat) == 1 else "")) if beat else
          "no personalised method beats", PICK_K))
    s += ": " + "; ".join("%s %.2fx (%s vs %s)" % (
        m, best[m]["metrics"][PICK_K]["recall"] / pop20, f4(best[m]["metrics"][PICK_K]["recall"]),
        f4(pop20)) for m in order) + "."
    if miss:
        s += " **%s do%s not beat popularity**; this is reported as measured, not tuned away." % (
            " and ".join(miss), "es" if len(miss) == 1 else "")
    out.append(s)
    # every grid point vs popularity
    losers = [r for r in models.values() if r["method"] != "popularity"
              and r["metrics"][PICK_K]["recall"] <= pop20]
    worst = min((r for r in models.values() if r["method"] != "popularity"),
                key=lambda r: r["metrics"][PICK_K]["recall"])
    if losers:
        out.append("Not every grid point beats popularity: %s." % "; ".join(
            "%s (%s) %s" % (r["method"], settings(r["options"]),
                            f4(r["metrics"][PICK_K]["recall"])) for r in losers))
    else:
        out.append("Every grid point of every method beats popularity, the weakest being %s (%s) "
                   "at %s (%.2fx)." % (worst["method"], settings(worst["options"]),
                                       f4(worst["metrics"][PICK_K]["recall"]),
                                       worst["metrics"][PICK_K]["recall"] / pop20))
    # the order among the methods, with two yardsticks: the paired difference between the
    # first two, and the seed spread of implicit_als
    a, b = order[0], order[1]
    ra, rb = best[a]["metrics"][PICK_K]["recall"], best[b]["metrics"][PICK_K]["recall"]
    s = ("Among the personalised methods %s leads at recall@%d (%s), then %s (%s) and %s (%s)"
         % (a, PICK_K, f4(ra), b, f4(rb), order[2],
            f4(best[order[2]]["metrics"][PICK_K]["recall"])))
    s += "; ndcg@%d puts them in the order %s." % (PICK_K, ", ".join(
        sorted(order, key=lambda m: -best[m]["metrics"][PICK_K]["ndcg"])))
    pt = F.get("paired_top")
    if pt:
        lo, hi = pt["mean"] - 1.96 * pt["se"], pt["mean"] + 1.96 * pt["se"]
        s += (" Customer by customer, %s - %s is %+.4f +- %.4f (95%% interval over the "
              "customers, for these fitted models), %s."
              % (pt["first"], pt["second"], pt["mean"], 1.96 * pt["se"],
                 "an interval that excludes zero" if lo > 0 or hi < 0 else
                 "an interval that includes zero, so this data does not settle their order"))
    if F.get("seeds"):
        rs = [x["recall"] for x in F["seeds"]]
        r42 = best["implicit_als"]["metrics"][PICK_K]["recall"]
        s += (" implicit_als's figure is the seed-42 fit; seeds %s give %s-%s (mean %s), so "
              "its own figure carries a seed spread of about %.3f%s."
              % (", ".join(str(x["seed"]) for x in F["seeds"]), f4(min(rs)), f4(max(rs)),
                 f4(sum(rs) / len(rs)), max(rs + [r42]) - min(rs + [r42]),
                 ", and seed 42 is at the top of it" if r42 >= max(rs) else ""))
    out.append(s)
    edges = grid_edges(models, best)
    if edges:
        out.append("Some best points lie at the end of their grid range (%s): a wider grid might "
                   "do a little better there, and this report does not claim otherwise."
                   % "; ".join("%s: %s" % (m, ", ".join(e)) for m, e in sorted(edges.items())))
    cov = {m: best[m]["metrics"][PICK_K]["coverage"] for m in METHODS}
    out.append("Coverage at k = %d: popularity recommends %.1f%% of the catalogue to the %d "
               "customers (the same best-sellers to everyone), the personalised methods %s."
               % (PICK_K, 100 * cov["popularity"], best["popularity"]["metrics"][PICK_K]["users"],
                  ", ".join("%s %.1f%%" % (m, 100 * cov[m]) for m in order)))
    fits = {m: best[m]["fit_seconds"] for m in METHODS}
    out.append("Fit time of the best points: %s. EASE's cost grows with the cube of the "
               "catalogue (%s items here), implicit_als's with the interactions and the "
               "factors, item_knn's with the co-purchases."
               % (", ".join("%s %.2f s" % (m, fits[m]) for m in ("implicit_als", "ease",
                                                                "item_knn", "popularity")),
                  n(F["split"]["train_items"])))
    V = F.get("validation")
    if V:
        parts = []
        for m in ("implicit_als", "ease", "item_knn"):
            vp = V["best"][m]["point"]
            parts.append("%s %s (%s)" % (m, f4(models[vp]["metrics"][PICK_K]["recall"]),
                                          "the same point" if vp == best[m]["point"] else
                                          "%s instead of %s" % (settings(models[vp]["options"]),
                                                                settings(best[m]["options"]))))
        vbeat = [m for m in ("implicit_als", "ease", "item_knn")
                 if models[V["best"][m]["point"]]["metrics"][PICK_K]["recall"] > pop20]
        out.append("**Caution.** The tables above choose each method's grid point on the same "
                   "August-September purchases they report, with no separate validation data, "
                   "so the best figures are optimistic. Choosing on July instead (validation "
                   "split) gives Aug-Sep recall@%d: %s, against popularity %s; %s."
                   % (PICK_K, "; ".join(parts), f4(pop20),
                      "all three still beat popularity" if len(vbeat) == 3 else
                      "only %s still beat%s popularity" % (" and ".join(vbeat) or "none",
                                                          "s" if len(vbeat) == 1 else "")))
    else:
        out.append("**Caution.** The tables above choose each method's grid point on the same "
                   "August-September purchases they report, with no separate validation data, "
                   "so the best figures are optimistic.")
    ratios = [best[m]["metrics"][PICK_K]["recall"] / pop20 for m in order]
    pt = F.get("paired_top") or {"mean": 0.0, "se": 0.0}
    rs = [x["recall"] for x in F.get("seeds") or []]
    rs.append(best["implicit_als"]["metrics"][PICK_K]["recall"])
    noise = max([1.96 * pt["se"], max(rs) - min(rs)]
                + [1.96 * x["se"] for x in F.get("paired", {}).values()])
    gaps = [best[order[i]]["metrics"][PICK_K]["recall"]
            - best[order[i + 1]]["metrics"][PICK_K]["recall"] for i in range(len(order) - 1)]
    margin = min(best[m]["metrics"][PICK_K]["recall"] for m in order) - pop20
    if margin > 0:
        s = ("One data set, one split, one seed per grid point. The smallest margin over "
             "popularity (%+.4f; the ratios run from %.2fx to %.2fx) is %.1f times the largest "
             "customer-sampling interval or seed spread seen here (%.4f)"
             % (margin, min(ratios), max(ratios), margin / noise if noise else float("inf"),
                noise))
    else:
        s = ("One data set, one split, one seed per grid point. At least one method is at or "
             "below popularity (margin %+.4f); the customer-sampling interval and seed spread "
             "are about %.4f" % (margin, noise))
    if max(gaps) <= 3 * noise:
        s += ("; the gaps between neighbouring personalised methods (%s) are within a few times "
              "that, so their order here describes this shop and this period rather than the "
              "methods." % ", ".join("%.4f" % g for g in gaps))
    else:
        s += "; the gaps between neighbouring personalised methods are %s." % (
            ", ".join("%.4f" % g for g in gaps))
    s += (" Another shop's data, a different period or weight can order them differently: "
          "tune per data set with the grid statement above.")
    out.append(s)
    return out


# --------------------------------------------------------------------------------------------

def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", default=os.path.join(REPO_DIR, "docs"))
    ap.add_argument("--json")
    ap.add_argument("--no-validation", action="store_true")
    args = ap.parse_args()

    t_start = float(os.environ.get("AFF_QUALITY_T0") or time.time())
    C.online_retail_path()          # exits 77, saying so, when the data set is absent
    db = DB()
    db.run("CREATE EXTENSION IF NOT EXISTS affinity")
    F = {"machine": machine(db)}
    prepare(db, F)
    F.update(data_file=F["data_file"])

    points = grid_points()
    create_grid(db, points)
    F["models"], F["fit_wall"] = fit_grid(db, "")
    F["eval_wall"] = evaluate_grid(db, "", F["models"])
    F["best"] = best_per_method(F["models"])
    for m in METHODS:
        b = F["best"][m]
        log("best %-12s #%-2d %-45s recall@20 %.4f ndcg@20 %.4f fit %.2f s"
            % (m, b["point"], settings(b["options"]), b["metrics"][20]["recall"],
               b["metrics"][20]["ndcg"], b["fit_seconds"]))
    F["curves"] = curves(db, F["best"])
    F["paired"] = {m: paired(db, F["best"][m]["point"], F["best"]["popularity"]["point"])
                   for m in ("implicit_als", "ease", "item_knn")}
    for m, p in F["paired"].items():
        log("paired recall@20 %s - popularity: %+.4f +- %.4f (%d customers)"
            % (m, p["mean"], 1.96 * p["se"], p["n"]))
    F["paired_top"] = None
    top = sorted(("implicit_als", "ease", "item_knn"),
                 key=lambda m: -F["best"][m]["metrics"][PICK_K]["recall"])
    F["paired_top"] = dict(paired(db, F["best"][top[0]]["point"], F["best"][top[1]]["point"]),
                           first=top[0], second=top[1])
    F["known_items"] = known_items(db, F["best"])
    F["seeds"] = seed_spread(db, F["best"]["implicit_als"]["options"])

    if not args.no_validation:
        V = {}
        V["models"], V["fit_wall"] = fit_grid(db, "_val")
        V["eval_wall"] = evaluate_grid(db, "_val", V["models"])
        V["best"] = best_per_method(V["models"])
        V["users"] = V["best"]["popularity"]["metrics"][PICK_K]["users"]
        for m in METHODS:
            vb = V["best"][m]
            log("validation: %-12s chose #%-2d %-45s July recall@20 %.4f -> Aug-Sep %.4f"
                % (m, vb["point"], settings(vb["options"]), vb["metrics"][20]["recall"],
                   F["models"][vb["point"]]["metrics"][20]["recall"]))
        F["validation"] = V

    os.makedirs(args.out, exist_ok=True)
    png = os.path.join(args.out, "quality_recall.png")
    plot(png, F["best"], F["curves"], F["best"]["popularity"]["metrics"][PICK_K]["users"])
    F["machine"]["loadavg_end"] = loadavg()
    F["reading"] = reading(F)
    F["elapsed"] = time.time() - t_start
    md = os.path.join(args.out, "quality.md")
    write_report(md, os.path.basename(png), F)
    for line in F["reading"]:
        log("  " + line)
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(F, fh, indent=1, sort_keys=True, default=str)
    log("wrote %s and %s (%.1f min since the start)"
        % (os.path.relpath(md, REPO_DIR), os.path.relpath(png, REPO_DIR), F["elapsed"] / 60))


if __name__ == "__main__":
    main()
