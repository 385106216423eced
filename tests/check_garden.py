"""Every SQL function of the extension called with awkward arguments.

The functions are listed at run time from src/affinity--*.sql (names) and
pg_proc (signatures of what is installed), so a function added later is
covered without editing this file.  Each function is called once with
ordinary arguments and then with one argument at a time replaced by an
awkward value of its type: NULL, empty arrays, k = 0, -1, 2^31-1 and
-2^31, ids at the bigint limits, NaN / Infinity / -0 weights, arrays of
100,000 ids, 2-D arrays; for each model it takes: implicit ALS, popularity,
ease and item_knn when this build fits them, models of one user and one
item, synthesized values of every method layout (tests/fuzz/seeds.py), and
any crafted bad value that text input wrongly accepts.  Aggregates get the
same per-argument variations over a few rows, one row, and empty input.

A case passes when it returns a result, or an error whose SQLSTATE is not
of class XX (internal error, data corrupted) or 58 (system error), within
the statement timeout, and the backend survives it.  A lost connection is a
crash: it is counted, the test reconnects once the server has recovered,
and the server log is searched for "terminated by signal" lines at the end.
The number of cases and the outcome by SQLSTATE are printed.
"""

import glob
import os
import re
import sys
import time

import psycopg2

from _common import REPO_DIR, Checker, connect

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "fuzz"))
import seeds  # noqa: E402

TIMEOUT = "20s"
BIG_IDS = "(SELECT array_agg(g) FROM generate_series(1::bigint, 100000) g)"
BIG_REALS = "(SELECT array_agg(1::real) FROM generate_series(1, 100000) g)"
BIG_TEXTS = "(SELECT array_agg(g::text) FROM generate_series(1, 100000) g)"
BIG = (BIG_IDS, BIG_REALS, BIG_TEXTS)
MIN_BIGINT = "'-9223372036854775808'::bigint"
MAX_BIGINT = "'9223372036854775807'::bigint"

# type -> (ordinary value, awkward values); SQL expressions, cast when used.
VALUES = {
    "bigint": ("1", ["NULL", "0", "-1", "999999", MIN_BIGINT, MAX_BIGINT]),
    "integer": ("5", ["NULL", "0", "-1", "1", "2147483647", "-2147483648"]),
    "boolean": ("true", ["NULL", "false"]),
    "real": ("1", ["NULL", "'NaN'", "'Infinity'", "'-Infinity'", "'-0'", "0", "-1",
                   "3e38", "1e-45"]),
    "timestamp with time zone": ("'2025-03-01 10:00+00'", ["NULL", "'infinity'", "'-infinity'",
                                                           "'4714-11-24 00:00+00 BC'",
                                                           "'294276-12-31 23:59:59+00'"]),
    "timestamp without time zone": ("'2025-03-01 10:00'", ["NULL", "'infinity'", "'-infinity'",
                                                           "'4714-11-24 00:00 BC'"]),
    "double precision": ("1", ["NULL", "'NaN'", "'Infinity'", "'-0'", "-1"]),
    "bigint[]": ("'{1,2,3}'", ["NULL", "'{}'", "'{NULL}'", "'{1,NULL,2}'", "'{1,1,1}'",
                               "'{-9223372036854775808,9223372036854775807}'",
                               "'{{1,2},{3,4}}'", BIG_IDS]),
    "real[]": ("'{1,1,1}'", ["NULL", "'{}'", "'{NaN,1,1}'", "'{Infinity,1,1}'",
                             "'{-0,-0,-0}'", "'{-1,1,1}'", "'{1}'", "'{NULL,1,1}'",
                             "'{{1,1},{1,1}}'", BIG_REALS]),
    "jsonb": ("'{}'", ["NULL", "'null'", "'[]'", "'\"x\"'", "'{\"k\": null}'"]),
    "text": ("'1'", ["NULL", "''", "'garden'", "' 1'", "'\u00fc\u00df'", "repeat('x', 100000)"]),
    "text[]": ("'{1,2,3}'", ["NULL", "'{}'", "'{NULL}'", "'{1,NULL,2}'", "'{\"\"}'", "'{1,1,1}'",
                             "'{{1,2},{3,4}}'", BIG_TEXTS]),
    "cstring": ("'QUZNRA=='", ["NULL", "''", "'not base64!'", "repeat('A', 100000)"]),
    "name": ("'garden'", ["NULL", "''"]),
    # a role: the current one, none (oid 0), and an oid no role has
    "regrole": ("current_user::text", ["NULL", "'-'", "'4294967295'"]),
}

# Options of the fit aggregate: ordinary, and awkward.
FIT_OPTIONS = ("'{\"factors\": 2, \"iterations\": 1, \"threads\": 1}'",
               ["NULL", "'{}'", "'null'", "'[]'", "'{\"factors\": 2147483647}'",
                "'{\"iterations\": 2147483647, \"factors\": 1}'", "'{\"threads\": -1}'",
                "'{\"seed\": -9223372036854775808}'", "'{\"alpha\": 1e308}'",
                "'{\"regularization\": 1e-320}'", "'{\"epsilon\": 1e-320}'",
                "'{\"method\": \"ease\", \"max_items\": 0}'",
                "'{\"method\": \"item_knn\", \"neighbors\": 0}'",
                "'{\"min_user_interactions\": 2147483647}'", "'{\"cg_steps\": 0}'"])

# Arguments of the registry functions, by name: (ordinary value, awkward values).
REGISTRY_QUERY = "'SELECT user_id, item_id, weight FROM garden.garden_buys'"
BY_NAME = {
    ("define_model", "name"): ("'garden_def'", ["NULL", "''", "'garden_reg'", "repeat('x', 100000)"]),
    ("define_model", "source_query"): (REGISTRY_QUERY, [
        "NULL", "''", "'SELECT 1'", "'garbage'", "'SELECT user_id, item_id FROM garden.garden_buys'",
        "'SELECT 1/0 AS user_id, 1 AS item_id, 1 AS weight'",
        "'SELECT user_id, item_id, weight FROM garden.garden_buys WHERE false'",
        "'SELECT user_id::text, item_id, weight FROM garden.garden_buys'"]),
    ("define_model", "options"): ("'{\"factors\": 2, \"iterations\": 1, \"threads\": 1}'",
                                  ["NULL", "'{}'", "'[]'", "'null'", "'{\"factors\": 0}'"]),
    ("refresh", "name"): ("'garden_reg'", ["NULL", "''", "'garden_none'"]),
    ("get_model", "name"): ("'garden_reg'", ["NULL", "''", "'garden_none'"]),
    ("revert_model", "name"): ("'garden_reg'", ["NULL", "''", "'garden_none'"]),
}

API_NAMES = ["fit", "top_items", "top_items_for_all", "items_like", "users_like", "score",
             "reasons", "user_vector", "item_vector", "user_vectors", "item_vectors",
             "describe", "runtime", "ranking_metrics", "define_model", "refresh",
             "get_model", "forget_user"]

GARDEN_DATA = """
CREATE TABLE garden_buys AS
SELECT u::bigint AS user_id, ((u * 7 + j * 5) % 20 + 1)::bigint AS item_id,
       (1 + (u + j) % 3)::real AS weight
FROM generate_series(1, 60) u, generate_series(1, 5) j;
CREATE TABLE garden_empty (user_id bigint, item_id bigint, weight real);
CREATE TABLE garden_models (name text PRIMARY KEY, model affinity.model);
"""

FITTED = [
    ("als", "SELECT affinity.fit(user_id, item_id, weight, "
            "'{\"factors\": 4, \"iterations\": 2, \"threads\": 1}') FROM garden_buys"),
    ("popularity", "SELECT affinity.fit(user_id, item_id, weight, '{\"method\": \"popularity\"}') "
                   "FROM garden_buys"),
    ("ease", "SELECT affinity.fit(user_id, item_id, weight, '{\"method\": \"ease\"}') FROM garden_buys"),
    ("item_knn", "SELECT affinity.fit(user_id, item_id, weight, "
                 "'{\"method\": \"item_knn\", \"neighbors\": 5}') FROM garden_buys"),
    ("als_one", "SELECT affinity.fit(1, 1, 1, '{\"factors\": 1, \"iterations\": 1, \"threads\": 1}')"),
    ("popularity_one", "SELECT affinity.fit(1, 1, 1, '{\"method\": \"popularity\"}')"),
    ("ease_one", "SELECT affinity.fit(1, 1, 1, '{\"method\": \"ease\"}')"),
    ("item_knn_one", "SELECT affinity.fit(1, 1, 1, '{\"method\": \"item_knn\"}')"),
    ("als_text", "SELECT affinity.fit(user_id::text, item_id::text, weight, "
                 "'{\"factors\": 4, \"iterations\": 2, \"threads\": 1}') FROM garden_buys"),
    ("popularity_text", "SELECT affinity.fit(user_id::text, item_id::text, weight, "
                        "'{\"method\": \"popularity\"}') FROM garden_buys"),
    ("ease_text", "SELECT affinity.fit(user_id::text, item_id::text, weight, "
                  "'{\"method\": \"ease\"}') FROM garden_buys"),
    ("item_knn_text", "SELECT affinity.fit(user_id::text, item_id::text, weight, "
                      "'{\"method\": \"item_knn\", \"neighbors\": 5}') FROM garden_buys"),
    ("als_text_one", "SELECT affinity.fit('1'::text, '1'::text, 1, "
                     "'{\"factors\": 1, \"iterations\": 1, \"threads\": 1}')"),
    ("als_extreme_keys", "SELECT affinity.fit(u, i, 1, '{\"factors\": 2, \"iterations\": 1, \"threads\": 1}') "
                         "FROM (VALUES (%s, %s), (%s, %s), (1::bigint, 1::bigint)) v(u, i)"
                         % (MIN_BIGINT, MAX_BIGINT, MAX_BIGINT, MIN_BIGINT)),
]


class Garden:
    def __init__(self):
        self.c = Checker("check_garden")
        self.cases = 0
        self.outcomes = {}
        self.bad = []
        self.crashes = 0
        self.samples = {}
        self.conn = None
        self.cur = None
        self.open()

    def open(self):
        self.conn = connect()
        self.cur = self.conn.cursor()
        self.cur.execute("SET statement_timeout = %s", (TIMEOUT,))
        # one thread per fit: the machine is shared; the serving paths are the same
        self.cur.execute("SET affinity.threads = 1")
        self.cur.execute("SET search_path = garden, public")

    def reopen(self):
        """Reconnect after a lost connection, waiting for crash recovery."""
        deadline = time.monotonic() + 60
        while True:
            try:
                psycopg2.connect("").close()
                break
            except psycopg2.OperationalError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.5)
        self.open()

    def run(self, label, sql):
        """One case: returns the first column of the first row, or None."""
        self.cases += 1
        try:
            self.cur.execute(sql)
            row = self.cur.fetchone()
            self.outcomes["ok"] = self.outcomes.get("ok", 0) + 1
            return row[0] if row else None
        except (psycopg2.OperationalError, psycopg2.InterfaceError) as e:
            if self.conn.closed or isinstance(e, psycopg2.InterfaceError) or \
                    "terminat" in str(e) or "closed" in str(e):
                self.crashes += 1
                self.outcomes["lost connection"] = self.outcomes.get("lost connection", 0) + 1
                self.bad.append((label, "lost connection (backend crash?)", sql))
                self.reopen()
                return None
            return self.error(label, sql, e)
        except psycopg2.Error as e:
            return self.error(label, sql, e)

    def error(self, label, sql, e):
        code = e.pgcode or "none"
        self.outcomes[code] = self.outcomes.get(code, 0) + 1
        msg = (e.diag.message_primary or "").strip()
        self.samples.setdefault(code, (label, msg))
        if code == "none" or code[:2] in ("XX", "58") or code == "57014" or not msg:
            why = "timeout" if code == "57014" else "SQLSTATE %s" % code
            self.bad.append((label, "%s: %s" % (why, msg), sql))
        return None


def extension_functions(cur):
    """(name, oid-signature, arg types, result is a set, kind) of every
    function of the extension, from pg_proc."""
    cur.execute("""
        SELECT p.proname, p.oid::regprocedure::text, p.proretset, p.prokind,
               coalesce((SELECT array_agg(format_type(t, NULL) ORDER BY o)
                         FROM unnest(p.proargtypes::oid[]) WITH ORDINALITY a(t, o)), '{}'),
               coalesce(p.proargnames[1:p.pronargs], '{}')
        FROM pg_proc p
        JOIN pg_depend d ON d.classid = 'pg_proc'::regclass AND d.objid = p.oid
                         AND d.refclassid = 'pg_extension'::regclass AND d.deptype = 'e'
        JOIN pg_extension e ON e.oid = d.refobjid AND e.extname = 'affinity'
        ORDER BY 2""")
    return cur.fetchall()


def script_names():
    """Names created by the install and upgrade scripts (src/affinity--*.sql),
    less the functions a later script drops for good."""
    text = ""
    for path in sorted(glob.glob(os.path.join(REPO_DIR, "src", "affinity--*.sql"))):
        with open(path) as f:
            text += f.read()
    names = set()
    for m in re.finditer(r"(CREATE\s+(?:OR\s+REPLACE\s+)?(?:FUNCTION|AGGREGATE)|DROP\s+FUNCTION)"
                         r"\s+affinity\.(\w+)\s*\(", text, re.I):
        if m.group(1).upper().startswith("DROP"):
            names.discard(m.group(2))
        else:
            names.add(m.group(2))
    return names


def cast(expr, typ):
    return "(%s)::%s" % (expr, typ)


def model_expr(name):
    if name is None:
        return "NULL::affinity.model"
    return "(SELECT model FROM garden_models WHERE name = '%s')" % name


def call_sql(fname, retset, args):
    call = "affinity.%s(%s)" % (fname, ", ".join(args))
    if retset:
        return "SELECT count(*) FROM %s" % call
    return "SELECT (%s) IS NULL" % call


def awkward(typ):
    if typ not in VALUES:
        return None
    return VALUES[typ]


def values_for(fname, argname, typ):
    return BY_NAME.get((fname, argname)) or VALUES.get(typ)


def garden_function(g, fname, sig, retset, types, names, models):
    """One ordinary call and one-at-a-time variations, for each model."""
    names = list(names) + [""] * (len(types) - len(names))
    if any(t == "internal" for t in types):
        return 0
    uncovered = [t for t, a in zip(types, names)
                 if t != "affinity.model" and values_for(fname, a, t) is None]
    if uncovered:
        g.c.check(False, "%s: argument types covered" % sig,
                  "no awkward values for type(s) %s" % uncovered)
        return 0
    has_model = "affinity.model" in types
    before = g.cases
    for m in (models if has_model else [None]):
        base = [model_expr(m) if t == "affinity.model" else cast(values_for(fname, a, t)[0], t)
                for t, a in zip(types, names)]
        g.run("%s [%s]" % (sig, m), call_sql(fname, retset, base))
        for p, t in enumerate(types):
            if t == "affinity.model":
                continue
            for v in values_for(fname, names[p], t)[1]:
                if v in BIG and m not in (None, "als", "popularity", "ease", "item_knn", "als_one",
                                          "als_text", "popularity_text"):
                    continue        # huge arrays: on the main models only, to bound time
                args = list(base)
                args[p] = cast(v, t)
                g.run("%s [%s] arg %d = %s" % (sig, m, p + 1, v[:40]), call_sql(fname, retset, args))
    if has_model:
        args = [model_expr(None) if t == "affinity.model" else cast(values_for(fname, a, t)[0], t)
                for t, a in zip(types, names)]
        g.run("%s [NULL model]" % sig, call_sql(fname, retset, args))
    return g.cases - before


def garden_aggregate(g, fname, sig, types, models):
    """Aggregates over three rows, one row, and no row, varying one argument
    at a time in every row."""
    before = g.cases
    n = len(types)

    def row_values(r, m, override=None):
        vals = []
        for p, t in enumerate(types):
            if override is not None and override[0] == p:
                vals.append(cast(override[1], t))
            elif t == "affinity.model":
                vals.append(model_expr(m))
            elif t == "bigint":
                vals.append(cast(str(1 + (r + p) % 3), t))
            elif t == "text":
                vals.append(cast("'%d'" % (1 + (r + p) % 3), t))
            elif t == "jsonb" and fname == "fit":
                vals.append(cast(FIT_OPTIONS[0], t))
            else:
                vals.append(cast(VALUES[t][0], t))
        return "(%s)" % ", ".join(vals)

    cols = ", ".join("a%d" % i for i in range(n))

    def agg_sql(rows):
        return "SELECT (affinity.%s(%s)) IS NULL FROM (VALUES %s) v(%s)" % (
            fname, cols, ", ".join(rows), cols)

    has_model = "affinity.model" in types
    for m in (models if has_model else [None]):
        g.run("%s [%s] three rows" % (sig, m), agg_sql([row_values(r, m) for r in range(3)]))
        g.run("%s [%s] one row" % (sig, m), agg_sql([row_values(0, m)]))
        g.run("%s [%s] no row" % (sig, m), agg_sql([row_values(0, m)]) + " WHERE false")
        for p, t in enumerate(types):
            if t == "affinity.model":
                continue
            vals = FIT_OPTIONS[1] if (t == "jsonb" and fname == "fit") else VALUES[t][1]
            for v in vals:
                if v in BIG:
                    continue
                rows = [row_values(r, m, (p, v)) for r in range(3)]
                g.run("%s [%s] arg %d = %s" % (sig, m, p + 1, v[:40]), agg_sql(rows))
                # the awkward value in one row only, among ordinary ones
                rows = [row_values(0, m, (p, v)), row_values(1, m), row_values(2, m)]
                g.run("%s [%s] one row with arg %d = %s" % (sig, m, p + 1, v[:40]), agg_sql(rows))
    if fname == "fit":
        opt = ", %s" % cast(FIT_OPTIONS[0], "jsonb") if n == 4 else ""
        g.run("%s over an empty table" % sig,
              "SELECT affinity.fit(user_id, item_id, weight%s) IS NULL FROM garden_empty" % opt)
        g.run("%s over 60 x 5 rows" % sig,
              "SELECT affinity.fit(user_id, item_id, weight%s) IS NULL FROM garden_buys" % opt)
        g.run("%s grouped by a key with one row per group" % sig,
              "SELECT count(*) FROM (SELECT affinity.fit(user_id, item_id, weight%s) FROM "
              "garden_buys WHERE user_id <= 3 GROUP BY user_id, item_id) s" % opt)
    elif has_model:
        g.run("%s over an empty table" % sig,
              "SELECT affinity.%s(%s) IS NULL FROM garden_empty, garden_models m "
              "WHERE m.name = 'als'" % (fname, ", ".join(
                  "m.model" if t == "affinity.model" else
                  ("user_id" if i == 1 else "item_id") if t == "bigint" else cast(VALUES[t][0], t)
                  for i, t in enumerate(types))))
    return g.cases - before


def load_models(g):
    """Fill garden_models; returns the names present."""
    cur = g.cur
    names = []
    for name, sql in FITTED:
        try:
            cur.execute("INSERT INTO garden_models SELECT %s, (" + sql.replace("%", "%%") + ")", (name,))
            names.append(name)
        except psycopg2.Error as e:
            print("note: model %s not fitted here: %s" % (name, (e.diag.message_primary or str(e)).strip()))
    for method in seeds.METHOD:
        for nu, ni in ((1, 1), (3, 4)):
            name = "synth_%s_%dx%d" % (method, nu, ni)
            payload = bytes(seeds.synth(method, nu, ni))[4:]
            try:
                cur.execute("INSERT INTO garden_models VALUES (%s, %s::affinity.model)",
                            (name, seeds.base64.b64encode(payload).decode()))
                names.append(name)
            except psycopg2.Error as e:
                g.c.check(False, "synthesized %s model accepted" % name, str(e).strip())
    # crafted bad values: none should get in; any that does is served like the rest
    base = None
    cur.execute("SELECT decode(model::text, 'base64') FROM garden_models WHERE name = 'als'")
    row = cur.fetchone()
    if row:
        base = bytes(row[0])
    accepted = []
    if base is not None:
        for name, payload in seeds.bad_values(base).items():
            try:
                cur.execute("INSERT INTO garden_models VALUES (%s, %s::affinity.model)",
                            ("bad_" + name, seeds.base64.b64encode(payload).decode()))
                accepted.append("bad_" + name)
            except psycopg2.Error:
                pass
    g.c.check(not accepted, "text input refuses every crafted bad value",
              "accepted: %s" % ", ".join(accepted) if accepted else "")
    return names + accepted


def registry_setup(g, installed):
    """Names already in the registry (left alone), after defining and
    refreshing the model that refresh, get_model and revert_model are called
    on; None when this build has no registry."""
    if "define_model" not in installed:
        return None
    cur = g.cur
    cur.execute("SELECT coalesce(array_agg(name), '{}') FROM affinity.models")
    before = cur.fetchone()[0]
    cur.execute("SELECT affinity.define_model('garden_reg', %s, %s)"
                % (REGISTRY_QUERY, BY_NAME[("define_model", "options")][0]))
    cur.execute("SELECT affinity.refresh('garden_reg') IS NOT NULL")
    cur.execute("SELECT affinity.refresh('garden_reg') IS NOT NULL")
    return before


def registry_cleanup(cur, before):
    if before is None:
        return
    cur.execute("DELETE FROM affinity.models WHERE NOT (name = ANY (%s))", (before,))


def log_file(cur):
    """Path of the server log and its current size, or (None, 0).  Tried in
    order: the logging collector's file, "log" in the data directory (where
    scripts/lib.sh's cluster_start puts it), "log" beside the socket
    directory (a cluster started by hand as in the contributor guide)."""
    candidates = []
    try:
        cur.execute("SELECT pg_current_logfile()")
        current = cur.fetchone()[0]
        cur.execute("SHOW data_directory")
        data = cur.fetchone()[0]
        if current:
            candidates.append(os.path.join(data, current))
        candidates.append(os.path.join(data, "log"))
    except psycopg2.Error:
        pass
    host = os.environ.get("PGHOST", "")
    if host.startswith("/"):
        candidates += [os.path.join(host, "log"), os.path.join(os.path.dirname(host), "log")]
    for path in candidates:
        try:
            return path, os.path.getsize(path)
        except OSError:
            continue
    return None, 0


def main():
    g = Garden()
    cur = g.cur
    log_path, log_start = log_file(cur)
    cur.execute("DROP SCHEMA IF EXISTS garden CASCADE")
    cur.execute("CREATE SCHEMA garden")
    cur.execute(GARDEN_DATA)
    models = load_models(g)

    funcs = extension_functions(cur)
    installed = set(f[0] for f in funcs)
    registry = registry_setup(g, installed)
    declared = script_names()
    missing = sorted(declared - installed)
    g.c.check(not missing, "every function of the install and upgrade scripts is installed",
              ("not installed: %s (reinstall the extension?)" % ", ".join(missing)) if missing else
              "%d names" % len(declared))
    print("API functions not in this build: %s"
          % (", ".join(n for n in API_NAMES if n not in installed) or "none"))

    t0 = time.monotonic()
    per_function = []
    for fname, sig, retset, kind, types, argnames in funcs:
        if kind == "a":
            n = garden_aggregate(g, fname, sig, list(types), models)
        else:
            n = garden_function(g, fname, sig, retset, list(types), list(argnames), models)
        if n:
            per_function.append((sig, n))
    took = time.monotonic() - t0

    # the backend of the last connection is alive and answers
    try:
        cur = g.cur
        cur.execute("SELECT 1")
        alive = cur.fetchone()[0] == 1
    except psycopg2.Error:
        alive = False
    g.c.check(alive, "the backend answers after every case")

    signals = []
    if log_path:
        try:
            with open(log_path, "rb") as f:
                f.seek(log_start)
                text = f.read().decode("utf-8", "replace")
            signals = [l for l in text.splitlines() if "terminated by signal" in l]
        except OSError:
            log_path = None
    if log_path:
        g.c.check(not signals, "no 'terminated by signal' line in the server log",
                  "; ".join(signals[:5]))
    else:
        print("note: server log not readable here; crashes are detected by lost connections only")

    for sig, n in per_function:
        print("  %5d cases  %s" % (n, sig))
    print("outcomes: " + ", ".join("%s %d" % kv for kv in sorted(g.outcomes.items())))
    for code, (label, msg) in sorted(g.samples.items()):
        print("  e.g. %s: %s  (%s)" % (code, msg, label))
    for label, why, sql in g.bad[:40]:
        print("BAD  %s -> %s\n     %s" % (label, why, sql[:600]))
    if len(g.bad) > 40:
        print("... and %d more" % (len(g.bad) - 40))
    g.c.check(not g.bad, "every case gives a result or a clear, non-internal error",
              "%d of %d cases failed, %d lost connections" % (len(g.bad), g.cases, g.crashes))
    print("garden: %d cases over %d functions and %d models in %.1f s"
          % (g.cases, len(per_function), len(models), took))
    registry_cleanup(cur, registry)
    cur.execute("DROP SCHEMA IF EXISTS garden CASCADE")
    g.c.finish()


if __name__ == "__main__":
    main()
