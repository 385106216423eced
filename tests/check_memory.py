"""Memory stays flat in a backend that serves and fits again and again.

1. Serving: one query calls top_items 100,000 times through a LATERAL join
   (SELECT count(*) FROM m, generate_series(1, 100000) u,
    affinity.top_items(m.model, u % 3000, 10)), and is run twice in the same
   backend.  The backend's memory is read from /proc/<pid>/status (Linux
   proc(5)): VmRSS (resident), RssAnon (its private, heap part) and VmHWM
   (peak resident), before, after the first run and after the second.
   After the first run every cache is warm and every allocator arena has
   grown to what the query needs, so the second run must not add more than
   RUN_BOUND bytes to VmRSS or RssAnon.  The bound: a leak of one small
   allocation per call (a 16-byte header plus a few bytes, as palloc makes)
   over 100,000 calls is about 2.4 MB, so 2 MB catches any per-call leak of
   more than about 20 bytes, while leaving room for the page-granular noise
   of glibc's allocator (it trims and re-grows its heap in 128 kB steps).
   The peak during one run (VmHWM) must stay within PEAK_BOUND (16 MB, 168
   bytes a call) of the resident size before it: memory kept per call until
   the end of the query makes a LATERAL join over all customers (the
   README's way to list top items for many customers) grow with the number
   of customers.  For scale, the same query shape with two of PostgreSQL's
   own materializing set-returning functions is measured and printed:
   pg_options_to_table, which builds its result from the expected tuple
   descriptor, and jsonb_each, which asks get_call_result_type for it on
   every call (that lookup's allocations stay in the per-query context).
2. The same through pg_backend_memory_contexts (PostgreSQL's own account of
   its memory contexts): the total after the second run equals the total
   after the first, within CONTEXT_BOUND.
3. Fitting: five identical fits in a row in one backend.  After the first
   (which loads OpenBLAS's buffers and starts its threads), RssAnon and the
   context total must not grow by more than FIT_BOUND over the next four.
"""

import os

from _common import Checker, connect, drop_schema, fresh_schema, reset_peak

RUN_BOUND = 2 * 1024 * 1024
PEAK_BOUND = 16 * 1024 * 1024
CONTEXT_BOUND = 64 * 1024
FIT_BOUND = 4 * 1024 * 1024

SERVE = """SELECT count(*) FROM mem_models m, generate_series(1, 100000) u,
                  affinity.top_items(m.model, u % 3000, 10)"""
FIT = """SELECT affinity.fit(user_id, item_id, weight,
                             '{"factors": 16, "iterations": 3, "seed": 7}') IS NULL FROM mem_buys"""

# Built-in set-returning functions called 100,000 times in the same shape.
REFERENCES = [
    ("pg_options_to_table", "SELECT count(*) FROM generate_series(1, 100000) u, "
                            "pg_options_to_table(array['a=' || u, 'b=1'])"),
    ("jsonb_each", "SELECT count(*) FROM generate_series(1, 100000) u, "
                   "jsonb_each(jsonb_build_object('a', u, 'b', 2))"),
]


def status(pid):
    """VmRSS, RssAnon, VmHWM of a process in bytes (proc(5): kB values)."""
    out = {}
    with open("/proc/%d/status" % pid) as f:
        for line in f:
            key, _, rest = line.partition(":")
            if key in ("VmRSS", "RssAnon", "VmHWM"):
                out[key] = int(rest.split()[0]) * 1024
    return out


def contexts(cur):
    cur.execute("SELECT sum(total_bytes), sum(used_bytes), count(*) FROM pg_backend_memory_contexts")
    total, used, n = cur.fetchone()
    return int(total), int(used), int(n)


def mb(x):
    return "%.2f MB" % (x / 1048576.0)


def main():
    c = Checker("check_memory")
    conn = connect()
    cur = conn.cursor()
    fresh_schema(cur, "mem")
    # 3,000 users (ids 0..2999, so that u % 3000 always names a known user),
    # 400 items, 12 purchases each
    cur.execute("""CREATE TABLE mem_buys AS
                   SELECT u::bigint AS user_id, ((u * 37 + j * 11) % 400)::bigint AS item_id,
                          (1 + (u + j) % 4)::real AS weight
                   FROM generate_series(0, 2999) u, generate_series(1, 12) j""")
    cur.execute("""CREATE TABLE mem_models AS
                   SELECT affinity.fit(user_id, item_id, weight,
                                       '{"factors": 16, "iterations": 3}') AS model
                   FROM mem_buys""")
    cur.execute("SELECT pg_backend_pid()")
    pid = cur.fetchone()[0]
    if not os.path.exists("/proc/%d/status" % pid):
        c.check(False, "backend's /proc entry readable", "no /proc/%d/status: is the server on this machine?" % pid)
        c.finish()

    # JIT would map LLVM's code into the backend in the middle of the first run
    cur.execute("SET jit = off")
    # one short call first, so that the library is loaded and the baseline is the backend's own
    cur.execute("SELECT count(*) FROM mem_models m, affinity.top_items(m.model, 1, 10)")
    references = []
    for name, q in REFERENCES:
        reset_peak(pid)
        before = status(pid)
        cur.execute(q)
        cur.fetchone()
        references.append((name, status(pid)["VmHWM"] - before["VmRSS"]))
    s0 = status(pid)
    x0 = contexts(cur)
    peak_reset = reset_peak(pid)
    cur.execute(SERVE)
    rows1 = cur.fetchone()[0]
    s1 = status(pid)
    x1 = contexts(cur)
    reset_peak(pid)
    cur.execute(SERVE)
    rows2 = cur.fetchone()[0]
    s2 = status(pid)
    x2 = contexts(cur)

    c.check(rows1 == rows2 == 1000000, "the serving query returns 10 rows per call",
            "%d and %d rows" % (rows1, rows2))
    print("backend %d   before / after run 1 / after run 2" % pid)
    for key in ("VmRSS", "RssAnon", "VmHWM"):
        print("  %-8s %10s %10s %10s" % (key, mb(s0[key]), mb(s1[key]), mb(s2[key])))
    print("  contexts %10s %10s %10s  (total bytes; %d / %d / %d contexts)"
          % (mb(x0[0]), mb(x1[0]), mb(x2[0]), x0[2], x1[2], x2[2]))
    for key in ("VmRSS", "RssAnon"):
        grow = s2[key] - s1[key]
        c.check(grow <= RUN_BOUND, "%s flat over the second run of 100,000 calls" % key,
                "%+d bytes (bound %s)" % (grow, mb(RUN_BOUND)))
    if peak_reset:
        for name, before, after in (("first", s0, s1), ("second", s1, s2)):
            c.check(after["VmHWM"] - before["VmRSS"] <= PEAK_BOUND,
                    "peak during the %s run within %s of the resident size before it"
                    % (name, mb(PEAK_BOUND)),
                    "peak %s, before %s" % (mb(after["VmHWM"]), mb(before["VmRSS"])))
        for name, grow in references:
            print("  reference: 100,000 calls of %s: peak %s over the resident size before"
                  % (name, mb(grow)))
    else:
        print("note: cannot reset VmHWM here; the peak check is left out")
    c.check(abs(x2[0] - x1[0]) <= CONTEXT_BOUND,
            "memory contexts: same total after the second run as after the first",
            "%+d bytes (bound %d)" % (x2[0] - x1[0], CONTEXT_BOUND))

    # fits
    anon, ctx = [], []
    for _ in range(5):
        cur.execute(FIT)
        cur.fetchone()
        anon.append(status(pid)["RssAnon"])
        ctx.append(contexts(cur)[0])
    print("fits: RssAnon after each: %s" % ", ".join(mb(a) for a in anon))
    print("fits: context total after each: %s" % ", ".join(mb(a) for a in ctx))
    c.check(max(anon[1:]) - anon[0] <= FIT_BOUND,
            "RssAnon flat over fits 2-5 (after the first)",
            "%+d bytes over the first (bound %s)" % (max(anon[1:]) - anon[0], mb(FIT_BOUND)))
    c.check(max(ctx[1:]) - ctx[0] <= CONTEXT_BOUND,
            "memory contexts flat over fits 2-5",
            "%+d bytes over the first (bound %d)" % (max(ctx[1:]) - ctx[0], CONTEXT_BOUND))

    drop_schema(cur, "mem")
    c.finish()


if __name__ == "__main__":
    main()
