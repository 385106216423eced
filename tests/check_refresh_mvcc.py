"""Serving a named model while it is refreshed, and two refreshes at once.

1. Session A serves from affinity.get_model() in a tight loop while session
   B runs a slow refresh of the same name (its source query joins a
   pg_sleep) and then keeps its transaction open a moment longer.  A is
   never held up: its calls keep completing while B's transaction is open,
   each quickly, all of them from the old model (version, checksum, and an
   answer only the new model could give); once B commits, A's next call
   gets the new model.
2. A REPEATABLE READ transaction keeps serving the model of its snapshot
   across a committed refresh, and sees the new one in its next transaction.
3. Two refreshes of one name at the same time: the second waits on the
   first one's row lock (pg_blocking_pids names the first backend), then
   runs; both succeed, with versions +1 and +2, and both are in the history.

The guarantees are PostgreSQL's MVCC (readers never wait for writers; a row
lock taken by SELECT ... FOR UPDATE makes a second locker wait, and under
READ COMMITTED it then sees the committed row), which affinity.refresh and
affinity.get_model must not defeat.  The scenario: the demo shop's
purchases, shrunk to 120 loyalty-card customers and 40 products.
"""

import threading
import time

import psycopg2

from _common import Checker, connect, drop_schema

SCHEMA = "mvcc_shop"
NAME = "mvcc_shop_picks"
NEW_CUSTOMER = 50999          # appears only after the data change
SLOW_SECONDS = 2.0            # the pg_sleep inside the slow refresh
HOLD_SECONDS = 1.0            # B keeps its transaction open after refresh returns
QUICK_CALL = 1.0              # a served call that takes longer than this waited for B

SERVE_SQL = """
SELECT m.version,
       affinity.describe(affinity.get_model(%(name)s))->>'checksum',
       (SELECT count(*) FROM affinity.top_items(affinity.get_model(%(name)s), %(cust)s, 5,
                                                fallback_popular => false))
FROM affinity.models m WHERE m.name = %(name)s
"""


def new_conn(autocommit=True):
    conn = psycopg2.connect("")
    conn.autocommit = autocommit
    return conn


def setup(cur):
    drop_schema(cur, SCHEMA)
    cur.execute("DELETE FROM affinity.models WHERE name = %s", (NAME,))
    cur.execute("CREATE SCHEMA %s" % SCHEMA)
    cur.execute("""CREATE TABLE %s.purchases AS
                   SELECT (50001 + c)::bigint AS customer_id,
                          (101 + (c %% 4) * 10 + abs(hashint4(c * 97 + k)) %% 10)::bigint AS product_id,
                          (1 + abs(hashint4(c * 13 + k)) %% 3)::real AS quantity
                   FROM generate_series(0, 119) c, generate_series(1, 6) k""" % SCHEMA)
    # the sleep of the next refresh, read by the source query itself
    cur.execute("CREATE TABLE %s.delay (seconds float8 NOT NULL)" % SCHEMA)
    cur.execute("INSERT INTO %s.delay VALUES (0)" % SCHEMA)
    cur.execute("""SELECT affinity.define_model(%%s,
                     'SELECT customer_id AS user_id, product_id AS item_id, quantity AS weight
                      FROM %s.purchases, (SELECT pg_sleep(seconds) FROM %s.delay) AS slow',
                     '{"factors": 8, "iterations": 5, "threads": 1}')"""
                % (SCHEMA, SCHEMA), (NAME,))
    cur.execute("SELECT affinity.refresh(%s)->'version'", (NAME,))
    return cur.fetchone()[0]


def set_delay(cur, seconds):
    cur.execute("UPDATE %s.delay SET seconds = %%s" % SCHEMA, (seconds,))


def serve(cur):
    t0 = time.monotonic()
    cur.execute(SERVE_SQL, {"name": NAME, "cust": NEW_CUSTOMER})
    version, checksum, picks = cur.fetchone()
    return time.monotonic() - t0, version, checksum, picks


def part_serve_while_refresh(c, adm):
    acur = adm.cursor()
    a = new_conn()
    b = new_conn(autocommit=False)
    acur_a = a.cursor()
    _, v0, sum0, picks0 = serve(acur_a)
    c.check(picks0 == 0, "before the refresh the new customer is unknown (no picks)", str(picks0))

    acur.execute("INSERT INTO %s.purchases VALUES (%s, 101, 2), (%s, 102, 1)"
                 % (SCHEMA, NEW_CUSTOMER, NEW_CUSTOMER))
    set_delay(acur, SLOW_SECONDS)

    bcur = b.cursor()
    bcur.execute("SELECT pg_backend_pid()")
    b_pid = bcur.fetchone()[0]
    b.commit()                          # B's transaction starts with its refresh
    events = {}
    errors = []

    def session_b():
        try:
            events["begin"] = time.monotonic()
            bcur.execute("SELECT affinity.refresh(%s)->'version'", (NAME,))
            events["result"] = bcur.fetchone()[0]
            events["returned"] = time.monotonic()
            time.sleep(HOLD_SECONDS)
            events["committing"] = time.monotonic()
            b.commit()
            events["committed"] = time.monotonic()
        except Exception as e:          # reported by the main thread
            errors.append(repr(e))
            b.rollback()

    t = threading.Thread(target=session_b)
    t.start()
    calls = []                          # (start, end, version, checksum, picks)
    saw_b_active = False
    while t.is_alive():
        start = time.monotonic()
        took, v, s, p = serve(acur_a)
        calls.append((start, start + took, v, s, p))
        if not saw_b_active:
            acur_a.execute("SELECT state = 'active' AND query LIKE '%%affinity.refresh%%' "
                           "FROM pg_stat_activity WHERE pid = %s", (b_pid,))
            row = acur_a.fetchone()
            saw_b_active = bool(row and row[0])
        time.sleep(0.02)
    t.join()
    c.check(not errors, "session B's slow refresh and commit succeed", "; ".join(errors))
    if errors:
        return
    c.check(events["result"] == v0 + 1, "B's refresh makes version %d" % (v0 + 1),
            "got %s" % events["result"])
    c.check(events["returned"] - events["begin"] >= SLOW_SECONDS * 0.9,
            "B's refresh is slow (%.1f s of pg_sleep in its query)" % SLOW_SECONDS,
            "%.2f s" % (events["returned"] - events["begin"]))
    c.check(saw_b_active, "A saw B's refresh running in pg_stat_activity")

    # calls wholly inside B's open transaction
    inside = [x for x in calls if x[0] >= events["begin"] and x[1] <= events["committing"]]
    after_update = [x for x in calls if x[0] >= events["returned"] and x[1] <= events["committing"]]
    c.check(len(inside) >= 10, "A kept being answered while B's transaction was open",
            "%d calls in %.1f s" % (len(inside), events["committing"] - events["begin"]))
    c.check(len(after_update) >= 3,
            "A kept being answered after B had updated the row, before B committed",
            "%d calls in %.1f s" % (len(after_update), HOLD_SECONDS))
    c.check(all(x[2] == v0 and x[3] == sum0 and x[4] == 0 for x in inside),
            "every answer during B's transaction came from the old model (version, checksum, "
            "no picks for the new customer)",
            "versions seen %s" % sorted(set(x[2] for x in inside)))
    slowest = max((x[1] - x[0] for x in calls), default=0.0)
    c.check(slowest < QUICK_CALL, "no served call waited (slowest under %.1f s)" % QUICK_CALL,
            "slowest %.3f s over %d calls" % (slowest, len(calls)))

    took, v, s, p = serve(acur_a)
    c.check(v == v0 + 1 and s != sum0 and p == 5,
            "after B commits, A's next call serves the new model",
            "version %s, checksum %s, %s picks for the new customer" %
            (v, "changed" if s != sum0 else "unchanged", p))
    a.close()
    b.close()
    return v


def part_repeatable_read(c, adm, v1):
    acur = adm.cursor()
    set_delay(acur, 0)
    a = new_conn(autocommit=False)
    a.set_session(isolation_level="REPEATABLE READ")
    cur = a.cursor()
    _, v, s, _ = serve(cur)                  # the snapshot is taken here
    acur.execute("SELECT affinity.refresh(%s)->'version'", (NAME,))
    v_new = acur.fetchone()[0]
    _, v_again, s_again, _ = serve(cur)
    c.check(v == v1 and v_again == v1 and s_again == s,
            "a REPEATABLE READ transaction keeps serving its snapshot's model after a refresh commits",
            "version %s then %s (the refresh made %s)" % (v, v_again, v_new))
    a.commit()
    _, v_next, s_next, _ = serve(cur)
    c.check(v_next == v_new and s_next != s, "its next transaction serves the new model",
            "version %s" % v_next)
    a.rollback()
    a.close()
    return v_next


def part_two_refreshes(c, adm, v_start):
    acur = adm.cursor()
    set_delay(acur, 1.0)
    conns = [new_conn(), new_conn()]
    pids = []
    for cn in conns:
        cr = cn.cursor()
        cr.execute("SELECT pg_backend_pid()")
        pids.append(cr.fetchone()[0])
    results = [None, None]
    ended = [None, None]
    errors = []

    def refresher(k):
        try:
            cr = conns[k].cursor()
            cr.execute("SELECT affinity.refresh(%s)->'version'", (NAME,))
            results[k] = cr.fetchone()[0]
            ended[k] = time.monotonic()
        except Exception as e:
            errors.append("refresh %d: %r" % (k + 1, e))

    t1 = threading.Thread(target=refresher, args=(0,))
    t1.start()
    # the first one holds the row lock once it is sleeping in its query
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:
        acur.execute("SELECT wait_event FROM pg_stat_activity WHERE pid = %s", (pids[0],))
        row = acur.fetchone()
        if row and row[0] == "PgSleep":
            break
        time.sleep(0.02)
    t2 = threading.Thread(target=refresher, args=(1,))
    t2.start()
    blocked_by = None
    wait_type = None
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and t1.is_alive():
        acur.execute("SELECT pg_blocking_pids(%s), wait_event_type FROM pg_stat_activity "
                     "WHERE pid = %s", (pids[1], pids[1]))
        row = acur.fetchone()
        if row and row[0]:
            blocked_by, wait_type = row
            break
        time.sleep(0.02)
    t1.join()
    t2.join()
    c.check(not errors, "both refreshes succeed", "; ".join(errors))
    c.check(blocked_by == [pids[0]] and wait_type == "Lock",
            "the second refresh waits on a lock held by the first",
            "blocked by %s (first is %d), wait type %s" % (blocked_by, pids[0], wait_type))
    if errors:
        return
    c.check(results == [v_start + 1, v_start + 2],
            "the versions go up by one each (%d, then %d)" % (v_start + 1, v_start + 2),
            "got %s" % results)
    c.check(ended[0] <= ended[1], "the second refresh finishes after the first")
    acur.execute("SELECT version FROM affinity.models WHERE name = %s", (NAME,))
    cur_version = acur.fetchone()[0]
    acur.execute("SELECT array_agg(version ORDER BY version) FROM affinity.model_history "
                 "WHERE name = %s AND version > %s", (NAME, v_start))
    hist = acur.fetchone()[0]
    c.check(cur_version == v_start + 2 and hist == [v_start + 1, v_start + 2],
            "the registry holds the second one's model, the history both",
            "current %s, history above %d: %s" % (cur_version, v_start, hist))
    for cn in conns:
        cn.close()


def main():
    c = Checker("check_refresh_mvcc")
    adm = connect()
    cur = adm.cursor()
    setup(cur)
    try:
        v1 = part_serve_while_refresh(c, adm)
        if v1 is not None:
            v2 = part_repeatable_read(c, adm, v1)
            part_two_refreshes(c, adm, v2)
    finally:
        cur.execute("DELETE FROM affinity.models WHERE name = %s", (NAME,))
        drop_schema(cur, SCHEMA)
    c.finish()


if __name__ == "__main__":
    main()
