"""ranking_metrics against scikit-learn.

Sources: scikit-learn's sklearn.metrics.ndcg_score (binary gains, log2
discount, ideal DCG of the user's relevant items: Jarvelin and Kekalainen
2002) and sklearn.metrics.average_precision_score.

Where the definitions agree and where they differ:
- NDCG@k: sklearn ranks the columns it is given; we give it exactly the
  items affinity ranks (all items the user did not have in training) with
  affinity.score as the score, so NDCG@k must agree.  Relevant items must
  be rankable for sklearn, so this check uses held-out items known to the
  model (affinity also counts new items in the ideal DCG; the pg_regress
  worked example covers that case).
- MAP: sklearn's average precision is over the whole ranking, not cut at k.
  affinity's AP@k divides by min(k, |R|); with k = the whole catalogue the
  two are the same quantity (mean of precision at each hit rank), so the
  check uses k = number of items.
- precision@k and recall@k are recomputed directly from the same rankings.
"""

import numpy as np

from _common import (Checker, connect, copy_rows, drop_schema, fresh_schema,
                     random_interactions)

SCHEMA = "check_metrics"
# |affinity - scikit-learn| of NDCG, MAP, precision and recall (all float64
# means over 150 users): measured 0 to 2.2e-16; tolerance about 100x.
METRIC_TOL = 3e-14


def main():
    try:
        from sklearn.metrics import average_precision_score, ndcg_score
    except ImportError:
        from _common import skip
        skip("scikit-learn (python3-sklearn) is not installed")
    c = Checker("check_metrics_sklearn")
    conn = connect()
    cur = conn.cursor()
    fresh_schema(cur, SCHEMA)
    rows, W, user_ids, item_ids = random_interactions(5, 150, 40, 1200)
    cur.execute("CREATE TABLE buys (user_id bigint, item_id bigint, weight real)")
    copy_rows(cur, "buys", ["user_id", "item_id", "weight"], rows)
    cur.execute("""CREATE TABLE m AS SELECT affinity.fit(user_id, item_id, weight,
                   '{"factors": 8, "iterations": 6}') AS model FROM buys""")
    rng = np.random.default_rng(3)
    held = []
    for u in range(150):
        unseen = np.nonzero(W[u] == 0)[0]
        for i in rng.choice(unseen, size=min(3, len(unseen)), replace=False):
            held.append((user_ids[u], item_ids[i]))
    cur.execute("CREATE TABLE held (user_id bigint, item_id bigint)")
    copy_rows(cur, "held", ["user_id", "item_id"], held)

    cur.execute("SELECT DISTINCT user_id FROM held ORDER BY 1")
    users = [r[0] for r in cur.fetchall()]
    relevant = {}
    for uid, iid in held:
        relevant.setdefault(uid, set()).add(iid)
    n_items = len(item_ids)
    for k in (5, 10, n_items):
        ndcgs, aps, precs, recs = [], [], [], []
        for uid in users:
            u = user_ids.index(uid)
            cand = [item_ids[i] for i in range(n_items) if W[u, i] == 0]
            cur.execute("SELECT i, affinity.score(model, %s, i) FROM m, unnest(%s::bigint[]) i",
                        (uid, cand))
            sc = dict(cur.fetchall())
            y_true = np.array([[1 if i in relevant[uid] else 0 for i in cand]])
            y_score = np.array([[sc[i] for i in cand]], dtype=np.float64)
            ndcgs.append(ndcg_score(y_true, y_score, k=k))
            aps.append(average_precision_score(y_true[0], y_score[0]))
            order = np.argsort(-y_score[0], kind="stable")[:k]
            hits = y_true[0][order].sum()
            precs.append(hits / k)
            recs.append(hits / y_true.sum())
        cur.execute("SELECT affinity.ranking_metrics(m.model, h.user_id, h.item_id, %s) FROM m, held h", (k,))
        got = cur.fetchone()[0]
        c.check(got["users"] == len(users), "k=%d: users evaluated" % k, "%d" % got["users"])
        c.check(abs(got["ndcg"] - np.mean(ndcgs)) < METRIC_TOL, "k=%d: NDCG equals sklearn ndcg_score" % k,
                "affinity %.8f sklearn %.8f diff %.1e" % (got["ndcg"], np.mean(ndcgs), abs(got["ndcg"] - np.mean(ndcgs))))
        c.check(abs(got["precision"] - np.mean(precs)) < METRIC_TOL and abs(got["recall"] - np.mean(recs)) < METRIC_TOL,
                "k=%d: precision and recall from the same rankings" % k,
                "precision %.6f/%.6f recall %.6f/%.6f diff %.1e/%.1e"
                % (got["precision"], np.mean(precs), got["recall"], np.mean(recs),
                   abs(got["precision"] - np.mean(precs)), abs(got["recall"] - np.mean(recs))))
        if k == n_items:
            c.check(abs(got["map"] - np.mean(aps)) < METRIC_TOL,
                    "k=all: MAP equals mean sklearn average_precision_score",
                    "affinity %.8f sklearn %.8f diff %.1e" % (got["map"], np.mean(aps), abs(got["map"] - np.mean(aps))))
    drop_schema(cur, SCHEMA)
    c.finish()


if __name__ == "__main__":
    main()
