#!/usr/bin/python3
"""Method content against scikit-learn's Ridge, on invented purchases.

The loss.  For user u, with the catalogue's profile matrix Q (n items x F
features, as the profiles value stores it), preference p_ui = 1 on the
items u bought and 0 elsewhere, confidence c_ui = 1 + alpha f(w_ui) on
bought items and 1 elsewhere (Hu, Koren, Volinsky 2008; f(w) = w for
"linear", log(1 + w / epsilon) for "log"), the content method's user vector
is

    x_u = argmin_x  sum_i c_ui (p_ui - q_i . x)^2 + lambda |x|^2.

scikit-learn's Ridge(alpha=lambda, fit_intercept=False) fitted on X = Q,
y = p_u with sample_weight = c_u minimises exactly
sum_i sample_weight_i (y_i - X_i . w)^2 + alpha |w|^2 (its documented
objective), so its coef_ is x_u.  Checks (each names its source):

  * dense profiles (normalization "none", float32-exact values, F = 12):
    user_vectors equals Ridge's coef_ to 1e-5 relative to each vector's
    largest entry (measured: 6e-8, the float32 storage of the vectors), for users
    with fewer items than features (the Woodbury path) and with more (the
    direct F x F path), for log and linear confidence;
  * feature rows (normalization "none", 0/1 values, 40 words): every
    item's score from top_items (all items, exclude_seen => false) equals
    Q @ coef_ (scores = profiles x user vector), to 1e-5 of the largest
    score (measured 9e-8); items nobody bought are scored too;
  * a basket (top_items with an item array and weights) equals Ridge fitted
    on the basket's confidences, to 1e-5 (measured 5e-8: CG to a
    residual of 1e-12);
  * reasons: the contributions of a user's items add up to the score
    (Hu et al. 2008, section 5: c_uj q_i^T A_u^-1 q_j summed over j is
    q_i . x_u), to 1e-5 of the score (measured 5e-7);
  * text keys: the same rows with text users and items (and the mixed
    pairs) give the same scores, to 1e-6 (measured 0: the same solves).
"""

import math
import sys

import numpy as np
from sklearn.linear_model import Ridge

import _common as C

SCHEMA = "affinity_check_content"
TOL = 1e-5


def conf(kind, alpha, eps, w):
    """Hu, Koren, Volinsky 2008: c = 1 + alpha f(w)."""
    if kind == "linear":
        return 1.0 + alpha * w
    return 1.0 + alpha * math.log(1.0 + w / eps)


def ridge(Q, bought, kind, alpha, eps, lam):
    """scikit-learn's Ridge on the content method's per-user problem."""
    y = np.zeros(Q.shape[0])
    c = np.ones(Q.shape[0])
    for i, w in bought.items():
        y[i] = 1.0
        c[i] = conf(kind, alpha, eps, w)
    r = Ridge(alpha=lam, fit_intercept=False, solver="cholesky", tol=1e-12)
    r.fit(Q, y, sample_weight=c)
    return r.coef_


def rel(a, b):
    return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-30))


def main():
    ck = C.Checker("check_content_sklearn")
    conn = C.connect()
    cur = conn.cursor()
    C.fresh_schema(cur, SCHEMA)
    rng = np.random.default_rng(7)

    # ---- dense profiles: user vectors against Ridge's coef_
    n_items, F = 60, 12
    Q = (rng.integers(-8, 9, size=(n_items, F)) / 8.0).astype(np.float32).astype(np.float64)
    Q[rng.random((n_items, F)) < 0.3] = 0
    Q[np.abs(Q).sum(axis=1) == 0, 0] = 1.0
    items = [1000 + 3 * i for i in range(n_items)]
    cur.execute("CREATE TABLE vec(item bigint, v real[])")
    C.copy_rows(cur, "vec", ["item", "v"],
                [(items[i], "{" + ",".join(repr(float(x)) for x in Q[i]) + "}") for i in range(n_items)])
    users = {}
    rows = []
    for u in range(40):
        n = 15 + u % 5 if u % 4 == 0 else 1 + u % 7     # some above F (direct), most below
        chosen = rng.choice(40, size=n, replace=False)     # items 40..59 are never bought
        users[500 + u] = {int(i): float(rng.integers(1, 6)) for i in chosen}
        rows += [(500 + u, items[i], w) for i, w in users[500 + u].items()]
    cur.execute("CREATE TABLE buys(u bigint, i bigint, w real)")
    C.copy_rows(cur, "buys", ["u", "i", "w"], rows)
    cur.execute("CREATE TABLE pv AS SELECT affinity.item_profiles(item, v, '{\"normalization\": \"none\"}') AS p FROM vec")
    for kind, alpha, lam in (("log", 3.0, 0.7), ("linear", 0.5, 2.0)):
        opts = '{"method": "content", "confidence": "%s", "alpha": %g, "regularization": %g, "epsilon": 1}' % (kind, alpha, lam)
        cur.execute("CREATE TABLE m_%s AS SELECT affinity.fit(u, i, w, '%s', (SELECT p FROM pv)) AS model FROM buys"
                    % (kind, opts))
        cur.execute("SELECT user_id, vector FROM affinity.user_vectors((SELECT model FROM m_%s))" % kind)
        got = dict(cur.fetchall())
        worst_w = worst_d = 0.0
        for u, bought in users.items():
            ref = ridge(Q, bought, kind, alpha, 1.0, lam)
            e = rel(np.array(got[u], dtype=np.float64), ref)
            if len(bought) > F:
                worst_d = max(worst_d, e)
            else:
                worst_w = max(worst_w, e)
        ck.check(worst_w < TOL, "dense, %s confidence: user vectors = sklearn Ridge coef_ (users with n_u <= F)" % kind,
                 "worst relative difference %.2e over %d users" % (worst_w, sum(len(b) <= F for b in users.values())))
        ck.check(worst_d < TOL, "dense, %s confidence: user vectors = sklearn Ridge coef_ (users with n_u > F)" % kind,
                 "worst relative difference %.2e over %d users" % (worst_d, sum(len(b) > F for b in users.values())))
        # a basket: three items with weights
        basket = {3: 2.0, 7: 1.0, 11: 4.0}
        ref = Q @ ridge(Q, basket, kind, alpha, 1.0, lam)
        cur.execute("SELECT item_id, score FROM affinity.top_items((SELECT model FROM m_%s), %%s::bigint[], %d, "
                    "exclude_seen => false, weights => %%s::real[])" % (kind, n_items),
                    ([items[i] for i in basket], list(basket.values())))
        got_b = dict(cur.fetchall())
        e = rel(np.array([got_b[items[i]] for i in range(n_items)]), ref)
        ck.check(e < TOL, "dense, %s confidence: basket scores = Q x sklearn Ridge on the basket" % kind,
                 "relative difference %.2e" % e)

    # ---- feature rows: scores = Q x coef_
    words = ["w%02d" % k for k in range(40)]
    n2 = 120
    Qs = np.zeros((n2, len(words)))
    wrows = []
    for i in range(n2):
        for k in rng.choice(len(words), size=int(rng.integers(1, 6)), replace=False):
            Qs[i, k] = 1.0
            wrows.append((i + 1, words[k], 1))
    cur.execute("CREATE TABLE wr(item bigint, word text, v real)")
    C.copy_rows(cur, "wr", ["item", "word", "v"], wrows)
    # features in the value are in hash order: give Qs the same columns by
    # reading no order at all (scores do not depend on it)
    users2 = {}
    rows2 = []
    for u in range(60):
        n = 45 + u % 3 if u % 10 == 0 else 1 + u % 9   # a few above F = 40 (direct)
        chosen = rng.choice(90, size=n, replace=False)  # items 91..120 never bought
        users2[u + 1] = {int(i): float(rng.integers(1, 4)) for i in chosen}
        rows2 += [(u + 1, int(i) + 1, w) for i, w in users2[u + 1].items()]
    cur.execute("CREATE TABLE buys2(u bigint, i bigint, w real)")
    C.copy_rows(cur, "buys2", ["u", "i", "w"], rows2)
    cur.execute("CREATE TABLE ps AS SELECT affinity.item_profiles(item, word, v, '{\"normalization\": \"none\"}') AS p FROM wr")
    cur.execute("""CREATE TABLE ms AS SELECT affinity.fit(u, i, w, '{"method": "content", "alpha": 4, "regularization": 1.5}',
                   (SELECT p FROM ps)) AS model FROM buys2""")
    worst = 0.0
    new_scored = 0
    for u, bought in users2.items():
        ref = Qs @ ridge(Qs, bought, "log", 4.0, 1.0, 1.5)
        cur.execute("SELECT item_id, score FROM affinity.top_items((SELECT model FROM ms), %s::bigint, %s, exclude_seen => false)",
                    (u, n2))
        got = dict(cur.fetchall())
        new_scored += sum(1 for i in range(91, n2 + 1) if i in got)
        worst = max(worst, rel(np.array([got[i + 1] for i in range(n2)]), ref))
    ck.check(worst < TOL, "feature rows: top_items scores = Q x sklearn Ridge coef_",
             "worst relative difference %.2e over %d users" % (worst, len(users2)))
    ck.check(new_scored == 30 * len(users2), "feature rows: the 30 items nobody bought are scored for every user",
             "%d of %d" % (new_scored, 30 * len(users2)))

    # ---- reasons add up to the score
    worst = 0.0
    for u in (1, 2, 11, 25):
        cur.execute("SELECT affinity.score((SELECT model FROM ms), %s::bigint, 100::bigint)", (u,))
        s = cur.fetchone()[0]
        cur.execute("SELECT sum(contribution) FROM affinity.reasons((SELECT model FROM ms), %s::bigint, 100::bigint, 1000)", (u,))
        total = cur.fetchone()[0]
        worst = max(worst, abs(total - s) / max(abs(s), 1e-3))
    ck.check(worst < TOL, "reasons: contributions add up to the score (Hu et al. 2008, section 5)",
             "worst difference %.2e of the score" % worst)

    # ---- text keys and the mixed pairs give the same scores
    cur.execute("CREATE TABLE pst AS SELECT affinity.item_profiles('I' || item, word, v, '{\"normalization\": \"none\"}') AS p FROM wr")
    opts = '{"method": "content", "alpha": 4, "regularization": 1.5}'
    forms = {
        "text": "SELECT affinity.fit('U' || u, 'I' || i, w, '%s', (SELECT p FROM pst)) FROM buys2" % opts,
        "bigint,text": "SELECT affinity.fit(u, 'I' || i, w, '%s', (SELECT p FROM pst)) FROM buys2" % opts,
        "text,bigint": "SELECT affinity.fit('U' || u, i, w, '%s', (SELECT p FROM ps)) FROM buys2" % opts,
    }
    cur.execute("SELECT item_id, score FROM affinity.top_items((SELECT model FROM ms), 7::bigint, %d, exclude_seen => false)" % n2)
    base = {int(k): v for k, v in cur.fetchall()}
    for kt, q in forms.items():
        cur.execute("CREATE TABLE mt AS " + q.replace(") FROM buys2", ") AS model FROM buys2"))
        # a model with a text side serves its text form (bigint ids as text)
        ukey = "'U7'::text" if kt.startswith("text") else "'7'::text"
        cur.execute("SELECT item_id::text, score FROM affinity.top_items((SELECT model FROM mt), %s, %d, exclude_seen => false)"
                    % (ukey, n2))
        got = {int(str(k).lstrip("I")): v for k, v in cur.fetchall()}
        cur.execute("SELECT d->>'key_type' FROM affinity.describe((SELECT model FROM mt)) d")
        kname = cur.fetchone()[0]
        e = max(abs(got[i] - base[i]) for i in base) if set(got) == set(base) else float("inf")
        ck.check(e < 1e-6 and kname == kt, "keys %s: the same scores as bigint keys" % kt,
                 "key_type %s, largest difference %.2e" % (kname, e))
        cur.execute("DROP TABLE mt")

    C.drop_schema(cur, SCHEMA)
    ck.finish()


if __name__ == "__main__":
    sys.exit(main())
