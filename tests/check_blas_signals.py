"""OpenBLAS's pool threads in a backend have every signal blocked.

PostgreSQL signals a backend (cancel, terminate, latch wake-ups, timeouts)
with process-directed signals, which the kernel may hand to any thread that
does not block them; its handlers must run on the backend's own thread.
The pthreads build of OpenBLAS starts a pool when the library is loaded and
adds threads when a fit asks for more (src/core/blas_pool.c).  Read from
/proc/<backend pid>/task/*/status (SigBlk, the blocked-signal mask in hex):

* after the library is loaded (affinity.runtime()), every thread of the
  backend but its own main thread blocks every catchable signal of 1..31,
  and the main thread's mask is as it was before the load;
* after a fit that asks OpenBLAS for 8 threads (affinity.max_threads
  raised, as a superuser may), the pool has grown to 8 and every pool
  thread still blocks them.

On the code before the fix the load-time pool thread blocked none of them.
"""

import os

from _common import Checker, connect, skip

CATCHABLE = [s for s in range(1, 32) if s not in (9, 19)]      # all but SIGKILL, SIGSTOP


def masks(pid):
    """tid -> SigBlk as an int, for every thread of process pid."""
    out = {}
    for tid in os.listdir("/proc/%d/task" % pid):
        try:
            with open("/proc/%d/task/%s/status" % (pid, tid)) as f:
                for line in f:
                    if line.startswith("SigBlk:"):
                        out[int(tid)] = int(line.split()[1], 16)
        except OSError:
            pass                # a thread that just ended
    return out


def unblocked(mask):
    return [s for s in CATCHABLE if not mask & (1 << (s - 1))]


def check_pool(c, pid, label, want_threads):
    m = masks(pid)
    pool = {t: v for t, v in m.items() if t != pid}
    c.check(len(pool) >= want_threads - 1,
            "%s: the backend has %d thread(s) besides its own (OpenBLAS's pool)" % (label, len(pool)),
            "expected at least %d" % (want_threads - 1))
    bad = {t: unblocked(v) for t, v in pool.items() if unblocked(v)}
    c.check(not bad, "%s: every pool thread blocks all catchable signals 1..31" % label,
            "; ".join("thread %d accepts %s" % (t, s) for t, s in sorted(bad.items())))
    return m


def main():
    c = Checker("check_blas_signals")
    if not os.path.isdir("/proc/self/task"):
        skip("no /proc/<pid>/task here to read thread signal masks from")
    if (os.cpu_count() or 1) < 2:
        skip("one CPU: OpenBLAS starts no pool thread at load")
    connect().close()               # the extension exists
    conn = connect()                # a fresh backend that has not loaded the library
    cur = conn.cursor()
    cur.execute("SELECT pg_backend_pid()")
    pid = cur.fetchone()[0]
    before = masks(pid)
    c.check(list(before) == [pid], "a backend that has not loaded affinity has one thread",
            str(sorted(before)))
    cur.execute("SELECT affinity.runtime()->>'blas_config'")
    print("OpenBLAS: %s" % cur.fetchone()[0])
    after = check_pool(c, pid, "after load", 2)
    c.check(after[pid] == before[pid], "the backend's own mask is unchanged by the load (%x)"
            % after[pid], "was %x" % before[pid])

    cur.execute("SET affinity.max_threads = 8")
    cur.execute("""SELECT affinity.describe(affinity.fit(c, p, 1, '{"factors": 64, "iterations": 1,
                                                              "threads": 8}'))->>'users'
                   FROM generate_series(1, 3000) c, generate_series(1, 5) k,
                        LATERAL (SELECT (c * 7 + k * 13) % 400 AS p) x""")
    c.check(cur.fetchone()[0] is not None, "a fit with 8 threads ran")
    grown = check_pool(c, pid, "after an 8-thread fit", 8)
    c.check(grown[pid] == before[pid], "the backend's own mask is unchanged by the fit")
    conn.close()
    c.finish()


if __name__ == "__main__":
    main()
