"""An updated database has the functions of a fresh install, one for one.

A database that was at 1.0 or 1.1 under a library before 1.2 names that
library's C symbols in pg_proc (most without the affinity_ prefix:
top_items, score, describe, model_in, ...).  ALTER EXTENSION affinity UPDATE
must bind each of them to its 1.2 symbol and leave everything else as a
fresh install has it.

Three databases: `fresh` (CREATE EXTENSION affinity), and two built the way
such databases are: CREATE EXTENSION affinity VERSION '1.0' (or '1.1'), their
C functions set back to the old symbol names, then ALTER EXTENSION affinity
UPDATE.  Checks, per database:
- before the update a call of an old-named function fails with "could not
  find function" (the old state is real), after it the call works;
- every function of the extension (functions and aggregates, by name and
  identity arguments) exists in both with the same argument names and
  defaults, result, kind, volatility, strictness, PARALLEL, COST, ROWS,
  security, leakproofness, SET options, library and symbol (prosrc), and
  comment; every aggregate has the same support functions and options.
"""

import os
import sys

import psycopg2

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _common  # noqa: E402

# The symbols that 1.0 and 1.1 named without the prefix; 1.2 prefixes them.
OLD_SYMBOLS = {
    "model_in", "model_out", "model_recv", "model_send",
    "top_items", "top_items_basket", "top_items_for_all", "items_like", "users_like",
    "score", "reasons", "user_vector", "item_vector", "user_vectors", "item_vectors",
    "ranking_metrics_transfn", "ranking_metrics_combinefn", "ranking_metrics_serialfn",
    "ranking_metrics_deserialfn", "ranking_metrics_finalfn", "describe", "forget_user",
}

MEMBERS = """
    SELECT p.oid FROM pg_proc p
    JOIN pg_depend d ON d.classid = 'pg_proc'::regclass AND d.objid = p.oid AND d.deptype = 'e'
    JOIN pg_extension e ON e.oid = d.refobjid AND e.extname = 'affinity'
"""

FUNCTIONS = """
    SELECT p.proname || '(' || pg_get_function_identity_arguments(p.oid) || ')',
           pg_get_function_arguments(p.oid), pg_get_function_result(p.oid),
           p.prokind, p.provolatile, p.proisstrict, p.proparallel, p.procost, p.prorows,
           p.proretset, p.prosecdef, p.proleakproof, p.proconfig,
           l.lanname, p.probin, p.prosrc, obj_description(p.oid, 'pg_proc')
    FROM pg_proc p JOIN pg_language l ON l.oid = p.prolang
    WHERE p.oid IN (%s)
    ORDER BY 1
""" % MEMBERS

FIELDS = ["arguments", "result", "kind", "volatility", "strict", "parallel", "cost", "rows",
          "returns set", "security definer", "leakproof", "SET options", "language",
          "library", "symbol", "comment"]

AGGREGATES = """
    SELECT a.aggfnoid::regprocedure::text, a.aggkind, a.aggtransfn::regprocedure::text,
           a.aggfinalfn::regprocedure::text, a.aggcombinefn::regprocedure::text,
           a.aggserialfn::regprocedure::text, a.aggdeserialfn::regprocedure::text,
           a.aggfinalextra, a.aggfinalmodify, a.aggtranstype::regtype::text, a.agginitval
    FROM pg_aggregate a
    WHERE a.aggfnoid IN (%s)
    ORDER BY 1
""" % MEMBERS

DATABASES = ["affinity_fidelity_fresh", "affinity_fidelity_10", "affinity_fidelity_11"]


def connect(dbname):
    conn = psycopg2.connect(dbname=dbname)
    conn.autocommit = True
    return conn


def set_old_symbols(cur):
    """Name the old library's symbols, as a database created by it does."""
    cur.execute("""
        UPDATE pg_proc SET prosrc = substr(prosrc, length('affinity_') + 1)
        WHERE oid IN (%s)
          AND prolang = (SELECT oid FROM pg_language WHERE lanname = 'c')
          AND left(prosrc, length('affinity_')) = 'affinity_'
          AND substr(prosrc, length('affinity_') + 1) = ANY (%%s)
        RETURNING prosrc""" % MEMBERS, (sorted(OLD_SYMBOLS),))
    return [r[0] for r in cur.fetchall()]


def call_error(cur, sql):
    """The message of the error a statement raises, or None."""
    try:
        cur.execute(sql)
        cur.fetchall()
        return None
    except psycopg2.Error as exc:
        return (exc.diag.message_primary or str(exc)).strip()


def snapshot(cur):
    cur.execute(FUNCTIONS)
    functions = {r[0]: r[1:] for r in cur.fetchall()}
    cur.execute(AGGREGATES)
    aggregates = {r[0]: r[1:] for r in cur.fetchall()}
    return functions, aggregates


def compare(c, label, fresh, other):
    f_fresh, a_fresh = fresh
    f_other, a_other = other
    c.check(set(f_fresh) == set(f_other), "%s: the same functions as a fresh install" % label,
            "%d functions; only fresh: %s; only updated: %s"
            % (len(f_fresh), sorted(set(f_fresh) - set(f_other)),
               sorted(set(f_other) - set(f_fresh))))
    diffs = []
    for name in sorted(set(f_fresh) & set(f_other)):
        for field, x, y in zip(FIELDS, f_fresh[name], f_other[name]):
            if x != y:
                diffs.append("%s %s: fresh %r, updated %r" % (name, field, x, y))
    c.check(not diffs, "%s: every function's properties equal a fresh install's" % label,
            "; ".join(diffs[:10]) if diffs else "%d functions x %d properties"
            % (len(f_fresh), len(FIELDS)))
    c.check(a_fresh == a_other, "%s: the aggregates equal a fresh install's" % label,
            "%d aggregates" % len(a_fresh) if a_fresh == a_other else
            "; ".join("%s: fresh %r, updated %r" % (k, a_fresh.get(k), a_other.get(k))
                      for k in sorted(set(a_fresh) | set(a_other))
                      if a_fresh.get(k) != a_other.get(k))[:2000])


def main():
    c = _common.Checker("check_upgrade_fidelity")
    admin = _common.connect()
    acur = admin.cursor()
    for db in DATABASES:
        acur.execute("DROP DATABASE IF EXISTS %s" % db)
        acur.execute("CREATE DATABASE %s" % db)
    try:
        conn = connect(DATABASES[0])
        cur = conn.cursor()
        cur.execute("CREATE EXTENSION affinity")
        fresh = snapshot(cur)
        conn.close()
        c.check(len(fresh[0]) >= 60 and len(fresh[1]) >= 8, "a fresh install has its functions",
                "%d functions, %d aggregates" % (len(fresh[0]), len(fresh[1])))
        c_symbols = sorted({v[-2] for v in fresh[0].values() if v[12] == "c"})
        c.check(all(s.startswith("affinity_") for s in c_symbols),
                "a fresh install names only affinity_ symbols", " ".join(c_symbols[:5]) + " ...")

        for db, version in ((DATABASES[1], "1.0"), (DATABASES[2], "1.1")):
            label = "from %s" % version
            conn = connect(db)
            cur = conn.cursor()
            cur.execute("CREATE EXTENSION affinity VERSION %s", (version,))
            renamed = set_old_symbols(cur)
            c.check(len(renamed) >= 20 and set(renamed) <= OLD_SYMBOLS,
                    "%s: the C functions name the old symbols" % label,
                    "%d functions, %d symbols" % (len(renamed), len(set(renamed))))
            # a fresh session: nothing of the new names is cached
            conn.close()
            conn = connect(db)
            cur = conn.cursor()
            err = call_error(cur, "SELECT affinity.describe(affinity.fit(1::bigint, 1::bigint, 1::real))")
            c.check(err is not None and err.startswith('could not find function "describe"'),
                    "%s: before the update a C function's call fails" % label, str(err)[:100])
            cur.execute("ALTER EXTENSION affinity UPDATE")
            cur.execute("SELECT affinity.describe(affinity.fit(u, i, 1::real))->>'users' "
                        "FROM (VALUES (1::bigint, 2::bigint), (2, 2), (2, 3)) v (u, i)")
            c.check(cur.fetchone()[0] == "2", "%s: after the update the call works" % label)
            compare(c, label, fresh, snapshot(cur))
            conn.close()
    finally:
        for db in DATABASES:
            acur.execute("DROP DATABASE IF EXISTS %s WITH (FORCE)" % db)
        admin.close()
    c.finish()


if __name__ == "__main__":
    main()
