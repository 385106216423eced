#!/usr/bin/python3
"""Implicit ALS with alpha = 0 reaches the known global optimum.

With alpha = 0 every confidence c_ui = 1 + 0 * f(w) is 1, so the loss of
Hu, Koren, Volinsky (2008) becomes

    L(X, Y) = ||P - X Y^T||_F^2 + lambda (||X||_F^2 + ||Y||_F^2),

P the 0/1 matrix of observed pairs, X (m x f), Y (n x f).  Its global minimum
has a closed form in the singular values s_1 >= s_2 >= ... of P:

    L* = sum_{j <= f} g(s_j) + sum_{j > f} s_j^2,
    g(s) = 2 lambda s - lambda^2   if s > lambda,
           s^2                     otherwise.

Derivation (the variational form of the nuclear norm: Srebro, Rennie,
Jaakkola 2005; the soft-thresholded SVD: Mazumder, Hastie, Tibshirani 2010):

1. For a fixed product Z = X Y^T of rank <= f,
   min {||X||^2 + ||Y||^2 : X Y^T = Z} = 2 ||Z||_*  (sum of singular values).
   ">=": ||Z||_* = sum_j u_j^T X Y^T v_j <= ||X|| ||Y|| <= (||X||^2 + ||Y||^2)/2
   (singular pairs u_j, v_j of Z; Cauchy-Schwarz on the trace inner product,
   then AM-GM).  "=": X = U S^{1/2}, Y = V S^{1/2} from the SVD Z = U S V^T.
   So min L = min over rank(Z) <= f of ||P - Z||^2 + 2 lambda ||Z||_*.
2. Both terms are unitarily invariant, and by von Neumann's trace inequality
   ||P - Z||^2 is smallest, for given singular values z_j of Z, when Z shares
   the singular vectors of P.  The problem splits per singular value:
   minimise sum_j (s_j - z_j)^2 + 2 lambda z_j over z_j >= 0 with at most f of
   them non-zero.
3. One term: d/dz = 2(z - s) + 2 lambda = 0 gives z = s - lambda, feasible
   when s > lambda, with value lambda^2 + 2 lambda (s - lambda) = 2 lambda s -
   lambda^2; otherwise z = 0 with value s^2.  So each term is g(s_j) if it may
   be non-zero, s_j^2 if not.
4. Letting term j be non-zero saves s_j^2 - g(s_j) = (s_j - lambda)^2 when
   s_j > lambda (0 otherwise), which grows with s_j: the f largest singular
   values take the non-zero slots.  This gives L* above.

ALS is block coordinate descent on this non-convex L.  From a random start it
is expected to reach L* when s_f > s_{f+1}, at a rate set by the gaps between
singular values; the test fits long enough on a matrix with visible gaps and
compares the recorded final loss with L*.
"""

import json

import numpy as np

import _common as C

SCHEMA = "affinity_check_closed_form"
N_USERS, N_ITEMS, DENSITY = 60, 40, 0.2
SEED = 424242            # numpy seed of the invented matrix
# Relative gap of the final recorded loss to L*: measured 1.5e-8 to 4.0e-8
# (float4 factors after enough sweeps to converge); tolerance about 100x.
LOSS_TOL = 4e-6
# Recorded loss vs numpy's recomputation from the exported factors: measured
# 3.3e-9 to 4.0e-8; tolerance about 100x.
RECOMPUTE_TOL = 4e-6
# Singular values of X Y^T vs max(s_j - lambda, 0): measured max abs error
# 1.6e-8 to 9.1e-7 (values up to 10.7); tolerance about 100x.
SV_TOL = 1e-4


def closed_form_optimum(s, f, lam):
    """L* from the derivation in the module docstring."""
    head = s[:f]
    g = np.where(head > lam, 2 * lam * head - lam * lam, head * head)
    return float(g.sum() + np.sum(s[f:] ** 2))


def hkv_loss_alpha0(X, Y, P, lam):
    R = P - X @ Y.T
    return float(np.sum(R * R) + lam * (np.sum(X * X) + np.sum(Y * Y)))


def invent_matrix():
    rng = np.random.default_rng(SEED)
    P = (rng.random((N_USERS, N_ITEMS)) < DENSITY).astype(np.float64)
    # every user and item present at least once, so the model's rows and
    # columns are exactly those of P
    for u in np.where(P.sum(1) == 0)[0]:
        P[u, rng.integers(N_ITEMS)] = 1
    for i in np.where(P.sum(0) == 0)[0]:
        P[rng.integers(N_USERS), i] = 1
    # weights are irrelevant when alpha = 0; vary them to show it
    W = P * rng.integers(1, 6, size=P.shape)
    return P, W


def main():
    P, W = invent_matrix()
    user_ids = list(range(1, N_USERS + 1))
    item_ids = list(range(101, 101 + N_ITEMS))
    s = np.linalg.svd(P, compute_uv=False)   # singular values, numpy
    print("invented 0/1 matrix %d x %d, %d ones; singular values: %s"
          % (N_USERS, N_ITEMS, int(P.sum()), " ".join("%.4f" % v for v in s[:12])))

    conn = C.connect()
    cur = conn.cursor()
    C.fresh_schema(cur, SCHEMA)
    cur.execute("CREATE TABLE interactions (user_id bigint, item_id bigint, weight real)")
    C.copy_rows(cur, "interactions", ["user_id", "item_id", "weight"],
                [(user_ids[u], item_ids[i], int(W[u, i])) for u, i in zip(*np.nonzero(P))])
    ck = C.Checker("check_closed_form")

    # (factors, lambda): one case with every kept singular value above lambda,
    # one where lambda sits between s_3 and s_4 so that some of the f kept
    # components must be thresholded to zero (the "s <= lambda" branch).
    lam2 = float((s[2] + s[3]) / 2)
    cases = [(4, 0.5), (8, lam2)]
    for f, lam in cases:
        opt = closed_form_optimum(s, f, lam)
        print("f=%d lambda=%.4f: s_f=%.4f s_f+1=%.4f, closed-form optimum %.8g"
              % (f, lam, s[f - 1], s[f], opt))
        for solver, iters in (("cholesky", 200), ("cg", 600)):
            label = "f=%d lambda=%.3g %s" % (f, lam, solver)
            opts = {"method": "implicit_als", "factors": f, "iterations": iters,
                    "regularization": lam, "alpha": 0, "solver": solver, "seed": 11}
            cur.execute("DROP TABLE IF EXISTS m")
            cur.execute("CREATE TABLE m AS SELECT affinity.fit(user_id, item_id, weight, %s::jsonb)"
                        " AS model FROM interactions", (json.dumps(opts),))
            d = C.describe(cur, "(SELECT model FROM m)")
            loss = [float(v) for v in d["loss"]]
            uindex, _, Xe = C.fetch_vectors(
                cur, "SELECT user_id, vector FROM affinity.user_vectors((SELECT model FROM m))")
            iindex, _, Ye = C.fetch_vectors(
                cur, "SELECT item_id, vector FROM affinity.item_vectors((SELECT model FROM m))")
            X = C.align(user_ids, uindex, Xe)
            Y = C.align(item_ids, iindex, Ye)
            mine = hkv_loss_alpha0(X, Y, P, lam)
            gap = (loss[-1] - opt) / opt
            print("%s: loss after sweeps 1, 10, 50, last: %.8g %.8g %.8g %.8g; "
                  "numpy from exported factors %.8g; fit_seconds %s"
                  % (label, loss[0], loss[min(9, len(loss) - 1)], loss[min(49, len(loss) - 1)],
                     loss[-1], mine, d.get("fit_seconds")))
            ck.check(abs(mine - loss[-1]) / mine < RECOMPUTE_TOL,
                     label + ": recorded loss matches numpy recomputation",
                     "rel diff %.2e (tol %.0e)" % (abs(mine - loss[-1]) / mine, RECOMPUTE_TOL))
            # No fit can go below the global minimum beyond float rounding
            # (measured -4.0e-8 for cg; allowed -LOSS_TOL).
            ck.check(gap > -LOSS_TOL, label + ": loss not below the closed-form optimum",
                     "rel gap %+.3e" % gap)
            ck.check(abs(gap) < LOSS_TOL, label + ": final loss equals closed-form optimum",
                     "recorded %.8g optimum %.8g rel gap %+.3e (tol %.0e)"
                     % (loss[-1], opt, gap, LOSS_TOL))
            # The fitted product should be the soft-thresholded rank-f SVD of P
            # (Mazumder, Hastie, Tibshirani 2010): its singular values are
            # max(s_j - lambda, 0) for j <= f.
            z = np.linalg.svd(X @ Y.T, compute_uv=False)[:f]
            want = np.maximum(s[:f] - lam, 0)
            zerr = float(np.max(np.abs(z - want)))
            ck.check(zerr < SV_TOL, label + ": singular values of X Y^T are soft-thresholded s_j",
                     "got %s want %s max abs err %.2e (tol %.0e)"
                     % (" ".join("%.4f" % v for v in z), " ".join("%.4f" % v for v in want), zerr, SV_TOL))

    C.drop_schema(cur, SCHEMA)
    conn.close()
    ck.finish()


if __name__ == "__main__":
    main()
