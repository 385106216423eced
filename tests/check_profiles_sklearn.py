#!/usr/bin/python3
"""Item profiles against scikit-learn, and on the open Online Retail data.

Checks (each names its outside source):
  * dense vectors: items_like equals scikit-learn's NearestNeighbors
    (metric "cosine", brute force) on the same vectors: the same neighbours
    in the same order, similarities (1 - cosine distance) to 1e-6 (measured
    difference about 1e-7: the value stores float32 rows, sklearn works in
    float64 on the same float32 numbers);
  * feature rows, normalisation "l2": cosine of sklearn.preprocessing.normalize
    rows; normalisation "tfidf" with min_document_frequency 3: cosine of the
    rows of sklearn's TfidfVectorizer(min_df=3, smooth_idf=False) with its
    idf_ lowered by 1 (sklearn's idf is ln(n/df) + 1, ours ln(n/df) as in
    Manning, Raghavan, Schuetze 2008, section 6.2.1); same neighbours, 1e-6;
  * crafted values (a feature index out of range, a NaN value, a vector
    section cut short) are refused on input with SQLSTATE 22P03;
  * Online Retail (skipped, saying so, without the data): profiles from the
    product descriptions through PostgreSQL's text search, items_like for
    products never bought before 2011-08-01: figures printed (share with
    look-alikes, share of look-alikes sharing a description word, share
    among products sold in the training window, build seconds).
"""

import os
import sys
import time

import numpy as np
import psycopg2

import _common as C

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "fuzz"))
import seeds as S  # noqa: E402  (the format's checksum, reimplemented)

SCHEMA = "affinity_check_profiles"
TOL = 1e-6
K = 10


def sql_like(cur, model, item, k, text=False):
    cur.execute("SELECT item_id, similarity FROM affinity.items_like((SELECT p FROM %s), %%s::%s, %d) "
                "ORDER BY rank" % (model, "text" if text else "bigint", k), (item,))
    return cur.fetchall()


def compare_rows(ck, label, cur, model, X, ids, queries, k):
    """items_like of each query against cosine over the rows of X (float64).
    Word counts give many equal similarities, so the neighbours are compared
    up to ties: every returned item has the reference similarity, and the
    returned similarities are the reference's best k."""
    norms = np.linalg.norm(X, axis=1)
    worst = 0.0
    for q in queries:
        qi = ids.index(q)
        sims = (X @ X[qi]) / np.where(norms * norms[qi] > 0, norms * norms[qi], 1)
        sims[qi] = -np.inf
        sims[norms == 0] = -np.inf
        sims[sims == 0] = -np.inf       # sharing no feature: no look-alike
        if norms[qi] == 0:
            sims[:] = -np.inf
        best = np.sort(sims[np.isfinite(sims)])[::-1][:k]
        got = sql_like(cur, model, q, k)
        if len(got) != len(best):
            worst = np.inf
            print("  query %s: %d rows, want %d" % (q, len(got), len(best)))
            continue
        for (gid, gs), bs in zip(got, best):
            worst = max(worst, abs(gs - sims[ids.index(gid)]), abs(gs - bs))
    ck.check(worst <= TOL, label + ": the best k by cosine, similarities within 1e-6",
             "%d queries, largest difference %.2e" % (len(queries), worst))


def dense_check(cur, ck):
    from sklearn.neighbors import NearestNeighbors
    rng = np.random.default_rng(11)
    n, d = 400, 24
    X = rng.normal(size=(n, d)).astype(np.float32)
    ids = [int(i) for i in rng.choice(10 ** 6, size=n, replace=False)]
    cur.execute("CREATE TABLE vecs (item_id bigint, v real[])")
    C.copy_rows(cur, "vecs", ["item_id", "v"],
                ((i, "{" + ",".join(repr(float(x)) for x in row) + "}") for i, row in zip(ids, X)))
    for norm in ("none", "l2"):
        cur.execute("DROP TABLE IF EXISTS pv")
        cur.execute("CREATE TABLE pv AS SELECT affinity.item_profiles(item_id, v, %s::jsonb) AS p FROM vecs",
                    ('{"normalization": "%s"}' % norm,))
        # scikit-learn's brute-force cosine neighbours on the same float32 numbers
        nn = NearestNeighbors(n_neighbors=K + 1, metric="cosine", algorithm="brute")
        nn.fit(X.astype(np.float64))
        worst = 0.0
        same = True
        for qi in range(0, n, 20):
            dist, idx = nn.kneighbors(X[qi:qi + 1].astype(np.float64))
            want = [(ids[j], 1 - dd) for j, dd in zip(idx[0], dist[0]) if j != qi][:K]
            got = sql_like(cur, "pv", ids[qi], K)
            if [g[0] for g in got] != [w[0] for w in want]:
                same = False
            for (gid, gs), (wid, ws) in zip(got, want):
                worst = max(worst, abs(gs - ws))
        ck.check(same, "dense %s: items_like has sklearn NearestNeighbors' cosine neighbours" % norm,
                 "20 queries over %d items of %d dimensions" % (n, d))
        ck.check(worst <= TOL, "dense %s: similarities equal 1 - sklearn's cosine distance to 1e-6" % norm,
                 "largest difference %.2e" % worst)


def sparse_check(cur, ck):
    import scipy.sparse as sp
    from sklearn.feature_extraction.text import TfidfVectorizer
    from sklearn.preprocessing import normalize
    rng = np.random.default_rng(5)
    n, vocab = 500, 300
    words = ["w%03d" % i for i in range(vocab)]
    # word frequencies skewed like text: a few common words, many rare ones
    p = 1.0 / np.arange(1, vocab + 1)
    p /= p.sum()
    docs = []
    rows = []
    for i in range(n):
        toks = list(rng.choice(words, size=int(rng.integers(3, 15)), p=p))
        docs.append(" ".join(toks))
        for t in toks:              # one row per token: repeated rows are summed
            rows.append((i + 1, t, 1.0))
    ids = list(range(1, n + 1))
    cur.execute("CREATE TABLE feats (item_id bigint, feature text, value real)")
    C.copy_rows(cur, "feats", ["item_id", "feature", "value"], rows)
    cur.execute("""CREATE TABLE pl2 AS SELECT affinity.item_profiles(item_id, feature, value) AS p FROM feats""")
    cur.execute("""CREATE TABLE ptf AS SELECT affinity.item_profiles(item_id, feature, value,
                   '{"normalization": "tfidf", "min_document_frequency": 3}') AS p FROM feats""")
    queries = ids[::25]

    # l2: scikit-learn's normalize of the count rows
    vec = TfidfVectorizer(analyzer=str.split, use_idf=False, norm=None)
    counts = vec.fit_transform(docs)
    Xl2 = normalize(counts, norm="l2").toarray()
    compare_rows(ck, "sparse l2 (sklearn normalize)", cur, "pl2", Xl2, ids, queries, K)

    # tfidf: TfidfVectorizer(min_df=3, smooth_idf=False), idf lowered by 1
    tv = TfidfVectorizer(analyzer=str.split, min_df=3, smooth_idf=False, norm=None)
    tv.fit(docs)
    raw = tv.transform(docs)
    idf = tv.idf_ - 1.0            # ln(n / df), without sklearn's + 1
    Xtf = normalize(sp.csr_matrix(raw.multiply(1.0 / tv.idf_).multiply(idf)), norm="l2").toarray()
    compare_rows(ck, "sparse tfidf min_df 3 (sklearn TfidfVectorizer)", cur, "ptf", Xtf, ids, queries, K)
    d = C.describe(cur, "(SELECT p FROM ptf)")["profile"]
    ck.check(d["features"] == len(tv.vocabulary_),
             "min_document_frequency keeps the features TfidfVectorizer(min_df=3) keeps",
             "%d and %d" % (d["features"], len(tv.vocabulary_)))


def crafted_check(cur, ck):
    cur.execute("SELECT decode(p::text, 'base64') FROM pl2")
    sparse = bytearray(b"\0\0\0\0" + bytes(cur.fetchone()[0]))
    cur.execute("SELECT decode(p::text, 'base64') FROM pv")
    dense = bytearray(b"\0\0\0\0" + bytes(cur.fetchone()[0]))
    cases = []
    b = bytearray(sparse)
    S.put_elem(b, S.KIND["profile_features"], 0, 1 << 30)
    cases.append(("a feature index out of range", S.fix_checksum(b)))
    b = bytearray(sparse)
    S.put_elem(b, S.KIND["profile_values"], 3, float("nan"))
    cases.append(("a NaN profile value", S.fix_checksum(b)))
    b = bytearray(dense)
    S.set_entry(b, S.KIND["profile_vectors"], count=S.section_entry(b, S.KIND["profile_vectors"])[4] - 1)
    cases.append(("a vector section cut short", S.fix_checksum(b)))
    b = bytearray(sparse)
    S.put_elem(b, S.KIND["profile_info"], 0, 2)
    cases.append(("a sparse value claiming to be dense", S.fix_checksum(b)))
    for label, buf in cases:
        ok, why = S.cast_result(cur, bytes(buf)[4:])
        ck.check(not ok and why[0] == "22P03", "crafted value refused: " + label, str(why))


def retail_check(cur, ck):
    if not os.path.isdir(C.data_dir()):
        print("skipped part: Online Retail data not found at %s" % C.data_dir())
        return
    try:
        C.online_retail_path()
    except SystemExit:
        print("skipped part: Online Retail data not found")
        return
    C.load_online_retail(cur, "raw")
    cur.execute("""CREATE TABLE descr AS
                   SELECT "StockCode" AS stock_code, min(btrim("Description")) AS description
                     FROM raw WHERE "StockCode" ~ '^[0-9]{5}' AND coalesce(btrim("Description"), '') <> ''
                    GROUP BY 1""")
    with open(C.ONLINE_RETAIL_SQL, encoding="utf-8") as f:
        cur.execute(f.read())          # drops raw; leaves purchases
    cur.execute("""CREATE TABLE words AS
                   SELECT stock_code, 'word:' || w AS feature, 1::real AS value
                     FROM descr, unnest(tsvector_to_array(to_tsvector('english', description))) w""")
    t0 = time.time()
    cur.execute("""CREATE TABLE pr AS SELECT affinity.item_profiles(stock_code, feature, value,
                   '{"normalization": "tfidf"}') AS p FROM words""")
    build = time.time() - t0
    d = C.describe(cur, "(SELECT p FROM pr)")["profile"]
    print("profiles of %d products, %d words, %d non-zeros built in %.2f s"
          % (d["items"], d["features"], d["nonzeros"], build))
    cur.execute("""CREATE TABLE new_items AS
                   SELECT DISTINCT stock_code FROM purchases p
                    WHERE bought_at >= '2011-08-01'
                      AND NOT EXISTS (SELECT 1 FROM purchases q WHERE q.stock_code = p.stock_code
                                                                 AND q.bought_at < '2011-08-01')
                      AND EXISTS (SELECT 1 FROM words w WHERE w.stock_code = p.stock_code)""")
    cur.execute("""CREATE TABLE looks AS
                   SELECT n.stock_code AS query, l.item_id, l.similarity, l.rank
                     FROM new_items n, affinity.items_like((SELECT p FROM pr), n.stock_code, 5) l""")
    cur.execute("SELECT count(*) FROM new_items")
    n_new = cur.fetchone()[0]
    cur.execute("SELECT count(DISTINCT query), count(*) FROM looks")
    with_looks, n_looks = cur.fetchone()
    cur.execute("""SELECT avg((EXISTS (SELECT 1 FROM words a JOIN words b USING (feature)
                                        WHERE a.stock_code = query AND b.stock_code = item_id))::int)
                     FROM looks""")
    share_word = float(cur.fetchone()[0] or 0)
    cur.execute("""SELECT avg((EXISTS (SELECT 1 FROM purchases q WHERE q.stock_code = item_id
                                         AND q.bought_at < '2011-08-01'))::int) FROM looks""")
    share_sold = float(cur.fetchone()[0] or 0)
    cur.execute("SELECT min(similarity), max(similarity) FROM looks")
    lo, hi = cur.fetchone()
    print("products first bought from 2011-08-01: %d; with look-alikes: %d; look-alikes: %d" %
          (n_new, with_looks, n_looks))
    print("share of look-alikes sharing a description word: %.3f; sold before August: %.3f" %
          (share_word, share_sold))
    ck.check(n_new >= 50, "the open data has products never bought in the training window", str(n_new))
    ck.check(with_looks >= 0.9 * n_new, "at least 90% of them get content look-alikes",
             "%d of %d" % (with_looks, n_new))
    ck.check(share_word == 1.0, "every look-alike shares a description word (cosine > 0 of word rows)",
             "%.3f" % share_word)
    ck.check(lo > 0 and hi <= 1.0 + 1e-6, "similarities lie in (0, 1]", "%.4f .. %.4f" % (lo, hi))


def main():
    conn = C.connect()
    cur = conn.cursor()
    C.fresh_schema(cur, SCHEMA)
    ck = C.Checker("check_profiles_sklearn")
    dense_check(cur, ck)
    sparse_check(cur, ck)
    crafted_check(cur, ck)
    retail_check(cur, ck)
    C.drop_schema(cur, SCHEMA)
    ck.finish()


if __name__ == "__main__":
    main()
