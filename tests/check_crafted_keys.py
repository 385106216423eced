"""Crafted keys: text keys whose 1.1 hashes collide, item ids chosen to share
the slots of the matrix build's index, and the keyed hash that defeats both.

1. SipHash-2-4 (Aumasson and Bernstein, "SipHash: a fast short-input PRF",
   2012): a Python implementation written from the paper is checked against
   the paper's published test vectors (key 00 01 .. 0f, messages 00 01 ..
   of 0 to 15 bytes; the values of the reference implementation's vector
   table), and then every key a fit stores is recomputed from the text and
   the hash key in the model's header: the server's hash is that function.
2. Two fits of the same rows draw different hash keys (a per-model random
   key) and score every item alike.
3. A pair of customer references whose 1.1 keys are equal, made here by
   inverting the 1.1 hash (tests/fuzz/seeds.py has it bit for bit): 1.1
   refused the whole fit ("two user keys have the same 64-bit hash"); now
   it fits and serves the two customers apart.
4. A 1.1-style value (hash key zero, keys from the 1.1 hash) still passes
   validation and serves.
5. 131,072 item ids chosen so that the 1.1 index's multiply-xorshift slot
   function sends all of them to slot 0 (quadratic probing: 23.7 s against
   0.13 s for ids 1..131072 on the 1.1 code): the build of crafted ids must
   cost at most RATIO_BOUND times that of ordinary ids, measured side by
   side here (best of two runs each).
6. Parallel and serial fits of text keys hold the same model.  The hash
   keys (so the int64 keys, the order of users and items, and the
   fingerprint) differ by design; compared are what describe() counts
   (users, items, interactions, rows read, duplicates) and, for popularity
   and item_knn, the score of every item for 40 users (top_items with k
   above the item count: the same (user, item) pairs, scores equal for
   popularity and within SCORE_RTOL for item_knn, whose float sums follow
   the order of the keys); for implicit_als (whose random start depends on the order)
   the counts only.
"""

import base64
import os
import sys
import time

from _common import Checker, connect, drop_schema, fresh_schema

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "fuzz"))
import seeds  # noqa: E402

MASK = (1 << 64) - 1
RATIO_BOUND = 8.0
# item_knn sums a column's similarities in the order of its users, which
# follows their keys: float32 sums in another order differ by a few units in
# the last place (measured: 2.5e-7 relative at most); 1e-6 is about 8 ulps.
SCORE_RTOL = 1e-6
N_CRAFTED = 131072

# SipHash-2-4, key 00..0f, message 00..(n-1), n = 0..15: the first vectors of
# the reference implementation (as 64-bit little-endian outputs).
SIP_VECTORS = [
    0x726FDB47DD0E0E31, 0x74F839C593DC67FD, 0x0D6C8009D9A94F5A, 0x85676696D7FB7E2D,
    0xCF2794E0277187B7, 0x18765564CD99A68D, 0xCBC9466E58FEE3CE, 0xAB0200F58B01D137,
    0x93F5F5799A932462, 0x9E0082DF0BA9E4B0, 0x7A5DBBC594DDB9F3, 0xF4B32F46226BADA7,
    0x751E8FBC860EE5FB, 0x14EA5627C0843D90, 0xF723CA908E7AF2EE, 0xA129CA6149BE45E5,
]


def rotl(x, b):
    return ((x << b) | (x >> (64 - b))) & MASK


def siphash(k0, k1, data, c=2, d=4):
    """SipHash-c-d of bytes under the key (k0, k1), as in the paper."""
    v = [k0 ^ 0x736F6D6570736575, k1 ^ 0x646F72616E646F6D,
         k0 ^ 0x6C7967656E657261, k1 ^ 0x7465646279746573]

    def rnd():
        v[0] = (v[0] + v[1]) & MASK; v[1] = rotl(v[1], 13); v[1] ^= v[0]; v[0] = rotl(v[0], 32)  # noqa: E702
        v[2] = (v[2] + v[3]) & MASK; v[3] = rotl(v[3], 16); v[3] ^= v[2]  # noqa: E702
        v[0] = (v[0] + v[3]) & MASK; v[3] = rotl(v[3], 21); v[3] ^= v[0]  # noqa: E702
        v[2] = (v[2] + v[1]) & MASK; v[1] = rotl(v[1], 17); v[1] ^= v[2]; v[2] = rotl(v[2], 32)  # noqa: E702

    n = len(data)
    words = [int.from_bytes(data[i:i + 8], "little") for i in range(0, n - n % 8, 8)]
    words.append(int.from_bytes(data[n - n % 8:] + b"\0" * (8 - n % 8), "little") | ((n & 0xFF) << 56))
    for m in words:
        v[3] ^= m
        for _ in range(c):
            rnd()
        v[0] ^= m
    v[2] ^= 0xFF
    for _ in range(d):
        rnd()
    return v[0] ^ v[1] ^ v[2] ^ v[3]


def signed(x):
    return x - (1 << 64) if x >= 1 << 63 else x


def model_bytes(cur, expr):
    """A model's bytes with the 4-byte length word in front, as the engine sees them."""
    cur.execute("SELECT (%s)::text" % expr)
    payload = base64.b64decode("".join(cur.fetchone()[0].split()))
    return ((len(payload) + 4) << 2).to_bytes(4, "little") + payload


def hash_key(m):
    reserved = m.h["reserved"]
    return int.from_bytes(reserved[32:40], "little"), int.from_bytes(reserved[40:48], "little")


def texts_of(m, side):
    off = m.sections[side + "_text_off"]
    raw = bytes(m.sections[side + "_text"])
    return [raw[off[i]:off[i + 1]] for i in range(len(off) - 1)]


# --- the 1.1 hash, inverted -------------------------------------------------

K = seeds.K
KINV = pow(K, -1, 1 << 64)
PRINTABLE = set(range(0x30, 0x7B)) - set(b"\\`")


def word_step(h, w):
    """One 8-byte step of aff_hash: h = (h ^ w) * K; h ^= h >> 32."""
    h = ((h ^ w) * K) & MASK
    return h ^ (h >> 32)


def colliding_pair():
    """Two different 16-byte printable texts with the same 1.1 key: the second
    word of the second text cancels the difference the first words made."""
    seed = 0x6A09E667F3BCC908
    a = b"cust-000A-000001"
    target = word_step(seed, int.from_bytes(a[:8], "little")) ^ int.from_bytes(a[8:], "little")
    for j in range(1, 10 ** 7):
        b1 = ("cust-%03d" % (j % 1000)).encode() if j < 1000 else ("c%07d" % j).encode()
        w2 = target ^ word_step(seed, int.from_bytes(b1, "little"))
        b2 = w2.to_bytes(8, "little")
        if all(ch in PRINTABLE for ch in b2):
            b = b1 + b2
            if b != a:
                return a.decode(), b.decode()
    raise RuntimeError("no printable colliding pair found")


# --- ids that share the 1.1 index's slot -----------------------------------

def crafted_ids(n):
    """Item ids whose 1.1 slot ((id * K) ^ ((id * K) >> 29)) & mask is 0 for a
    table of the size the build makes for n items (the next power of two at
    least 2n): invert the xorshift and the multiplication."""
    size = 16
    while size < 2 * n:
        size <<= 1
    shift = size.bit_length() - 1
    out = []
    for j in range(1, n + 1):
        x = (j << shift) & MASK
        h = x ^ (x >> 29) ^ (x >> 58)
        out.append(signed((h * KINV) & MASK))
    return out


def timed(cur, sql):
    t = time.monotonic()
    cur.execute(sql)
    cur.fetchall()
    return time.monotonic() - t


def main():
    c = Checker("check_crafted_keys")
    conn = connect()
    conn.autocommit = True
    cur = conn.cursor()
    fresh_schema(cur, "ck")

    # 1. SipHash-2-4 against the published vectors, then against the server
    key0 = int.from_bytes(bytes(range(8)), "little")
    key1 = int.from_bytes(bytes(range(8, 16)), "little")
    bad = [n for n in range(16) if siphash(key0, key1, bytes(range(n))) != SIP_VECTORS[n]]
    c.check(not bad, "SipHash-2-4 (Python) matches the 16 published test vectors",
            "mismatch at lengths %s" % bad)

    cur.execute("""CREATE TABLE ck_buys AS
                   SELECT 'cust-' || (g % 300) AS c, 'sku-' || ((g * 7) % 97) AS s,
                          (1 + g % 3)::real AS w
                   FROM generate_series(1, 6000) g""")
    fit_sql = """SELECT affinity.fit(c, s, w, '{"method": "popularity"}') FROM ck_buys"""
    cur.execute("CREATE TABLE ck_models AS SELECT 1 AS n, (%s) AS model" % fit_sql)
    cur.execute("INSERT INTO ck_models SELECT 2, (%s)" % fit_sql)
    m1 = seeds.Model(model_bytes(cur, "SELECT model FROM ck_models WHERE n = 1"))
    m2 = seeds.Model(model_bytes(cur, "SELECT model FROM ck_models WHERE n = 2"))
    k = hash_key(m1)
    c.check(k != (0, 0), "a new text-key model carries a non-zero hash key", "%016x %016x" % k)
    wrong = 0
    total = 0
    for side in ("user", "item"):
        for t, key in zip(texts_of(m1, side), m1.sections[side + "_keys"]):
            total += 1
            if signed(siphash(k[0], k[1], t)) != key:
                wrong += 1
    c.check(total == 300 + 97 and wrong == 0,
            "every stored key is SipHash-2-4 of its text under the header's key",
            "%d keys, %d wrong" % (total, wrong))

    # 2. a random key per model, same answers
    c.check(hash_key(m2) != k, "two fits of the same rows draw different hash keys",
            "%016x %016x / %016x %016x" % (k + hash_key(m2)))
    cur.execute("""SELECT count(*) FROM (
                     SELECT u, t.item_id, round(t.score::numeric, 6) FROM ck_models m,
                            generate_series(0, 299) u,
                            affinity.top_items(m.model, 'cust-' || u, 100) t WHERE m.n = 1
                     EXCEPT
                     SELECT u, t.item_id, round(t.score::numeric, 6) FROM ck_models m,
                            generate_series(0, 299) u,
                            affinity.top_items(m.model, 'cust-' || u, 100) t WHERE m.n = 2) d""")
    c.check(cur.fetchone()[0] == 0, "both models score every item alike for 300 customers", "")

    # 3. a colliding pair under the 1.1 hash
    a, b = colliding_pair()
    same = seeds.text_key(a.encode()) == seeds.text_key(b.encode())
    c.check(same and a != b, "crafted pair collides under the 1.1 hash",
            "%r and %r: 1.1 keys %d, %d" % (a, b, seeds.text_key(a.encode()), seeds.text_key(b.encode())))
    cur.execute("""CREATE TABLE ck_pair AS
                   SELECT * FROM (VALUES (%s, 'sku-1', 1::real), (%s, 'sku-2', 1::real),
                                         ('cust-x', 'sku-1', 1::real), ('cust-x', 'sku-2', 1::real),
                                         ('cust-y', 'sku-3', 1::real)) v(c, s, w)""", (a, b))
    try:
        cur.execute("""CREATE TABLE ck_pair_model AS
                       SELECT affinity.fit(c, s, w, '{"method": "popularity"}') AS model FROM ck_pair""")
        cur.execute("SELECT (affinity.describe(model)->>'users')::int FROM ck_pair_model")
        users = cur.fetchone()[0]
        c.check(users == 4, "a fit holding the colliding pair succeeds and keeps both", "%d users" % users)
        got = {}
        for who in (a, b):
            cur.execute("""SELECT array_agg(item_id ORDER BY item_id) FROM ck_pair_model,
                           affinity.top_items(model, %s, 5, exclude_seen => true)""", (who,))
            got[who] = cur.fetchone()[0]
        c.check(got[a] == ["sku-2", "sku-3"] and got[b] == ["sku-1", "sku-3"],
                "the two colliding customers are served apart", repr(got))
    except Exception as e:  # the 1.1 code refuses the fit
        c.check(False, "a fit holding the colliding pair succeeds and keeps both", str(e).strip())

    # 4. a 1.1 value (hash key zero) still validates and serves
    old = seeds.synth("popularity", 4, 3, text=True)
    old_text = base64.b64encode(bytes(old[4:])).decode()
    first_user = texts_of(seeds.Model(old), "user")[0].decode()
    try:
        cur.execute("""SELECT count(*) FROM affinity.top_items(%s::text::affinity.model, %s, 3,
                       exclude_seen => false)""", (old_text, first_user))
        n = cur.fetchone()[0]
    except Exception as e:
        n = str(e).strip()
    c.check(n == 3, "a 1.1 text-key value (hash key zero) validates and serves", "%s rows" % n)

    # 5. item ids crafted against the 1.1 index
    cur.execute("CREATE TABLE ck_ids (kind text, i bigint)")
    cur.execute("INSERT INTO ck_ids SELECT 'ordinary', g FROM generate_series(1, %s) g", (N_CRAFTED,))
    cur.execute("INSERT INTO ck_ids SELECT 'crafted', unnest(%s::bigint[])", (crafted_ids(N_CRAFTED),))
    cur.execute("ANALYZE ck_ids")
    times = {}
    for kind in ("ordinary", "crafted", "ordinary", "crafted"):
        t = timed(cur, """SELECT affinity.fit(u, i, 1, '{"method": "popularity"}') IS NULL
                          FROM ck_ids, generate_series(1, 2) u WHERE kind = '%s'""" % kind)
        times[kind] = min(times.get(kind, t), t)
    ratio = times["crafted"] / max(times["ordinary"], 1e-3)
    c.check(ratio <= RATIO_BOUND,
            "crafted item ids cost at most %.0fx ordinary ones (%d items)" % (RATIO_BOUND, N_CRAFTED),
            "crafted %.3f s, ordinary %.3f s: %.1fx" % (times["crafted"], times["ordinary"], ratio))

    # 6. parallel and serial fits of text keys
    cur.execute("""CREATE TABLE ck_big AS
                   SELECT 'cust-' || (hashint4(g) & 4095) AS c, 'sku-' || (hashint4(g * 31 + 7) & 511) AS s,
                          (1 + g % 5)::real AS w
                   FROM generate_series(1, 200000) g""")
    cur.execute("ANALYZE ck_big")
    par = ["SET max_parallel_workers_per_gather = 2", "SET parallel_setup_cost = 0",
           "SET parallel_tuple_cost = 0", "SET min_parallel_table_scan_size = 0"]
    ser = ["SET max_parallel_workers_per_gather = 0"]
    counts = ("users", "items", "interactions", "rows_read", "duplicates_summed")
    for method in ("popularity", "item_knn", "implicit_als"):
        opts = '{"method": "%s", "factors": 8, "iterations": 2}' % method if method == "implicit_als" \
            else '{"method": "%s"}' % method
        fit = "SELECT affinity.fit(c, s, w, '%s') FROM ck_big" % opts
        facts = {}
        for name, sets in (("parallel", par), ("serial", ser)):
            for q in sets:
                cur.execute(q)
            if name == "parallel":
                cur.execute("EXPLAIN (ANALYZE, COSTS OFF, TIMING OFF) " + fit)
                plan = "\n".join(r[0] for r in cur.fetchall())
                c.check("Partial Aggregate" in plan and "Workers Launched: 0" not in plan,
                        "%s: the parallel plan runs workers" % method,
                        "" if "Partial Aggregate" in plan else plan)
            cur.execute("DROP TABLE IF EXISTS ck_m_%s" % name)
            cur.execute("CREATE TABLE ck_m_%s AS SELECT affinity.fit(c, s, w, '%s') AS model FROM ck_big"
                        % (name, opts))
            cur.execute("SELECT affinity.describe(model) FROM ck_m_%s" % name)
            d = cur.fetchone()[0]
            facts[name] = tuple(d.get(x) for x in counts)
            if method != "implicit_als":
                # every item of each user (k above the item count): equal
                # scores may come in either order, since the order of items
                # follows their keys
                cur.execute("""SELECT u, t.item_id, t.score FROM ck_m_%s m, generate_series(0, 39) u,
                                      affinity.top_items(m.model, 'cust-' || u, 1000) t""" % name)
                facts[name + "_top"] = {(u, i): sc for u, i, sc in cur.fetchall()}
        for q in ("max_parallel_workers_per_gather", "parallel_setup_cost", "parallel_tuple_cost",
                  "min_parallel_table_scan_size"):
            cur.execute("RESET " + q)
        c.check(facts["parallel"] == facts["serial"], "%s: parallel and serial fits count the same" % method,
                "%s / %s" % (facts["parallel"], facts["serial"]))
        if method != "implicit_als":
            p_top, s_top = facts["parallel_top"], facts["serial_top"]
            worst = max((abs(p_top[k] - s_top[k]) / max(abs(s_top[k]), 1e-30)
                         for k in s_top if k in p_top), default=0.0)
            c.check(p_top.keys() == s_top.keys() and len(s_top) >= 40 * 100 and worst <= SCORE_RTOL,
                    "%s: parallel and serial fits score every item alike for 40 customers" % method,
                    "%d and %d (customer, item) pairs, largest relative difference %.2g (bound %.0g)"
                    % (len(p_top), len(s_top), worst, SCORE_RTOL))
    drop_schema(cur, "ck")
    c.finish()


if __name__ == "__main__":
    main()
