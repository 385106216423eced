"""affinity.max_fit_memory bounds a fit as its rows arrive, and the peak a
model reports is what the backend really used.

The backend's memory is read from /proc/<pid>/status (Linux proc(5)): VmRSS
before a statement, and VmHWM (peak resident) after it, with the peak reset
just before (writing 5 to /proc/<pid>/clear_refs).  Each statement runs
once first so that the library, OpenBLAS's buffers and the table's pages
are already resident; the growth measured is the fit's own.

1. 200 text keys of 1 MB under a 16 MB limit: refused with
   PROGRAM_LIMIT_EXCEEDED (the detail names the text keys) before the
   backend grows by more than LIMIT_SLACK over the limit.  Version 1.1
   counted no text: the fit passed and the backend grew by 573 MB.
2. 3,000,000 bigint rows under a 32 MB limit: refused when the row array
   next fills after the row that takes the estimate over the limit, so the
   backend grows by at most the limit plus LIMIT_SLACK (1.1 collected every
   row first: +100 MB).
3. describe()'s peak_memory_bytes agrees with the measured growth of a
   serial fit of 2,000,000 rows (bigint, popularity and implicit_als) and
   of 400,000 rows with text keys, within PEAK_RTOL of the measurement plus
   PEAK_SLACK (measured: 0.4-0.9 %; the slack covers the executor's own memory and glibc's page
   granularity).  Each runs in a backend of its own after one small fit:
   memory an earlier large fit freed can stay resident in glibc's heap and
   hide the next fit's growth.
"""

import os

import psycopg2

from _common import Checker, connect, drop_schema, fresh_schema, reset_peak

MB = 1024 * 1024
LIMIT_SLACK = 8 * MB
PEAK_RTOL = 0.03
PEAK_SLACK = 2 * MB


def status(pid):
    out = {}
    with open("/proc/%d/status" % pid) as f:
        for line in f:
            key, _, rest = line.partition(":")
            if key in ("VmRSS", "VmHWM"):
                out[key] = int(rest.split()[0]) * 1024
    return out


def growth(cur, pid, sql, args=None):
    """(result or exception, peak growth in bytes) of one statement."""
    before = status(pid)["VmRSS"]
    reset_peak(pid)
    try:
        cur.execute(sql, args)
        out = cur.fetchone()[0]
    except psycopg2.Error as e:
        out = e
    return out, status(pid)["VmHWM"] - before


def main():
    c = Checker("check_fit_memory")
    conn = connect()
    conn.autocommit = True
    cur = conn.cursor()
    fresh_schema(cur, "fm")
    cur.execute("SELECT pg_backend_pid()")
    pid = cur.fetchone()[0]
    if not os.path.exists("/proc/%d/status" % pid) or not reset_peak(pid):
        c.check(False, "backend's /proc entry readable and its peak resettable", "pid %d" % pid)
        c.finish()
    cur.execute("SET jit = off")
    cur.execute("SET max_parallel_workers_per_gather = 0")
    cur.execute("""CREATE TABLE fm_rows AS
                   SELECT (hashint4(g) & 65535)::bigint AS u, (hashint4(g * 7 + 1) & 8191)::bigint AS i,
                          (1 + g % 5)::real AS w
                   FROM generate_series(1, 3000000) g""")
    cur.execute("""SELECT affinity.fit(u, i, w, '{"factors": 16, "iterations": 2}') IS NULL
                   FROM fm_rows WHERE u < 200""")
    cur.fetchone()

    # 1. long text keys
    cur.execute("SET affinity.max_fit_memory = 16")
    texts = """SELECT affinity.fit(repeat(chr(65 + g % 26), 1048576 - g), 'sku', 1)
               IS NULL FROM generate_series(1, 200) g"""
    growth(cur, pid, texts)
    out, grew = growth(cur, pid, texts)
    refused = isinstance(out, psycopg2.Error) and out.pgcode == "54000"
    c.check(refused and "text keys" in (out.diag.message_detail or ""),
            "200 text keys of 1 MB are refused under a 16 MB limit, naming the text keys",
            str(out).strip().replace("\n", " | ")[:300])
    c.check(grew <= 16 * MB + LIMIT_SLACK, "the backend grows by at most the limit + %d MB before"
            % (LIMIT_SLACK // MB), "+%.1f MB" % (grew / MB))

    # 2. many bigint rows
    cur.execute("SET affinity.max_fit_memory = 32")
    rows = "SELECT affinity.fit(u, i, w) IS NULL FROM fm_rows"
    growth(cur, pid, rows)
    out, grew = growth(cur, pid, rows)
    refused = isinstance(out, psycopg2.Error) and out.pgcode == "54000"
    c.check(refused, "3,000,000 rows are refused under a 32 MB limit", str(out).strip()[:200])
    c.check(grew <= 32 * MB + LIMIT_SLACK, "the backend grows by at most the limit + %d MB before"
            % (LIMIT_SLACK // MB), "+%.1f MB" % (grew / MB))
    cur.execute("RESET affinity.max_fit_memory")

    # 3. the reported peak against the measured one
    cases = [
        ("bigint popularity, 2M rows", """SELECT (affinity.describe(affinity.fit(u, i, w,
             '{"method": "popularity"}'))->>'peak_memory_bytes')::bigint FROM fm_rows WHERE u < 43691"""),
        ("bigint implicit_als, 2M rows", """SELECT (affinity.describe(affinity.fit(u, i, w,
             '{"factors": 16, "iterations": 2}'))->>'peak_memory_bytes')::bigint FROM fm_rows WHERE u < 43691"""),
        ("text popularity, 400k rows", """SELECT (affinity.describe(affinity.fit('customer-' || u, 'sku-' || i, w,
             '{"method": "popularity"}'))->>'peak_memory_bytes')::bigint FROM fm_rows WHERE u < 8738"""),
    ]
    for name, sql in cases:
        # a backend of its own: memory a previous fit freed may stay resident
        # in the allocator and hide the next fit's growth
        conn2 = connect()
        conn2.autocommit = True
        cur2 = conn2.cursor()
        cur2.execute("SET search_path = fm, public")
        cur2.execute("SET jit = off")
        cur2.execute("SET max_parallel_workers_per_gather = 0")
        cur2.execute("SELECT pg_backend_pid()")
        pid2 = cur2.fetchone()[0]
        cur2.execute("""SELECT affinity.fit(u, i, w, '{"factors": 16, "iterations": 2}') IS NULL,
                               count(*) FROM fm_rows WHERE u < 200""")
        cur2.execute("SELECT count(*) FROM fm_rows")
        reported, grew = growth(cur2, pid2, sql)
        conn2.close()
        if isinstance(reported, Exception):
            c.check(False, "%s: fits" % name, str(reported).strip())
            continue
        off = abs(reported - grew)
        c.check(off <= PEAK_RTOL * grew + PEAK_SLACK,
                "%s: reported peak agrees with /proc within %.0f %% + %d MB"
                % (name, PEAK_RTOL * 100, PEAK_SLACK // MB),
                "reported %.1f MB, measured %.1f MB (%+.1f %%)"
                % (reported / MB, grew / MB, 100.0 * (reported - grew) / max(grew, 1)))
    drop_schema(cur, "fm")
    c.finish()


if __name__ == "__main__":
    main()
