"""Models survive pg_dump and pg_restore.

A database of the demo shop holds models two ways: fitted models in an
ordinary table of the shop's own, and named models in the registry
(affinity.models with its history: three refreshes, then a revert, so the
current version is not the newest one kept).  It is dumped in the custom
format (pg_dump -Fc, restored with pg_restore) and in the plain format
(pg_dump -Fp, replayed with psql), each into a new database.  In both copies:

* every model has the same text form and the same describe() (checksum
  included), and gives the same top_items rows (known customers, an
  unknown one who falls back to best-sellers, a guest basket) and the same
  items_like rows;
* the registry's rows are there, history included, with their versions,
  times, statistics and source queries: pg_dump carries the contents of
  the extension's tables because the extension script marks them with
  pg_extension_config_dump (PostgreSQL documentation, "Extension
  Configuration Tables");
* the registry keeps working: get_model serves the restored current model,
  and a refresh makes the next version number;
* a table of models fitted at every option bound (factors 1 and 1024,
  iterations 1, regularization 1e8 and the smallest positive double,
  alpha 0 and 1e6, epsilon 1e-6 and 1e6, linear and log confidence, cg and
  cholesky, every method, bigint and text keys) restores every row, each
  model with its fingerprint and text form; a fit whose arithmetic leaves
  the finite range (alpha 1e300) is an error, never a value that cannot be
  restored.

Runs with the PostgreSQL 15 client programs, as the role in PGUSER
(scripts/test: postgres), with dump files in AFFINITY_TEST_TMP.
"""

import os
import subprocess
import tempfile

import psycopg2

from _common import Checker, connect, fail

PG_BIN = "/usr/lib/postgresql/15/bin"
SOURCE = "affinity_dump_source"
COPIES = {"custom": "affinity_dump_custom", "plain": "affinity_dump_plain"}
NAME = "dump_shop_picks"
KNOWN = [50001, 50017, 50140]
UNKNOWN = 59999
BASKET = [104, 111, 126]


def db_conn(dbname):
    conn = psycopg2.connect(dbname=dbname)
    conn.autocommit = True
    return conn


def run(args, label):
    p = subprocess.run(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                       universal_newlines=True)
    if p.returncode != 0:
        fail("%s failed (exit %d): %s" % (label, p.returncode, (p.stderr or p.stdout)[-2000:]))
    return p.stderr


def build_source(cur):
    cur.execute("CREATE EXTENSION affinity")
    cur.execute("CREATE SCHEMA shop")
    cur.execute("""CREATE TABLE shop.purchases AS
                   SELECT (50001 + c)::bigint AS customer_id,
                          (101 + (c % 6) * 9 + abs(hashint4(c * 41 + k)) % 9)::bigint AS product_id,
                          (1 + abs(hashint4(c * 7 + k)) % 3)::real AS quantity
                   FROM generate_series(0, 199) c, generate_series(1, 7) k""")
    # fitted models kept in a table of the shop's own
    cur.execute("""CREATE TABLE shop.saved_models (label text PRIMARY KEY, model affinity.model NOT NULL)""")
    cur.execute("""INSERT INTO shop.saved_models
                   SELECT 'als', affinity.fit(customer_id, product_id, quantity,
                                              '{"factors": 8, "iterations": 6, "threads": 1}')
                   FROM shop.purchases
                   UNION ALL
                   SELECT 'bestsellers', affinity.fit(customer_id, product_id, quantity,
                                                      '{"method": "popularity"}')
                   FROM shop.purchases""")
    # a named model with history: three refreshes over changing data, then back one version
    cur.execute("SET search_path = shop, public")
    cur.execute("""SELECT affinity.define_model(%s,
                     'SELECT customer_id AS user_id, product_id AS item_id, quantity AS weight
                      FROM purchases',
                     '{"factors": 6, "iterations": 5, "threads": 1}')""", (NAME,))
    cur.execute("SELECT affinity.refresh(%s)", (NAME,))
    cur.execute("INSERT INTO shop.purchases VALUES (50300, 104, 2), (50300, 111, 1)")
    cur.execute("SELECT affinity.refresh(%s)", (NAME,))
    cur.execute("INSERT INTO shop.purchases VALUES (50301, 126, 1)")
    cur.execute("SELECT affinity.refresh(%s)", (NAME,))
    cur.execute("SELECT affinity.revert_model(%s)", (NAME,))
    cur.execute("RESET search_path")
    build_bound_models(cur)


# (label, options, text keys?) of the models fitted at the option bounds
BOUNDS = [
    ("factors 1", '{"factors": 1, "iterations": 2}', False),
    ("factors 1024", '{"factors": 1024, "iterations": 1}', False),
    ("iterations 1", '{"factors": 4, "iterations": 1}', False),
    ("regularization 1e8", '{"factors": 4, "iterations": 2, "regularization": 1e8}', False),
    ("regularization min cg", '{"factors": 4, "iterations": 2, "regularization": 5e-324}', False),
    ("regularization min cholesky",
     '{"factors": 4, "iterations": 2, "regularization": 5e-324, "solver": "cholesky"}', False),
    ("alpha 0", '{"factors": 4, "iterations": 2, "alpha": 0}', False),
    ("alpha 1e6 linear", '{"factors": 4, "iterations": 2, "alpha": 1e6, "confidence": "linear"}', False),
    ("alpha 1e6 log", '{"factors": 4, "iterations": 2, "alpha": 1e6, "confidence": "log"}', False),
    ("epsilon 1e-6", '{"factors": 4, "iterations": 2, "confidence": "log", "epsilon": 1e-6}', False),
    ("epsilon 1e6", '{"factors": 4, "iterations": 2, "confidence": "log", "epsilon": 1e6}', False),
    ("cholesky linear", '{"factors": 6, "iterations": 2, "solver": "cholesky", "confidence": "linear"}',
     False),
    ("als text keys", '{"factors": 3, "iterations": 2}', True),
    ("ease", '{"method": "ease"}', False),
    ("ease regularization min", '{"method": "ease", "regularization": 5e-324}', False),
    ("ease regularization 1e8", '{"method": "ease", "regularization": 1e8}', False),
    ("ease text keys", '{"method": "ease"}', True),
    ("item_knn 1 neighbour", '{"method": "item_knn", "neighbors": 1}', False),
    ("item_knn text keys", '{"method": "item_knn", "neighbors": 3}', True),
    ("popularity", '{"method": "popularity"}', False),
    ("popularity text keys", '{"method": "popularity"}', True),
]


def build_bound_models(cur):
    """shop.bound_models: one model per option bound, fitted on tiny data."""
    cur.execute("""CREATE TABLE shop.tiny AS
                   SELECT (50001 + c)::bigint AS customer_id,
                          (101 + abs(hashint4(c * 41 + k)) % 12)::bigint AS product_id,
                          (1 + abs(hashint4(c * 7 + k)) % 3)::real AS quantity
                   FROM generate_series(0, 29) c, generate_series(1, 4) k""")
    cur.execute("CREATE TABLE shop.bound_models (label text PRIMARY KEY, model affinity.model NOT NULL)")
    for label, opts, text in BOUNDS:
        keys = ("'customer-' || customer_id, 'product ' || product_id" if text
                else "customer_id, product_id")
        cur.execute("""INSERT INTO shop.bound_models
                       SELECT %%s, affinity.fit(%s, quantity,
                                                (%%s::jsonb || '{"threads": 1}'))
                       FROM shop.tiny""" % keys, (label, opts))


def model_facts(cur, expr, args):
    """Everything a model is checked by: text form, describe, served rows."""
    facts = {}
    cur.execute("SELECT md5(m::text), affinity.describe(m)::text FROM (SELECT %s AS m) x" % expr, args)
    facts["md5"], facts["describe"] = cur.fetchone()
    cur.execute("SELECT affinity.describe(m)->>'checksum' FROM (SELECT %s AS m) x" % expr, args)
    facts["checksum"] = cur.fetchone()[0]
    for u in KNOWN + [UNKNOWN]:
        cur.execute("SELECT item_id, score, rank FROM affinity.top_items((SELECT %s), %%s, 8)"
                    % expr, args + (u,))
        facts["top_items %d" % u] = cur.fetchall()
    cur.execute("SELECT item_id, score, rank FROM affinity.top_items((SELECT %s), %%s::bigint[], 8)"
                % expr, args + (BASKET,))
    facts["basket"] = cur.fetchall()
    cur.execute("SELECT affinity.describe(m)->>'method' FROM (SELECT %s AS m) x" % expr, args)
    if cur.fetchone()[0] != "popularity":       # best-sellers have no item similarities
        cur.execute("SELECT item_id, similarity, rank FROM affinity.items_like((SELECT %s), 104, 6)"
                    % expr, args)
        facts["items_like 104"] = cur.fetchall()
    return facts


def snapshot(dbname):
    conn = db_conn(dbname)
    cur = conn.cursor()
    snap = {}
    cur.execute("SELECT label FROM shop.saved_models ORDER BY label")
    for (label,) in cur.fetchall():
        snap["table " + label] = model_facts(
            cur, "(SELECT model FROM shop.saved_models WHERE label = %s)", (label,))
    cur.execute("""SELECT name, source_query, options::text, search_path, keep_versions, version,
                          fitted_at, stats::text, md5(model::text)
                   FROM affinity.models ORDER BY name""")
    snap["registry rows"] = cur.fetchall()
    cur.execute("""SELECT name, version, fitted_at, stats::text, md5(model::text)
                   FROM affinity.model_history ORDER BY name, version""")
    snap["history rows"] = cur.fetchall()
    cur.execute("""SELECT label, affinity.describe(model)->>'fingerprint', md5(model::text)
                   FROM shop.bound_models ORDER BY label""")
    snap["models at the option bounds"] = cur.fetchall()
    snap["registry current"] = model_facts(cur, "affinity.get_model(%s)", (NAME,))
    cur.execute("SELECT version FROM affinity.model_history WHERE name = %s ORDER BY version", (NAME,))
    for (v,) in cur.fetchall():
        snap["history v%d" % v] = model_facts(
            cur, "(SELECT model FROM affinity.model_history WHERE name = %s AND version = %s)",
            (NAME, v))
    conn.close()
    return snap


def compare(c, what, want, got):
    same = sorted(want) == sorted(got)
    c.check(same, "%s: the same models and tables (%d)" % (what, len(want)),
            "" if same else "before %s, after %s" % (sorted(want), sorted(got)))
    for key in sorted(want):
        if key not in got:
            continue
        if isinstance(want[key], dict):
            diffs = [f for f in want[key] if want[key][f] != got[key].get(f)]
            c.check(not diffs, "%s: %s identical (text form, describe, checksum, served rows)"
                    % (what, key), "differs in " + ", ".join(diffs) if diffs else "")
        else:
            same = want[key] == got[key]
            c.check(same, "%s: %s identical (%d)" % (what, key, len(want[key])),
                    "" if same else "before %r\nafter  %r" % (want[key], got[key]))


def after_restore_refresh(c, what, dbname, current_version, newest_version):
    conn = db_conn(dbname)
    cur = conn.cursor()
    cur.execute("SELECT (affinity.refresh(%s))->'version'", (NAME,))
    v = cur.fetchone()[0]
    c.check(v == newest_version + 1,
            "%s: a refresh after the restore makes version %d" % (what, newest_version + 1),
            "got %s (current was %d)" % (v, current_version))
    conn.close()


def main():
    c = Checker("check_dump_restore")
    admin = connect()
    acur = admin.cursor()
    tmp = os.environ.get("AFFINITY_TEST_TMP") or tempfile.mkdtemp(prefix="affinity-dump-")
    for db in [SOURCE] + list(COPIES.values()):
        acur.execute("DROP DATABASE IF EXISTS %s WITH (FORCE)" % db)
    try:
        acur.execute("CREATE DATABASE %s" % SOURCE)
        src = db_conn(SOURCE)
        build_source(src.cursor())
        src.close()
        want = snapshot(SOURCE)
        scur = db_conn(SOURCE).cursor()
        scur.execute("SELECT version FROM affinity.models WHERE name = %s", (NAME,))
        current = scur.fetchone()[0]
        scur.execute("SELECT max(version), count(*) FROM affinity.model_history WHERE name = %s", (NAME,))
        newest, kept = scur.fetchone()
        scur.connection.close()
        c.check(current == 2 and newest == 3 and kept == 3,
                "the source registry: current version 2 (reverted), versions 1-3 kept",
                "current %s, newest %s, %s kept" % (current, newest, kept))
        c.check(len(want["models at the option bounds"]) == len(BOUNDS),
                "the source holds a model at each of the %d option bounds" % len(BOUNDS))
        scur = db_conn(SOURCE).cursor()
        try:
            scur.execute("""SELECT affinity.fit(customer_id, product_id, quantity,
                                   '{"factors": 4, "iterations": 2, "alpha": 1e300, "threads": 1}')
                            FROM shop.tiny""")
            c.check(False, "a fit whose loss leaves the finite range (alpha 1e300) is an error")
        except psycopg2.Error as e:
            c.check(True, "a fit whose loss leaves the finite range (alpha 1e300) is an error",
                    "%s: %s" % (e.pgcode, e.diag.message_primary))
        scur.connection.close()

        # custom format
        dump = os.path.join(tmp, "shop.dump")
        run([PG_BIN + "/pg_dump", "-Fc", "-f", dump, SOURCE], "pg_dump -Fc")
        acur.execute("CREATE DATABASE %s" % COPIES["custom"])
        err = run([PG_BIN + "/pg_restore", "--exit-on-error", "-d", COPIES["custom"], dump],
                  "pg_restore")
        c.check(err.strip() == "", "pg_restore reports nothing", err.strip()[:500])
        compare(c, "custom format", want, snapshot(COPIES["custom"]))
        after_restore_refresh(c, "custom format", COPIES["custom"], current, newest)

        # plain format
        script = os.path.join(tmp, "shop.sql")
        run([PG_BIN + "/pg_dump", "-Fp", "-f", script, SOURCE], "pg_dump -Fp")
        with open(script) as f:
            text = f.read()
        c.check("COPY affinity.model_history" in text and "COPY affinity.models" in text,
                "the plain dump carries the registry's rows (COPY of both registry tables)")
        acur.execute("CREATE DATABASE %s" % COPIES["plain"])
        p = subprocess.run([PG_BIN + "/psql", "-X", "-q", "-v", "ON_ERROR_STOP=1",
                            "-d", COPIES["plain"], "-f", script],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, universal_newlines=True)
        clean = p.returncode == 0 and p.stderr.strip() == ""
        c.check(clean, "the plain dump replays without an error or warning",
                "" if clean else "exit %d: %s" % (p.returncode, p.stderr.strip()[:500]))
        if p.returncode == 0:
            compare(c, "plain format", want, snapshot(COPIES["plain"]))
            after_restore_refresh(c, "plain format", COPIES["plain"], current, newest)
    finally:
        for db in [SOURCE] + list(COPIES.values()):
            try:
                acur.execute("DROP DATABASE IF EXISTS %s WITH (FORCE)" % db)
            except psycopg2.Error as e:
                print("cleanup: %s" % e)
    c.finish()


if __name__ == "__main__":
    main()
