#!/usr/bin/python3
"""top_items' rules agree with a numpy version of maximal marginal relevance.

Carbonell and Goldstein 1998 ("The use of MMR, diversity-based reranking
for reordering documents and producing summaries", SIGIR 1998, section 2)
build a list one item at a time, each time taking

    argmax over c not chosen of  lambda Sim1(c, Q) - (1 - lambda) max_{j chosen} Sim2(c, j).

affinity writes diversity d = 1 - lambda, takes Sim1 as the item's score
scaled to [0, 1] over the pool (the best `pool` items by score), Sim2(c, j)
as the model's item-to-item value of c in chosen item j's row (what
items_like ranks by), and passes over items whose group is full.

The reference here: numpy, from the model's own scores (top_items' pool) and
item rows (items_like with k = every item), the published greedy rule, for
implicit_als (cosine of factors) and ease (rows of B) on invented data,
several users, diversities and group caps.  A difference in the chosen list
fails the check; ties (values within 1e-6) are reported and allowed.
"""

import json

import numpy as np

import _common as C

SCHEMA = "affinity_check_rules"
SEED = 1998
N_USERS, N_ITEMS, N_PAIRS = 300, 80, 3000
K, POOL = 8, 30
TIE = 1e-6


def mmr(scores, pool_idx, sim, d, group, cap, k):
    """The greedy rule over pool_idx (best first); returns the chosen items and
    the smallest gap between the best and the runner-up value at any step."""
    s = np.array([scores[i] for i in pool_idx], dtype=np.float64)
    hi, lo = s.max(), s.min()
    scaled = (s - lo) / (hi - lo) if hi > lo else np.ones_like(s)
    chosen, counts, gap = [], {}, np.inf
    red = np.zeros(len(pool_idx))
    free = np.ones(len(pool_idx), dtype=bool)
    while len(chosen) < k:
        vals = []
        for c in range(len(pool_idx)):
            if not free[c]:
                continue
            g = group.get(pool_idx[c]) if group else None
            if g is not None and counts.get(g, 0) >= cap:
                continue
            vals.append(((1 - d) * scaled[c] - d * (red[c] if chosen else 0.0), c))
        if not vals:
            break
        vals.sort(key=lambda t: (-t[0], t[1]))
        if len(vals) > 1:
            gap = min(gap, vals[0][0] - vals[1][0])
        c = vals[0][1]
        chosen.append(pool_idx[c])
        free[c] = False
        g = group.get(pool_idx[c]) if group else None
        if g is not None:
            counts[g] = counts.get(g, 0) + 1
        row = sim[pool_idx[c]]
        for q in range(len(pool_idx)):
            v = row.get(pool_idx[q], 0.0)
            red[q] = v if len(chosen) == 1 else max(red[q], v)
    return chosen, gap


def main():
    rows, W, user_ids, item_ids = C.random_interactions(SEED, N_USERS, N_ITEMS, N_PAIRS)
    conn = C.connect()
    cur = conn.cursor()
    C.fresh_schema(cur, SCHEMA)
    cur.execute("CREATE TABLE interactions (user_id bigint, item_id bigint, weight real)")
    C.copy_rows(cur, "interactions", ["user_id", "item_id", "weight"], rows)
    ck = C.Checker("check_rules_mmr")
    group = {i: "g%d" % (n % 5) for n, i in enumerate(item_ids)}
    groups_json = json.dumps({str(i): g for i, g in group.items()})
    rng = np.random.default_rng(SEED)
    users = [user_ids[u] for u in rng.choice(N_USERS, 12, replace=False)]
    for method, opts in (("implicit_als", {"factors": 8, "iterations": 6, "threads": 1}),
                         ("ease", {"method": "ease", "regularization": 50})):
        cur.execute("CREATE TABLE m_%s AS SELECT affinity.fit(user_id, item_id, weight, %%s::jsonb) AS model"
                    " FROM interactions" % method, (json.dumps(opts),))
        m = "(SELECT model FROM m_%s)" % method
        # the model's item rows, as items_like gives them (every item)
        cur.execute("SELECT i, l.item_id, l.similarity FROM unnest(%%s::bigint[]) i,"
                    " affinity.items_like(%s, i, %d) l" % (m, N_ITEMS), (item_ids,))
        sim = {i: {} for i in item_ids}
        for i, j, v in cur.fetchall():
            sim[i][j] = v
        bad, ties, compared = [], 0, 0
        for d in (0.0, 0.3, 0.7, 1.0):
            for cap in (None, 2):
                rules = {"diversity": d, "pool": POOL}
                if cap:
                    rules.update({"max_per_group": cap, "groups": json.loads(groups_json)})
                for u in users:
                    cur.execute("SELECT item_id, score FROM affinity.top_items(%s, %%s, %d)"
                                " ORDER BY rank" % (m, POOL), (u,))
                    pool = cur.fetchall()
                    scores = {i: s for i, s in pool}
                    want, gap = mmr(scores, [i for i, _ in pool], sim, d,
                                    group if cap else None, cap, K)
                    cur.execute("SELECT item_id FROM affinity.top_items(%s, %%s, %d, rules => %%s::jsonb)"
                                " ORDER BY rank" % (m, K), (u, json.dumps(rules)))
                    got = [r[0] for r in cur.fetchall()]
                    compared += 1
                    if got != want:
                        if gap <= TIE:
                            ties += 1
                        else:
                            bad.append((d, cap, u, got, want))
        ck.check(not bad, "%s: %d lists (diversity 0, 0.3, 0.7, 1; no cap and 2 per group) equal numpy's MMR"
                 % (method, compared),
                 "%d differ beyond ties, %d ties%s" % (len(bad), ties, "; first %r" % (bad[0],) if bad else ""))
    C.drop_schema(cur, SCHEMA)
    conn.close()
    ck.finish()


if __name__ == "__main__":
    main()
