#!/usr/bin/python3
"""affinity.items_like agrees with scikit-learn's cosine similarity.

A small implicit ALS model is fitted on invented data; its item vectors are
exported and scikit-learn's sklearn.metrics.pairwise.cosine_similarity is the
reference.  For several items, items_like(model, item, 10) must return the
reference's ten nearest items (the item itself excluded) in the same order,
allowing swaps only between near-ties, with the same similarities.  Also
checked: the candidates argument, the documented tie-break (item_id
ascending) on two items with identical vectors, and an unknown item.
"""

import json

import numpy as np
from sklearn.metrics.pairwise import cosine_similarity

import _common as C

SCHEMA = "affinity_check_items_like"
SEED = 777               # numpy seed of the invented data
K = 10
# similarity returned vs scikit-learn (float4 vectors and scores): measured
# max abs error 2.6e-8 to 1.05e-7; the tolerance is about 100x the largest.
SIM_TOL = 1e-5
TIE_TOL = 1e-6           # two reference similarities closer than this count as a tie


def reference_ranking(S, j, ids, allowed=None):
    """Items other than column j ordered by (-cosine, item_id), the order
    API.md documents for items_like; allowed restricts to a candidate set."""
    order = [n for n in range(len(ids)) if n != j and (allowed is None or ids[n] in allowed)]
    return sorted(order, key=lambda n: (-S[j, n], ids[n]))


def compare(ck, label, got, S, j, ids, index, k, allowed=None):
    """got: list of (item_id, similarity, rank) from items_like.  The structural
    checks print only on failure; one summary line per call."""
    ref = reference_ranking(S, j, ids, allowed)[:k]
    if not ck.check(len(got) == len(ref), label + ": number of rows",
                    "got %d want %d" % (len(got), len(ref)), quiet=True):
        return
    ck.check([r[2] for r in got] == list(range(1, len(got) + 1)), label + ": ranks 1..k in order",
             repr([r[2] for r in got]), quiet=True)
    got_ids = [r[0] for r in got]
    ck.check(ids[j] not in got_ids, label + ": item itself excluded", quiet=True)
    ck.check(len(set(got_ids)) == len(got_ids), label + ": no duplicates", quiet=True)
    if allowed is not None:
        ck.check(set(got_ids) <= allowed, label + ": only candidates returned", quiet=True)
    unknown = [g for g in got_ids if g not in index]
    if not ck.check(not unknown, label + ": returned ids are model items", repr(unknown),
                    quiet=True):
        return
    # similarity of each returned item equals scikit-learn's for that pair
    sim_err = max(abs(float(r[1]) - S[j, index[r[0]]]) for r in got)
    # same order: position r holds the reference's item r, or an item whose
    # reference similarity ties with it
    bad = []
    ties = 0
    for pos, (g, r) in enumerate(zip(got_ids, ref)):
        if g != ids[r]:
            if abs(S[j, index[g]] - S[j, r]) >= TIE_TOL:
                bad.append((pos + 1, g, ids[r], S[j, index[g]], S[j, r]))
            else:
                ties += 1
    ck.check(sim_err < SIM_TOL and not bad,
             label + ": same neighbours, same order, same similarities as scikit-learn",
             "max abs sim err %.2e (tol %.0e), %d near-tie swaps, top-3 %s%s"
             % (sim_err, SIM_TOL, ties, ", ".join("%d:%.5f" % (r[0], r[1]) for r in got[:3]),
                "; out of order (rank, got, want, got sim, want sim): %r" % bad[:3] if bad else ""))


def main():
    rows, W, user_ids, item_ids = C.random_interactions(SEED, 200, 80, 1600)
    # Two extra items bought by exactly the same users with the same weights:
    # with the exact solver their vectors are identical, so for any third item
    # their similarities tie exactly and items_like must list the smaller
    # item_id first (API.md).
    twin_a, twin_b = 90001, 90000
    twin_buyers = user_ids[:25]
    rows += [(u, twin_a, 2) for u in twin_buyers] + [(u, twin_b, 2) for u in twin_buyers]

    conn = C.connect()
    cur = conn.cursor()
    C.fresh_schema(cur, SCHEMA)
    cur.execute("CREATE TABLE interactions (user_id bigint, item_id bigint, weight real)")
    C.copy_rows(cur, "interactions", ["user_id", "item_id", "weight"], rows)
    opts = {"method": "implicit_als", "factors": 16, "iterations": 10, "regularization": 0.1,
            "solver": "cholesky", "seed": 3}
    cur.execute("CREATE TABLE m AS SELECT affinity.fit(user_id, item_id, weight, %s::jsonb)"
                " AS model FROM interactions", (json.dumps(opts),))
    index, ids, Y = C.fetch_vectors(
        cur, "SELECT item_id, vector FROM affinity.item_vectors((SELECT model FROM m))")
    S = cosine_similarity(Y)          # reference: scikit-learn
    print("model: %d items, %d factors; exported item vectors" % Y.shape)
    ck = C.Checker("check_items_like_cosine")
    ck.check(len(ids) == len(item_ids) + 2, "all items exported", "%d" % len(ids))

    q = ("SELECT item_id, similarity, rank FROM affinity.items_like((SELECT model FROM m), "
         "%s, %s) ORDER BY rank")
    rng = np.random.default_rng(SEED + 1)
    probes = [item_ids[n] for n in rng.choice(len(item_ids), 8, replace=False)]
    probes += [p for p in (item_ids[0], item_ids[1], twin_a) if p not in probes][:2]
    for item in probes:
        cur.execute(q, (item, K))
        compare(ck, "items_like(%d, %d)" % (item, K), cur.fetchall(), S, index[item], ids,
                index, K)

    # the twin tie: the same normal equations give the same vectors, and when
    # items_like scores them equal the smaller id must rank first
    ya, yb = Y[index[twin_a]], Y[index[twin_b]]
    # (the same rows solved alike: the same bits, measured difference 0)
    ck.check(float(np.max(np.abs(ya - yb))) == 0.0, "twin items have the same vectors",
             "max diff %.2e" % float(np.max(np.abs(ya - yb))))
    third = item_ids[5]
    cur.execute("SELECT item_id, similarity, rank FROM affinity.items_like((SELECT model FROM m), "
                "%s, %s, %s) ORDER BY rank", (third, 5, [twin_a, twin_b, item_ids[7]]))
    got = cur.fetchall()
    pos = {r[0]: r for r in got}
    ck.check(len(got) == 3, "candidates: only the 3 given items can be returned",
             "%d rows" % len(got))
    if ck.check(twin_a in pos and twin_b in pos, "both twins returned", repr(got)):
        sa, sb = pos[twin_a][1], pos[twin_b][1]
        if sa == sb:
            ck.check(pos[twin_b][2] + 1 == pos[twin_a][2], "exact tie broken by item_id ascending",
                     repr(got))
        else:
            # not bit-identical: then the order must follow the similarities
            print("note: twin similarities differ in the last bits (%r vs %r); tie-break "
                  "checked as plain order" % (sa, sb))
            ck.check((pos[twin_a][2] < pos[twin_b][2]) == (sa > sb), "twins ordered by similarity",
                     repr(got))

    # candidates restrict the answer to a set (a category, what is in stock)
    cand = set(int(v) for v in rng.choice(item_ids, 20, replace=False))
    cand.discard(item_ids[3])
    cur.execute("SELECT item_id, similarity, rank FROM affinity.items_like((SELECT model FROM m), "
                "%s, %s, %s) ORDER BY rank", (item_ids[3], 5, sorted(cand)))
    compare(ck, "items_like(%d, 5, 20 candidates)" % item_ids[3], cur.fetchall(), S,
            index[item_ids[3]], ids, index, 5, allowed=cand)

    # k larger than the number of other items: all of them, still ordered
    cur.execute(q, (item_ids[1], len(ids) + 50))
    compare(ck, "items_like(%d, k > items)" % item_ids[1], cur.fetchall(), S, index[item_ids[1]],
            ids, index, len(ids) - 1)

    # an unknown item is not an error and gives no rows (API.md)
    cur.execute(q, (123456789, K))
    ck.check(cur.fetchall() == [], "unknown item gives no rows")

    C.drop_schema(cur, SCHEMA)
    conn.close()
    ck.finish()


if __name__ == "__main__":
    main()
