#!/usr/bin/python3
"""Seed corpus and crafted bad values for the model validator.

A model value is stored as a varlena: a 4-byte length word, then the bytes
that the text form (base64) and the binary form carry.  Every file this
script writes, and every literal it prints, is those bytes after the length
word: what model_in decodes and what fuzz_model.c is fed.

    seeds.py corpus DIR   write valid models (fitted by the extension through
                          the PG* connection settings, plus synthesized ones
                          for every method layout) and crafted bad values
                          into DIR, one file each; prints the counts
    seeds.py check        cast every crafted bad value through ::affinity.model
                          and report those the server accepts (exit 1 if any)
    seeds.py literals     fit the tiny fixed model of sql/corrupt.sql and print
                          each bad case as "name<TAB>base64" (the pasted
                          literals of that suite were made this way)

Bad values other than "bad checksum" get a recomputed checksum after the
edit, so that the content check, not the checksum, is what must reject
them.  The checksum (aff_model_checksum in src/core/model_format.c) is
reimplemented here and tested against the stored checksum of every model
the extension fits (selftest, run by every command).
"""

import base64
import hashlib
import math
import os
import random
import struct
import sys

MASK = (1 << 64) - 1
K = 0x9E3779B97F4A7C15

# The header of model_format.h, 256 bytes, little-endian.
HEADER_FIELDS = [
    ("varlena_word", "I"), ("magic", "4s"), ("version", "H"), ("method", "H"),
    ("key_type", "H"), ("n_sections", "H"), ("total_size", "Q"), ("checksum", "Q"),
    ("fingerprint", "Q"), ("n_users", "q"), ("n_items", "q"), ("nnz", "q"),
    ("factors", "i"), ("iterations", "i"), ("solver", "i"), ("solver_steps", "i"),
    ("confidence", "i"), ("threads", "i"), ("min_user_interactions", "i"),
    ("min_item_interactions", "i"), ("neighbors", "i"), ("max_items", "i"),
    ("regularization", "d"), ("alpha", "d"), ("epsilon", "d"), ("seed", "q"),
    ("rows_read", "q"), ("rows_skipped_null", "q"), ("rows_skipped_zero", "q"),
    ("duplicates_summed", "q"), ("dropped_users", "q"), ("dropped_items", "q"),
    ("dropped_interactions", "q"), ("peak_memory", "q"), ("fit_seconds", "d"),
    ("reserved", "48s"),
]
HEADER_FMT = "<" + "".join(f for _, f in HEADER_FIELDS)
HEADER_SIZE = 256
assert struct.calcsize(HEADER_FMT) == HEADER_SIZE
OFFSET = {}
_off = 0
for _name, _f in HEADER_FIELDS:
    OFFSET[_name] = _off
    _off += struct.calcsize("<" + _f)
assert OFFSET["reserved"] == 208

SECTION_FMT = "<IIQQ"           # kind, elem_size, offset, count
SECTION_SIZE = 24

# Section kinds: number -> (name, struct code of one element).
SEC = {
    1: ("user_keys", "q"), 2: ("item_keys", "q"), 3: ("user_factors", "f"),
    4: ("item_factors", "f"), 5: ("seen_ptr", "q"), 6: ("seen_items", "i"),
    7: ("seen_weights", "f"), 8: ("popularity", "f"), 9: ("loss", "d"),
    10: ("sweep_seconds", "d"), 11: ("item_weights", "f"), 12: ("neighbor_ptr", "q"),
    13: ("neighbor_idx", "i"), 14: ("neighbor_sim", "f"), 15: ("user_text_off", "q"),
    16: ("user_text", "B"), 17: ("item_text_off", "q"), 18: ("item_text", "B"),
    19: ("profile_info", "q"), 20: ("feature_keys", "q"), 21: ("feature_text_off", "q"),
    22: ("feature_text", "B"), 23: ("feature_items", "i"), 24: ("profile_ptr", "q"),
    25: ("profile_features", "i"), 26: ("profile_values", "f"), 27: ("profile_vectors", "f"),
    28: ("user_profiles", "f"),
    29: ("sequence_info", "q"),
}
KIND = {name: k for k, (name, _) in SEC.items()}
METHOD = {"implicit_als": 1, "popularity": 2, "ease": 3, "item_knn": 4}


def align8(x):
    return (x + 7) & ~7


# ---------------------------------------------------------------------------
# The engine's hash and checksum, bit for bit (model_format.c).

def aff_hash(data, h):
    n = len(data)
    p = 0
    while n - p >= 8:
        w = int.from_bytes(data[p:p + 8], "little")
        h = ((h ^ w) * K) & MASK
        h ^= h >> 32
        p += 8
    rest = n - p
    w = int.from_bytes(data[p:] + b"\0" * (8 - rest), "little")
    h = ((h ^ w ^ ((rest << 56) & MASK)) * K) & MASK
    h ^= h >> 29
    return h


def text_key(data):
    """aff_text_key: the int64 key of a text key (a mix of aff_hash of its bytes)."""
    h = aff_hash(data, 0x6A09E667F3BCC908)
    h ^= h >> 33
    h = (h * 0xFF51AFD7ED558CCD) & MASK
    h ^= h >> 33
    return h - (1 << 64) if h >= 1 << 63 else h


DIGEST_AT = 208                 # content_digest: the first 32 bytes of "reserved"


def model_digest(buf):
    """The content digest (src/core/digest.c): SHA-256 of the value after the
    length word, with the checksum and content_digest fields read as zeros."""
    b = bytearray(buf[4:])
    b[OFFSET["checksum"] - 4:OFFSET["checksum"] + 4] = b"\0" * 8
    b[DIGEST_AT - 4:DIGEST_AT + 28] = b"\0" * 32
    return hashlib.sha256(bytes(b)).digest()


def model_checksum(buf):
    """aff_model_checksum: every byte but the length word and the checksum field."""
    off = OFFSET["checksum"]
    h = 0x5851F42D4C957F2D
    h = aff_hash(buf[4:off], h)
    h = aff_hash(buf[off + 8:], h)
    return h ^ (h >> 31)


# ---------------------------------------------------------------------------
# Reading and writing values.  A value here is a bytearray with the 4-byte
# length word in front (as the engine sees it); .payload() drops it.

class Model:
    """A decoded value: header fields, the section table, and each section's
    elements, so that tests can edit one thing and re-encode."""

    def __init__(self, buf):
        buf = bytes(buf)
        self.raw = buf
        self.h = dict(zip([n for n, _ in HEADER_FIELDS], struct.unpack_from(HEADER_FMT, buf, 0)))
        self.table = []
        self.sections = {}
        for i in range(self.h["n_sections"]):
            kind, esz, off, cnt = struct.unpack_from(SECTION_FMT, buf, HEADER_SIZE + i * SECTION_SIZE)
            self.table.append([kind, esz, off, cnt])
            code = SEC[kind][1]
            self.sections[SEC[kind][0]] = list(struct.unpack_from("<%d%s" % (cnt, code), buf, off))

    @staticmethod
    def from_payload(payload):
        return Model(b"\0\0\0\0" + bytes(payload))

    def encode(self, last=()):
        """Lay the value out as aff_model_write does: header, table, then the
        sections in kind order on 8-byte boundaries, fingerprint, checksum.
        Kinds listed in last are moved to the end, in that order (the format
        allows any order; a section at the very end has nothing after it, so
        a read past it leaves the buffer)."""
        present = [k for k in sorted(SEC) if SEC[k][0] in self.sections and k not in last]
        present += [k for k in last if SEC[k][0] in self.sections]
        start = align8(HEADER_SIZE + len(present) * SECTION_SIZE)
        table = []
        body = b""
        off = start
        fp = 0x2545F4914F6CDD1D
        for k in present:
            name, code = SEC[k]
            vals = self.sections[name]
            data = struct.pack("<%d%s" % (len(vals), code), *vals)
            table.append((k, struct.calcsize(code), off, len(vals)))
            if k != KIND["sweep_seconds"]:
                fp = aff_hash(data, fp)
            body += data + b"\0" * (align8(len(data)) - len(data))
            off += align8(len(data))
        h = dict(self.h)
        h.update(magic=b"AFMD", n_sections=len(present), total_size=off, checksum=0, fingerprint=0)
        tbytes = b"".join(struct.pack(SECTION_FMT, *t) for t in table)
        hc = dict(h, varlena_word=0, fit_seconds=0.0, peak_memory=0,
                  reserved=b"\0" * 32 + h["reserved"][32:])
        fp = aff_hash(pack_header(hc), fp)
        fp = aff_hash(tbytes, fp)
        h["fingerprint"] = fp
        h["varlena_word"] = (off << 2) & 0xFFFFFFFF
        buf = bytearray(pack_header(h) + tbytes)
        buf += b"\0" * (start - len(buf))
        buf += body
        fix_checksum(buf)
        return buf


def pack_header(h):
    return struct.pack(HEADER_FMT, *[h[n] for n, _ in HEADER_FIELDS])


def fix_checksum(buf):
    """Recompute the checksum, and the content digest first when one is set
    (a value without one, as 1.1 wrote, gets none)."""
    if any(buf[DIGEST_AT:DIGEST_AT + 32]):
        buf[DIGEST_AT:DIGEST_AT + 32] = model_digest(buf)
    struct.pack_into("<Q", buf, OFFSET["checksum"], model_checksum(buf))
    return buf


def set_header(buf, field, value):
    code = dict(HEADER_FIELDS)[field]
    struct.pack_into("<" + code, buf, OFFSET[field], value)


def section_entry(buf, kind):
    """(index in the table, kind, elem_size, offset, count) of a section kind."""
    n = struct.unpack_from("<H", buf, OFFSET["n_sections"])[0]
    for i in range(n):
        e = struct.unpack_from(SECTION_FMT, buf, HEADER_SIZE + i * SECTION_SIZE)
        if e[0] == kind:
            return (i,) + e
    raise KeyError("no section of kind %d" % kind)


def set_entry(buf, kind, **fields):
    i, k, esz, off, cnt = section_entry(buf, kind)
    e = {"kind": k, "elem_size": esz, "offset": off, "count": cnt}
    e.update(fields)
    struct.pack_into(SECTION_FMT, buf, HEADER_SIZE + i * SECTION_SIZE,
                     e["kind"], e["elem_size"], e["offset"], e["count"])


def put_elem(buf, kind, index, value):
    """Overwrite element index of a section in place."""
    _, _, esz, off, _ = section_entry(buf, kind)
    struct.pack_into("<" + SEC[kind][1], buf, off + index * esz, value)


# ---------------------------------------------------------------------------
# Synthesized valid models of every layout (the extension may not fit every
# method yet; the validator must handle all four).

def text_dictionary(texts):
    """Keys (ascending), offsets and bytes of a text key dictionary."""
    pairs = sorted((text_key(t), t) for t in texts)
    off, blob = [0], b""
    for _, t in pairs:
        blob += t
        off.append(len(blob))
    return [k for k, _ in pairs], off, list(blob)


def synth(method, n_users, n_items, factors=3, neighbors=2, seed=7, text=False):
    rng = random.Random(seed * 1000 + n_users * 31 + n_items + (500 if text else 0))
    ukeys = sorted(rng.sample(range(-10**6, 10**6), n_users))
    ikeys = sorted(rng.sample(range(-10**6, 10**6), n_items))
    if text:
        ukeys, uoff, utext = text_dictionary([b"cust-%d" % k for k in ukeys])
        ikeys, ioff, itext = text_dictionary([("SKU-%d-\u00e9" % k).encode() for k in ikeys])
    ptr, idx, wts = [0], [], []
    for _ in range(n_users):
        chosen = sorted(rng.sample(range(n_items), rng.randint(1, min(3, n_items))))
        idx += chosen
        wts += [float(rng.randint(1, 5)) for _ in chosen]
        ptr.append(len(idx))
    pop = [0.0] * n_items
    for i in idx:
        pop[i] += 1.0
    h = {n: 0 for n, _ in HEADER_FIELDS}
    h.update(magic=b"AFMD", version=1, method=METHOD[method], key_type=1, reserved=b"\0" * 48,
             n_users=n_users, n_items=n_items, nnz=len(idx),
             factors=factors if method == "implicit_als" else 0, iterations=2,
             solver=1, solver_steps=3, confidence=2, threads=1, min_user_interactions=1,
             min_item_interactions=1, neighbors=neighbors, max_items=20000,
             regularization=0.1, alpha=10.0, epsilon=1.0, seed=42, rows_read=len(idx),
             fit_seconds=0.001)
    m = Model.__new__(Model)
    m.h = h
    m.sections = {"user_keys": ukeys, "item_keys": ikeys, "seen_ptr": ptr, "seen_items": idx,
                  "seen_weights": wts, "popularity": pop}
    if text:
        h["key_type"] = 2
        m.sections.update(user_text_off=uoff, user_text=utext, item_text_off=ioff, item_text=itext)
    if method == "implicit_als":
        m.sections["user_factors"] = [rng.uniform(-1, 1) for _ in range(n_users * factors)]
        m.sections["item_factors"] = [rng.uniform(-1, 1) for _ in range(n_items * factors)]
        m.sections["loss"] = [10.0, 5.0]
        m.sections["sweep_seconds"] = [0.001, 0.001]
    elif method == "ease":
        m.sections["item_weights"] = [0.0 if i == j else rng.uniform(-1, 1)
                                      for i in range(n_items) for j in range(n_items)]
    elif method == "item_knn":
        nptr, nidx, nsim = [0], [], []
        for i in range(n_items):
            others = [j for j in range(n_items) if j != i]
            for j in rng.sample(others, min(neighbors, len(others))):
                nidx.append(j)
                nsim.append(rng.uniform(0, 1))
            nptr.append(len(nidx))
        m.sections.update(neighbor_ptr=nptr, neighbor_idx=nidx, neighbor_sim=nsim)
    return m.encode()


# ---------------------------------------------------------------------------
# Crafted bad values: name -> a function of a valid value (with length word)
# returning the edited copy.  Every edit but "bad_checksum" and the pure size
# edits recomputes the checksum afterwards.

def _edit(fn, checksum=True):
    def run(buf):
        b = bytearray(buf)
        b = fn(b) or b
        if checksum and len(b) >= HEADER_SIZE:
            fix_checksum(b)
        return b
    return run


def _entry(buf, kind):
    return section_entry(buf, kind)


def _set_off_decreasing(b):
    # offsets 0, a, b, c -> 0, b, a, c: the second text would run backwards
    _, _, _, off, cnt = _entry(b, KIND["user_text_off"])
    o = list(struct.unpack_from("<%dq" % cnt, b, off))
    o[1], o[2] = o[2], o[1]
    struct.pack_into("<%dq" % cnt, b, off, *o)


def _swap_keys(b):
    _, _, _, off, cnt = _entry(b, KIND["item_keys"])
    a, c = struct.unpack_from("<qq", b, off)
    struct.pack_into("<qq", b, off, c, a)


def _dup_keys(b):
    _, _, _, off, _ = _entry(b, KIND["user_keys"])
    a = struct.unpack_from("<q", b, off)[0]
    struct.pack_into("<q", b, off + 8, a)


def _overlap(b):
    # item keys read the bytes of the user keys (same count in the tiny model)
    _, _, _, uoff, ucnt = _entry(b, KIND["user_keys"])
    _, _, _, ioff, icnt = _entry(b, KIND["item_keys"])
    set_entry(b, KIND["item_keys"], offset=uoff + 8 if icnt < ucnt else uoff)


def _overlap_tail(b):
    # the popularity section starts inside the training weights
    _, _, _, woff, wcnt = _entry(b, KIND["seen_weights"])
    set_entry(b, KIND["popularity"], offset=woff + 8 * ((wcnt * 4 // 8) // 2))


def _repeat_kind(b):
    i, _, _, _, _ = _entry(b, KIND["loss"])
    struct.pack_into("<I", b, HEADER_SIZE + i * SECTION_SIZE, KIND["popularity"])


def _unknown_kind(b):
    i, _, _, _, _ = _entry(b, KIND["loss"])
    struct.pack_into("<I", b, HEADER_SIZE + i * SECTION_SIZE, 99)


def _drop_section(b):
    # the table lists one section fewer: the last entry (sweep timings) vanishes
    n = struct.unpack_from("<H", b, OFFSET["n_sections"])[0]
    set_header(b, "n_sections", n - 1)


def _ptr_end(b):
    nu = struct.unpack_from("<q", b, OFFSET["n_users"])[0]
    put_elem(b, KIND["seen_ptr"], nu, struct.unpack_from("<q", b, OFFSET["nnz"])[0] + 1)


def _ptr_decrease(b):
    # offsets 0, 2, 1, ... : the second user's list would run backwards
    nu = struct.unpack_from("<q", b, OFFSET["n_users"])[0]
    _, _, _, off, _ = _entry(b, KIND["seen_ptr"])
    ptr = list(struct.unpack_from("<%dq" % (nu + 1), b, off))
    ptr[1] = ptr[2] + 1 if nu >= 2 else ptr[1]
    struct.pack_into("<%dq" % (nu + 1), b, off, *ptr)


def _ptr_past(b):
    # first user's list claims to run far past the training lists, the rest is intact
    put_elem(b, KIND["seen_ptr"], 1, 1 << 40)


def _ptr_negative(b):
    put_elem(b, KIND["seen_ptr"], 0, -1)


def _item_out_of_range(b):
    ni = struct.unpack_from("<q", b, OFFSET["n_items"])[0]
    put_elem(b, KIND["seen_items"], 0, ni)


def _item_negative(b):
    put_elem(b, KIND["seen_items"], 0, -5)


def _items_unsorted(b):
    # the first user's two training items in descending order
    _, _, _, off, _ = _entry(b, KIND["seen_items"])
    a, c = struct.unpack_from("<ii", b, off)
    struct.pack_into("<ii", b, off, c, a)


BAD = {
    # sizes
    "truncated_header": _edit(lambda b: b[:200], checksum=False),
    "truncated": _edit(lambda b: b[:len(b) - 64], checksum=False),
    "truncated_table": _edit(lambda b: b[:HEADER_SIZE + 30], checksum=False),
    "size_larger": _edit(lambda b: set_header(b, "total_size", len(b) + 8)),
    "size_smaller": _edit(lambda b: set_header(b, "total_size", len(b) - 8)),
    "trailing_bytes": _edit(lambda b: b + b"\0" * 8, checksum=False),
    # header codes
    "bad_magic": _edit(lambda b: b.__setitem__(slice(4, 8), b"AFMX")),
    "version_2": _edit(lambda b: set_header(b, "version", 2)),
    "version_0": _edit(lambda b: set_header(b, "version", 0)),
    "method_0": _edit(lambda b: set_header(b, "method", 0)),
    "method_9": _edit(lambda b: set_header(b, "method", 9)),
    "key_type_9": _edit(lambda b: set_header(b, "key_type", 9)),
    "sections_15": _edit(lambda b: set_header(b, "n_sections", 15)),
    "sections_many": _edit(lambda b: set_header(b, "n_sections", 0xFFFF)),
    "users_0": _edit(lambda b: set_header(b, "n_users", 0)),
    "users_negative": _edit(lambda b: set_header(b, "n_users", -1)),
    "items_huge": _edit(lambda b: set_header(b, "n_items", 1 << 40)),
    "nnz_wrong": _edit(lambda b: set_header(b, "nnz", struct.unpack_from("<q", b, OFFSET["nnz"])[0] + 1)),
    "factors_0": _edit(lambda b: set_header(b, "factors", 0)),
    "factors_2000": _edit(lambda b: set_header(b, "factors", 2000)),
    "factors_negative": _edit(lambda b: set_header(b, "factors", -1)),
    "regularization_nan": _edit(lambda b: set_header(b, "regularization", float("nan"))),
    "epsilon_0": _edit(lambda b: set_header(b, "epsilon", 0.0)),
    "alpha_infinite": _edit(lambda b: set_header(b, "alpha", float("inf"))),
    "fit_seconds_negative": _edit(lambda b: set_header(b, "fit_seconds", -1.0)),
    "solver_7": _edit(lambda b: set_header(b, "solver", 7)),
    "confidence_7": _edit(lambda b: set_header(b, "confidence", 7)),
    # section table
    "offset_misaligned": _edit(lambda b: set_entry(b, KIND["item_keys"], offset=_entry(b, KIND["item_keys"])[3] + 4)),
    "offset_in_header": _edit(lambda b: set_entry(b, KIND["user_keys"], offset=8)),
    "offset_past_end": _edit(lambda b: set_entry(b, KIND["popularity"], offset=align8(len(b)) + 8)),
    "count_past_end": _edit(lambda b: set_entry(b, KIND["seen_weights"], count=len(b))),
    "count_overflow": _edit(lambda b: set_entry(b, KIND["user_factors"], count=1 << 62)),
    "count_wrong": _edit(lambda b: set_entry(b, KIND["popularity"], count=_entry(b, KIND["popularity"])[4] - 1)),
    "elem_size_wrong": _edit(lambda b: set_entry(b, KIND["item_keys"], elem_size=4)),
    "overlap_keys": _edit(_overlap),
    "overlap_partial": _edit(_overlap_tail),
    "kind_repeated": _edit(_repeat_kind),
    "kind_unknown": _edit(_unknown_kind),
    "section_missing": _edit(_drop_section),
    # content
    "user_factor_nan": _edit(lambda b: put_elem(b, KIND["user_factors"], 0, float("nan"))),
    "item_factor_infinite": _edit(lambda b: put_elem(b, KIND["item_factors"], 1, float("-inf"))),
    "item_keys_unsorted": _edit(_swap_keys),
    "user_keys_repeated": _edit(_dup_keys),
    "seen_end_wrong": _edit(_ptr_end),
    "seen_decreasing": _edit(_ptr_decrease),
    "seen_past_end": _edit(_ptr_past),
    "seen_negative": _edit(_ptr_negative),
    "seen_item_out_of_range": _edit(_item_out_of_range),
    "seen_item_negative": _edit(_item_negative),
    "seen_items_unsorted": _edit(_items_unsorted),
    "seen_weight_zero": _edit(lambda b: put_elem(b, KIND["seen_weights"], 0, 0.0)),
    "seen_weight_nan": _edit(lambda b: put_elem(b, KIND["seen_weights"], 0, float("nan"))),
    "popularity_negative": _edit(lambda b: put_elem(b, KIND["popularity"], 0, -1.0)),
    "loss_nan": _edit(lambda b: put_elem(b, KIND["loss"], 0, float("nan"))),
    # checksum (no recomputation: the checksum is what must catch it)
    "bad_checksum": _edit(lambda b: b.__setitem__(len(b) - 1, b[len(b) - 1] ^ 0x40), checksum=False),
    "checksum_zero": _edit(lambda b: set_header(b, "checksum", 0), checksum=False),
}


def _set_fixed(buf, field, value):
    """buf with one header field changed and the checksum made right again."""
    b = bytearray(buf)
    set_header(b, field, value)
    return fix_checksum(b)


def _stray_factors(method):
    """A model of a method without factors that still carries a factor
    section: serving code tests for the section, not the method."""
    def run(buf):
        m = Model(buf)
        m.sections["item_factors"] = [0.5]
        return m.encode()
    return run


def _loss_alone(_):
    """A model of a method that may carry a loss (any may) with a loss but no
    sweep timings: the validator read the timings through a null pointer
    (found by the fuzzer)."""
    m = Model(synth("popularity", 3, 4))
    m.sections["loss"] = [1.0, 2.0]
    return m.encode()


def _knn_edit(fn):
    def run(_):
        b = synth("item_knn", 4, 5)
        fn(b)
        return fix_checksum(b)
    return run


def _ease_edit(fn):
    def run(_):
        b = synth("ease", 4, 5)
        fn(b)
        return fix_checksum(b)
    return run


def _list_overrun(method):
    """A value whose first CSR list (training items, or item_knn neighbours)
    claims to run past the end of its index section, while every element it
    covers inside the section is in range and in order, and the index section
    is the last bytes of the value.  Rejected or not, a validator that walks
    the list before checking its end against the section reads past the
    value."""
    def run(_):
        m = Model(synth(method, 2, 4 if method == "implicit_als" else 3))
        if method == "implicit_als":
            # user 0 bought items 0 and 1, user 1 items 2 and 3: one ascending run
            m.sections.update(seen_ptr=[0, 2, 4], seen_items=[0, 1, 2, 3],
                              seen_weights=[1.0, 2.0, 1.0, 3.0])
            m.h["nnz"] = 4
            b = m.encode(last=(KIND["seen_weights"], KIND["seen_items"]))
            put_elem(b, KIND["seen_ptr"], 1, 5)
        else:
            # neighbours: item 0 -> 1, 2; item 1 -> 2; item 2 -> 1 (none is item 0)
            m.sections.update(neighbor_ptr=[0, 2, 3, 4], neighbor_idx=[1, 2, 2, 1],
                              neighbor_sim=[0.5, 0.25, 0.5, 0.5])
            b = m.encode(last=(KIND["neighbor_sim"], KIND["neighbor_idx"]))
            put_elem(b, KIND["neighbor_ptr"], 1, 6)
        return fix_checksum(b)
    return run


def _text_edit(fn, last=()):
    """An edit of a synthesized implicit_als model with text keys."""
    def run(_):
        b = synth("implicit_als", 3, 4, text=True)
        if last:
            b = Model(b).encode(last=last)
        fn(b)
        return fix_checksum(b)
    return run


def _text_overrun(b):
    # the first user's text claims to run 50 bytes past the text section, the last offset is right
    _, _, _, _, n = _entry(b, KIND["user_text"])
    put_elem(b, KIND["user_text_off"], 1, n + 50)


def _text_into_bigint(_):
    m = Model(synth("implicit_als", 3, 4))
    t = synth("implicit_als", 3, 4, text=True)
    mt = Model(t)
    for k in ("user_text_off", "user_text", "item_text_off", "item_text"):
        m.sections[k] = mt.sections[k]
    return m.encode()


# Cases built from a synthesized model of another method (the argument is ignored).
BAD_OTHER = {
    "text_overrun": _text_edit(_text_overrun, last=(KIND["user_text"],)),
    "text_hash_mismatch": _text_edit(lambda b: put_elem(b, KIND["item_text"], 0, ord("X"))),
    "text_off_decreasing": _text_edit(_set_off_decreasing),
    "text_off_end_wrong": _text_edit(lambda b: put_elem(b, KIND["item_text_off"], 4,
                                                        _entry(b, KIND["item_text"])[4] - 1)),
    "text_off_missing": _text_edit(lambda b: set_entry(b, KIND["user_text_off"], count=3)),
    "text_sections_in_bigint_model": _text_into_bigint,
    "text_keys_unsorted": _text_edit(_swap_keys),
    "seen_overrun": _list_overrun("implicit_als"),
    "knn_overrun": _list_overrun("item_knn"),
    "knn_self_neighbour": _knn_edit(lambda b: put_elem(b, KIND["neighbor_idx"], 0, 0)),
    "knn_index_out_of_range": _knn_edit(lambda b: put_elem(b, KIND["neighbor_idx"], 0, 5)),
    "knn_sim_nan": _knn_edit(lambda b: put_elem(b, KIND["neighbor_sim"], 0, float("nan"))),
    "knn_ptr_end": _knn_edit(lambda b: put_elem(b, KIND["neighbor_ptr"], 5, 3)),
    "knn_ptr_past_end": _knn_edit(lambda b: put_elem(b, KIND["neighbor_ptr"], 1, 1 << 40)),
    "knn_count_mismatch": _knn_edit(lambda b: set_entry(b, KIND["neighbor_sim"], count=_entry(b, KIND["neighbor_sim"])[4] - 1)),
    "ease_weight_nan": _ease_edit(lambda b: put_elem(b, KIND["item_weights"], 3, float("nan"))),
    "ease_weights_short": _ease_edit(lambda b: set_entry(b, KIND["item_weights"], count=24)),
    "popularity_with_factors": lambda _: _stray_factors("popularity")(synth("popularity", 3, 4)),
    "popularity_factors_huge": lambda _: _set_fixed(synth("popularity", 3, 4), "factors", 0x7FFFFFFF),
    "loss_without_sweep_seconds": _loss_alone,
}

# The cases of sql/corrupt.sql, in its order: (case name, what it shows).
SQL_CASES = [
    ("truncated", "truncated: the header's size and the value's disagree"),
    ("truncated_header", "truncated inside the header"),
    ("size_larger", "the header claims more bytes than there are"),
    ("offset_in_header", "a section that starts inside the header"),
    ("offset_misaligned", "a section that starts off an 8-byte boundary"),
    ("offset_past_end", "a section that starts past the end"),
    ("count_past_end", "a section longer than the value"),
    ("count_wrong", "a section with the wrong element count"),
    ("overlap_keys", "two sections over the same bytes"),
    ("kind_repeated", "a section kind listed twice"),
    ("section_missing", "a required section missing"),
    ("user_factor_nan", "NaN in the user factors"),
    ("item_factor_infinite", "an infinite item factor"),
    ("item_keys_unsorted", "item keys out of order"),
    ("user_keys_repeated", "a user key listed twice"),
    ("seen_end_wrong", "training-list offsets that do not end at the interaction count"),
    ("seen_item_out_of_range", "a training item index out of range"),
    ("seen_weight_nan", "a NaN training weight"),
    ("bad_checksum", "one byte changed, checksum left as it was"),
    ("version_2", "an unknown format version"),
    ("method_9", "an unknown method code"),
    ("key_type_9", "an unknown key type"),
    ("popularity_with_factors", "a popularity model carrying a factor section"),
    ("popularity_factors_huge", "a popularity model whose header claims 2^31-1 factors"),
    ("text_hash_mismatch", "a text key whose bytes do not match its stored hash"),
]


# ---------------------------------------------------------------------------
# Talking to the extension.

TINY_FIT = """
SELECT decode(affinity.fit(u, i, w, {opts})::text, 'base64')
FROM (VALUES (101::bigint, 7::bigint, 1::real), (101, 9, 2), (102, 9, 1), (103, 7, 3)) v(u, i, w)
"""

FITS = [
    ("als_tiny", TINY_FIT, '{"factors": 2, "iterations": 2, "threads": 1}'),
    ("popularity_tiny", TINY_FIT, '{"method": "popularity"}'),
    ("ease_tiny", TINY_FIT, '{"method": "ease"}'),
    ("item_knn_tiny", TINY_FIT, '{"method": "item_knn", "neighbors": 1}'),
    ("als_text_tiny", """
SELECT decode(affinity.fit(u, i, w, {opts})::text, 'base64')
FROM (VALUES ('ana'::text, 'SKU-7'::text, 1::real), ('ana', 'SKU-9', 2), ('bo', 'SKU-9', 1),
             ('\u00e7a', '', 3)) v(u, i, w)""", '{"factors": 2, "iterations": 2, "threads": 1}'),
    ("item_knn_text", """
SELECT decode(affinity.fit(u::text, i::text, 1, {opts})::text, 'base64')
FROM generate_series(1, 12) u, generate_series(1, 6) i WHERE (u + i) % 3 = 0""",
     '{"method": "item_knn", "neighbors": 2}'),
    ("als_one", """SELECT decode(affinity.fit(5, 6, 1, {opts})::text, 'base64')""",
     '{"factors": 1, "iterations": 1, "threads": 1}'),
    ("als_cholesky", """
SELECT decode(affinity.fit(u, i, (1 + (u * i) % 4)::real, {opts})::text, 'base64')
FROM generate_series(1, 40) u, generate_series(1, 15) i WHERE (u + i * 3) % 4 = 0""",
     '{"factors": 4, "iterations": 3, "solver": "cholesky", "confidence": "linear", "threads": 1}'),
    ("als_extreme_keys", """
SELECT decode(affinity.fit(u, i, 1, {opts})::text, 'base64')
FROM (VALUES ('-9223372036854775808'::bigint, '9223372036854775807'::bigint),
             ('9223372036854775807', '-9223372036854775808'), (0, 0)) v(u, i)""",
     '{"factors": 3, "iterations": 2, "threads": 1}'),
    ("profiles_words", """
SELECT decode(affinity.item_profiles(i, 'w' || (i * f) % 7, f::real, {opts})::text, 'base64')
FROM generate_series(1, 9) i, generate_series(1, 3) f""", '{"normalization": "tfidf"}'),
    ("profiles_text", """
SELECT decode(affinity.item_profiles('SKU-' || i, 'w' || (i + f) % 5, 1, {opts})::text, 'base64')
FROM generate_series(1, 6) i, generate_series(1, 2) f""", '{"min_document_frequency": 2}'),
    ("profiles_vectors", """
SELECT decode(affinity.item_profiles(i, ARRAY[i, 1 - i, i % 3]::real[], {opts})::text, 'base64')
FROM generate_series(0, 7) i""", '{"normalization": "none"}'),
    ("content_words", """
SELECT decode(affinity.fit(u, i, w, {opts},
                           (SELECT affinity.item_profiles(i, 'w' || (i * f) % 5, 1)
                            FROM generate_series(1, 8) i, generate_series(1, 2) f))::text, 'base64')
FROM (VALUES (1::bigint, 1::bigint, 1::real), (1, 2, 2), (2, 2, 1), (2, 5, 1), (3, 7, 4)) v(u, i, w)""",
     '{"method": "content"}'),
    ("content_vectors_text", """
SELECT decode(affinity.fit(u, i, 1, {opts},
                           (SELECT affinity.item_profiles('SKU-' || i, ARRAY[i, 2 - i, 1]::real[])
                            FROM generate_series(0, 5) i))::text, 'base64')
FROM (VALUES ('ana'::text, 'SKU-1'::text), ('ana', 'SKU-3'), ('bo', 'SKU-4')) v(u, i)""",
     '{"method": "content", "regularization": 0.5}'),
    ("sequences_rules", """
SELECT decode(affinity.fit_sequences(s, (s * p) % 7, p, {opts})::text, 'base64')
FROM generate_series(1, 9) s, generate_series(1, 4) p""", '{"window": 2, "successors": 3}'),
    ("sequences_text", """
SELECT decode(affinity.fit_sequences('v' || s, 'SKU-' || (s + p) % 5, p / 2, {opts})::text, 'base64')
FROM generate_series(1, 6) s, generate_series(1, 5) p""", '{"window": 1}'),
    ("popularity_wide", """
SELECT decode(affinity.fit(u, i, 1, {opts})::text, 'base64')
FROM generate_series(1, 30) u, generate_series(1, 30) i WHERE (u * i) % 7 = 1""",
     '{"method": "popularity"}'),
]


def connect():
    import psycopg2
    conn = psycopg2.connect("")
    conn.autocommit = True
    with conn.cursor() as cur:
        cur.execute("CREATE EXTENSION IF NOT EXISTS affinity")
    return conn


def fitted_models(conn):
    """name -> payload of each model the extension can fit here (a method
    this build does not offer yet is left out and named on stderr)."""
    import psycopg2
    out = {}
    with conn.cursor() as cur:
        for name, sql, opts in FITS:
            try:
                cur.execute(sql.replace("{opts}", "'%s'::jsonb" % opts))
                out[name] = bytes(cur.fetchone()[0])
            except psycopg2.Error as e:
                sys.stderr.write("seeds: %s not fitted: %s\n" % (name, str(e).splitlines()[0]))
    return out


def selftest(conn, payloads):
    """The Python checksum equals the stored one of every fitted model, the
    stored one equals describe()'s, and decode + encode reproduces the bytes
    of a fitted model exactly (so edits change only what they mean to)."""
    if not payloads:
        raise SystemExit("seeds: the extension fitted no model; nothing to test the checksum on")
    with conn.cursor() as cur:
        for name, p in payloads.items():
            buf = b"\0\0\0\0" + p
            stored = struct.unpack_from("<Q", buf, OFFSET["checksum"])[0]
            mine = model_checksum(buf)
            if mine != stored:
                raise SystemExit("seeds: checksum reimplementation differs on %s: %016x vs %016x"
                                 % (name, mine, stored))
            cur.execute("SELECT affinity.describe(%s::affinity.model)->>'checksum'",
                        (base64.b64encode(p).decode(),))
            if cur.fetchone()[0] != "%016x" % stored:
                raise SystemExit("seeds: describe() reports another checksum for %s" % name)
            again = bytes(Model(buf).encode())[4:]
            if again != p:
                raise SystemExit("seeds: re-encoding %s does not reproduce its bytes" % name)
    return len(payloads)


def bad_values(base):
    """name -> payload of every crafted bad value, edited from base (a payload)."""
    out = {}
    for name, fn in BAD.items():
        try:
            out[name] = bytes(fn(bytearray(b"\0\0\0\0" + base)))[4:]
        except KeyError:
            pass            # the edit needs a section this method has not
    for name, fn in BAD_OTHER.items():
        out[name] = bytes(fn(None))[4:]
    return out


def cast_result(cur, payload):
    """(True, None) when the server accepts the value as text input, else
    (False, (sqlstate, message))."""
    import psycopg2
    try:
        cur.execute("SELECT %s::affinity.model IS NOT NULL", (base64.b64encode(payload).decode(),))
        cur.fetchone()
        return True, None
    except psycopg2.Error as e:
        return False, (e.pgcode, "%s: %s" % (e.diag.message_primary, e.diag.message_detail))


# ---------------------------------------------------------------------------
# Commands

def cmd_corpus(outdir):
    conn = connect()
    fitted = fitted_models(conn)
    n = selftest(conn, fitted)
    os.makedirs(outdir, exist_ok=True)
    valid = dict(("fit_" + k, v) for k, v in fitted.items())
    for method in METHOD:
        for nu, ni in ((1, 1), (3, 4), (6, 9)):
            valid["synth_%s_%dx%d" % (method, nu, ni)] = bytes(synth(method, nu, ni))[4:]
        valid["synth_%s_text_3x4" % method] = bytes(synth(method, 3, 4, text=True))[4:]
    bad = bad_values(fitted["als_tiny"])
    if "popularity_tiny" in fitted:
        for name, p in bad_values(fitted["popularity_tiny"]).items():
            bad["pop_" + name] = p
    for name, p in list(valid.items()) + [("bad_" + k, v) for k, v in bad.items()]:
        with open(os.path.join(outdir, name), "wb") as f:
            f.write(p)
    print("seeds: checksum reimplementation agrees with %d fitted models" % n)
    print("seeds: %d valid (%d fitted, %d synthesized) and %d crafted bad values in %s"
          % (len(valid), len(fitted), len(valid) - len(fitted), len(bad), outdir))


def cmd_check():
    """Every crafted bad value must be refused by text input, with SQLSTATE
    22P03 (invalid_binary_representation); every synthesized valid model
    must be accepted."""
    conn = connect()
    fitted = fitted_models(conn)
    selftest(conn, fitted)
    bad = bad_values(fitted["als_tiny"])
    problems = 0
    with conn.cursor() as cur:
        for method in METHOD:
            for text in (False, True):
                ok, why = cast_result(cur, bytes(synth(method, 3, 4, text=text))[4:])
                if not ok:
                    problems += 1
                    print("REFUSED valid synthesized %s model%s: %s"
                          % (method, " with text keys" if text else "", why))
        for name, p in bad.items():
            ok, why = cast_result(cur, p)
            if ok:
                problems += 1
                print("ACCEPTED bad value %s" % name)
            elif why[0] != "22P03":
                problems += 1
                print("WRONG SQLSTATE for %s: %s %s" % (name, why[0], why[1]))
            else:
                print("rejected %-26s %s" % (name, why[1]))
    print("seeds check: %d bad values, %d problem(s)" % (len(bad), problems))
    return 1 if problems else 0


def cmd_literals():
    conn = connect()
    fitted = fitted_models(conn)
    selftest(conn, fitted)
    base = fitted["als_tiny"]
    bad = bad_values(base)
    print("valid\t" + base64.b64encode(base).decode())
    for name, _ in SQL_CASES:
        print("%s\t%s" % (name, base64.b64encode(bad[name]).decode()))


def main(argv):
    if len(argv) >= 2 and argv[1] == "corpus" and len(argv) == 3:
        cmd_corpus(argv[2])
        return 0
    if len(argv) == 2 and argv[1] == "check":
        return cmd_check()
    if len(argv) == 2 and argv[1] == "literals":
        cmd_literals()
        return 0
    sys.stderr.write(__doc__)
    return 2


if __name__ == "__main__":
    sys.exit(main(sys.argv))
