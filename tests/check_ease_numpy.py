#!/usr/bin/python3
"""The ease method agrees with numpy's closed form of EASE.

Steck 2019 ("Embarrassingly Shallow Autoencoders for Sparse Data", WWW 2019,
section 3) gives the item-item weights in closed form: with X the binary
users x items matrix of the training pairs,

    P = (X^T X + lambda I)^-1,    B = I - P diag(1 / diag P),

which makes diag(B) = 0, and a user's scores are the row of X B.  numpy
computes this in float64 from the same invented data (numpy.linalg.inv);
the model stores B in float4.

Checked through SQL, since there is no export function for item weights:
- affinity.score(model, user, item) for every (user, item) pair equals
  (X B)[user, item] within an absolute 1e-5;
- items_like(model, item, k) lists the k largest entries of row `item` of
  B (the item itself left out), in order, with those values within 1e-6;
- top_items(model, user, k) lists the k best unseen items of X B;
- the summed weights are not used (binary X, as in the paper): a fit on the
  same pairs with other weights gives the same scores;
- a basket with weights scores item j as sum_i w_i B[i, j] (the basket as
  a weighted row x, scores x B), repeated items summing their weights;
- on a second matrix of 700 items (the inverse works in blocks of 256
  items, so this crosses block borders and ends on a partial block), the
  full rows of B from items_like and the scores of a sample of users.
"""

import json

import numpy as np

import _common as C

SCHEMA = "affinity_check_ease"
SEED = 2019              # numpy seed of the invented data
N_USERS, N_ITEMS, N_PAIRS = 200, 60, 1500
LAMBDA = 20.0            # regularization of the fit (small, so B is far from 0)
K = 8
BIG_USERS, BIG_ITEMS, BIG_PAIRS, BIG_LAMBDA = 1500, 700, 15000, 10.0
# score vs numpy: |got - ref| <= abs + rel * |ref|; measured max abs error
# 8.7e-8 to 8.9e-8 (scores in [-0.27, 1.04]); the tolerance is about 100x.
SCORE_ABS_TOL = 1e-5
SCORE_REL_TOL = 0.0
# items_like similarity vs the numpy entry of B: measured max abs error
# 6.8e-9 (60 items) and 1.0e-8 (700 items); tolerance about 100x.
WEIGHT_TOL = 1e-6
TIE_TOL = 1e-6           # reference values closer than this count as a tie


def ease_weights(X, lam):
    """Steck 2019, closed form: B = I - P diag(1/diag P), P = (X^T X + lam I)^-1."""
    G = X.T @ X + lam * np.eye(X.shape[1])
    P = np.linalg.inv(G)
    B = -P / np.diag(P)[None, :]
    np.fill_diagonal(B, 0.0)
    return B


def ranked(values, ids, skip):
    """Indices by (-value, key), the order the serving functions document."""
    order = [n for n in range(len(ids)) if n not in skip]
    return sorted(order, key=lambda n: (-values[n], ids[n]))


def same_ranking(got_ids, ref, values, index, ids):
    """Positions where got and ref differ by more than a near-tie."""
    bad = []
    for pos, (g, r) in enumerate(zip(got_ids, ref)):
        if g not in index:
            bad.append((pos + 1, g, ids[r]))
        elif g != ids[r] and abs(values[index[g]] - values[r]) >= TIE_TOL:
            bad.append((pos + 1, g, ids[r]))
    return bad


def fit(cur, table, opts):
    cur.execute("CREATE TABLE %s AS SELECT affinity.fit(user_id, item_id, weight, %%s::jsonb)"
                " AS model FROM interactions" % table, (json.dumps(opts),))


def check_scores(ck, cur, table, S, user_ids, item_ids, label):
    """score() of every pair against the reference matrix S."""
    cur.execute("SELECT u, i, affinity.score(m.model, u, i) FROM %s m, unnest(%%s::bigint[]) u, "
                "unnest(%%s::bigint[]) i" % table, (user_ids, item_ids))
    got = cur.fetchall()
    uix = {k: n for n, k in enumerate(user_ids)}
    iix = {k: n for n, k in enumerate(item_ids)}
    G = np.full(S.shape, np.nan)
    for u, i, s in got:
        if s is not None:
            G[uix[u], iix[i]] = s
    missing = int(np.isnan(G).sum())
    err = np.abs(G - S)
    # share of the allowed error used by the worst pair (<= 1 passes)
    used = err / (SCORE_ABS_TOL + SCORE_REL_TOL * np.abs(S))
    worst = float(np.nanmax(used)) if missing < G.size else float("inf")
    ck.check(missing == 0 and worst <= 1.0,
             "%s: score() of all %d pairs equals numpy's X B" % (label, S.size),
             "%d missing, max abs err %.2e, worst pair at %.1e of its tolerance "
             "(%.0e + %.0e |ref|), scores in [%.3f, %.3f]"
             % (missing, float(np.nanmax(err)), worst, SCORE_ABS_TOL, SCORE_REL_TOL,
                S.min(), S.max()))
    return G


def check_items_like(ck, cur, B, item_ids, index, probes):
    worst = 0.0
    bad_all = []
    for n in probes:
        cur.execute("SELECT item_id, similarity, rank FROM affinity.items_like("
                    "(SELECT model FROM m), %s, %s) ORDER BY rank", (item_ids[n], K))
        got = cur.fetchall()
        ref = ranked(B[n], item_ids, {n})[:K]
        if not ck.check(len(got) == K, "items_like(%d): %d rows" % (item_ids[n], K),
                        "got %d" % len(got), quiet=True):
            continue
        bad = same_ranking([g[0] for g in got], ref, B[n], index, item_ids)
        bad_all += bad
        worst = max([worst] + [abs(g[1] - B[n, index[g[0]]]) for g in got if g[0] in index])
    ck.check(not bad_all and worst < WEIGHT_TOL,
             "items_like of %d items: the top %d of B's row, in order, with B's values"
             % (len(probes), K),
             "max abs err %.2e (tol %.0e)%s"
             % (worst, WEIGHT_TOL, "; wrong (rank, got, want): %r" % bad_all[:3] if bad_all else ""))


def check_top_items(ck, cur, S, X, user_ids, item_ids, index, probes):
    bad_all = []
    for u in probes:
        cur.execute("SELECT item_id, score, rank FROM affinity.top_items("
                    "(SELECT model FROM m), %s, %s) ORDER BY rank", (user_ids[u], K))
        got = cur.fetchall()
        seen = set(np.nonzero(X[u])[0])
        ref = ranked(S[u], item_ids, seen)[:K]
        if len(got) != len(ref):
            bad_all.append((user_ids[u], "rows", len(got), len(ref)))
            continue
        bad_all += same_ranking([g[0] for g in got], ref, S[u], index, item_ids)
    ck.check(not bad_all, "top_items of %d users: the %d best unseen items of X B"
             % (len(probes), K), repr(bad_all[:3]) if bad_all else "")


def check_weighted_baskets(ck, cur, B, item_ids, index):
    """Baskets with weights: scores = x B with x the weighted basket row."""
    rng = np.random.default_rng(SEED + 4)
    worst = 0.0
    bad = []
    for t in range(10):
        picks = list(rng.choice(len(item_ids), 4, replace=False))
        picks.append(picks[0])                   # a repeat: weights summed
        w = [float(x) for x in rng.uniform(0.1, 4.0, size=len(picks))]
        x = np.zeros(len(item_ids))
        for n, wi in zip(picks, w):
            x[n] += wi
        ref = x @ B
        cur.execute("SELECT item_id, score FROM affinity.top_items((SELECT model FROM m), %s::bigint[],"
                    " %s, exclude_seen => false, weights => %s::real[])",
                    ([item_ids[n] for n in picks], len(item_ids), w))
        got = cur.fetchall()
        if len(got) != len(item_ids):
            bad.append((t, "rows", len(got)))
            continue
        err = max(abs(sc - ref[index[j]]) for j, sc in got)
        worst = max(worst, err)
        if err > SCORE_ABS_TOL + SCORE_REL_TOL:
            bad.append((t, err))
    ck.check(not bad, "10 weighted baskets (one item repeated): scores equal numpy's x B",
             "max abs err %.2e (tol %.0e)%s" % (worst, SCORE_ABS_TOL, "; bad %r" % bad[:3] if bad else ""))


def invent_wide(seed, n_users, n_items, n_pairs):
    """A larger invented matrix, drawn in bulk (skewed item popularity, every
    user and item present, weights 1..5); returns rows, W and the keys."""
    rng = np.random.default_rng(seed)
    pop = 1.0 / np.arange(1, n_items + 1) ** 0.7
    pop /= pop.sum()
    P = np.zeros((n_users, n_items), dtype=bool)
    P[np.arange(n_users), rng.choice(n_items, n_users, p=pop)] = True
    P[rng.integers(n_users, size=n_items), np.arange(n_items)] = True
    P[rng.integers(n_users, size=n_pairs), rng.choice(n_items, n_pairs, p=pop)] = True
    W = P * rng.integers(1, 6, size=P.shape)
    user_ids = [10 + 3 * u for u in range(n_users)]
    item_ids = [7000 + 5 * i for i in range(n_items)]
    rows = [(user_ids[u], item_ids[i], int(W[u, i])) for u, i in zip(*np.nonzero(W))]
    return rows, W, user_ids, item_ids


def check_blocked(ck, cur):
    """A catalogue of several inversion blocks: rows of B and sample scores."""
    rows, W, user_ids, item_ids = invent_wide(SEED + 2, BIG_USERS, BIG_ITEMS, BIG_PAIRS)
    X = (W > 0).astype(np.float64)
    B = ease_weights(X, BIG_LAMBDA)      # reference: numpy, Steck's closed form
    index = {k: n for n, k in enumerate(item_ids)}
    cur.execute("CREATE TABLE big_interactions (user_id bigint, item_id bigint, weight real)")
    C.copy_rows(cur, "big_interactions", ["user_id", "item_id", "weight"], rows)
    cur.execute("CREATE TABLE big AS SELECT affinity.fit(user_id, item_id, weight, %s::jsonb)"
                " AS model FROM big_interactions",
                (json.dumps({"method": "ease", "regularization": BIG_LAMBDA, "threads": 2}),))
    rng = np.random.default_rng(SEED + 3)
    probes = sorted(set(int(n) for n in rng.choice(BIG_ITEMS, 20, replace=False)) | {0, BIG_ITEMS - 1})
    cur.execute("SELECT i, l.item_id, l.similarity FROM big, unnest(%s::bigint[]) i, "
                "affinity.items_like(big.model, i, %s) l", ([item_ids[n] for n in probes], BIG_ITEMS))
    got = np.full((len(probes), BIG_ITEMS), np.nan)
    row_of = {item_ids[n]: r for r, n in enumerate(probes)}
    for i, j, s in cur.fetchall():
        got[row_of[i], index[j]] = s
    want = B[probes]
    for r, n in enumerate(probes):
        got[r, n] = 0.0 if np.isnan(got[r, n]) else np.inf    # the item itself is never listed
    missing = int(np.isnan(got).sum())
    err = float(np.max(np.abs(got - want))) if missing == 0 else float("inf")
    ck.check(missing == 0 and err < WEIGHT_TOL,
             "%d items, %d pairs: full rows of B (%d x %d entries) equal numpy's"
             % (BIG_ITEMS, len(rows), len(probes), BIG_ITEMS),
             "%d missing, max abs err %.2e (tol %.0e), |B| max %.3f"
             % (missing, err, WEIGHT_TOL, float(np.abs(want).max())))
    users = sorted(int(u) for u in rng.choice(BIG_USERS, 40, replace=False))
    S = X[users] @ B
    check_scores(ck, cur, "big", S, [user_ids[u] for u in users], item_ids,
                 "%d items, %d users" % (BIG_ITEMS, len(users)))


def main():
    rows, W, user_ids, item_ids = C.random_interactions(SEED, N_USERS, N_ITEMS, N_PAIRS)
    X = (W > 0).astype(np.float64)
    B = ease_weights(X, LAMBDA)          # reference: numpy, Steck's closed form
    S = X @ B
    index = {k: n for n, k in enumerate(item_ids)}

    conn = C.connect()
    cur = conn.cursor()
    C.fresh_schema(cur, SCHEMA)
    cur.execute("CREATE TABLE interactions (user_id bigint, item_id bigint, weight real)")
    C.copy_rows(cur, "interactions", ["user_id", "item_id", "weight"], rows)
    fit(cur, "m", {"method": "ease", "regularization": LAMBDA, "threads": 2})
    ck = C.Checker("check_ease_numpy")
    d = C.describe(cur, "(SELECT model FROM m)")
    ck.check(d.get("method") == "ease" and d.get("items") == N_ITEMS and d.get("users") == N_USERS,
             "describe: method ease over all users and items",
             "%s, %s users, %s items" % (d.get("method"), d.get("users"), d.get("items")))
    print("reference: %d x %d, %d pairs, lambda %g; |B| max %.3f"
          % (N_USERS, N_ITEMS, int(X.sum()), LAMBDA, float(np.abs(B).max())))

    got = check_scores(ck, cur, "m", S, user_ids, item_ids, "ease")
    rng = np.random.default_rng(SEED + 1)
    check_items_like(ck, cur, B, item_ids, index, list(rng.choice(N_ITEMS, 12, replace=False)))
    check_top_items(ck, cur, S, X, user_ids, item_ids, index,
                    list(rng.choice(N_USERS, 12, replace=False)))
    check_weighted_baskets(ck, cur, B, item_ids, index)

    # binary X: other weights on the same pairs change nothing
    cur.execute("UPDATE interactions SET weight = weight * 7 + 1")
    fit(cur, "m_reweighted", {"method": "ease", "regularization": LAMBDA, "threads": 1})
    G2 = check_scores(ck, cur, "m_reweighted", S, user_ids, item_ids, "ease, other weights")
    # binary X and a per-block Gram: the same bits (measured difference 0)
    ck.check(float(np.nanmax(np.abs(G2 - got))) == 0.0,
             "other weights and one thread give the same scores",
             "max diff %.2e" % float(np.nanmax(np.abs(G2 - got))))

    check_blocked(ck, cur)

    C.drop_schema(cur, SCHEMA)
    conn.close()
    ck.finish()


if __name__ == "__main__":
    main()
