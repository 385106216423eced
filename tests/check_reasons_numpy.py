"""Explanations and fold-in of implicit ALS, checked with numpy.

Source: Hu, Koren, Volinsky 2008, section 5 ("Explaining recommendations"):
for user u with W^u = (Y^T C^u Y + lambda I)^-1, the score of item i is
sum over the user's items j of s^u_ij c_uj p_uj with s^u_ij = y_i^T W^u y_j.
So the contributions that affinity.reasons returns must
  1. equal c_uj * y_i^T W^u y_j computed by numpy from the exported item
     factors, the training weights and the model's options, and
  2. add up to y_i . x_u where x_u = W^u Y^T C^u p(u) is the user's vector
     solved exactly against the current item factors,
and the fold-in of the user's history (affinity.top_items with a basket and
weights) must score items with that same exact x_u.
"""

import numpy as np

from _common import (Checker, connect, copy_rows, drop_schema, fetch_vectors,
                     fresh_schema, random_interactions, align)

SCHEMA = "check_reasons"
LAMBDA = 0.5
ALPHA = 4.0
EPS = 1.0
# Relative errors against numpy, measured: contributions 1.1e-7, their sum
# vs y_i . x_u 2.2e-7, fold-in 1.5e-7; the tolerance is about 100x the largest.
TOL = 2e-5


def main():
    c = Checker("check_reasons_numpy")
    conn = connect()
    cur = conn.cursor()
    fresh_schema(cur, SCHEMA)
    rows, W, user_ids, item_ids = random_interactions(11, 120, 50, 900)
    cur.execute("CREATE TABLE buys (user_id bigint, item_id bigint, weight real)")
    copy_rows(cur, "buys", ["user_id", "item_id", "weight"], rows)
    cur.execute("""CREATE TABLE m AS SELECT affinity.fit(user_id, item_id, weight,
                   '{"factors": 6, "iterations": 8, "solver": "cholesky", "regularization": %g,
                     "alpha": %g, "confidence": "log", "epsilon": %g}') AS model FROM buys"""
                % (LAMBDA, ALPHA, EPS))
    index, _, Y = fetch_vectors(cur, "SELECT (affinity.item_vectors(model)).* FROM m")
    Y = align(item_ids, index, Y)
    G = Y.T @ Y
    f = Y.shape[1]

    worst_contrib = worst_sum = worst_fold = 0.0
    checked = 0
    for u in range(0, 120, 7):
        seen = np.nonzero(W[u])[0]
        conf = 1.0 + ALPHA * np.log1p(W[u, seen] / EPS)     # c = 1 + alpha log(1 + w/eps)
        Ys = Y[seen]
        A = G + Ys.T @ ((conf - 1.0)[:, None] * Ys) + LAMBDA * np.eye(f)
        Winv = np.linalg.inv(A)
        x = Winv @ (Ys.T @ conf)                            # exact solve, p = 1 on seen items
        basket = "ARRAY[%s]::bigint[]" % ",".join(str(item_ids[j]) for j in seen)
        weights = "ARRAY[%s]::real[]" % ",".join(repr(float(W[u, j])) for j in seen)
        cur.execute("SELECT item_id, score FROM m, affinity.top_items(model, %s, 1000, weights => %s,"
                    " exclude_seen => false)" % (basket, weights))
        fold = dict(cur.fetchall())
        for i in range(0, 50, 9):
            cur.execute("SELECT past_item_id, contribution FROM m, affinity.reasons(model, %s, %s, 1000)",
                        (user_ids[u], item_ids[i]))
            got = dict(cur.fetchall())
            want = {item_ids[j]: conf[n] * (Y[i] @ Winv @ Y[j]) for n, j in enumerate(seen)}
            if set(got) != set(want):
                c.check(False, "reasons lists the user's training items",
                        "user %d item %d: got %d items, want %d" % (user_ids[u], item_ids[i], len(got), len(want)))
                continue
            scale = max(1.0, max(abs(v) for v in want.values()))
            worst_contrib = max(worst_contrib, max(abs(got[k] - want[k]) for k in want) / scale)
            total = Y[i] @ x
            worst_sum = max(worst_sum, abs(sum(got.values()) - total) / max(1.0, abs(total)))
            worst_fold = max(worst_fold, abs(fold[item_ids[i]] - total) / max(1.0, abs(total)))
            checked += 1
    c.check(checked > 50, "pairs checked", "%d (user, item) pairs" % checked)
    c.check(worst_contrib < TOL, "each contribution equals c_uj y_i^T W^u y_j (numpy)",
            "max relative error %.2e (tol %.0e)" % (worst_contrib, TOL))
    c.check(worst_sum < TOL, "contributions add up to y_i . x_u for the exactly solved x_u",
            "max relative error %.2e (tol %.0e)" % (worst_sum, TOL))
    c.check(worst_fold < TOL, "fold-in of the user's history scores with the same x_u",
            "max relative error %.2e (tol %.0e)" % (worst_fold, TOL))
    drop_schema(cur, SCHEMA)
    c.finish()


if __name__ == "__main__":
    main()
