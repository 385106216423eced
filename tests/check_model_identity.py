"""A forged model value is never served with another model's vectors.

The per-backend cache (src/pg/model_cache.c) once named an in-memory value
by its size and checksum.  The checksum (aff_model_checksum) is a fast
multiply-xorshift hash: each step can be undone, so a value can be given any
checksum by choosing one free 8-byte field.  The attack: serve model A, then
a copy B of A with other vectors for one customer and a checksum forged to
equal A's, in the same backend; B was served with A's vectors.

Here the forgery is made in Python (the checksum inverted step by step,
rows_read as the free field), for a model over 1 MB (the cache trusts its
verified SHA-256 digest) and for a small one (the cache also compares the
bytes), and checked four ways in one backend, after A was served:

* B keeping A's content digest (and A's checksum) is refused on input:
  its content does not match the digest (SQLSTATE 22P03);
* B with the digest cleared, as a value written before digests existed,
  is accepted, given its own digest, and served with its own vectors;
* the same, sent through binary COPY (model_recv);
* both stored in a table (TOAST pointers) are each served as themselves;
* ranking_metrics in the README's held-out form (a subquery per model) scores
  A and B each as itself, and refuses B keeping A's digest.

On the code before the digest, the first two serve B with A's vectors.
"""

import base64
import struct
import sys

import psycopg2

sys.path.insert(0, __import__("os").path.join(__import__("os").path.dirname(__file__), "fuzz"))
import seeds  # noqa: E402

from _common import Checker, connect, drop_schema, fresh_schema  # noqa: E402

M = seeds.MASK
K = seeds.K
KINV = pow(K, -1, 1 << 64)
ROWS_READ = seeds.OFFSET["rows_read"]
SEG2 = seeds.OFFSET["checksum"] + 8         # the checksum's second run starts here
TARGET_USER = 70003


def unshift(y, s):
    """Inverse of x -> x ^ (x >> s) on 64 bits."""
    x = y
    k = s
    while k < 64:
        x = y ^ (x >> s)
        k += s
    return x & M


def forge_checksum(buf, target):
    """Set the 8 bytes at rows_read so that buf's checksum equals target."""
    assert (len(buf) - SEG2) % 8 == 0 and (ROWS_READ - SEG2) % 8 == 0
    h = seeds.aff_hash(bytes(buf[4:seeds.OFFSET["checksum"]]), 0x5851F42D4C957F2D)
    words = [int.from_bytes(buf[p:p + 8], "little") for p in range(SEG2, len(buf), 8)]
    j = (ROWS_READ - SEG2) // 8
    for w in words[:j]:
        h = ((h ^ w) * K) & M
        h ^= h >> 32
    # backwards from the checksum: final mix, tail step (no tail bytes), words after j
    s = unshift(target, 31)
    s = unshift(s, 29)
    s = ((s * KINV) & M) ^ 0
    for w in reversed(words[j + 1:]):
        x = s ^ (s >> 32)
        s = ((x * KINV) & M) ^ w
    x = s ^ (s >> 32)
    w = ((x * KINV) & M) ^ h
    buf[ROWS_READ:ROWS_READ + 8] = w.to_bytes(8, "little")
    struct.pack_into("<Q", buf, seeds.OFFSET["checksum"], target)
    assert seeds.model_checksum(buf) == target, "forgery does not reproduce the checksum"
    return buf


def model_bytes(cur, sql):
    cur.execute("SELECT decode((%s)::text, 'base64')" % sql)
    return bytearray(b"\0\0\0\0" + bytes(cur.fetchone()[0]))


def b64(buf):
    return base64.b64encode(bytes(buf[4:])).decode()


def served_vector(cur, literal):
    cur.execute("SELECT affinity.user_vector(%s::affinity.model, %s)", (literal, TARGET_USER))
    return cur.fetchone()[0]


def binary_copy(cur, table, payload):
    """COPY table (model) FROM STDIN (FORMAT binary) with one row."""
    import io
    data = (b"PGCOPY\n\xff\r\n\x00" + struct.pack(">ii", 0, 0) + struct.pack(">h", 1)
            + struct.pack(">i", len(payload)) + payload + struct.pack(">h", -1))
    cur.copy_expert("COPY %s (model) FROM STDIN WITH (FORMAT binary)" % table, io.BytesIO(data))


def run_case(c, cur, label, users, factors):
    cur.execute("DROP TABLE IF EXISTS purchases")
    cur.execute("""CREATE TABLE purchases AS
                   SELECT (70001 + c)::bigint AS customer_id,
                          (300 + abs(hashint4(c * 31 + k)) %% 40)::bigint AS product_id,
                          1::real AS quantity
                   FROM generate_series(0, %d) c, generate_series(1, 4) k""" % (users - 1))
    a = model_bytes(cur, """SELECT affinity.fit(customer_id, product_id, quantity,
                               '{"factors": %d, "iterations": 2, "threads": 1}')
                            FROM purchases""" % factors)
    m = seeds.Model(a)
    n_users, f = m.h["n_users"], m.h["factors"]
    c.check(a[seeds.DIGEST_AT:seeds.DIGEST_AT + 32] != b"\0" * 32,
            "%s: the fitted model A (%d bytes) carries a content digest" % (label, len(a)))
    u = m.sections["user_keys"].index(TARGET_USER)
    vec_a = m.sections["user_factors"][u * f:(u + 1) * f]

    # B: A with customer TARGET_USER's vector negated, checksum forged to A's
    b = bytearray(a)
    _, _, _, off, _ = seeds.section_entry(b, seeds.KIND["user_factors"])
    for k in range(f):
        struct.pack_into("<f", b, off + 4 * (u * f + k), -vec_a[k])
    forge_checksum(b, m.h["checksum"])
    b_nodigest = bytearray(b)
    b_nodigest[seeds.DIGEST_AT:seeds.DIGEST_AT + 32] = b"\0" * 32
    forge_checksum(b_nodigest, m.h["checksum"])
    c.check(len(b) == len(a) and seeds.model_checksum(b) == seeds.model_checksum(a)
            and bytes(b) != bytes(a),
            "%s: forged B has A's size (%d) and checksum (%016x), other bytes"
            % (label, len(a), m.h["checksum"]))

    got_a = served_vector(cur, b64(a))
    c.check(max(abs(x - y) for x, y in zip(got_a, vec_a)) < 1e-6,
            "%s: A is served with its own vector" % label)

    # 1. digest kept: refused
    try:
        got = served_vector(cur, b64(b))
        c.check(False, "%s: B with A's digest is refused" % label,
                "accepted and served %s (A's: %s)" % (
                    "A's vector" if got == got_a else "another vector", got_a[:3]))
    except psycopg2.Error as e:
        c.check(e.pgcode == "22P03" and "digest" in e.diag.message_primary,
                "%s: B with A's digest is refused" % label,
                "%s %s" % (e.pgcode, e.diag.message_primary))

    # 2. digest cleared (a 1.1-style value): served as itself
    got_b = served_vector(cur, b64(b_nodigest))
    own = max(abs(x + y) for x, y in zip(got_b, vec_a)) < 1e-6
    c.check(own, "%s: B without a digest is served with its own vector (after A, same backend)"
            % label, "" if own else "served %s, A's is %s" % (got_b[:3], vec_a[:3]))
    got_a2 = served_vector(cur, b64(a))
    c.check(got_a2 == got_a, "%s: A is still served as A afterwards" % label)

    # 3. binary COPY and 4. stored values (TOAST pointers or inline)
    cur.execute("DROP TABLE IF EXISTS kept")
    cur.execute("CREATE TABLE kept (label text, model affinity.model)")
    binary_copy(cur, "kept", bytes(b_nodigest[4:]))
    cur.execute("UPDATE kept SET label = 'b'")
    try:
        binary_copy(cur, "kept", bytes(b[4:]))
        c.check(False, "%s: binary COPY refuses B with A's digest" % label)
    except psycopg2.Error as e:
        c.check(e.pgcode == "22P03", "%s: binary COPY refuses B with A's digest" % label,
                "%s %s" % (e.pgcode, e.diag.message_primary))
    cur.execute("INSERT INTO kept VALUES ('a', %s::affinity.model)", (b64(a),))
    cur.execute("""SELECT label, affinity.user_vector(model, %s) FROM kept ORDER BY label""",
                (TARGET_USER,))
    rows = dict(cur.fetchall())
    ok = (max(abs(x - y) for x, y in zip(rows["a"], vec_a)) < 1e-6 and
          max(abs(x + y) for x, y in zip(rows["b"], vec_a)) < 1e-6)
    c.check(ok, "%s: stored A and B (binary COPY) are each served as themselves" % label)

    # 5. ranking_metrics in the README's held-out form (a subquery per model
    #    over the held-out rows, the model passed as a parameter): the held-out
    #    items are A's top 3 for the customer, so A scores recall 1 and B, whose
    #    vector is negated, less; each equals its stored copy's figures
    cur.execute("SELECT item_id FROM affinity.top_items(%s::affinity.model, %s, 3)",
                (b64(a), TARGET_USER))
    top_a = [r[0] for r in cur.fetchall()]
    cur.execute("DROP TABLE IF EXISTS held")
    cur.execute("CREATE TABLE held AS SELECT %s::bigint AS customer_id, "
                "unnest(%s::bigint[]) AS product_id", (TARGET_USER, top_a))
    held_form = """SELECT m.label, (SELECT affinity.ranking_metrics(m.model, t.customer_id, t.product_id, 3)
                                    FROM held t)
                   FROM (VALUES ('a', %s::affinity.model), ('b', %s::affinity.model)) m(label, model)"""
    cur.execute(held_form, (b64(a), b64(b_nodigest)))
    sub = dict(cur.fetchall())
    cur.execute("""SELECT k.label, affinity.ranking_metrics(k.model, t.customer_id, t.product_id, 3)
                   FROM kept k, held t GROUP BY k.label""")
    saved = dict(cur.fetchall())
    ok = (len(top_a) == 3 and sub == saved and sub["a"]["recall"] == 1
          and sub["b"]["recall"] < 1)
    c.check(ok, "%s: ranking_metrics in the subquery form scores A and B (no digest) each as "
                "itself, equal to their stored copies" % label,
            "" if ok else "subquery form %s, stored %s" % (sub, saved))
    try:
        cur.execute(held_form, (b64(a), b64(b)))
        c.check(False, "%s: the subquery form refuses B with A's digest" % label)
    except psycopg2.Error as e:
        c.check(e.pgcode == "22P03" and "digest" in e.diag.message_primary,
                "%s: the subquery form refuses B with A's digest" % label,
                "%s %s" % (e.pgcode, e.diag.message_primary))
    return n_users


def main():
    c = Checker("check_model_identity")
    conn = connect()
    cur = conn.cursor()
    fresh_schema(cur, "ident")
    try:
        run_case(c, cur, "model over 1 MB", users=5000, factors=48)
        run_case(c, cur, "small model", users=60, factors=4)
    finally:
        drop_schema(cur, "ident")
    c.finish()


if __name__ == "__main__":
    main()
