"""The engine's SHA-256 and base64 codec, and the content digest of model values.

1. src/core/digest.c, built outside the server with tests/digest/digest_driver.c,
   run twice: with the compression function the engine picks for this CPU
   (the x86 SHA extensions when /proc/cpuinfo lists sha_ni, portable C
   otherwise) and with the portable one forced (AFFINITY_SHA256_PORTABLE=1);
   each run checks that it used the path it names, then:
   * SHA-256 of the examples of FIPS 180-4 (NIST's "abc", the 448-bit
     two-block message and one million "a"; the expected digests are the
     published ones, written here from memory and confirmed by hashlib);
   * SHA-256 of random messages of every length 0..300 and a few large ones,
     whole and fed in pieces of 1..70 bytes, against Python's hashlib;
   * base64 encoding against Python's base64 module, decoding of that text
     with white space inserted, and refusal of malformed text (bad
     characters, padding in the middle, truncated groups).
2. In the server: a fitted model's content digest equals hashlib's SHA-256
   of its bytes (checksum and digest fields read as zeros), bigint and text
   keys; a value without a digest (as 1.1 wrote) gets that digest on input,
   a checksum that covers it and its fingerprint unchanged; a value whose
   content no longer matches its digest is refused (SQLSTATE 22P03).
"""

import base64
import hashlib
import os
import random
import struct
import subprocess
import sys

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "fuzz"))
import seeds  # noqa: E402

import psycopg2  # noqa: E402

from _common import build_engine_program, REPO_DIR, Checker, connect, fail  # noqa: E402

FIPS = [
    (b"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"),
    (b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq",
     "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"),
    (b"a" * 1000000, "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0"),
    (b"", "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"),
]


def build_driver(tmp):
    exe = os.path.join(tmp, "digest_driver")
    rc, out = build_engine_program(exe, "tests/digest/digest_driver.c", ["-Wall"])
    if rc != 0:
        fail("cannot build the digest driver: " + out[-2000:])
    return exe


def cpu_has_sha():
    """True when this is an x86-64 CPU whose flags list the SHA extensions."""
    import platform
    if platform.machine() not in ("x86_64", "AMD64"):
        return False
    try:
        with open("/proc/cpuinfo") as f:
            return any(line.startswith("flags") and "sha_ni" in line.split() for line in f)
    except OSError:
        return False


class Driver:
    def __init__(self, exe, portable=False):
        self.exe = exe
        self.env = dict(os.environ)
        self.env.pop("AFFINITY_SHA256_PORTABLE", None)
        if portable:
            self.env["AFFINITY_SHA256_PORTABLE"] = "1"

    def implementation(self):
        p = subprocess.run([self.exe, "--implementation"], stdout=subprocess.PIPE,
                           env=self.env, universal_newlines=True)
        if p.returncode != 0:
            fail("digest driver --implementation exit %d" % p.returncode)
        return p.stdout.strip()

    def run(self, ops):
        """ops: list of (op, bytes); returns the answers in order."""
        data = b"".join(op.encode() + struct.pack("<Q", len(b)) + b for op, b in ops)
        p = subprocess.run([self.exe], input=data, stdout=subprocess.PIPE, env=self.env)
        if p.returncode != 0:
            fail("digest driver exit %d" % p.returncode)
        out, pos, answers = p.stdout, 0, []
        for op, _ in ops:
            if op in "si":
                answers.append(out[pos:pos + 32])
                pos += 32
            elif op == "e":
                n = struct.unpack_from("<Q", out, pos)[0]
                answers.append(out[pos + 8:pos + 8 + n].decode())
                pos += 8 + n
            else:
                n, bad = struct.unpack_from("<qQ", out, pos)
                pos += 16
                if n >= 0:
                    answers.append(out[pos:pos + n])
                    pos += n
                else:
                    answers.append(("error", bad))
        return answers


def check_sha(c, drv, path):
    got = drv.run([("s", m) for m, _ in FIPS] + [("i", m) for m, _ in FIPS])
    for k, (m, want) in enumerate(FIPS):
        name = "%r" % m if len(m) < 60 else "one million 'a'"
        c.check(got[k].hex() == want and hashlib.sha256(m).hexdigest() == want,
                "%s: FIPS 180-4 example %s" % (path, name), got[k].hex())
        c.check(got[len(FIPS) + k].hex() == want,
                "%s: FIPS 180-4 example %s, fed in pieces" % (path, name))
    rng = random.Random(180)
    msgs = [bytes(rng.getrandbits(8) for _ in range(n)) for n in range(301)]
    msgs += [os.urandom(n) for n in (4095, 65536 + 7, 3 * 1024 * 1024 + 13)]
    got = drv.run([("s", m) for m in msgs] + [("i", m) for m in msgs])
    bad = [len(m) for k, m in enumerate(msgs) if got[k] != hashlib.sha256(m).digest()]
    bad_i = [len(m) for k, m in enumerate(msgs) if got[len(msgs) + k] != hashlib.sha256(m).digest()]
    c.check(not bad, "%s: SHA-256 equals hashlib on %d random messages (0..300 bytes and up to 3 MB)"
            % (path, len(msgs)), "differs at lengths %s" % bad[:10] if bad else "")
    c.check(not bad_i, "%s: SHA-256 fed in pieces equals hashlib on the same messages" % path,
            "differs at lengths %s" % bad_i[:10] if bad_i else "")


def check_base64(c, drv):
    rng = random.Random(4648)
    msgs = [bytes(rng.getrandbits(8) for _ in range(n)) for n in range(70)] + [os.urandom(100003)]
    enc = drv.run([("e", m) for m in msgs])
    bad = [len(m) for m, e in zip(msgs, enc) if e != base64.b64encode(m).decode()]
    c.check(not bad, "base64 encoding equals Python's on %d messages" % len(msgs),
            "differs at lengths %s" % bad[:10] if bad else "")
    spaced = []
    for e in enc:
        s = "".join(ch + (rng.choice([" ", "\n", "\r\n", "\t", ""]) if rng.random() < 0.2 else "")
                    for ch in e)
        spaced.append(("d", (" \n" + s + "\n ").encode()))
    dec = drv.run(spaced)
    bad = [len(m) for m, d in zip(msgs, dec) if d != m]
    c.check(not bad, "base64 decoding with white space inserted gives the bytes back (%d)" % len(msgs),
            "differs at lengths %s" % bad[:10] if bad else "")
    malformed = ["abc", "ab=c", "a===", "abcd=", "ab==ab==", "ab*d", "====", "ab=", "abcde",
                 "QUJD\x00RA==", "QUJDRA==QQ=="]
    dec = drv.run([("d", m.encode()) for m in malformed])
    wrong = [m for m, d in zip(malformed, dec) if not (isinstance(d, tuple) and d[0] == "error")]
    c.check(not wrong, "malformed base64 is refused (%d cases)" % len(malformed),
            "accepted: %r" % wrong if wrong else "")


def value_of(cur, sql):
    cur.execute("SELECT decode((%s)::text, 'base64')" % sql)
    return bytearray(b"\0\0\0\0" + bytes(cur.fetchone()[0]))


def check_server(c, cur):
    fits = {
        "bigint keys": """SELECT affinity.fit(c, p, 1, '{"factors": 3, "iterations": 2, "threads": 1}')
                          FROM generate_series(1, 40) c, generate_series(1, 12) p WHERE (c + p) % 3 = 0""",
        "text keys": """SELECT affinity.fit('customer-' || c, 'sku-' || p, 1,
                                '{"factors": 3, "iterations": 2, "threads": 1}')
                        FROM generate_series(1, 40) c, generate_series(1, 12) p WHERE (c * p) % 5 = 1""",
    }
    for label, sql in fits.items():
        v = value_of(cur, sql)
        stored = bytes(v[seeds.DIGEST_AT:seeds.DIGEST_AT + 32])
        c.check(stored == seeds.model_digest(v) and stored != b"\0" * 32,
                "%s: the fitted model's content digest is hashlib's SHA-256 of its content" % label,
                stored.hex())
        c.check(seeds.model_checksum(v) == struct.unpack_from("<Q", v, seeds.OFFSET["checksum"])[0],
                "%s: the checksum covers the digest" % label)

        # as 1.1 wrote it: digest zero, checksum over that
        old = bytearray(v)
        old[seeds.DIGEST_AT:seeds.DIGEST_AT + 32] = b"\0" * 32
        seeds.fix_checksum(old)
        cur.execute("SELECT decode(%s::affinity.model::text, 'base64')",
                    (base64.b64encode(bytes(old[4:])).decode(),))
        back = bytearray(b"\0\0\0\0" + bytes(cur.fetchone()[0]))
        c.check(bytes(back) == bytes(v),
                "%s: a value without a digest gets it on input (same bytes as the fit: digest, "
                "checksum; fingerprint kept)" % label)

        # content changed, digest kept, checksum fixed: refused
        bad = bytearray(v)
        _, _, _, off, _ = seeds.section_entry(bad, seeds.KIND["item_factors"])
        struct.pack_into("<f", bad, off, 0.5)
        struct.pack_into("<Q", bad, seeds.OFFSET["checksum"], seeds.model_checksum(bad))
        try:
            cur.execute("SELECT %s::affinity.model IS NOT NULL",
                        (base64.b64encode(bytes(bad[4:])).decode(),))
            c.check(False, "%s: a value whose content does not match its digest is refused" % label)
        except psycopg2.Error as e:
            c.check(e.pgcode == "22P03", "%s: a value whose content does not match its digest "
                    "is refused" % label, "%s: %s" % (e.pgcode, e.diag.message_primary))


def main():
    c = Checker("check_digest")
    tmp = os.environ.get("AFFINITY_TEST_TMP") or "/tmp"
    exe = build_driver(tmp)
    drv = Driver(exe)
    native = drv.implementation()
    want = "sha-ni" if cpu_has_sha() else "portable"
    c.check(native == want, "the engine picks the %s compression on this CPU" % want, native)
    portable = Driver(exe, portable=True)
    c.check(portable.implementation() == "portable",
            "AFFINITY_SHA256_PORTABLE=1 makes the driver use the portable compression",
            portable.implementation())
    check_sha(c, drv, native)
    check_sha(c, portable, "portable (forced)")
    check_base64(c, drv)
    conn = connect()
    check_server(c, conn.cursor())
    c.finish()


if __name__ == "__main__":
    main()
