"""Crafted text keys with invalid bytes never enter the database.

A model with text keys carries the texts of its customers and products;
serving returns them as text values.  Crafted values (built in Python with
the format writer of tests/fuzz/seeds.py: keys hashed and sorted as the
format wants, checksum right) hold one bad text key each:

* invalid UTF-8: a stray continuation byte, an overlong "/", a UTF-16
  surrogate, a truncated sequence;
* a NUL byte inside a key.

Each is refused with SQLSTATE 22021 (character_not_in_repertoire), the
detail naming the side (user / item) and the key's index, both through text
input (::affinity.model, as psql replays a dump) and through binary COPY
(model_recv).  Valid keys with accents and emoji are accepted.  In a LATIN1
database the same invalid-UTF-8 bytes are valid characters and are
accepted, while the NUL is refused there too: keys are checked in the
database's own encoding.  On the code before the check, every bad value was
accepted and its key served as text.
"""

import base64
import io
import os
import struct
import sys

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "fuzz"))
import seeds  # noqa: E402

import psycopg2  # noqa: E402

from _common import Checker, connect  # noqa: E402

LATIN1_DB = "affinity_latin1_keys"

GOOD_USERS = [b"ana", b"bo", "\u00e7\u00e9cile".encode(), "\U0001f600 guest".encode()]
GOOD_ITEMS = [b"SKU-7", b"SKU-9", "caf\u00e9 cup".encode(), b"", b"tea"]
BAD = [
    ("item", "a stray continuation byte", b"SKU-\x80"),
    ("item", "an overlong encoding of '/'", b"\xc0\xaf"),
    ("user", "a UTF-16 surrogate", b"\xed\xa0\x80x"),
    ("item", "a truncated sequence", b"caf\xc3"),
    ("user", "a NUL byte", b"cust\x00omer"),
    ("item", "a NUL byte", b"\x00"),
]


def value_with(users, items):
    """A valid implicit_als value over these text keys (synth's layout)."""
    m = seeds.Model(seeds.synth("implicit_als", len(users), len(items), text=True))
    uk, uo, ut = seeds.text_dictionary(users)
    ik, io_, it = seeds.text_dictionary(items)
    m.sections.update(user_keys=uk, user_text_off=uo, user_text=ut,
                      item_keys=ik, item_text_off=io_, item_text=it)
    return bytes(m.encode()[4:])


def key_index(texts, t):
    keys, _, _ = seeds.text_dictionary(texts)
    return keys.index(seeds.text_key(t))


def binary_copy(cur, payload):
    data = (b"PGCOPY\n\xff\r\n\x00" + struct.pack(">ii", 0, 0) + struct.pack(">h", 1)
            + struct.pack(">i", len(payload)) + payload + struct.pack(">h", -1))
    cur.copy_expert("COPY keyed (model) FROM STDIN WITH (FORMAT binary)", io.BytesIO(data))


def attempt(cur, how, payload):
    """None when accepted, else (sqlstate, message, detail)."""
    try:
        if how == "text":
            cur.execute("SELECT %s::affinity.model IS NOT NULL", (base64.b64encode(payload).decode(),))
        else:
            binary_copy(cur, payload)
        return None
    except psycopg2.Error as e:
        return (e.pgcode, e.diag.message_primary, e.diag.message_detail or "")


def main():
    c = Checker("check_text_key_encoding")
    conn = connect()
    cur = conn.cursor()
    cur.execute("DROP TABLE IF EXISTS keyed")
    cur.execute("CREATE TABLE keyed (model affinity.model)")

    good = value_with(GOOD_USERS, GOOD_ITEMS)
    for how in ("text", "binary"):
        r = attempt(cur, how, good)
        c.check(r is None, "keys with accents and emoji are accepted (%s input)" % how, str(r or ""))
    cur.execute("SELECT item_id FROM keyed, affinity.top_items(model, %s, 10) ORDER BY item_id",
                ("\u00e7\u00e9cile",))
    served = [r[0] for r in cur.fetchall()]
    c.check(set(served) <= set(t.decode() for t in GOOD_ITEMS) and served,
            "such a model serves its keys as text", repr(served))

    bad_values = []
    for side, what, text in BAD:
        users, items = list(GOOD_USERS), list(GOOD_ITEMS)
        (users if side == "user" else items)[1] = text
        idx = key_index(users if side == "user" else items, text)
        bad_values.append((side, what, text, value_with(users, items)))
        for how in ("text", "binary"):
            r = attempt(cur, how, bad_values[-1][3])
            want = "%s key index %d" % (side, idx)
            ok = r is not None and r[0] == "22021" and want in r[2]
            c.check(ok, "%s key with %s is refused (%s input), naming %s" % (side, what, how, want),
                    "accepted" if r is None else "%s: %s (%s)" % r)
    cur.execute("SELECT count(*) FROM keyed")
    c.check(cur.fetchone()[0] == 1, "only the valid model reached the table")
    cur.execute("DROP TABLE keyed")

    # the same bytes in a LATIN1 database: every byte but NUL is a character there
    cur.execute("DROP DATABASE IF EXISTS %s" % LATIN1_DB)
    cur.execute("CREATE DATABASE %s TEMPLATE template0 ENCODING 'LATIN1' LC_COLLATE 'C' LC_CTYPE 'C'"
                % LATIN1_DB)
    try:
        lconn = psycopg2.connect(dbname=LATIN1_DB)
        lconn.autocommit = True
        lcur = lconn.cursor()
        lcur.execute("CREATE EXTENSION affinity")
        for side, what, text, payload in bad_values:
            r = attempt(lcur, "text", payload)
            if b"\x00" in text:
                c.check(r is not None and r[0] == "22021",
                        "LATIN1 database: %s key with %s is refused" % (side, what), str(r))
            else:
                c.check(r is None, "LATIN1 database: %s key with %s is accepted (valid LATIN1)"
                        % (side, what), str(r or ""))
        lconn.close()
    finally:
        cur.execute("DROP DATABASE IF EXISTS %s WITH (FORCE)" % LATIN1_DB)
    c.finish()


if __name__ == "__main__":
    main()
