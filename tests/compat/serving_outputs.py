#!/usr/bin/python3
"""Fingerprints and hashed outputs of every serving function, for comparing
two builds (scripts/compare_serving runs this against the 1.1 build and the
current one).  Not a tests/ program: it needs two installations.

    serving_outputs.py fit FILE      fit the models on invented data (every
                                     method, bigint and text keys) into the
                                     table cmp.models, write their text forms
                                     to FILE (JSON)
    serving_outputs.py serve OUT [--load FILE]
                                     serve every model of cmp.models (or of
                                     FILE, loaded through the text form into a
                                     fresh table) and write, per model, its
                                     fingerprint and an md5 of each serving
                                     function's full output to OUT (JSON)
    serving_outputs.py compare A B   exit 1 unless A and B are equal; prints
                                     the differences

Scores are compared through float4's text output, which is exact in
PostgreSQL 15 (shortest form that reads back to the same bits), so equal
hashes mean bit-equal scores.  An error is recorded by its message.
"""

import json
import random
import sys

import psycopg2

SCHEMA = "cmp"
MODELS = {
    "als_cg_log": ("bigint", {"factors": 8, "iterations": 4, "seed": 3}),
    "als_chol_linear": ("bigint", {"factors": 6, "iterations": 3, "solver": "cholesky",
                                   "confidence": "linear", "alpha": 2.0, "seed": 5}),
    "popularity": ("bigint", {"method": "popularity"}),
    "ease": ("bigint", {"method": "ease", "regularization": 20}),
    "item_knn": ("bigint", {"method": "item_knn", "neighbors": 12}),
    "als_text": ("text", {"factors": 5, "iterations": 3, "seed": 9}),
    "knn_text": ("text", {"method": "item_knn", "neighbors": 8}),
}
N_USERS, N_ITEMS, N_ROWS = 240, 90, 2600


def connect():
    conn = psycopg2.connect("")
    conn.autocommit = True
    return conn


def invented_rows():
    """Customers buying from a small shop's catalogue (invented)."""
    rng = random.Random(11)
    rows = []
    for _ in range(N_ROWS):
        u = rng.randrange(N_USERS)
        i = min(int(rng.expovariate(1 / 20.0)), N_ITEMS - 1)
        rows.append((1000 + u, 500 + 7 * i, float(rng.choice([1, 1, 2, 3, 5]))))
    return rows


def fit(path):
    cur = connect().cursor()
    cur.execute("CREATE EXTENSION IF NOT EXISTS affinity")
    cur.execute("DROP SCHEMA IF EXISTS %s CASCADE; CREATE SCHEMA %s" % (SCHEMA, SCHEMA))
    cur.execute("CREATE TABLE cmp.buys (user_id bigint, item_id bigint, weight real)")
    cur.executemany("INSERT INTO cmp.buys VALUES (%s, %s, %s)", invented_rows())
    cur.execute("CREATE TABLE cmp.models (label text PRIMARY KEY, model affinity.model)")
    for label, (keys, opts) in MODELS.items():
        if keys == "bigint":
            src = "user_id, item_id, weight"
        else:
            src = "'c-' || user_id, 'sku ' || item_id, weight"
        cur.execute("INSERT INTO cmp.models SELECT %%s, affinity.fit(%s, %%s::jsonb) FROM cmp.buys"
                    % src, (label, json.dumps(opts)))
    cur.execute("SELECT label, model::text FROM cmp.models ORDER BY label")
    with open(path, "w") as f:
        json.dump(dict(cur.fetchall()), f)


def md5_of(cur, sql, args=()):
    """md5 of the query's rows (in its ORDER BY) or the error's message."""
    cur.execute("SAVEPOINT s")
    try:
        cur.execute("SELECT md5(coalesce(string_agg(r::text, ';'), '')) FROM (%s) r" % sql, args)
        out = cur.fetchone()[0]
        cur.execute("RELEASE SAVEPOINT s")
        return out
    except psycopg2.Error as e:
        cur.execute("ROLLBACK TO SAVEPOINT s")
        return "ERROR: " + e.pgerror.splitlines()[0] if e.pgerror else "ERROR"


def serve(out_path, load=None):
    conn = connect()
    conn.autocommit = False
    cur = conn.cursor()
    table = "cmp.models"
    if load:
        with open(load) as f:
            texts = json.load(f)
        cur.execute("CREATE TEMP TABLE loaded (label text, model affinity.model)")
        for label, text in texts.items():
            cur.execute("INSERT INTO loaded VALUES (%s, %s::affinity.model)", (label, text))
        table = "loaded"
    cur.execute("SELECT label FROM %s ORDER BY label" % table)
    labels = [r[0] for r in cur.fetchall()]
    result = {}
    for label in labels:
        keys = MODELS[label][0]
        m = "(SELECT model FROM %s WHERE label = '%s')" % (table, label)
        if keys == "bigint":
            users = "(SELECT DISTINCT user_id AS u FROM cmp.buys)"
            items = "(SELECT DISTINCT item_id AS i FROM cmp.buys)"
            ukey, ikey, arr = "u", "i", "bigint[]"
            basket = lambda j: "ARRAY[%d, %d, %d, 3]::bigint[]" % (500 + 7 * j, 500 + 7 * (j + 3), 500 + 7 * j)
            excl = "ARRAY[500, 507, 514]::bigint[]"
            cands = "ARRAY(SELECT 500 + 7 * g FROM generate_series(0, 60, 2) g)"
        else:
            users = "(SELECT DISTINCT 'c-' || user_id AS u FROM cmp.buys)"
            items = "(SELECT DISTINCT 'sku ' || item_id AS i FROM cmp.buys)"
            ukey, ikey, arr = "u", "i", "text[]"
            basket = lambda j: "ARRAY['sku %d', 'sku %d', 'sku %d', 'nope']" % (500 + 7 * j, 500 + 7 * (j + 3), 500 + 7 * j)
            excl = "ARRAY['sku 500', 'sku 507', 'sku 514']"
            cands = "ARRAY(SELECT 'sku ' || (500 + 7 * g) FROM generate_series(0, 60, 2) g)"
        r = {}
        cur.execute("SELECT affinity.describe(%s)->>'fingerprint'" % m)
        r["fingerprint"] = cur.fetchone()[0]
        r["top_items"] = md5_of(cur, "SELECT us.u, t.item_id, t.score, t.rank FROM %s us, affinity.top_items(%s, us.u, 10) t ORDER BY 1, t.rank" % (users, m))
        r["top_items_options"] = md5_of(cur, "SELECT us.u, t.item_id, t.score, t.rank FROM %s us, affinity.top_items(%s, us.u, 7, exclude_seen => false, exclude => %s, candidates => %s) t ORDER BY 1, t.rank" % (users, m, excl, cands))
        r["top_items_unknown"] = md5_of(cur, "SELECT t.item_id, t.score, t.rank FROM affinity.top_items(%s, %s, 10, fallback_popular => true) t ORDER BY rank" % (m, "-1::bigint" if keys == "bigint" else "'nobody'::text"))
        r["top_items_basket"] = md5_of(cur, " UNION ALL ".join(
            "(SELECT %d AS b, t.item_id, t.score, t.rank FROM affinity.top_items(%s, %s, 8, weights => ARRAY[1, 2.5, 0.5, 1]::real[]) t)" % (j, m, basket(j))
            for j in range(0, 40, 3)) + " ORDER BY 1, rank")
        r["top_items_basket_options"] = md5_of(cur, " UNION ALL ".join(
            "(SELECT %d AS b, t.item_id, t.score, t.rank FROM affinity.top_items(%s, %s, 5, exclude_seen => false, exclude => %s, candidates => %s) t)" % (j, m, basket(j), excl, cands)
            for j in range(0, 40, 5)) + " ORDER BY 1, rank")
        all_users = "ARRAY(SELECT u FROM %s us)::%s" % (users, arr)
        all_items = "ARRAY(SELECT i FROM %s it)::%s" % (items, arr)
        if keys == "bigint":
            r["top_items_for_all"] = md5_of(cur, "SELECT user_id, item_id, score, rank FROM affinity.top_items_for_all(%s, 10) ORDER BY 1, rank" % m)
        else:
            r["top_items_for_all"] = md5_of(cur, "SELECT user_id, item_id, score, rank FROM affinity.top_items_for_all(%s, 10, true, %s) ORDER BY 1, rank" % (m, all_users))
        r["top_items_for_all_list"] = md5_of(cur, "SELECT user_id, item_id, score, rank FROM affinity.top_items_for_all(%s, 4, false, ARRAY(SELECT u FROM %s us ORDER BY u LIMIT 30)::%s) ORDER BY 1, rank" % (m, users, arr))
        r["items_like"] = md5_of(cur, "SELECT it.i, t.* FROM %s it, affinity.items_like(%s, it.i, 6) t ORDER BY 1, t.rank" % (items, m))
        r["items_like_candidates"] = md5_of(cur, "SELECT it.i, t.* FROM %s it, affinity.items_like(%s, it.i, 6, candidates => %s) t ORDER BY 1, t.rank" % (items, m, cands))
        r["users_like"] = md5_of(cur, "SELECT us.u, t.* FROM %s us, affinity.users_like(%s, us.u, 6) t ORDER BY 1, t.rank" % (users, m))
        r["score"] = md5_of(cur, "SELECT us.u, it.i, affinity.score(%s, us.u, it.i) FROM %s us, %s it ORDER BY 1, 2" % (m, users, items))
        r["reasons"] = md5_of(cur, "SELECT us.u, it.i, t.* FROM (SELECT * FROM %s us ORDER BY u LIMIT 40) us, (SELECT * FROM %s it ORDER BY i LIMIT 15) it, affinity.reasons(%s, us.u, it.i, 4) t ORDER BY 1, 2, t.rank" % (users, items, m))
        if keys == "bigint":
            r["user_vectors"] = md5_of(cur, "SELECT * FROM affinity.user_vectors(%s) ORDER BY 1" % m)
            r["item_vectors"] = md5_of(cur, "SELECT * FROM affinity.item_vectors(%s) ORDER BY 1" % m)
        else:
            r["user_vectors"] = md5_of(cur, "SELECT * FROM affinity.user_vectors(%s, %s) ORDER BY 1" % (m, all_users))
            r["item_vectors"] = md5_of(cur, "SELECT * FROM affinity.item_vectors(%s, %s) ORDER BY 1" % (m, all_items))
        if keys == "bigint":
            r["ranking_metrics"] = md5_of(cur, "SELECT affinity.ranking_metrics(%s, user_id, item_id + 7, 10) FROM cmp.buys" % m)
        result[label] = r
    conn.rollback()
    with open(out_path, "w") as f:
        json.dump(result, f, indent=1, sort_keys=True)


def compare(a_path, b_path):
    with open(a_path) as f:
        a = json.load(f)
    with open(b_path) as f:
        b = json.load(f)
    diffs = 0
    n = 0
    for label in sorted(set(a) | set(b)):
        for fn in sorted(set(a.get(label, {})) | set(b.get(label, {}))):
            n += 1
            x, y = a.get(label, {}).get(fn), b.get(label, {}).get(fn)
            if x != y:
                diffs += 1
                print("differs: %s %s: %s / %s" % (label, fn, x, y))
    errors = sum(1 for r in a.values() for v in r.values() if str(v).startswith("ERROR"))
    print("%d models, %d outputs compared (%d of them errors, the same message expected), %d differ"
          % (len(a), n, errors, diffs))
    return 1 if diffs else 0


if __name__ == "__main__":
    if sys.argv[1] == "fit":
        fit(sys.argv[2])
    elif sys.argv[1] == "serve":
        serve(sys.argv[2], sys.argv[4] if len(sys.argv) > 4 and sys.argv[3] == "--load" else None)
    else:
        sys.exit(compare(sys.argv[2], sys.argv[3]))
