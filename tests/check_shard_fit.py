"""Fitting from shards through postgres_fdw, and collecting per-shard models.

Three clusters of this program's own (tests/_clusters.py): two shards, one
per region of an invented chain of shops (north, south), each holding the
purchases of its own loyalty-card customers, and a coordinator.  On the
coordinator the purchases table is partitioned by customer (RANGE), and
its two partitions are foreign tables (postgres_fdw, PostgreSQL's contrib)
on the shards.

1. The rows arrive whole: the coordinator reads through the partitioned
   table exactly the multiset of rows the shards hold (count and md5 of
   the sorted rows, computed on each side), and a local copy of them.
2. A fit on the coordinator over the partitioned table gives the same model
   as the same fit over the local copy: equal describe()->>'fingerprint'
   (the fit sorts its rows, so the order in which the shards answer does
   not matter), also through the registry (define_model over the
   partitioned table, refresh), with the plan checked to be two foreign
   scans under an Append.
3. Per-shard fits (a model per region in each shard's own registry) are
   collected into a model table on the coordinator through foreign tables
   over each shard's affinity.models: each value arrives intact (the md5 of
   its binary form, affinity.model_send, equal on both sides; postgres_fdw
   carries it in text form, so the coordinator's input function validated
   it), and serves on the coordinator exactly as on its shard (top_items of
   every customer of the region, items_like of every product).
"""

import os
import sys

import psycopg2

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import Checker  # noqa: E402
import _clusters  # noqa: E402

DB = "affinity_shard"
OPTIONS = '{"factors": 8, "iterations": 6, "threads": 1}'
# the customers of each region: a contiguous range, the partition bounds
REGIONS = [("north", 80001, 80351), ("south", 80351, 80701)]

ROWS_MD5 = """SELECT count(*), md5(string_agg(format('%s:%s:%s', customer_id, product_id, quantity), ','
                                       ORDER BY customer_id, product_id, quantity))
              FROM {}"""

SERVE_MD5 = {
    "top_items": """
        SELECT count(*), md5(string_agg(format('%%s:%%s:%%s:%%s', c, r.item_id, r.score, r.rank), ','
                                         ORDER BY c, r.rank))
        FROM generate_series(%(lo)s::bigint, %(hi)s::bigint - 1) c,
             affinity.top_items((SELECT model FROM {tbl} WHERE {cond}), c, 10) r""",
    "items_like": """
        SELECT count(*), md5(string_agg(format('%%s:%%s:%%s:%%s', p, r.item_id, r.similarity, r.rank), ','
                                         ORDER BY p, r.rank))
        FROM generate_series(501::bigint, 560) p,
             affinity.items_like((SELECT model FROM {tbl} WHERE {cond}), p, 8) r""",
}


def one(conn, sql, args=None):
    with conn.cursor() as cur:
        cur.execute(sql, args)
        return cur.fetchone()


def run(conn, sql, args=None):
    with conn.cursor() as cur:
        cur.execute(sql, args)


def make_shard(region, lo, hi):
    """A shard: its region's purchases, and a registry model fitted from them."""
    cl = _clusters.Cluster(region).initdb()
    cl.start()
    run(cl.connect(), "CREATE DATABASE %s" % DB)
    conn = cl.connect(DB)
    run(conn, "CREATE EXTENSION affinity")
    run(conn, "CREATE SCHEMA shop")
    # customers buy mostly from one of four shelves of 15 products (501..560);
    # the region shifts the favourite shelf, so the two regions' models differ
    run(conn, """CREATE TABLE shop.purchases AS
                 SELECT c::bigint AS customer_id,
                        (501 + ((c + %(shift)s) %% 4) * 15 + abs(hashint4(c * 131 + k)) %% 15)::bigint
                            AS product_id,
                        (1 + abs(hashint4(c * 17 + k)) %% 3)::real AS quantity
                 FROM generate_series(%(lo)s::int, %(hi)s::int - 1) c, generate_series(1, 6) k
                 WHERE abs(hashint4(c * 7 + k)) %% 5 <> 0""",
        {"shift": 0 if region == "north" else 1, "lo": lo, "hi": hi})
    run(conn, """SELECT affinity.define_model('region_picks',
                   'SELECT customer_id AS user_id, product_id AS item_id, quantity AS weight
                    FROM shop.purchases', %s)""", (OPTIONS,))
    run(conn, "SELECT affinity.refresh('region_picks')")
    return cl, conn


def make_coordinator(shards):
    cl = _clusters.Cluster("coordinator").initdb()
    cl.start()
    run(cl.connect(), "CREATE DATABASE %s" % DB)
    conn = cl.connect(DB)
    run(conn, "CREATE EXTENSION affinity")
    run(conn, "CREATE EXTENSION postgres_fdw")
    run(conn, "CREATE SCHEMA shop")
    run(conn, """CREATE TABLE shop.purchases (customer_id bigint NOT NULL, product_id bigint NOT NULL,
                                              quantity real NOT NULL)
                 PARTITION BY RANGE (customer_id)""")
    run(conn, "CREATE SCHEMA remote")
    for (region, lo, hi), (scl, _sconn) in zip(REGIONS, shards):
        run(conn, "CREATE SERVER shard_%s FOREIGN DATA WRAPPER postgres_fdw "
                  "OPTIONS (host %%s, port %%s, dbname %%s)" % region, (scl.sock, str(scl.port), DB))
        run(conn, "CREATE USER MAPPING FOR postgres SERVER shard_%s OPTIONS (user 'postgres')" % region)
        run(conn, """CREATE FOREIGN TABLE shop.purchases_%s PARTITION OF shop.purchases
                     FOR VALUES FROM (%d) TO (%d)
                     SERVER shard_%s OPTIONS (schema_name 'shop', table_name 'purchases')"""
            % (region, lo, hi, region))
        # the shard's registry, as far as collecting its models needs it
        run(conn, """CREATE FOREIGN TABLE remote.%s_models (name text, version integer,
                                                              model affinity.model)
                     SERVER shard_%s OPTIONS (schema_name 'affinity', table_name 'models')"""
            % (region, region))
    return cl, conn


def main():
    c = Checker("check_shard_fit")
    shards = [make_shard(*r) for r in REGIONS]
    coord, conn = make_coordinator(shards)

    # 1. the rows through the foreign path
    held = [one(sconn, ROWS_MD5.format("shop.purchases")) for _cl, sconn in shards]
    for (region, _lo, _hi), h in zip(REGIONS, held):
        got = one(conn, ROWS_MD5.format("shop.purchases_%s" % region))
        c.check(got == h and h[0] > 1000, "the %s partition reads the shard's rows whole" % region,
                "shard %r, coordinator %r" % (h, got))
    run(conn, "CREATE TABLE shop.purchases_local AS SELECT * FROM shop.purchases")
    total = one(conn, ROWS_MD5.format("shop.purchases"))
    local = one(conn, ROWS_MD5.format("shop.purchases_local"))
    c.check(total == local and total[0] == held[0][0] + held[1][0],
            "the local copy holds the partitioned table's rows",
            "%d rows = %d + %d" % (total[0], held[0][0], held[1][0]))

    # 2. one fit over the shards, the same model as over the local copy
    with conn.cursor() as cur:
        cur.execute("EXPLAIN (COSTS OFF) SELECT affinity.fit(customer_id, product_id, quantity, %s) "
                    "FROM shop.purchases", (OPTIONS,))
        plan = "\n".join(r[0] for r in cur.fetchall())
    c.check(plan.count("Foreign Scan") == 2 and "Append" in plan,
            "the fit over the partitioned table scans both shards", plan.replace("\n", " | "))
    fp_sql = "SELECT affinity.describe(affinity.fit(customer_id, product_id, quantity, %s))->>'fingerprint' FROM {}"
    fp_sharded = one(conn, fp_sql.format("shop.purchases"), (OPTIONS,))[0]
    fp_local = one(conn, fp_sql.format("shop.purchases_local"), (OPTIONS,))[0]
    c.check(fp_sharded == fp_local and fp_local is not None,
            "a fit over the shards equals the fit over the local copy (fingerprint)",
            "sharded %s, local %s" % (fp_sharded, fp_local))
    run(conn, """SELECT affinity.define_model('chain_picks',
                   'SELECT customer_id AS user_id, product_id AS item_id, quantity AS weight
                    FROM shop.purchases', %s)""", (OPTIONS,))
    run(conn, "SELECT affinity.refresh('chain_picks')")
    fp_registry = one(conn, "SELECT affinity.describe(affinity.get_model('chain_picks'))->>'fingerprint'")[0]
    c.check(fp_registry == fp_local, "a registry refresh over the shards gives the same fingerprint",
            fp_registry)

    # 3. the regions' models, collected into a model table on the coordinator
    run(conn, """CREATE TABLE shop.region_models AS
                 SELECT 'north'::text AS region, name, version, model FROM remote.north_models
                 UNION ALL
                 SELECT 'south', name, version, model FROM remote.south_models""")
    c.check(one(conn, "SELECT count(*) FROM shop.region_models")[0] == 2,
            "one model per region collected")
    region_fps = []
    for (region, lo, hi), (_cl, sconn) in zip(REGIONS, shards):
        ident = "SELECT md5(affinity.model_send(model)), version FROM {} WHERE {}"
        at_shard = one(sconn, ident.format("affinity.models", "name = 'region_picks'"))
        at_coord = one(conn, ident.format("shop.region_models", "region = %s"), (region,))
        c.check(at_shard == at_coord, "the %s model arrives intact (md5 of its binary form)" % region,
                "shard %r, coordinator %r" % (at_shard, at_coord))
        region_fps.append(one(conn, "SELECT affinity.describe(model)->>'fingerprint' "
                                    "FROM shop.region_models WHERE region = %s", (region,))[0])
        for k, sql in SERVE_MD5.items():
            on_shard = one(sconn, sql.format(tbl="affinity.models", cond="name = 'region_picks'"),
                           {"lo": lo, "hi": hi})
            on_coord = one(conn, sql.format(tbl="shop.region_models", cond="region = 'north'"
                                            if region == "north" else "region = 'south'"),
                           {"lo": lo, "hi": hi})
            c.check(on_shard == on_coord and on_shard[0] > 0,
                    "the collected %s model serves %s as on its shard" % (region, k),
                    "%r" % (on_coord,))
    c.check(region_fps[0] != region_fps[1], "the two regions' models differ")

    conn.close()
    for _cl, sconn in shards:
        sconn.close()
    _clusters.remove_all()
    c.finish()


if __name__ == "__main__":
    try:
        main()
    except (RuntimeError, psycopg2.Error) as exc:
        for cl in list(_clusters._LIVE):
            print("---- %s server log ----\n%s" % (cl.name, cl.log_tail()))
        print("FAILED: %s" % exc)
        sys.exit(1)
