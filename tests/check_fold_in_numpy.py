#!/usr/bin/python3
"""Fold-in of a basket (affinity.top_items with a basket) for implicit ALS,
checked against an exact solve with numpy.

Source: Hu, Koren, Volinsky 2008, eq. 4: for fixed item factors Y the best
vector of a user with confidences c_j and preferences p_j (1 on the items
bought, 0 elsewhere) solves

    (Y^T C Y + lambda I) x = Y^T C p,   C = diag(c_j), c_j = 1 off the basket,

and the user's score of item i is y_i . x.  numpy forms Y^T C Y directly over
every item (not through the Gram matrix plus a correction, as the extension
does) and solves the system in float64 with the item vectors that
affinity.item_vectors exports and the options that affinity.describe reports
(confidence, alpha, epsilon, regularization).  Every item's score of every
basket (random sizes, weights, repeated and unknown items) must match, for
both confidence functions.
"""

import json

import numpy as np

from _common import (Checker, align, connect, copy_rows, describe, drop_schema,
                     fetch_vectors, fresh_schema, random_interactions)

SCHEMA = "check_fold_in"
N_USERS, N_ITEMS, N_PAIRS = 200, 80, 2000
BASKETS = 40                    # per model
UNKNOWN_ITEM = 7                # not a key of the invented data (keys are 50000 + 3 i)
# Largest |score - numpy| / max(1, |numpy score|) over every item of every
# basket: measured 3.2e-7 (log) and 1.8e-7 (linear) with float4 item
# vectors, a float4 score and a float64 Cholesky solve.  The tolerance is
# about 100x the larger; a wrong alpha, epsilon, lambda or confidence function, or
# a basket weight summed wrongly, moves scores by 1e-3 and more on this data.
TOL = 3e-5

MODELS = {
    "log": {"factors": 8, "iterations": 6, "solver": "cholesky", "confidence": "log",
            "alpha": 6.0, "epsilon": 0.5, "regularization": 1.5},
    "linear": {"factors": 6, "iterations": 6, "solver": "cg", "confidence": "linear",
               "alpha": 3.0, "regularization": 0.4},
}


def confidence(kind, alpha, epsilon, w):
    """c = 1 + alpha w (linear) or 1 + alpha log(1 + w / epsilon) (log); API.md."""
    if kind == "linear":
        return 1.0 + alpha * w
    return 1.0 + alpha * np.log1p(w / epsilon)


def exact_scores(Y, opts, basket_idx, basket_w):
    """Scores y_i . x of every item for the basket, x from the normal equations
    formed over all items (float64)."""
    m, f = Y.shape
    w = np.zeros(m)
    for j, wt in zip(basket_idx, basket_w):
        w[j] += wt                       # repeated items sum their weights
    c = np.ones(m)
    p = np.zeros(m)
    on = w > 0
    c[on] = confidence(opts["confidence"], float(opts["alpha"]), float(opts["epsilon"]), w[on])
    p[on] = 1.0
    A = Y.T @ (c[:, None] * Y) + float(opts["regularization"]) * np.eye(f)
    x = np.linalg.solve(A, Y.T @ (c * p))
    return Y @ x


def main():
    ck = Checker("check_fold_in_numpy")
    conn = connect()
    cur = conn.cursor()
    fresh_schema(cur, SCHEMA)
    rows, _, _, item_ids = random_interactions(23, N_USERS, N_ITEMS, N_PAIRS, item_base=50000)
    cur.execute("CREATE TABLE buys (user_id bigint, item_id bigint, weight real)")
    copy_rows(cur, "buys", ["user_id", "item_id", "weight"], rows)
    rng = np.random.default_rng(5)
    for label, options in MODELS.items():
        cur.execute("CREATE TABLE m_%s AS SELECT affinity.fit(user_id, item_id, weight, %%s::jsonb)"
                    " AS model FROM buys" % label, (json.dumps(options),))
        opts = describe(cur, "(SELECT model FROM m_%s)" % label)["options"]
        ck.check(all(opts[k] == v for k, v in options.items()),
                 label + ": describe reports the options fitted", json.dumps(opts, sort_keys=True))
        index, _, Y = fetch_vectors(cur, "SELECT (affinity.item_vectors(model)).* FROM m_%s" % label)
        Y = align(item_ids, index, Y)
        worst = 0.0
        worst_at = ""
        compared = 0
        for b in range(BASKETS):
            size = int(rng.integers(1, 12))
            idx = [int(j) for j in rng.choice(N_ITEMS, size=size, replace=False)]
            if b % 4 == 1:
                idx.append(idx[0])               # a repeated item
            wts = [float(rng.integers(1, 6)) for _ in idx]
            keys = [item_ids[j] for j in idx]
            if b % 5 == 2:                       # an unknown item is ignored
                keys.append(UNKNOWN_ITEM)
                wts.append(3.0)
            cur.execute("SELECT item_id, score FROM m_%s, affinity.top_items(model, %%s::bigint[], %d,"
                        " weights => %%s::real[], exclude_seen => false)" % (label, N_ITEMS),
                        (keys, wts))
            got = dict(cur.fetchall())
            want = exact_scores(Y, opts, idx, wts[:len(idx)])
            if len(got) != N_ITEMS:
                ck.check(False, label + ": every item scored", "basket %d: %d rows" % (b, len(got)))
                continue
            for n, key in enumerate(item_ids):
                err = abs(got[key] - want[n]) / max(1.0, abs(want[n]))
                if err > worst:
                    worst, worst_at = err, "basket %d item %d" % (b, key)
                compared += 1
        ck.check(compared == BASKETS * N_ITEMS, label + ": scores compared",
                 "%d (%d baskets x %d items)" % (compared, BASKETS, N_ITEMS))
        ck.check(worst <= TOL, label + ": basket scores equal y_i . x of numpy's exact solve",
                 "max relative error %.2e at %s (tol %.0e)" % (worst, worst_at, TOL))
    # a negative control: the same solve with a wrong alpha is far outside the tolerance
    opts = dict(opts, alpha=float(opts["alpha"]) * 1.1)
    off = exact_scores(Y, opts, idx, wts[:len(idx)])
    gap = max(abs(got[key] - off[n]) / max(1.0, abs(off[n])) for n, key in enumerate(item_ids))
    ck.check(gap > 100 * TOL, "a 10% wrong alpha is detected", "max relative difference %.2e" % gap)
    drop_schema(cur, SCHEMA)
    ck.finish()


if __name__ == "__main__":
    main()
