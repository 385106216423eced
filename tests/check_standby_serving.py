"""A hot standby serves the registry's models exactly as the primary does.

Two clusters of this program's own (tests/_clusters.py): a primary and a hot
standby made from it with pg_basebackup -R (PostgreSQL's streaming
replication; hot_standby_feedback on, as the README advises).  On the
primary a registry model is defined and refreshed from an invented shop's
purchases; each check waits until the standby has replayed everything the
primary wrote (pg_last_wal_replay_lsn() >= pg_current_wal_lsn()).

1. For the first and the second version of the model the standby returns
   the primary's results exactly (equality, not a tolerance: the same bytes
   served by the same code): top_items for every customer,
   top_items_for_all, items_like for every product, all through
   affinity.get_model, and describe()'s fingerprint and checksum.  The two
   versions answer differently (the check of the second one is real).
2. The per-backend model cache of a standby session that served the first
   version serves the second after its refresh has been replayed, in the
   same session (and affinity.runtime() counts a new load).
3. A REPEATABLE READ transaction on the standby keeps serving the version
   of its snapshot while a third refresh is replayed, and the next
   transaction serves the third version.
4. refresh, define_model (a new name and a redefinition) and revert_model
   are refused on the standby with SQLSTATE 25006 (read_only_sql_transaction)
   and a hint to run them on the primary; nothing changes on either server.
"""

import os
import sys

import psycopg2

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import Checker  # noqa: E402
import _clusters  # noqa: E402

NAME = "standby_picks"
DB = "affinity_standby"

# Every answer as one text per function, ordered, with the scores printed
# exactly (extra_float_digits 1 in PostgreSQL 15: shortest exact form).
ANSWERS = {
    "top_items": """
        SELECT count(*), md5(string_agg(format('%%s:%%s:%%s:%%s', c.customer_id, r.item_id, r.score, r.rank),
                                         ',' ORDER BY c.customer_id, r.rank))
        FROM shop.customers c, affinity.top_items(affinity.get_model(%(n)s), c.customer_id, 10) r""",
    "top_items_for_all": """
        SELECT count(*), md5(string_agg(format('%%s:%%s:%%s:%%s', t.user_id, t.item_id, t.score, t.rank),
                                         ',' ORDER BY t.user_id, t.rank))
        FROM affinity.top_items_for_all(affinity.get_model(%(n)s), 10) t""",
    "items_like": """
        SELECT count(*), md5(string_agg(format('%%s:%%s:%%s:%%s', p.product_id, r.item_id, r.similarity, r.rank),
                                         ',' ORDER BY p.product_id, r.rank))
        FROM shop.products p, affinity.items_like(affinity.get_model(%(n)s), p.product_id, 8) r""",
    "describe": """
        SELECT m.version, (affinity.describe(m.model)->>'fingerprint') || ' ' ||
                          (affinity.describe(m.model)->>'checksum')
        FROM affinity.models m WHERE m.name = %(n)s""",
}


def answers(conn):
    out = {}
    with conn.cursor() as cur:
        for k, sql in ANSWERS.items():
            cur.execute(sql, {"n": NAME})
            out[k] = cur.fetchone()
    return out


def one(conn, sql, args=None):
    with conn.cursor() as cur:
        cur.execute(sql, args)
        return cur.fetchone()[0]


def model_loads(conn):
    return int(one(conn, "SELECT affinity.runtime()->'model_cache'->>'loads'"))


def setup_primary(conn):
    with conn.cursor() as cur:
        cur.execute("CREATE EXTENSION affinity")
        cur.execute("CREATE SCHEMA shop")
        # 400 loyalty-card customers in four tastes, 60 products in four shelves
        cur.execute("""CREATE TABLE shop.customers AS
                       SELECT (70001 + c)::bigint AS customer_id FROM generate_series(0, 399) c""")
        cur.execute("""CREATE TABLE shop.products AS
                       SELECT (301 + p)::bigint AS product_id FROM generate_series(0, 59) p""")
        cur.execute("""CREATE TABLE shop.purchases AS
                       SELECT (70001 + c)::bigint AS customer_id,
                              (301 + (c % 4) * 15 + abs(hashint4(c * 131 + k)) % 15)::bigint AS product_id,
                              (1 + abs(hashint4(c * 17 + k)) % 3)::real AS quantity,
                              1 AS batch
                       FROM generate_series(0, 399) c, generate_series(1, 7) k""")
        cur.execute("""SELECT affinity.define_model(%s,
                         'SELECT customer_id AS user_id, product_id AS item_id, quantity AS weight
                          FROM shop.purchases',
                         '{"factors": 8, "iterations": 6, "threads": 1}')""", (NAME,))
        cur.execute("SELECT affinity.refresh(%s)->'version'", (NAME,))
        return cur.fetchone()[0]


def new_purchases(conn, batch):
    """A week of cross-shelf buying: changes the factors and so every answer."""
    with conn.cursor() as cur:
        cur.execute("""INSERT INTO shop.purchases
                       SELECT (70001 + c)::bigint, (301 + abs(hashint4(c * 7 + %s)) %% 60)::bigint,
                              2::real, %s
                       FROM generate_series(0, 399, 3) c""", (batch, batch))


def refresh(conn):
    return one(conn, "SELECT (affinity.refresh(%s)->>'version')::int", (NAME,))


def compare(c, label, primary, standby):
    for k in ANSWERS:
        c.check(primary[k] == standby[k], "%s: %s on the standby equals the primary's" % (label, k),
                "primary %r, standby %r" % (primary[k], standby[k]))


def refused(conn, sql, args=None):
    """(sqlstate, message, hint) of the error a statement raises on the standby."""
    try:
        with conn.cursor() as cur:
            cur.execute(sql, args)
        return None, None, None
    except psycopg2.Error as exc:
        return exc.pgcode, exc.diag.message_primary, exc.diag.message_hint


def main():
    c = Checker("check_standby_serving")
    primary = _clusters.Cluster("primary").initdb(["wal_level = replica", "max_wal_senders = 4"])
    primary.start()
    pconn = primary.connect()
    pconn.cursor().execute("CREATE DATABASE %s" % DB)
    pconn.close()
    pconn = primary.connect(DB)
    version1 = setup_primary(pconn)

    standby = _clusters.Cluster("standby").basebackup_of(primary, ["hot_standby = on",
                                                                   "hot_standby_feedback = on"])
    standby.start()
    sconn = standby.wait_ready(DB)
    c.check(one(sconn, "SELECT pg_is_in_recovery()") is True, "the standby is in recovery",
            "port %d, streaming from port %d" % (standby.port, primary.port))
    _clusters.wait_replay(pconn, sconn)
    c.check(one(pconn, "SELECT count(*) FROM pg_stat_replication WHERE state = 'streaming'") == 1,
            "the primary streams to the standby (pg_stat_replication)")

    # 1. the first version, and a session whose cache holds it
    p1 = answers(pconn)
    s1 = answers(sconn)
    c.check(p1["top_items"][0] == 4000 and p1["items_like"][0] == 480 and
            p1["top_items_for_all"][0] == 4000,
            "version %s answers every customer and product" % version1,
            "rows: top_items %d, top_items_for_all %d, items_like %d"
            % (p1["top_items"][0], p1["top_items_for_all"][0], p1["items_like"][0]))
    compare(c, "version %s" % version1, p1, s1)
    loads_before = model_loads(sconn)

    # 2. the second version, replayed; the same standby session picks it up
    new_purchases(pconn, 2)
    version2 = refresh(pconn)
    waited = _clusters.wait_replay(pconn, sconn)
    p2 = answers(pconn)
    s2 = answers(sconn)
    c.check(version2 == version1 + 1, "the refresh on the primary made version %s" % version2)
    for k in ("top_items", "top_items_for_all", "items_like", "describe"):
        c.check(p2[k] != p1[k], "version %s answers %s differently from version %s"
                % (version2, k, version1))
    compare(c, "version %s, same standby session" % version2, p2, s2)
    c.check(model_loads(sconn) > loads_before,
            "the standby session's model cache loaded the new value",
            "loads %d before, %d after; replay took %.2f s" % (loads_before, model_loads(sconn), waited))

    # 3. a REPEATABLE READ transaction keeps its snapshot while a refresh replays
    rr = standby.connect(DB, autocommit=False)
    rr.set_session(isolation_level="REPEATABLE READ")
    in_snapshot = answers(rr)
    new_purchases(pconn, 3)
    version3 = refresh(pconn)
    _clusters.wait_replay(pconn, sconn)
    c.check(one(sconn, "SELECT version FROM affinity.models WHERE name = %s", (NAME,)) == version3,
            "a new standby transaction sees version %s while the old one is open" % version3)
    still = answers(rr)
    c.check(still == in_snapshot and in_snapshot == s2,
            "the REPEATABLE READ transaction still serves version %s after version %s replayed"
            % (version2, version3), "describe in it: %r" % (still["describe"],))
    rr.commit()
    after = answers(rr)
    p3 = answers(pconn)
    compare(c, "version %s, next transaction" % version3, p3, after)
    rr.close()

    # 4. the registry's writers are refused on the standby
    calls = [
        ("refresh", "SELECT affinity.refresh(%s)", (NAME,)),
        ("define_model of a new name",
         "SELECT affinity.define_model('standby_new', 'SELECT customer_id AS user_id, "
         "product_id AS item_id, quantity AS weight FROM shop.purchases')", None),
        ("define_model of the existing name",
         "SELECT affinity.define_model(%s, 'SELECT customer_id AS user_id, "
         "product_id AS item_id, quantity AS weight FROM shop.purchases')", (NAME,)),
        ("revert_model", "SELECT affinity.revert_model(%s)", (NAME,)),
    ]
    for label, sql, args in calls:
        code, msg, hint = refused(sconn, sql, args)
        c.check(code == "25006" and "hot standby" in (msg or "") and "primary" in (hint or ""),
                "%s on the standby: 25006, saying to run it on the primary" % label,
                "SQLSTATE %s: %s (hint: %s)" % (code, msg, hint))
    c.check(one(pconn, "SELECT version FROM affinity.models WHERE name = %s", (NAME,)) == version3
            and one(pconn, "SELECT count(*) FROM affinity.models") == 1,
            "the primary's registry is unchanged")

    sconn.close()
    pconn.close()
    standby.remove()
    primary.remove()
    c.finish()


if __name__ == "__main__":
    try:
        main()
    except (RuntimeError, psycopg2.Error) as exc:
        for cl in list(_clusters._LIVE):
            print("---- %s server log ----\n%s" % (cl.name, cl.log_tail()))
        print("FAILED: %s" % exc)
        sys.exit(1)
