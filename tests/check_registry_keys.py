"""The registry holds text-key models, with key types taken from the query.

A role that logs in (the registry runs a query only in its owner's own
sessions) keeps an invented shop's models, whose products are stock codes
(some all digits, some with letters) and whose customers are references:

* define_model reads the key types from the query's columns: 'text,text'
  is stored in affinity.models.key_types before any row is read;
* refresh fits a text-key model, top_items serves its codes, a second
  refresh and revert_model go back to the first model (same checksum);
* ranking_metrics over the held-out purchases, written as text, equals the
  same figures recomputed here from top_items by the README's definitions
  (precision, recall, NDCG with a log2 discount, MAP, hit rate, coverage);
* a refresh whose query now yields bigint keys is refused (SQLSTATE 42804)
  and the current model, its version and its history stay;
* numeric and float8 ids are refused at define time with a hint naming the
  casts, and a mixed pair is defined with its own key types;
* pg_dump -Fc and pg_restore carry key_types and the model; the restored
  model serves the same rows and the owner refreshes it in the copy;
* an update from 1.1 gives each row the key types of its current model
  (text when a text-key model was stored), bigint when never fitted;
* pg_cron, when set up, refreshes the text-key model as its owner;
* on the Online Retail data (skipped, saying so, when absent): a query over
  the raw file's numeric-looking customer ids is refused with the cast to
  use, the stock codes (with 'POST' and other letters, which a bigint fit
  refused in 1.1) make a text-key model through the registry, and its
  ranking_metrics equals the figures recomputed from top_items.
"""

import math
import os
import random
import subprocess
import tempfile
import time

import psycopg2

import _common as C

SCHEMA = "keys_shop"
OWNER = "regress_keys_owner"
NAME = "keys_codes"
DUMP_SRC = "affinity_keys_src"
DUMP_COPY = "affinity_keys_copy"
UPGRADE_DB = "affinity_keys_upgrade"
K = 10
CRON_JOB = "affinity_refresh_keys_codes"
CRON_WAIT = 130


def one(cur, sql, args=None):
    cur.execute(sql, args)
    row = cur.fetchone()
    return row[0] if row else None


def connect_as(user, dbname=None):
    kw = {"user": user}
    if dbname:
        kw["dbname"] = dbname
    conn = psycopg2.connect(**kw)
    conn.autocommit = True
    return conn


def error_of(cur, sql, args=None):
    """Run sql expecting an error; returns (sqlstate, message, hint) or None."""
    try:
        cur.execute(sql, args)
    except psycopg2.Error as e:
        d = e.diag
        return e.pgcode, d.message_primary or "", d.message_hint or ""
    return None


def invent_shop(seed=7):
    """Purchases of 300 customers over 120 stock codes in 4 groups; codes of
    the form 85123A, 22423, 4713B (digits, or digits and a letter)."""
    rng = random.Random(seed)
    codes = []
    for g in range(4):
        for j in range(30):
            base = str(20000 + 1000 * g + 17 * j)
            codes.append(base + ("" if j % 3 else "ABC"[j % 2]))
    rows = []
    held = []
    for c in range(300):
        ref = "CU-%04d" % c
        group = c % 4
        own = codes[30 * group:30 * group + 30]
        bought = rng.sample(own, 8) + rng.sample(codes, 2)
        for code in bought:
            rows.append((ref, code, rng.randint(1, 4)))
        later = [x for x in own if x not in bought]
        for code in rng.sample(later, 2):
            held.append((ref, code))
    held.append(("CU-9999", codes[0]))          # an unknown customer
    held.append(("CU-0001", "99999Z"))          # a code new to the catalogue
    return rows, held


def metrics_by_hand(cur, model_sql, args, held, k):
    """The README's definitions, from top_items, over held-out (user, item)
    text pairs; users the model does not know are counted apart."""
    cur.execute("SELECT count(*) FROM affinity.item_vectors(%s, NULL::text[])" % model_sql, args)
    n_items = cur.fetchone()[0]
    by_user = {}
    for u, i in held:
        by_user.setdefault(u, set()).add(i)
    sums = dict(precision=0.0, recall=0.0, ndcg=0.0, map=0.0, hit_rate=0.0)
    users = unknown = without_new = 0
    shown = set()
    cur.execute("SELECT item_id FROM affinity.item_vectors(%s, NULL::text[])" % model_sql, args)
    catalogue = set(r[0] for r in cur.fetchall())
    for u, items in sorted(by_user.items()):
        cur.execute("SELECT affinity.user_vector(%s, %%s) IS NULL" % model_sql, args + (u,))
        if cur.fetchone()[0]:
            unknown += 1
            continue
        cur.execute("SELECT item_id FROM affinity.top_items(%s, %%s, 100000) ORDER BY rank"
                    % model_sql, args + (u,))
        unseen = set(r[0] for r in cur.fetchall())
        seen = catalogue - unseen
        rel = set(i for i in items if i not in seen)
        if not rel:
            without_new += 1
            continue
        cur.execute("SELECT item_id FROM affinity.top_items(%s, %%s, %%s) ORDER BY rank"
                    % model_sql, args + (u, k))
        top = [r[0] for r in cur.fetchall()]
        shown.update(top)
        hits = 0
        dcg = ap = 0.0
        for r, it in enumerate(top):
            if it in rel:
                hits += 1
                dcg += 1.0 / math.log2(r + 2)
                ap += hits / (r + 1)
        idcg = sum(1.0 / math.log2(r + 2) for r in range(min(k, len(rel))))
        users += 1
        sums["precision"] += hits / k
        sums["recall"] += hits / len(rel)
        sums["ndcg"] += dcg / idcg
        sums["map"] += ap / min(k, len(rel))
        sums["hit_rate"] += 1 if hits else 0
    out = {key: v / max(users, 1) for key, v in sums.items()}
    out.update(users=users, unknown_users=unknown, users_without_new_items=without_new,
               coverage=len(shown) / n_items, k=k)
    return out


def compare_metrics(c, label, got, want, tol=1e-9):
    bad = [key for key in want
           if abs(float(got.get(key, float("nan"))) - float(want[key])) > tol]
    c.check(not bad, label,
            "recall %.4f, ndcg %.4f over %d users (%d unknown)%s"
            % (want["recall"], want["ndcg"], want["users"], want["unknown_users"],
               "" if not bad else "; differ: " + ", ".join(
                   "%s %r vs %r" % (key, got.get(key), want[key]) for key in bad)))


def state(cur, name):
    cur.execute("""SELECT version, affinity.describe(model)->>'checksum', key_types,
                          (SELECT count(*) FROM affinity.model_history h WHERE h.name = m.name)
                   FROM affinity.models m WHERE name = %s""", (name,))
    return cur.fetchone()


def setup_db(cur, rows, held):
    """Schema, tables and grants for the owner in the current database."""
    cur.execute("CREATE EXTENSION IF NOT EXISTS affinity")
    cur.execute("DROP SCHEMA IF EXISTS %s CASCADE" % SCHEMA)
    cur.execute("CREATE SCHEMA %s" % SCHEMA)
    cur.execute("CREATE TABLE %s.purchases (customer_ref text, stock_code text, quantity integer)" % SCHEMA)
    C.copy_rows(cur, SCHEMA + ".purchases", ["customer_ref", "stock_code", "quantity"], rows)
    cur.execute("CREATE TABLE %s.heldout (customer_ref text, stock_code text)" % SCHEMA)
    C.copy_rows(cur, SCHEMA + ".heldout", ["customer_ref", "stock_code"], held)
    cur.execute("GRANT USAGE ON SCHEMA %s TO %s" % (SCHEMA, OWNER))
    cur.execute("GRANT SELECT, UPDATE ON ALL TABLES IN SCHEMA %s TO %s" % (SCHEMA, OWNER))
    cur.execute("GRANT SELECT, INSERT, UPDATE, DELETE ON affinity.models TO %s" % OWNER)
    cur.execute("GRANT SELECT, INSERT, DELETE ON affinity.model_history TO %s" % OWNER)


DEFINE = """SELECT affinity.define_model(%s,
  'SELECT customer_ref AS user_id, stock_code AS item_id, quantity AS weight FROM keys_shop.purchases',
  '{"factors": 8, "iterations": 6, "threads": 1}')"""


def check_registry(c, cur, own, held):
    own.execute(DEFINE, (NAME,))
    c.check(one(cur, "SELECT key_types FROM affinity.models WHERE name = %s", (NAME,)) == "text,text",
            "define_model stores the query's key types (text,text) before any fit")
    r1 = one(own, "SELECT affinity.refresh(%s)", (NAME,))
    d = C.describe(own, "affinity.get_model('%s')" % NAME)
    c.check(d["key_type"] == "text" and r1["key_types"] == "text,text" and r1["version"] == 1,
            "refresh fits a text-key model", "key_type %s, refresh says %s" % (d["key_type"], r1))
    own.execute("SELECT item_id FROM affinity.top_items(affinity.get_model(%s), 'CU-0005', 5)", (NAME,))
    top = [r[0] for r in own.fetchall()]
    own.execute("SELECT count(*) FROM keys_shop.purchases WHERE stock_code = ANY(%s) "
                "AND customer_ref = 'CU-0005'", (top,))
    bought = own.fetchone()[0]
    own.execute("SELECT count(DISTINCT stock_code) FROM keys_shop.purchases WHERE stock_code = ANY(%s)", (top,))
    real = own.fetchone()[0]
    c.check(len(top) == 5 and real == 5 and bought == 0,
            "top_items serves five real stock codes the customer has not bought", repr(top))

    got = one(own, "SELECT affinity.ranking_metrics(affinity.get_model(%s), customer_ref, stock_code, %s) "
                   "FROM keys_shop.heldout", (NAME, K))
    want = metrics_by_hand(own, "affinity.get_model(%s)", (NAME,), held, K)
    compare_metrics(c, "ranking_metrics over text keys equals the figures recomputed from top_items", got, want)

    v1 = state(cur, NAME)
    cur.execute("INSERT INTO keys_shop.purchases VALUES ('CU-0300', '20017', 3), ('CU-0300', '20034', 1)")
    r2 = one(own, "SELECT affinity.refresh(%s)", (NAME,))
    back = one(own, "SELECT affinity.revert_model(%s)", (NAME,))
    v = state(cur, NAME)
    c.check(r2["version"] == 2 and back["version"] == 1 and v[1] == v1[1] and v[2] == "text,text",
            "a second refresh, then revert_model, brings back the first text-key model",
            "refresh %s, revert %s, checksum %s vs %s" % (r2["version"], back["version"], v[1], v1[1]))

    before = state(cur, NAME)
    own.execute("UPDATE affinity.models SET source_query = 'SELECT (20000 + length(customer_ref))::bigint AS user_id, "
                "length(stock_code)::bigint AS item_id, quantity AS weight FROM keys_shop.purchases' "
                "WHERE name = %s", (NAME,))
    err = error_of(own, "SELECT affinity.refresh(%s)", (NAME,))
    after = state(cur, NAME)
    c.check(err is not None and err[0] == "42804" and "now yields bigint,bigint keys" in err[1]
            and after == before,
            "a refresh whose query now yields bigint keys is refused; model, version and history stay",
            "%r; before %r, after %r" % (err, before, after))
    own.execute(DEFINE, (NAME,))

    cases = [
        ("numeric", "SELECT customer_ref AS user_id, stock_code::numeric AS item_id, quantity AS weight "
                    "FROM keys_shop.purchases WHERE stock_code ~ '^[0-9]+$'", "42804", ["::bigint", "::text"]),
        ("float8", "SELECT length(customer_ref)::float8 AS user_id, stock_code AS item_id, quantity AS weight "
                   "FROM keys_shop.purchases", "42804", ["::bigint", "::text"]),
    ]
    for label, query, code, words in cases:
        err = error_of(own, "SELECT affinity.define_model('keys_bad', %s)", (query,))
        c.check(err is not None and err[0] == code and all(w in err[2] for w in words),
                "%s ids are refused at define time with a hint naming the casts" % label, repr(err))
    c.check(one(cur, "SELECT count(*) FROM affinity.models WHERE name = 'keys_bad'") == 0,
            "and nothing is registered for them")
    # a mixed pair is a model of its own key types
    err = error_of(own, "SELECT affinity.define_model('keys_mixed', %s)",
                   ("SELECT length(customer_ref)::bigint AS user_id, stock_code AS item_id, quantity AS weight "
                    "FROM keys_shop.purchases",))
    kt = one(cur, "SELECT key_types FROM affinity.models WHERE name = 'keys_mixed'")
    c.check(err is None and kt == "bigint,text", "a mixed pair is defined with key types bigint,text",
            "%r, %r" % (err, kt))
    cur.execute("DELETE FROM affinity.models WHERE name = 'keys_mixed'")


def check_dump_restore(c, su, rows, held):
    su_cur = su.cursor()
    for db in (DUMP_SRC, DUMP_COPY):
        su_cur.execute("DROP DATABASE IF EXISTS %s" % db)
    su_cur.execute("CREATE DATABASE %s" % DUMP_SRC)
    src = connect_as(os.environ.get("PGUSER", "postgres"), DUMP_SRC)
    setup_db(src.cursor(), rows, held)
    own = connect_as(OWNER, DUMP_SRC)
    own.cursor().execute(DEFINE, (NAME,))
    own.cursor().execute("SELECT affinity.refresh(%s)", (NAME,))
    scur = src.cursor()
    facts_sql = ("SELECT key_types, version, md5(model::text) FROM affinity.models WHERE name = %s")
    scur.execute(facts_sql, (NAME,))
    before = scur.fetchone()
    scur.execute("SELECT item_id, score, rank FROM affinity.top_items(affinity.get_model(%s), 'CU-0042', 8)", (NAME,))
    served = scur.fetchall()
    own.close()
    src.close()
    tmp = os.environ.get("AFFINITY_TEST_TMP") or tempfile.mkdtemp()
    path = os.path.join(tmp, "keys.dump")
    for args in (["pg_dump", "-Fc", "-f", path, DUMP_SRC], ["createdb", DUMP_COPY],
                 ["pg_restore", "-d", DUMP_COPY, path]):
        p = subprocess.run(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, universal_newlines=True)
        if p.returncode != 0:
            C.fail("%s failed: %s" % (args[0], p.stderr[-2000:]))
    cp = connect_as(os.environ.get("PGUSER", "postgres"), DUMP_COPY)
    ccur = cp.cursor()
    ccur.execute(facts_sql, (NAME,))
    after = ccur.fetchone()
    ccur.execute("SELECT item_id, score, rank FROM affinity.top_items(affinity.get_model(%s), 'CU-0042', 8)", (NAME,))
    c.check(after == before and ccur.fetchall() == served,
            "pg_dump -Fc and pg_restore keep key_types, the model and its served rows",
            "before %r, after %r" % (before, after))
    own = connect_as(OWNER, DUMP_COPY)
    r = one(own.cursor(), "SELECT affinity.refresh(%s)", (NAME,))
    c.check(r["version"] == before[1] + 1 and r["key_types"] == "text,text",
            "the owner refreshes the restored text-key model", repr(r))
    own.close()
    cp.close()
    for db in (DUMP_SRC, DUMP_COPY):
        su_cur.execute("DROP DATABASE IF EXISTS %s" % db)


def check_upgrade(c, su):
    su_cur = su.cursor()
    su_cur.execute("DROP DATABASE IF EXISTS %s" % UPGRADE_DB)
    su_cur.execute("CREATE DATABASE %s" % UPGRADE_DB)
    db = connect_as(os.environ.get("PGUSER", "postgres"), UPGRADE_DB)
    cur = db.cursor()
    cur.execute("CREATE EXTENSION affinity VERSION '1.1'")
    cur.execute("""CREATE TABLE buys AS SELECT u::bigint AS user_id, (abs(hashint4(u * 7 + i)) % 20)::bigint AS item_id,
                   1::real AS weight FROM generate_series(1, 50) u, generate_series(1, 4) i""")
    q = "SELECT user_id, item_id, weight FROM public.buys"
    qt = "SELECT user_id::text AS user_id, item_id::text AS item_id, weight FROM public.buys"
    for name, query in (("fitted", q), ("text_stored", qt), ("never", q)):
        cur.execute("SELECT affinity.define_model(%s, %s, '{\"method\": \"popularity\"}')", (name, query))
    cur.execute("SELECT affinity.refresh('fitted')")
    # 1.1 refreshes made bigint keys; an owner could store a text-key model itself
    cur.execute("""UPDATE affinity.models SET model = (SELECT affinity.fit(user_id::text, item_id::text, weight,
                   '{"method": "popularity"}') FROM buys), version = 1 WHERE name = 'text_stored'""")
    cur.execute("ALTER EXTENSION affinity UPDATE TO '1.2'")
    cur.execute("SELECT name, key_types FROM affinity.models ORDER BY name")
    got = dict(cur.fetchall())
    want = {"fitted": "bigint,bigint", "never": "bigint,bigint", "text_stored": "text,text"}
    c.check(got == want, "the update to 1.2 gives rows their current model's key types (bigint when never fitted)",
            repr(got))
    r = one(cur, "SELECT affinity.refresh('text_stored')")
    c.check(r["version"] == 2 and r["key_types"] == "text,text",
            "the stored text-key model refreshes from its text query after the update", repr(r))
    db.close()
    su_cur.execute("DROP DATABASE %s" % UPGRADE_DB)


def cron_ready(cur):
    if not one(cur, "SELECT count(*) FROM pg_available_extensions WHERE name = 'pg_cron'"):
        return "pg_cron is not installed"
    libs = one(cur, "SELECT current_setting('shared_preload_libraries')")
    if "pg_cron" not in [x.strip() for x in libs.split(",")]:
        return "pg_cron is not preloaded"
    if one(cur, "SELECT current_setting('cron.database_name', true)") != one(cur, "SELECT current_database()"):
        return "pg_cron runs its jobs in another database"
    return None


def check_cron(c, cur):
    why = cron_ready(cur)
    if why:
        print("pg_cron part skipped: %s" % why)
        return
    created = not one(cur, "SELECT count(*) FROM pg_extension WHERE extname = 'pg_cron'")
    cur.execute("CREATE EXTENSION IF NOT EXISTS pg_cron")
    before = state(cur, NAME)
    # after a revert the next version is the newest kept one plus one
    next_version = one(cur, "SELECT greatest(m.version, max(h.version)) + 1 FROM affinity.models m "
                            "JOIN affinity.model_history h USING (name) WHERE name = %s GROUP BY m.version", (NAME,))
    jobid = one(cur, "SELECT cron.schedule_in_database(%s, '* * * * *', format('SELECT affinity.refresh(%%L)', %s::text), "
                     "current_database(), username => %s)", (CRON_JOB, NAME, OWNER))
    t0 = time.monotonic()
    run = None
    try:
        while time.monotonic() - t0 < CRON_WAIT and run is None:
            cur.execute("SELECT status, return_message FROM cron.job_run_details WHERE jobid = %s "
                        "AND status IN ('succeeded', 'failed') ORDER BY runid LIMIT 1", (jobid,))
            run = cur.fetchone()
            if run is None:
                time.sleep(1)
    finally:
        cur.execute("SELECT cron.unschedule(%s)", (jobid,))
        cur.execute("DELETE FROM cron.job_run_details WHERE jobid = %s", (jobid,))
    after = state(cur, NAME)
    c.check(run is not None and run[0] == "succeeded" and after[0] == next_version and after[2] == "text,text",
            "pg_cron refreshes the text-key model as its owner",
            "run %r after %.0f s; version %s -> %s, key types %s" % (run, time.monotonic() - t0,
                                                                    before[0], after[0], after[2]))
    if created:
        cur.execute("DROP EXTENSION pg_cron")


def check_retail(c, cur, own):
    d = C.data_dir()
    names = [n for n in (os.listdir(d) if os.path.isdir(d) else [])
             if n.startswith("online-retail-") and n.endswith(".csv.xz")]
    if not names:
        print("Online Retail part skipped: data not found at %s" % d)
        return
    C.load_online_retail(cur, SCHEMA + ".raw")
    cur.execute("GRANT SELECT ON %s.raw TO %s" % (SCHEMA, OWNER))
    base = ("FROM keys_shop.raw WHERE \"InvoiceNo\" NOT LIKE 'C%%' AND \"Quantity\"::integer > 0 "
            "AND coalesce(btrim(\"CustomerID\"), '') <> '' AND \"InvoiceDate\"::timestamp < '2011-08-01'")
    err = error_of(own, "SELECT affinity.define_model('keys_retail', %s)",
                   ('SELECT "CustomerID"::numeric AS user_id, "StockCode" AS item_id, '
                    'count(*) AS weight ' + base.replace("%%", "%") + ' GROUP BY 1, 2',))
    c.check(err is not None and err[0] == "42804" and "user_id::bigint" in err[2],
            "Online Retail: customer ids read as numeric are refused, the hint names the cast", repr(err))
    query = ('SELECT ("CustomerID"::numeric)::bigint::text AS user_id, "StockCode" AS item_id, '
             'count(*) AS weight ' + base.replace("%%", "%") + ' GROUP BY 1, 2')
    own.execute("SELECT affinity.define_model('keys_retail', %s, "
                "'{\"factors\": 16, \"iterations\": 5, \"threads\": 2}')", (query,))
    r = one(own, "SELECT affinity.refresh('keys_retail')")
    codes_with_letters = one(own, "SELECT count(*) FROM affinity.item_vectors(affinity.get_model('keys_retail'), "
                                  "NULL::text[]) WHERE item_id !~ '^[0-9]+$'")
    c.check(r["key_types"] == "text,text" and codes_with_letters > 0,
            "Online Retail: the stock codes make a text-key model through the registry",
            "%s users, %s items, %d codes with letters (POST among them: %s)"
            % (r["users"], r["items"], codes_with_letters,
               one(own, "SELECT affinity.item_vector(affinity.get_model('keys_retail'), 'POST') IS NOT NULL")))
    own.execute("""SELECT DISTINCT ("CustomerID"::numeric)::bigint::text, "StockCode" FROM keys_shop.raw
                   WHERE "InvoiceNo" NOT LIKE 'C%%' AND "Quantity"::integer > 0
                     AND coalesce(btrim("CustomerID"), '') <> ''
                     AND "InvoiceDate"::timestamp >= '2011-09-01' AND "InvoiceDate"::timestamp < '2011-09-08'""")
    held = own.fetchall()
    cur.execute("CREATE TABLE keys_shop.retail_held (u text, i text)")
    C.copy_rows(cur, "keys_shop.retail_held", ["u", "i"], held)
    cur.execute("GRANT SELECT ON keys_shop.retail_held TO %s" % OWNER)
    got = one(own, "SELECT affinity.ranking_metrics(affinity.get_model('keys_retail'), u, i, 20) "
                   "FROM keys_shop.retail_held")
    want = metrics_by_hand(own, "affinity.get_model(%s)", ("keys_retail",), held, 20)
    compare_metrics(c, "Online Retail: ranking_metrics over stock codes equals the figures from top_items",
                    got, want)


def drop_owner(cur):
    if one(cur, "SELECT count(*) FROM pg_roles WHERE rolname = %s", (OWNER,)):
        cur.execute("DELETE FROM affinity.models WHERE owner_name = %s", (OWNER,))
        cur.execute("DROP OWNED BY %s" % OWNER)
        cur.execute("DROP ROLE %s" % OWNER)


def main():
    c = C.Checker("check_registry_keys")
    su = C.connect()
    cur = su.cursor()
    rows, held = invent_shop()
    cur.execute("DELETE FROM affinity.models WHERE name IN (%s, 'keys_bad', 'keys_retail')", (NAME,))
    drop_owner(cur)
    cur.execute("CREATE ROLE %s LOGIN" % OWNER)
    try:
        setup_db(cur, rows, held)
        own_conn = connect_as(OWNER)
        own = own_conn.cursor()
        check_registry(c, cur, own, held)
        check_cron(c, cur)
        check_retail(c, cur, own)
        own_conn.close()
        check_dump_restore(c, su, rows, held)
        check_upgrade(c, su)
    finally:
        cur.execute("DELETE FROM affinity.models WHERE name IN (%s, 'keys_bad', 'keys_retail')", (NAME,))
        cur.execute("DROP SCHEMA IF EXISTS %s CASCADE" % SCHEMA)
        for db in (DUMP_SRC, DUMP_COPY, UPGRADE_DB):
            cur.execute("DROP DATABASE IF EXISTS %s" % db)
        drop_owner(cur)
    c.finish()


if __name__ == "__main__":
    main()
