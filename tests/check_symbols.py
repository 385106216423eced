"""The installed affinity.so exports only what PostgreSQL looks up, under the
module's prefix.

PostgreSQL loads a module's library into the server's namespace, so every
dynamic symbol the library defines can take the place of, or be taken by, a
symbol of the same name in the server or another module.  The library is
built with -fvisibility=hidden and gives default visibility only to:

- Pg_magic_func and _PG_init, which the server looks up by name;
- for each C function named in the extension's SQL (pg_proc.prosrc of the
  functions whose probin is '$libdir/affinity', read from the server after
  CREATE EXTENSION affinity), that symbol and its pg_finfo_ record.

Checks: `nm -D --defined-only` of the library that the server's $libdir
holds lists exactly that set, every SQL-callable symbol starts with
affinity_, and the server still resolves each one (every C function's own
definition, from pg_get_functiondef, is run again with check_function_bodies
on, which loads the library and looks up the symbol and its record, in a
transaction that is rolled back).
"""

import os
import subprocess
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _common  # noqa: E402

PREFIX = "affinity_"
ALWAYS = {"Pg_magic_func", "_PG_init"}


def exported(path):
    """Defined dynamic symbols of a shared library, as {name: nm type letter}."""
    p = subprocess.run(["nm", "-D", "--defined-only", path], stdout=subprocess.PIPE,
                       stderr=subprocess.PIPE, universal_newlines=True)
    if p.returncode != 0:
        _common.fail("nm -D %s: %s" % (path, p.stderr.strip()))
    syms = {}
    for line in p.stdout.splitlines():
        parts = line.split()
        if len(parts) >= 2:
            syms[parts[-1]] = parts[-2]
    return syms


def main():
    c = _common.Checker("check_symbols")
    conn = _common.connect()
    cur = conn.cursor()
    cur.execute("SELECT setting FROM pg_config WHERE name = 'PKGLIBDIR'")
    libdir = cur.fetchone()[0]
    lib = os.path.join(libdir, "affinity.so")
    if not os.path.exists(lib):
        _common.fail("the server's $libdir has no affinity.so: %s" % lib)
    cur.execute("""
        SELECT DISTINCT p.prosrc
        FROM pg_proc p
        JOIN pg_depend d ON d.classid = 'pg_proc'::regclass AND d.objid = p.oid AND d.deptype = 'e'
        JOIN pg_extension e ON e.oid = d.refobjid AND e.extname = 'affinity'
        WHERE p.prolang = (SELECT oid FROM pg_language WHERE lanname = 'c')
        ORDER BY 1""")
    c_functions = [r[0] for r in cur.fetchall()]
    cur.execute("""
        SELECT count(*) FROM pg_proc
        WHERE prolang = (SELECT oid FROM pg_language WHERE lanname = 'c')
          AND probin = '$libdir/affinity'
          AND oid NOT IN (SELECT objid FROM pg_depend d JOIN pg_extension e ON e.oid = d.refobjid
                          WHERE d.classid = 'pg_proc'::regclass AND d.deptype = 'e'
                            AND e.extname = 'affinity')""")
    c.check(cur.fetchone()[0] == 0, "every C function on $libdir/affinity belongs to the extension")
    c.check(len(c_functions) >= 20, "the extension names its C functions",
            "%d distinct symbols in pg_proc.prosrc" % len(c_functions))

    want = set(ALWAYS)
    for f in c_functions:
        want.add(f)
        want.add("pg_finfo_" + f)
    syms = exported(lib)
    have = set(syms)
    extra = sorted(have - want)
    missing = sorted(want - have)
    c.check(not extra, "affinity.so exports nothing but what PostgreSQL looks up",
            "%d exported, %d extra: %s" % (len(have), len(extra), " ".join(extra[:40])
                                          + (" ..." if len(extra) > 40 else "")))
    c.check(not missing, "affinity.so exports every symbol the SQL names, with its pg_finfo_ record",
            "missing: %s" % " ".join(missing) if missing else "%d symbols" % len(want))
    unprefixed = sorted(f for f in c_functions if not f.startswith(PREFIX))
    c.check(not unprefixed, "every SQL-callable symbol starts with %s" % PREFIX,
            " ".join(unprefixed) if unprefixed else "%d functions" % len(c_functions))
    not_code = sorted(s for s in want & have if syms[s] not in ("T", "t", "W"))
    c.check(not not_code, "the exported symbols are functions (nm type T)",
            " ".join("%s:%s" % (s, syms[s]) for s in not_code))

    # The server resolves each symbol: validating a C function's definition
    # loads the library and looks the symbol and its info record up.
    cur.execute("""
        SELECT p.oid::regprocedure::text, pg_get_functiondef(p.oid)
        FROM pg_proc p
        JOIN pg_depend d ON d.classid = 'pg_proc'::regclass AND d.objid = p.oid AND d.deptype = 'e'
        JOIN pg_extension e ON e.oid = d.refobjid AND e.extname = 'affinity'
        WHERE p.prolang = (SELECT oid FROM pg_language WHERE lanname = 'c')
          AND p.prokind = 'f'
        ORDER BY 1""")
    defs = cur.fetchall()
    unresolved = []
    for name, definition in defs:
        cur.execute("BEGIN")
        try:
            cur.execute("SET LOCAL check_function_bodies = on")
            cur.execute(definition)
        except Exception as exc:  # noqa: BLE001 - report whatever the server says
            unresolved.append("%s (%s)" % (name, str(exc).strip().splitlines()[0]))
        finally:
            cur.execute("ROLLBACK")
    c.check(not unresolved and len(defs) > 0, "the server resolves every C function's symbol",
            "; ".join(unresolved) if unresolved else "%d functions validated" % len(defs))
    print("exported: %d dynamic symbols (%d SQL-callable C symbols)" % (len(have), len(c_functions)))
    c.finish()


if __name__ == "__main__":
    main()
