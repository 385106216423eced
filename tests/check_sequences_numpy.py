#!/usr/bin/python3
"""Sequential rules against a numpy implementation of the published rule.

The rule (Ludewig and Jannach 2018, "Evaluation of session-based
recommendation algorithms", section 2.1, sequential rules): in every
sequence, each event of item p at step x and each later event of item
q != p at step y with 1 <= y - x <= window add 1 / (y - x) to the weight of
p -> q.  Steps number the distinct positions of a sequence (equal positions
are one step and give no rule to each other); a repeated (sequence,
position, item) row counts once.

Checks (each names its outside source):
  * every rule's weight, read back through items_like, equals the numpy
    sums of the rule above on an invented corpus with ties, repeats and
    NULL rows (bigint keys and bigint positions; text keys; timestamptz
    positions): the same successors, weights to a relative 1e-5 (measured
    about 6e-8: the value stores float32 of the double sums);
  * successors = 3: each item keeps its three heaviest rules of the numpy
    weights (the kept weights equal the numpy top three);
  * next_items equals the numpy score sum over the recent items of
    W(r, q) / j, j the steps back from the last (the documented recency
    weighting), for sessions with unknown items, NULLs and positions: the
    same top-k scores to 1e-5 relative;
  * next_items_for_all equals next_items session by session (equality);
  * rows in another order, and read through a parallel scan, give the same
    model (equal fingerprints).
"""

import random
import sys
from collections import defaultdict

import numpy as np

import _common as C

SCHEMA = "affinity_check_sequences"
TOL = 1e-5
WINDOW = 3


def invent(seed=7, n_seq=400, n_items=40):
    rng = np.random.default_rng(seed)
    pop = 1.0 / np.arange(1, n_items + 1) ** 0.8
    pop /= pop.sum()
    rows = []
    for s in range(n_seq):
        n = int(rng.integers(1, 13))
        for _ in range(n):
            item = int(rng.choice(n_items, p=pop))
            pos = int(rng.integers(0, 8))       # small range: ties happen
            rows.append((1000 + 7 * s, 500 + 3 * item, pos))
            if rng.random() < 0.05:
                rows.append((1000 + 7 * s, 500 + 3 * item, pos))   # a repeat
    rows.append((None, 503, 1))
    rows.append((1000, None, 1))
    rows.append((1000, 503, None))
    return rows


def rule_weights(rows, window):
    """numpy/Python sums of the published rule; keys as given."""
    seqs = defaultdict(set)
    for s, i, p in rows:
        if s is None or i is None or p is None:
            continue
        seqs[s].add((p, i))
    W = defaultdict(float)
    for s, evs in seqs.items():
        positions = sorted({p for p, _ in evs})
        step = {p: k for k, p in enumerate(positions)}
        ev = sorted((step[p], i) for p, i in evs)
        for a in range(len(ev)):
            for b in range(a + 1, len(ev)):
                d = ev[b][0] - ev[a][0]
                if d < 1:
                    continue
                if d > window:
                    break
                if ev[a][1] != ev[b][1]:
                    W[(ev[a][1], ev[b][1])] += 1.0 / d
    return W


def read_rules(cur, model, items, cast="bigint"):
    got = {}
    for it in items:
        cur.execute("SELECT item_id, similarity FROM affinity.items_like((SELECT m FROM %s), %%s::%s, 100000)"
                    % (model, cast), (it,))
        for q, w in cur.fetchall():
            got[(it, q)] = w
    return got


def compare(ck, label, got, W):
    keys_ok = set(got) == set(W)
    err = max((abs(got[k] - W[k]) / W[k] for k in W if k in got), default=0.0)
    ck.check(keys_ok and err <= TOL, label,
             "%d rules (numpy %d), max relative difference %.2e" % (len(got), len(W), err))


def numpy_next(W, recent, window, positions=None):
    """Score of each q: sum over the recent steps j back from the last of W(r, q) / j."""
    ev = [(positions[n] if positions else n, n, r) for n, r in enumerate(recent) if r is not None]
    ev.sort()
    scores = defaultdict(float)
    j = 0
    prev = None
    for pos, _, r in reversed(ev):
        if prev is None or positions is None or pos != prev:
            j += 1
        prev = pos
        if j > window:
            break
        for (p, q), w in W.items():
            if p == r:
                scores[q] += w / j
    return scores


def main():
    conn = C.connect()
    cur = conn.cursor()
    C.fresh_schema(cur, SCHEMA)
    ck = C.Checker("check_sequences_numpy")
    rows = invent()
    cur.execute("CREATE TABLE ev (s bigint, i bigint, p bigint)")
    C.copy_rows(cur, "ev", ["s", "i", "p"], rows)
    W = rule_weights(rows, WINDOW)
    items = sorted({i for _, i, _ in rows if i is not None})

    opts = '{"window": %d, "successors": 100000}' % WINDOW
    cur.execute("CREATE TABLE m AS SELECT affinity.fit_sequences(s, i, p, %s) AS m FROM ev", (opts,))
    compare(ck, "rule weights equal the numpy sums (bigint keys, bigint positions)",
            read_rules(cur, "m", items), W)
    d = C.describe(cur, "(SELECT m FROM m)")
    ck.check(d["rows_skipped_null"] == 3 and d["sequences"]["rules"] == len(W),
             "describe counts the NULL rows and the rules",
             "rows_skipped_null %d, rules %d" % (d["rows_skipped_null"], d["sequences"]["rules"]))

    # text keys and timestamptz positions: the same rules
    cur.execute("CREATE TABLE mt AS SELECT affinity.fit_sequences('s' || s, 'sku-' || i, "
                "timestamptz '2024-03-01 09:00+00' + p * interval '1 minute', %s) AS m FROM ev", (opts,))
    got = read_rules(cur, "mt", ["sku-%d" % i for i in items], "text")
    compare(ck, "rule weights equal the numpy sums (text keys, timestamptz positions)",
            {(int(a[4:]), int(b[4:])): w for (a, b), w in got.items()}, W)

    # successors = 3: the three heaviest rules of each item
    cur.execute("CREATE TABLE m3 AS SELECT affinity.fit_sequences(s, i, p, %s) AS m FROM ev",
                ('{"window": %d, "successors": 3}' % WINDOW,))
    got3 = read_rules(cur, "m3", items)
    bad = 0
    for it in items:
        want = sorted((w for (p, _), w in W.items() if p == it), reverse=True)[:3]
        mine = sorted((w for (p, _), w in got3.items() if p == it), reverse=True)
        if len(want) != len(mine) or any(abs(a - b) > TOL * a for a, b in zip(want, mine)) or \
                any(abs(w - W[k]) > TOL * W[k] for k, w in got3.items() if k[0] == it):
            bad += 1
    ck.check(bad == 0, "successors 3 keeps each item's three heaviest numpy rules",
             "%d of %d items differ" % (bad, len(items)))

    # next_items against the numpy score
    rnd = random.Random(3)
    worst = 0.0
    mismatch = 0
    sessions = []
    for n in range(60):
        recent = [rnd.choice(items) for _ in range(rnd.randint(1, 6))]
        if n % 7 == 0:
            recent.insert(rnd.randint(0, len(recent)), 99999)      # unknown item
        if n % 11 == 0:
            recent.insert(rnd.randint(0, len(recent)), None)       # NULL element
        positions = [rnd.randint(0, 3) for _ in recent] if n % 2 else None
        sessions.append((n, recent, positions))
        want = numpy_next(W, recent, WINDOW, positions)
        cur.execute("SELECT item_id, score FROM affinity.next_items((SELECT m FROM m), %s::bigint[], 10, "
                    "positions => %s::bigint[])", (recent, positions))
        got = cur.fetchall()
        top = sorted(want.values(), reverse=True)[:10]
        if len(got) != len(top):
            mismatch += 1
            continue
        for (q, s), t in zip(got, top):
            worst = max(worst, abs(s - want[q]) / want[q], abs(s - t) / t)
    ck.check(mismatch == 0 and worst <= TOL,
             "next_items equals the numpy sum of W(r, q) / j over the recent steps",
             "60 sessions, %d with another count of rows, max relative difference %.2e"
             % (mismatch, worst))

    # the batch equals next_items session by session (sessions without positions)
    plain = [(n, r) for n, r, p in sessions if p is None]
    sids = [n for n, r in plain for _ in r]
    iids = [x for _, r in plain for x in r]
    cur.execute("SELECT session_id, item_id, score, rank FROM affinity.next_items_for_all("
                "(SELECT m FROM m), %s::bigint[], %s::bigint[], 5) ORDER BY 1, 4", (sids, iids))
    batch = cur.fetchall()
    single = []
    for n, r in sorted(plain):
        cur.execute("SELECT item_id, score, rank FROM affinity.next_items((SELECT m FROM m), %s::bigint[], 5)",
                    (r,))
        single += [(n,) + row for row in cur.fetchall()]
    ck.check(batch == single, "next_items_for_all equals next_items per session",
             "%d rows over %d sessions" % (len(batch), len(plain)))

    # arrival order and parallel scans do not change the model
    cur.execute("SELECT affinity.describe(m)->>'fingerprint' FROM m")
    fp = cur.fetchone()[0]
    cur.execute("CREATE TABLE big AS SELECT s + 1000000 * g AS s, i, p FROM ev, generate_series(0, 49) g")
    cur.execute("SELECT affinity.describe(affinity.fit_sequences(s, i, p, %s))->>'fingerprint' "
                "FROM (SELECT * FROM big ORDER BY s, p, i) o", (opts,))
    fp_sorted = cur.fetchone()[0]
    cur.execute("SELECT affinity.describe(affinity.fit_sequences(s, i, p, %s))->>'fingerprint' "
                "FROM (SELECT * FROM big ORDER BY md5(s::text || i::text || p::text)) o", (opts,))
    fp_shuffled = cur.fetchone()[0]
    for sql in ("SET parallel_setup_cost = 0", "SET parallel_tuple_cost = 0",
                "SET min_parallel_table_scan_size = 0", "SET max_parallel_workers_per_gather = 2"):
        cur.execute(sql)
    q = "SELECT affinity.describe(affinity.fit_sequences(s, i, p, '%s'))->>'fingerprint' FROM big" % opts
    cur.execute("EXPLAIN " + q)
    plan = "\n".join(r[0] for r in cur.fetchall())
    cur.execute(q)
    fp_par = cur.fetchone()[0]
    cur.execute("RESET ALL")
    cur.execute("SET search_path = %s, public" % SCHEMA)
    ck.check(fp_sorted == fp_shuffled == fp_par and "Gather" in plan,
             "rows in another order and through a parallel scan give the same model",
             "fingerprints %s %s %s, plan %s" % (fp_sorted, fp_shuffled, fp_par,
                                                 "parallel" if "Gather" in plan else "serial"))
    ck.check(fp != fp_sorted, "a corpus 50 times larger is another model", fp)

    C.drop_schema(cur, SCHEMA)
    ck.finish()


if __name__ == "__main__":
    sys.exit(main())
