#!/usr/bin/python3
"""The item_knn method agrees with scikit-learn's cosine similarity.

item_knn compares the columns of the confidence-weighted matrix C, which
holds c_ui = 1 + alpha * f(w_ui) on the observed pairs (w_ui the summed
weight, f(w) = log(1 + w / epsilon) or f(w) = w) and 0 on the unobserved
ones.  The reference is sklearn.metrics.pairwise.cosine_similarity of the
columns of C, built with numpy from the same invented data.

Checked through SQL:
- with neighbors >= the number of items (nothing cut), items_like(model,
  item, all) lists exactly the items with a positive reference similarity,
  the item itself left out, in order (similarity descending, item_id
  ascending on ties), with similarities within 2e-6; for the log and the
  linear confidence;
- score(model, user, item) for every pair equals the sum of the reference
  similarities between the item and the user's training items;
- with neighbors = 3, every item keeps exactly its reference top 3, and the
  scores use only those.
"""

import json

import numpy as np
from sklearn.metrics.pairwise import cosine_similarity

import _common as C

SCHEMA = "affinity_check_item_knn"
SEED = 31337             # numpy seed of the invented data
N_USERS, N_ITEMS, N_PAIRS = 300, 70, 2000
# similarity returned vs scikit-learn: measured max abs error 1.6e-8 to
# 1.8e-8; tolerance about 100x.
SIM_TOL = 2e-6
# summed similarities vs the reference sum (absolute, scores up to 2.9):
# measured 2.4e-7 to 3.0e-7; tolerance about 100x.
SCORE_TOL = 3e-5
TIE_TOL = 1e-6           # reference similarities closer than this count as a tie


def confidence_matrix(W, kind, alpha, eps):
    """c_ui = 1 + alpha f(w_ui) on observed pairs, 0 elsewhere."""
    f = np.log1p(W / eps) if kind == "log" else W
    return np.where(W > 0, 1.0 + alpha * f, 0.0)


def reference_lists(S, ids, k):
    """Per item: the other items with positive similarity by (-sim, key), the first k."""
    out = []
    for i in range(S.shape[0]):
        js = [j for j in range(S.shape[0]) if j != i and S[i, j] > 0]
        out.append(sorted(js, key=lambda j: (-S[i, j], ids[j]))[:k])
    return out


def fetch_lists(cur, table, item_ids):
    cur.execute("SELECT i, l.item_id, l.similarity, l.rank FROM %s m, unnest(%%s::bigint[]) i, "
                "affinity.items_like(m.model, i, %%s) l ORDER BY i, l.rank" % table,
                (item_ids, len(item_ids)))
    lists = {i: [] for i in item_ids}
    for i, j, s, r in cur.fetchall():
        lists[i].append((j, s, r))
    return lists


def compare_lists(ck, label, lists, S, ref, item_ids, index):
    """Every item's list against the reference: same items, order, values."""
    bad = []
    worst = 0.0
    rows = 0
    for n, i in enumerate(item_ids):
        got = lists[i]
        rows += len(got)
        want = ref[n]
        if len(got) != len(want) or [g[2] for g in got] != list(range(1, len(got) + 1)):
            bad.append((i, "rows", len(got), len(want)))
            continue
        for (g, s, r), w in zip(got, want):
            if g not in index or (g != item_ids[w] and abs(S[n, index[g]] - S[n, w]) >= TIE_TOL):
                bad.append((i, r, g, item_ids[w]))
                break
            worst = max(worst, abs(s - S[n, index[g]]))
    ck.check(not bad and worst < SIM_TOL,
             "%s: all %d neighbour lists equal scikit-learn's (%d pairs)"
             % (label, len(item_ids), rows),
             "max abs sim err %.2e (tol %.0e)%s"
             % (worst, SIM_TOL, "; wrong (item, rank, got, want): %r" % bad[:3] if bad else ""))


def check_scores(ck, label, cur, table, W, S_kept, user_ids, item_ids):
    """score(u, j) = sum over u's training items i of the kept sim(i, j)."""
    ref = (W > 0).astype(np.float64) @ S_kept
    cur.execute("SELECT u, i, affinity.score(m.model, u, i) FROM %s m, unnest(%%s::bigint[]) u, "
                "unnest(%%s::bigint[]) i" % table, (user_ids, item_ids))
    uix = {k: n for n, k in enumerate(user_ids)}
    iix = {k: n for n, k in enumerate(item_ids)}
    got = np.full(ref.shape, np.nan)
    for u, i, s in cur.fetchall():
        if s is not None:
            got[uix[u], iix[i]] = s
    err = float(np.nanmax(np.abs(got - ref)))
    missing = int(np.isnan(got).sum())
    ck.check(missing == 0 and err < SCORE_TOL,
             "%s: score() of all %d pairs is the sum of the kept similarities" % (label, ref.size),
             "%d missing, max abs err %.2e (tol %.0e), scores up to %.3f"
             % (missing, err, SCORE_TOL, float(ref.max())))


def kept_matrix(S, ref):
    """S restricted to each row's kept neighbours (row i: the items i votes for)."""
    K = np.zeros_like(S)
    for i, js in enumerate(ref):
        K[i, js] = S[i, js]
    return K


def main():
    rows, W, user_ids, item_ids = C.random_interactions(SEED, N_USERS, N_ITEMS, N_PAIRS)
    index = {k: n for n, k in enumerate(item_ids)}
    conn = C.connect()
    cur = conn.cursor()
    C.fresh_schema(cur, SCHEMA)
    cur.execute("CREATE TABLE interactions (user_id bigint, item_id bigint, weight real)")
    C.copy_rows(cur, "interactions", ["user_id", "item_id", "weight"], rows)
    ck = C.Checker("check_item_knn_sklearn")

    cases = [("log", {"confidence": "log", "alpha": 5.0, "epsilon": 2.0}),
             ("linear", {"confidence": "linear", "alpha": 0.5})]
    for n, (label, conf) in enumerate(cases):
        C_ = confidence_matrix(W, conf["confidence"], conf["alpha"], conf.get("epsilon", 1.0))
        S = cosine_similarity(C_.T)      # reference: scikit-learn, item columns
        for k, threads in ((N_ITEMS + 10, 2), (3, 1)):
            table = "m_%d_%d" % (n, k)
            opts = dict(conf, method="item_knn", neighbors=k, threads=threads)
            cur.execute("CREATE TABLE %s AS SELECT affinity.fit(user_id, item_id, weight, %%s::jsonb)"
                        " AS model FROM interactions" % table, (json.dumps(opts),))
            ref = reference_lists(S, item_ids, k)
            name = "%s confidence, neighbors %d" % (label, k)
            compare_lists(ck, name, fetch_lists(cur, table, item_ids), S, ref, item_ids, index)
            check_scores(ck, name, cur, table, W, kept_matrix(S, ref), user_ids, item_ids)
            if k == 3:
                # items_like asked for 10 gives at most the 3 kept (fewer only
                # when fewer items share a user with it)
                cur.execute("SELECT i, count(l.item_id) FROM %s m CROSS JOIN unnest(%%s::bigint[]) i "
                            "LEFT JOIN LATERAL affinity.items_like(m.model, i, 10) l ON true "
                            "GROUP BY i" % table, (item_ids,))
                counts = dict(cur.fetchall())
                full = reference_lists(S, item_ids, N_ITEMS)
                wrong = [i for n, i in enumerate(item_ids) if counts.get(i) != min(3, len(full[n]))]
                ck.check(not wrong, name + ": each item keeps exactly min(3, co-occurring items)",
                         "%d items with 3, %d with fewer; wrong: %r"
                         % (sum(1 for c in counts.values() if c == 3),
                            sum(1 for c in counts.values() if c < 3), wrong[:5]))

    C.drop_schema(cur, SCHEMA)
    conn.close()
    ck.finish()


if __name__ == "__main__":
    main()
