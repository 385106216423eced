"""Shared helpers for the numerical and data-set checks in tests/.

Each tests/*.py file is a standalone program: exit 0 = passed, 77 = skipped,
anything else = failed.  This module is imported by them and is not run.

Connection settings come from the libpq environment (PGHOST, PGPORT, PGUSER,
PGDATABASE).  The open data set is looked up in $AFFINITY_DATA_DIR, falling
back to ../shared/data beside the checkout.
"""

import csv
import io
import json
import lzma
import os
import sys

import psycopg2
import psycopg2.extras

SKIP = 77

TESTS_DIR = os.path.dirname(os.path.abspath(__file__))
REPO_DIR = os.environ.get("AFFINITY_REPO") or os.path.dirname(TESTS_DIR)

# Columns of the Online Retail CSV, in file order.
RETAIL_COLUMNS = ["InvoiceNo", "StockCode", "Description", "Quantity",
                  "InvoiceDate", "UnitPrice", "CustomerID", "Country"]



def build_engine_program(exe, program, extra_flags=()):
    """Compile program (a path under the checkout) with every engine source
    (src/core/*.c: the validator reads the method table, so the engine is
    linked whole) and OpenBLAS into exe; returns (returncode, output)."""
    import glob
    import subprocess
    srcs = [os.path.join(REPO_DIR, program)] + sorted(glob.glob(os.path.join(REPO_DIR, "src", "core", "*.c")))

    def pkg(flag, default):
        p = subprocess.run(["pkg-config", flag, "openblas"], stdout=subprocess.PIPE,
                           stderr=subprocess.DEVNULL, universal_newlines=True)
        return p.stdout.split() if p.returncode == 0 else default
    cmd = (["cc", "-std=gnu11", "-O2", "-pthread"] + list(extra_flags) + pkg("--cflags", []) +
           ["-o", exe] + srcs + pkg("--libs", ["-lopenblas"]) + ["-lm"])
    p = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, universal_newlines=True)
    return p.returncode, p.stdout

def reset_peak(pid):
    """Reset VmHWM to the current RSS (proc(5): writing 5 to clear_refs);
    False when the kernel refuses."""
    try:
        with open("/proc/%d/clear_refs" % pid, "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


def skip(reason):
    """Report a skip to the runner and stop."""
    print("skipped: " + reason)
    sys.stdout.flush()
    sys.exit(SKIP)


def fail(message):
    """Report a failure and stop with a non-zero, non-skip status."""
    print("FAILED: " + message)
    sys.stdout.flush()
    sys.exit(1)


class Checker:
    """Collects named checks, prints each outcome, and exits 1 at the end if any failed.

    Checks are collected rather than stopping at the first one so that a
    failing run shows every measured figure at once.
    """

    def __init__(self, name):
        self.name = name
        self.failures = []

    def check(self, ok, label, detail="", quiet=False):
        """Record one check; quiet=True prints it only when it fails."""
        self.count = getattr(self, "count", 0) + 1
        status = "ok  " if ok else "FAIL"
        if not ok or not quiet:
            print("%s %s%s" % (status, label, (": " + detail) if detail else ""))
        if not ok:
            self.failures.append(label)
        return ok

    def finish(self):
        sys.stdout.flush()
        if self.failures:
            print("%s: %d check(s) failed: %s"
                  % (self.name, len(self.failures), "; ".join(self.failures)))
            sys.exit(1)
        print("%s: all %d checks passed" % (self.name, getattr(self, "count", 0)))
        sys.exit(0)


def connect():
    """Open an autocommit connection from the PG* environment and make sure
    the extension is installed in the test database."""
    try:
        conn = psycopg2.connect("")
    except psycopg2.OperationalError as exc:
        fail("cannot connect to PostgreSQL (PGHOST=%s PGPORT=%s PGDATABASE=%s): %s"
             % (os.environ.get("PGHOST"), os.environ.get("PGPORT"),
                os.environ.get("PGDATABASE"), exc))
    conn.autocommit = True
    with conn.cursor() as cur:
        cur.execute("CREATE EXTENSION IF NOT EXISTS affinity")
    return conn


def fresh_schema(cur, name):
    """Create an empty schema for one test (dropping a leftover one) and put it
    first on the search path.  The test drops it again with drop_schema()."""
    cur.execute("DROP SCHEMA IF EXISTS %s CASCADE" % name)
    cur.execute("CREATE SCHEMA %s" % name)
    cur.execute("SET search_path = %s, public" % name)


def drop_schema(cur, name):
    cur.execute("DROP SCHEMA IF EXISTS %s CASCADE" % name)


def copy_rows(cur, table, columns, rows):
    """Load an iterable of tuples into table(columns) with COPY (text format)."""
    buf = io.StringIO()
    for row in rows:
        buf.write("\t".join("\\N" if v is None else str(v) for v in row))
        buf.write("\n")
    buf.seek(0)
    cur.copy_expert("COPY %s (%s) FROM STDIN" % (table, ", ".join(columns)), buf)


def describe(cur, model_sql):
    """affinity.describe() of a model expression, as a Python dict."""
    cur.execute("SELECT affinity.describe(%s)" % model_sql)
    d = cur.fetchone()[0]
    if isinstance(d, str):
        d = json.loads(d)
    return d


def fetch_vectors(cur, sql):
    """Run a query yielding (id, real[]) and return ({id: row}, matrix) with rows in
    ascending id order, as float64 numpy arrays."""
    import numpy as np
    cur.execute(sql)
    rows = sorted(cur.fetchall())
    ids = [r[0] for r in rows]
    mat = np.array([r[1] for r in rows], dtype=np.float64)
    return {k: n for n, k in enumerate(ids)}, ids, mat


def data_dir():
    """Directory holding the open data set: $AFFINITY_DATA_DIR, else
    <repo>/../shared/data."""
    d = os.environ.get("AFFINITY_DATA_DIR")
    if d:
        return d
    return os.path.normpath(os.path.join(REPO_DIR, "..", "shared", "data"))


def online_retail_path():
    """Path of the Online Retail CSV (xz), or skip the test when it is absent."""
    d = data_dir()
    try:
        names = sorted(n for n in os.listdir(d)
                       if n.startswith("online-retail-") and n.endswith(".csv.xz"))
    except OSError:
        names = []
    if not names:
        skip("Online Retail data not found at %s" % os.path.join(d, "online-retail-*.csv.xz"))
    return os.path.join(d, names[-1])


def load_online_retail(cur, table):
    """Create table (all columns text, as in the file) and COPY the Online Retail
    CSV into it, decompressing on the fly.  Returns the number of rows loaded.

    The header is read with the csv module and checked against the expected
    columns; the body is handed to COPY ... (FORMAT csv), which applies the
    same quoting rules."""
    path = online_retail_path()
    cur.execute("CREATE TABLE %s (%s)"
                % (table, ", ".join('"%s" text' % c for c in RETAIL_COLUMNS)))
    with lzma.open(path, "rt", encoding="utf-8", newline="") as f:
        header = next(csv.reader([f.readline()]))
        if header != RETAIL_COLUMNS:
            fail("unexpected header in %s: %r" % (path, header))
        cur.copy_expert("COPY %s FROM STDIN WITH (FORMAT csv)" % table, f)
    cur.execute("SELECT count(*) FROM %s" % table)
    return cur.fetchone()[0]


ONLINE_RETAIL_SQL = os.path.join(TESTS_DIR, "online_retail.sql")


def clean_online_retail(cur):
    """Load the Online Retail CSV into raw and clean it with tests/online_retail.sql,
    the one cleaning shared by the checks and bench/quality: it leaves the tables
    purchases, products and lines and the function retail_weights() in the first
    schema of the search path.  Returns the number of rows loaded."""
    loaded = load_online_retail(cur, "raw")
    with open(ONLINE_RETAIL_SQL, encoding="utf-8") as f:
        cur.execute(f.read())
    return loaded


def retail_train(cur, table, before, measure="lines"):
    """Create table(user_id, item_id, weight): one row per (customer, item) bought
    before the given time, weighted by retail_weights() of tests/online_retail.sql
    ('lines' or 'quantity')."""
    cur.execute("CREATE TABLE %s AS SELECT user_id, item_id, weight FROM retail_weights(%%s, %%s)"
                % table, (before, measure))


def random_interactions(seed, n_users, n_items, n_pairs, max_weight=5,
                        user_base=1000, item_base=50000, split_share=0.1):
    """Invent a sparse implicit-feedback matrix with numpy.

    Returns (rows, W, user_ids, item_ids): rows is a list of (user_id, item_id,
    weight) tuples to load; W is the dense n_users x n_items matrix of summed
    weights (0 = not observed); user_ids[u] / item_ids[i] are the bigint keys of
    row u / column i.  Keys are spaced out (not 0..n-1) so that a mix-up of
    keys and internal indexes shows.  Every user and every item gets at least
    one interaction.  Item popularity is skewed (Zipf-like weights), as in
    purchase data.  A share of the pairs is written as two rows whose weights
    add up, since the fit sums duplicate (user, item) rows (API.md).
    """
    import numpy as np
    rng = np.random.default_rng(seed)
    pop = 1.0 / np.arange(1, n_items + 1) ** 0.7
    pop = pop[rng.permutation(n_items)]
    pop /= pop.sum()
    W = np.zeros((n_users, n_items))
    # one guaranteed interaction per user and per item
    for u in range(n_users):
        W[u, rng.choice(n_items, p=pop)] = rng.integers(1, max_weight + 1)
    for i in range(n_items):
        W[rng.integers(n_users), i] = rng.integers(1, max_weight + 1)
    while np.count_nonzero(W) < n_pairs:
        u = rng.integers(n_users)
        i = rng.choice(n_items, p=pop)
        if W[u, i] == 0:
            W[u, i] = rng.integers(1, max_weight + 1)
    user_ids = [user_base + 7 * u for u in range(n_users)]
    item_ids = [item_base + 3 * i for i in range(n_items)]
    rows = []
    for u, i in zip(*np.nonzero(W)):
        w = int(W[u, i])
        if w >= 2 and rng.random() < split_share:
            a = int(rng.integers(1, w))
            rows.append((user_ids[u], item_ids[i], a))
            rows.append((user_ids[u], item_ids[i], w - a))
        else:
            rows.append((user_ids[u], item_ids[i], w))
    order = rng.permutation(len(rows))
    rows = [rows[k] for k in order]
    return rows, W, user_ids, item_ids


def align(ids_wanted, index, mat):
    """Rows of mat (indexed by key through index) in the order of ids_wanted;
    fails when a key is missing."""
    import numpy as np
    missing = [k for k in ids_wanted if k not in index]
    if missing:
        fail("%d key(s) missing from the exported vectors, e.g. %r" % (len(missing), missing[:5]))
    return mat[np.array([index[k] for k in ids_wanted])]
