"""examples/recommend.py, run as an application developer would run it.

The demo shop (scripts/demo_data.sql) is loaded into a database of this
test's own, a model is registered and refreshed, and the example program is
run as a subprocess with a connection string on its command line.  Its
printed lists are compared with what the same model answers in SQL:

* a known customer: N real product names, in the model's order, none of
  them bought by the customer before;
* a customer the model has never seen: the best-sellers, i.e. the N
  products with the most distinct buyers (ties to the smaller id), and a
  line that says so;
* a guest's cart: N products, in the model's order, none from the cart;
* a model name that is an SQL injection attempt is only ever a name: the
  program reports that no such model exists and the products table is
  still there (its values travel as bound parameters).
"""

import os
import re
import subprocess

import psycopg2

from _common import REPO_DIR, Checker, connect, fail

DB = "affinity_client_example"
PG_BIN = "/usr/lib/postgresql/15/bin"
EXAMPLE = os.path.join(REPO_DIR, "examples", "recommend.py")
MODEL = "shop_picks"
N = 5
KNOWN = 50009
UNKNOWN = 59999                 # no such loyalty card in the demo data
CART = [104, 111, 216]


def run_example(*args):
    p = subprocess.run(["/usr/bin/python3", EXAMPLE, "--dsn", "dbname=" + DB] + list(args),
                       stdout=subprocess.PIPE, stderr=subprocess.PIPE, universal_newlines=True,
                       timeout=120)
    return p.returncode, p.stdout, p.stderr


def ranked_lines(out):
    """The numbered lines of the program's output ("%2d. name ...")."""
    return [line for line in out.splitlines() if re.match(r"^ *\d+\. ", line)]


def check_list(c, label, out, names, banned_names=()):
    lines = ranked_lines(out)
    ok = len(lines) == len(names) and all(
        line.startswith("%2d. %s " % (r + 1, name)) for r, (line, name) in enumerate(zip(lines, names)))
    c.check(ok, "%s: the program prints the model's %d products in order" % (label, len(names)),
            "" if ok else "expected %r\n--- output ---\n%s" % (names, out))
    clash = [n for n in names if n in banned_names]
    c.check(not clash, "%s: none of them is excluded (bought before / in the cart)" % label,
            ", ".join(clash))


def main():
    c = Checker("check_client_example")
    admin = connect()
    acur = admin.cursor()
    acur.execute("DROP DATABASE IF EXISTS %s WITH (FORCE)" % DB)
    acur.execute("CREATE DATABASE %s" % DB)
    try:
        p = subprocess.run([PG_BIN + "/psql", "-X", "-q", "-v", "ON_ERROR_STOP=1", "-d", DB,
                            "-f", os.path.join(REPO_DIR, "scripts", "demo_data.sql")],
                           stdout=subprocess.PIPE, stderr=subprocess.STDOUT, universal_newlines=True)
        if p.returncode != 0:
            fail("loading scripts/demo_data.sql failed: %s" % p.stdout[-2000:])
        conn = psycopg2.connect(dbname=DB)
        conn.autocommit = True
        cur = conn.cursor()
        cur.execute("CREATE EXTENSION affinity")
        cur.execute("""SELECT affinity.define_model(%s,
                         'SELECT customer_id AS user_id, product_id AS item_id, quantity AS weight
                          FROM demo.purchases',
                         '{"factors": 16, "iterations": 8}')""", (MODEL,))
        cur.execute("SELECT affinity.refresh(%s)", (MODEL,))

        def names(sql, args):
            cur.execute(sql, args)
            return [r[0] for r in cur.fetchall()]

        # a known customer
        want = names("""SELECT p.name FROM affinity.top_items(affinity.get_model(%s), %s::bigint, %s) r
                        JOIN demo.products p ON p.product_id = r.item_id ORDER BY r.rank""",
                     (MODEL, KNOWN, N))
        bought = names("""SELECT DISTINCT p.name FROM demo.purchases u JOIN demo.products p USING (product_id)
                          WHERE u.customer_id = %s""", (KNOWN,))
        c.check(len(want) == N and len(bought) > 0, "customer %d is known and has %d picks" % (KNOWN, N),
                "%d picks, %d products bought" % (len(want), len(bought)))
        rc, out, err = run_example("--model", MODEL, "-n", str(N), "customer", str(KNOWN))
        c.check(rc == 0 and err == "", "customer %d: the program succeeds" % KNOWN,
                "exit %d, stderr %r" % (rc, err))
        c.check("Top %d for customer %d" % (N, KNOWN) in out, "customer %d: a personal list" % KNOWN,
                "" if "Top" in out else out)
        check_list(c, "customer %d" % KNOWN, out, want, bought)
        print(out.rstrip())

        # an unknown customer: the best-sellers, counted here from the purchases
        best = names("""SELECT p.name FROM demo.purchases u JOIN demo.products p USING (product_id)
                        GROUP BY p.product_id, p.name
                        ORDER BY count(DISTINCT u.customer_id) DESC, p.product_id LIMIT %s""", (N,))
        rc, out, err = run_example("--model", MODEL, "-n", str(N), "customer", str(UNKNOWN))
        c.check(rc == 0 and err == "", "unknown customer: the program succeeds",
                "exit %d, stderr %r" % (rc, err))
        said = "No personal picks for customer %d yet" % UNKNOWN in out
        c.check(said, "unknown customer: the program says it falls back to the best-sellers",
                "" if said else out)
        check_list(c, "unknown customer", out, best)
        print(out.rstrip())

        # a guest's cart
        want = names("""SELECT p.name FROM affinity.top_items(affinity.get_model(%s), %s::bigint[], %s) r
                        JOIN demo.products p ON p.product_id = r.item_id ORDER BY r.rank""",
                     (MODEL, CART, N))
        in_cart = names("SELECT name FROM demo.products WHERE product_id = ANY(%s::bigint[])", (CART,))
        rc, out, err = run_example("--model", MODEL, "-n", str(N), "basket", *map(str, CART))
        c.check(rc == 0 and err == "", "guest cart: the program succeeds", "exit %d, stderr %r" % (rc, err))
        heading = [line for line in out.splitlines() if line.startswith("Top %d for a cart of" % N)]
        named = len(heading) == 1 and len(in_cart) == len(CART) and all(n in heading[0] for n in in_cart)
        c.check(named, "guest cart: the cart is named by its products", "" if named else out)
        check_list(c, "guest cart", out, want, in_cart)
        print(out.rstrip())

        # a hostile model name stays a name
        hostile = "x'); DROP TABLE demo.products CASCADE; --"
        rc, out, err = run_example("--model", hostile, "customer", str(KNOWN))
        c.check(rc != 0 and 'no model named "%s"' % hostile in err,
                "a hostile model name: the program reports that there is no such model",
                "exit %d, stderr %r" % (rc, err))
        cur.execute("SELECT to_regclass('demo.products') IS NOT NULL")
        c.check(cur.fetchone()[0], "and demo.products is still there")
        conn.close()
    finally:
        acur.execute("DROP DATABASE IF EXISTS %s WITH (FORCE)" % DB)
    c.finish()


if __name__ == "__main__":
    main()
