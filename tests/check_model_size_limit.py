"""A model at the size limit has a text form; one past it is refused (long mode only).

pg_dump reads every value as text, so a model whose text form cannot be
made cannot be dumped.  The largest value affinity builds or accepts is
AFF_MAX_MODEL_BYTES (720 MiB, 754,974,720 bytes): its base64 text, 4/3 of
that, is 960 MiB, under PostgreSQL's 1 GB string limit.  The values here are
written by tests/digest/big_value.c, which lays out a popularity model of
about 31.5 million customers with the engine's own writer (exact sizes, a
real checksum and content digest), since a fit of that size would take far
longer:

* a value of exactly the limit goes in through COPY FROM (text), comes out
  through COPY TO with the same text (so the same bytes), and reports the
  fingerprint it was written with;
* a value 8 bytes over the limit is refused by COPY FROM with SQLSTATE
  54000 (program_limit_exceeded) and its size in the detail.

Heavy (about 3 GB of memory in the server and 2 GB here, a minute or two):
runs only when AFFINITY_TEST_LONG is set (scripts/test --long).  Prints the
sizes, seconds and the server's peak memory (VmHWM of the backend).
"""

import base64
import hashlib
import os
import subprocess
import time

import psycopg2

from _common import build_engine_program, REPO_DIR, Checker, connect, fail, skip

LIMIT = 720 * 1024 * 1024


def build_writer(tmp):
    exe = os.path.join(tmp, "big_value")
    rc, out = build_engine_program(exe, "tests/digest/big_value.c", ())
    if rc != 0:
        fail("cannot build big_value: " + out[-2000:])
    return exe


def write_value(exe, size, path):
    t = time.time()
    out = subprocess.run([exe, str(size), path], stdout=subprocess.PIPE, universal_newlines=True,
                         check=True).stdout.split()
    users, items, sweeps, fp = out
    print("wrote %d bytes (%s customers, %s items, %s sweeps) in %.1f s"
          % (size, users, items, sweeps, time.time() - t))
    return fp


def copy_file(tmp, label, path):
    """A COPY text file with one row (label, base64 of the file); returns its path."""
    with open(path, "rb") as f:
        text = base64.b64encode(f.read())
    out = os.path.join(tmp, label + ".copy")
    with open(out, "wb") as f:
        f.write(label.encode() + b"\t" + text + b"\n")
    return out, hashlib.sha256(text).hexdigest(), len(text)


def peak_kb(pid):
    with open("/proc/%d/status" % pid) as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    return 0


def main():
    if not os.environ.get("AFFINITY_TEST_LONG"):
        skip("heavy test at the 720 MB model limit; run scripts/test --long (AFFINITY_TEST_LONG=1)")
    c = Checker("check_model_size_limit")
    tmp = os.environ.get("AFFINITY_TEST_TMP") or "/tmp"
    exe = build_writer(tmp)
    conn = connect()
    cur = conn.cursor()
    cur.execute("SELECT pg_backend_pid()")
    pid = cur.fetchone()[0]
    cur.execute("DROP TABLE IF EXISTS big_models")
    cur.execute("CREATE TABLE big_models (label text, model affinity.model)")

    under = os.path.join(tmp, "under.bin")
    fp = write_value(exe, LIMIT, under)
    cfile, text_sha, text_len = copy_file(tmp, "under", under)
    os.unlink(under)
    print("text form: %d characters" % text_len)
    t = time.time()
    with open(cfile, "rb") as f:
        cur.copy_expert("COPY big_models FROM STDIN", f)
    print("COPY FROM: %.1f s" % (time.time() - t))
    os.unlink(cfile)
    cur.execute("""SELECT affinity.describe(model)->>'fingerprint', pg_column_size(model)
                   FROM big_models""")
    got_fp, stored = cur.fetchone()
    c.check(got_fp == fp, "the value at the limit (%d bytes) is accepted with its fingerprint %s"
            % (LIMIT, fp), "got %s" % got_fp)
    print("stored size: %d bytes" % stored)
    t = time.time()
    out = os.path.join(tmp, "out.copy")
    with open(out, "wb") as f:
        cur.copy_expert("COPY (SELECT model FROM big_models) TO STDOUT", f)
    print("COPY TO: %.1f s" % (time.time() - t))
    h = hashlib.sha256()
    with open(out, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 24), b""):
            h.update(chunk.rstrip(b"\n"))
    n_out = os.path.getsize(out) - 1
    os.unlink(out)
    c.check(h.hexdigest() == text_sha and n_out == text_len,
            "COPY TO gives the same text back (%d characters)" % n_out)
    cur.execute("DELETE FROM big_models")

    over = os.path.join(tmp, "over.bin")
    write_value(exe, LIMIT + 8, over)
    cfile, _, _ = copy_file(tmp, "over", over)
    os.unlink(over)
    try:
        with open(cfile, "rb") as f:
            cur.copy_expert("COPY big_models FROM STDIN", f)
        c.check(False, "a value 8 bytes over the limit is refused")
    except psycopg2.Error as e:
        c.check(e.pgcode == "54000" and str(LIMIT + 8) in (e.diag.message_detail or ""),
                "a value 8 bytes over the limit is refused", "%s: %s %s"
                % (e.pgcode, e.diag.message_primary, e.diag.message_detail))
    os.unlink(cfile)
    print("backend peak memory (VmHWM): %d MB" % (peak_kb(pid) // 1024))
    cur.execute("DROP TABLE big_models")
    c.finish()


if __name__ == "__main__":
    main()
