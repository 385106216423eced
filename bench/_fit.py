"""The driver of bench/fit: generate, time ingest and the fit, count the work, run the peer.

Run by bench/fit inside its throwaway cluster; see bench/fit for the options. Prints each figure
as it is measured and a summary at the end; --json writes all of them.
"""

import argparse
import json
import os
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import _bench as B  # noqa: E402

ap = argparse.ArgumentParser()
ap.add_argument("--small", action="store_true", help="the 1M table only")
ap.add_argument("--sizes", default=None, help="comma-separated subset of 1m,10m")
ap.add_argument("--grid-iterations", type=int, default=2)
ap.add_argument("--iterations", type=int, default=15, help="sweeps of the headline fits")
ap.add_argument("--peer-iterations-10m", type=int, default=3)
ap.add_argument("--no-grid", action="store_true")
ap.add_argument("--no-peer", action="store_true")
ap.add_argument("--no-profile", action="store_true")
ap.add_argument("--json")
args = ap.parse_args()

SIZES = {"1m": (1_000_000, 100_000, 20_000), "10m": (10_000_000, 500_000, 50_000)}


# ---------------------------------------------------------------------------
# Floating-point work of one sweep, counted from src/core/als.c (one multiply-add = 2).
#
# n_u users, n_i items, nnz interactions, f factors, s = cg_steps. Per sweep (steady state, the
# first sweep has one more Gram): the Gram matrices X^T X and Y^T Y by ssyrk, f^2 n each
# (f(f+1)/2 entries, n multiply-adds each), then each side's rows, then the loss.
#
# cg, one row with len interactions (solve_cg):
#   residual r = b - A x:   (G + lambda I) x: 2f^2 + f; per interaction a dot (2f), t (3),
#                           an axpy (2f): 4f + 3; then p = r and rs: 2f
#   each of s steps:        A p (row_system_times): 2f^2 + f + len (4f + 2); p.Ap: 2f;
#                           x, r updates and rs_new: 6f; the new p: 2f
#   => (s + 1)(2f^2 + f) + (s + 1)(4f + 3) len + (10 s + 2) f          (rounded up slightly)
# cholesky, one row (solve_cholesky):
#   A += (c - 1) y y^T over the lower triangle and b += c y: f^2 + 4f per interaction;
#   factorisation f^3/3; two triangular solves 2f^2 (+ f^2/2 divisions)
#   => len (f^2 + 4f) + f^3/3 + 2.5 f^2
# loss: with cg, summed in the item blocks (cg_block_loss): per item y^T G y with G = X^T X:
#   2f^2 + 2f; per interaction a dot and the correction: 2f + 6.  With cholesky (loss_block):
#   per user x^T G x with G = Y^T Y, 2f^2 + 2f, and the same per interaction.
#
# "Dense" parts, the ones a BLAS-3 kernel could run at its rate: the Gram products, the
# products with G (2f^2 per row and cg step, 2f^2 per user in the loss), and for cholesky the
# rank-one accumulations into A (f^2 per interaction) and the factorisation (f^3/3).

def sweep_flops(nu, ni, nnz, f, solver, s):
    gram = f * f * (nu + ni)
    if solver == "cg":
        def side(n):
            return (s + 1) * (2 * f * f + f) * n + (s + 1) * (4 * f + 3) * nnz + (10 * s + 2) * f * n
        dense_sides = (s + 1) * 2 * f * f * (nu + ni)
    else:
        def side(n):
            return nnz * (f * f + 4 * f) + n * (f ** 3 / 3 + 2.5 * f * f)
        dense_sides = 2 * nnz * f * f + (nu + ni) * f ** 3 / 3
    loss_rows = ni if solver == "cg" else nu
    loss = loss_rows * (2 * f * f + 2 * f) + nnz * (2 * f + 6)
    total = gram + side(nu) + side(ni) + loss
    dense = gram + dense_sides + loss_rows * 2 * f * f
    return {"total": total, "dense": dense, "gram": gram, "sides": side(nu) + side(ni), "loss": loss}


# Bytes a cg sweep must move at least, as src/core/als.c does its work: each half-sweep reads
# every interaction's index and confidence (8 bytes) and, once, the fixed-side vector it names
# (4f bytes: the block gathers it, then works in cache), reads and writes the rows it solves
# (2 x 4f bytes a row) and reads the fixed side once more for its Gram matrix (4f bytes a row).
# Divided by the triad's bandwidth of the same run, a lower bound on the sweep's time.
def sweep_bytes(nu, ni, nnz, f):
    half = nnz * (8 + 4 * f)
    return 2 * half + 2 * 4 * f * (nu + ni) + 4 * f * (nu + ni)


def bandwidth_bound(r, rates, threads):
    """(bytes, seconds at the triad's rate, sweep median / that) for a fit's figures."""
    bw = B.rate_of(rates, "triad", threads)
    by = sweep_bytes(r["users"], r["items"], r["interactions"], r["options"]["factors"])
    if not bw:
        return {"bytes": by}
    t = by / (bw * 1e9)
    return {"bytes": by, "triad_gbytes_per_s": bw, "bound_seconds": t,
            "ratio": B.median(r["sweep_seconds"]) / t}


FIT_SQL = ("SELECT affinity.describe(affinity.fit(user_id, item_id, weight, %s::jsonb)) FROM {t}")


ERRORS = []


def fit(conn, table, opts):
    """One fit statement; its figures, or {"error": ...} if it failed (the run goes on)."""
    try:
        secs, rows = B.timed(conn, FIT_SQL.format(t=table), (json.dumps(opts),))
    except B.psycopg2.Error as e:
        msg = "fit %s on %s failed: %s" % (json.dumps(opts), table, str(e).strip())
        B.log("  ERROR: " + msg)
        ERRORS.append(msg)
        return {"options": opts, "error": str(e).strip()}
    d = rows[0][0]
    sweeps = d["sweep_seconds"]
    return {"options": opts, "statement_seconds": secs, "fit_seconds": d["fit_seconds"],
            "sweep_seconds": sweeps, "loss": d["loss"], "users": d["users"], "items": d["items"],
            "interactions": d["interactions"], "used": d["options"],
            "peak_memory_bytes": d.get("peak_memory_bytes"),
            # fit_seconds covers the final step: matrix build, initial factors, sweeps
            "ingest_seconds": secs - d["fit_seconds"],
            "build_seconds": d["fit_seconds"] - sum(sweeps)}


def ingest(conn, table, reps):
    """count(*) and sum(weight) against the fit's pass over the rows, each as planned by default
    (parallel workers where the planner wants them) and with parallel query off."""
    B.query(conn, "SELECT count(*) FROM %s" % table)     # warm the OS cache
    plans = {}
    for mode, setting in (("parallel", None), ("serial", "0")):
        B.query(conn, "SET max_parallel_workers_per_gather = %s" % setting if setting
                else "RESET max_parallel_workers_per_gather")
        plans[mode] = [r[0].strip() for r in B.query(
            conn, "EXPLAIN (COSTS OFF) " + FIT_SQL.format(t=table),
            ('{"iterations": 1, "factors": 1}',))]
        B.log("  plan of the fit (%s): %s" % (mode, " / ".join(plans[mode])))
    out = {k: [] for k in ("count_serial", "count_parallel", "fit_statement_parallel",
                           "fit_ingest_parallel", "fit_build_parallel", "fit_statement_serial",
                           "fit_ingest_serial", "fit_build_serial")}
    for _ in range(reps):
        for mode, setting in (("parallel", None), ("serial", "0")):
            B.query(conn, "SET max_parallel_workers_per_gather = %s" % setting if setting
                    else "RESET max_parallel_workers_per_gather")
            s, _r = B.timed(conn, "SELECT count(*), sum(weight) FROM %s" % table)
            out["count_" + mode].append(s)
            r = fit(conn, table, {"iterations": 1, "factors": 1, "threads": 2})
            if "error" in r:
                continue
            out["fit_statement_" + mode].append(r["statement_seconds"])
            out["fit_ingest_" + mode].append(r["ingest_seconds"])
            out["fit_build_" + mode].append(r["build_seconds"])
    B.query(conn, "RESET max_parallel_workers_per_gather")
    m = {k: B.median(v) for k, v in out.items()}
    out["median"] = m
    out["min"] = {k: min(v) if v else float("nan") for k, v in out.items() if k != "median"}
    out["plans"] = plans
    out["ratio_parallel"] = m["fit_ingest_parallel"] / m["count_parallel"]
    out["ratio_serial"] = m["fit_ingest_serial"] / m["count_serial"]
    for mode in ("parallel", "serial"):
        B.log("  %-8s count(*), sum(weight) %.3f s; fit statement %.3f s - fit_seconds = %.3f s "
              "= %.2fx count (medians of %d); matrix build %.3f s"
              % (mode, m["count_" + mode], m["fit_statement_" + mode], m["fit_ingest_" + mode],
                 out["ratio_" + mode], reps, m["fit_build_" + mode]))
    return out


def export(conn, table, path):
    t0 = time.perf_counter()
    with open(path, "wb") as fh, conn.cursor() as cur:
        cur.copy_expert("COPY %s TO STDOUT (FORMAT binary)" % table, fh)
    secs = time.perf_counter() - t0
    B.log("  COPY %s TO a file (binary, client side): %.2f s, %.0f MB"
          % (table, secs, os.path.getsize(path) / 1e6))
    return secs


def peer(path, used, iterations, threads, tag):
    """The peer with the options affinity used (describe()'s "options"), other than the count
    of sweeps and threads."""
    out = os.path.join(B.WORK, "peer_%s.json" % tag)
    factors = used["factors"]
    t0 = time.perf_counter()
    subprocess.run(["/usr/bin/python3", os.path.join(B.BENCH_DIR, "peer_als.py"), path,
                    "--factors", str(factors), "--iterations", str(iterations),
                    "--cg-steps", str(used["solver_steps"]),
                    "--regularization", str(used["regularization"]),
                    "--alpha", str(used["alpha"]), "--epsilon", str(used["epsilon"]),
                    "--confidence", used["confidence"],
                    "--threads", str(threads), "--json", out], check=True,
                   stdout=subprocess.DEVNULL)
    wall = time.perf_counter() - t0
    with open(out) as fh:
        r = json.load(fh)
    r["process_seconds"] = wall
    B.log("  peer (numpy/scipy) f=%d threads=%d: read %.2f s, build %.2f s, sweep median %.3f s, "
          "final loss %.6g, process %.1f s"
          % (factors, threads, r["read_seconds"], r["build_seconds"],
             B.median(r["sweep_seconds"]), r["loss"][-1], wall))
    return r


def grid(conn, table, rates, iters):
    cells = []
    for f in (32, 64, 128):
        for solver in ("cg", "cholesky"):
            for threads in (1, 2):
                r = fit(conn, table, {"factors": f, "solver": solver, "threads": threads,
                                      "iterations": iters})
                if "error" in r:
                    cells.append(r)
                    continue
                fl = sweep_flops(r["users"], r["items"], r["interactions"], f, solver,
                                 r["used"]["solver_steps"])
                sw = B.median(r["sweep_seconds"])
                r["flops"] = fl
                r["sweep_median"] = sw
                r["gflops"] = fl["total"] / sw / 1e9
                r["dense_share"] = fl["dense"] / fl["total"]
                sg = B.rate_of(rates, "sgemm", threads)
                r["sgemm_gflops"] = sg
                r["share_of_sgemm"] = r["gflops"] / sg if sg else None
                if solver == "cg":
                    r["bandwidth"] = bandwidth_bound(r, rates, threads)
                cells.append(r)
                B.log("  f=%3d %-8s threads=%d: sweep %.3f s (median of %d), %.2f GFLOP/s = %.1f%% "
                      "of sgemm (%d threads); dense share of the work %.0f%%"
                      % (f, solver, threads, sw, len(r["sweep_seconds"]), r["gflops"],
                         100 * (r["share_of_sgemm"] or 0), threads, 100 * r["dense_share"]))
    return cells


def profile(conn, table, opts, tag):
    pid = B.one(conn, "SELECT pg_backend_pid()")
    path = os.path.join(B.WORK, "perf_%s.data" % tag)
    p = B.Perf(pid, path)
    r = fit(conn, table, opts)
    if not p.stop() or "error" in r:
        return {"fit": r, "symbols": [], "lines": []}
    lib = (B.LIBRARY or {}).get("copy")
    syms, lines = p.report(lib, 0.5)
    B.log("  profile of fit %s (%s): statement %.2f s" % (json.dumps(opts), table,
                                                          r["statement_seconds"]))
    for ln in syms[:18]:
        B.log("    " + ln)
    B.log("  by source line inside affinity (innermost inlined function):")
    for ln in lines[:12]:
        B.log("    " + ln)
    return {"fit": r, "symbols": syms, "lines": lines}


def main():
    res = {"args": vars(args)}
    conn = B.connect()
    res["machine"] = B.machine(conn)
    m = res["machine"]
    B.LIBRARY = m["library"]
    B.log("== machine: %s CPUs (%s), %s; OpenBLAS core %s; numpy BLAS %s"
          % (m["nproc"], m["cpu"], m["postgres"].split(",")[0], m["blas_core"],
             json.dumps(m["numpy_blas"])))
    B.log("== checkout %s (%s)%s; library measured: %s"
          % (m["git"]["head"], m["git"]["subject"],
             "; uncommitted in src: " + ", ".join(m["git"]["uncommitted_in_src"])
             if m["git"]["uncommitted_in_src"] else "", json.dumps(m["library"])))
    B.log("== sgemm reference (OpenBLAS, square 2048)")
    rates = B.sgemm_rates()
    res["sgemm"] = rates

    sizes = ["1m"] if args.small else ["1m", "10m"]
    if args.sizes:
        sizes = [x for x in args.sizes.split(",") if x in SIZES]
    for tag in sizes:
        rows, users, items = SIZES[tag]
        table = "purchases_" + tag
        B.log("== %s table" % tag)
        part = res[tag] = {"data": B.generate(table, rows, users, items)}

        B.log("-- ingest (%s)" % tag)
        part["ingest"] = ingest(conn, table, 3 if tag == "1m" else 2)

        if tag == "1m" and not args.no_grid:
            B.log("-- per sweep, factors x solver x threads (%d sweeps each)" % args.grid_iterations)
            part["grid"] = grid(conn, table, rates, args.grid_iterations)

        B.log("-- headline fit (%s): factors 64, cg, threads 2, %d sweeps" % (tag, args.iterations))
        hopts = {"factors": 64, "solver": "cg", "threads": 2, "iterations": args.iterations}
        part["headline_attempts"] = []
        settings = []
        h = fit(conn, table, hopts)
        if "error" in h and "max_fit_memory" in h["error"]:
            # the guard's estimate before the matrix is built; say so, then measure anyway
            part["headline_attempts"].append(h)
            B.log("  the memory guard refused the fit at the default affinity.max_fit_memory; "
                  "again with it raised to 64GB (the measured peak is reported)")
            B.query(conn, "SET affinity.max_fit_memory = '64GB'")
            settings.append("affinity.max_fit_memory = 64GB")
            h = fit(conn, table, hopts)
        if "error" in h:
            part["headline_attempts"].append(h)
            B.log("  the fit failed; once more as it is")
            h = fit(conn, table, hopts)
        if "error" in h and "max_fit_memory" not in h["error"]:
            part["headline_attempts"].append(h)
            B.log("  the fit failed again; once more without parallel workers")
            B.query(conn, "SET max_parallel_workers_per_gather = 0")
            settings.append("max_parallel_workers_per_gather = 0")
            h = fit(conn, table, hopts)
        h["settings"] = settings
        B.query(conn, "RESET affinity.max_fit_memory")
        B.query(conn, "RESET max_parallel_workers_per_gather")
        if "error" in h:
            part["headline"] = h
            B.query(conn, "DROP TABLE %s" % table)
            continue
        fl = sweep_flops(h["users"], h["items"], h["interactions"], 64, "cg",
                         h["used"]["solver_steps"])
        h["gflops"] = fl["total"] / B.median(h["sweep_seconds"]) / 1e9
        sg = B.rate_of(rates, "sgemm", 2)
        h["share_of_sgemm"] = h["gflops"] / sg if sg else None
        h["bandwidth"] = bandwidth_bound(h, rates, 2)
        part["headline"] = h
        bw = h["bandwidth"]
        if "ratio" in bw:
            B.log("  sweep: %.1f%% of sgemm (2 threads, %.1f GFLOP/s); moves at least %.2f GB, "
                  "%.3f s at the triad's %.1f GB/s: the median sweep is %.2fx that bound"
                  % (100 * (h["share_of_sgemm"] or 0), sg or 0, bw["bytes"] / 1e9,
                     bw["bound_seconds"], bw["triad_gbytes_per_s"], bw["ratio"]))
        B.log("  statement %.2f s = ingest %.2f s + matrix build %.2f s + %d sweeps %.2f s "
              "(median %.3f s, %.2f GFLOP/s); final loss %.6g; peak memory %s MB"
              % (h["statement_seconds"], h["ingest_seconds"], h["build_seconds"],
                 len(h["sweep_seconds"]), sum(h["sweep_seconds"]),
                 B.median(h["sweep_seconds"]), h["gflops"], h["loss"][-1],
                 "%.0f" % (h["peak_memory_bytes"] / 2**20) if h.get("peak_memory_bytes") else "?"))

        if not args.no_peer:
            B.log("-- peer (%s)" % tag)
            path = os.path.join(B.WORK, table + ".bin")
            part["export_seconds"] = export(conn, table, path)
            if tag == "1m":
                part["peer_t2"] = peer(path, h["used"], args.iterations, 2, tag + "_t2")
                part["peer_t1"] = peer(path, h["used"], args.grid_iterations, 1, tag + "_t1")
            else:
                part["peer_t2"] = peer(path, h["used"], args.peer_iterations_10m, 2, tag + "_t2")
            os.unlink(path)
            p2 = part["peer_t2"]
            n = len(p2["loss"])
            a_loss = h["loss"][n - 1]
            part["compare"] = {
                "sweep_ratio_t2": B.median(p2["sweep_seconds"]) / B.median(h["sweep_seconds"]),
                "loss_at_sweep": n, "affinity_loss": a_loss, "peer_loss": p2["loss"][-1],
                "loss_rel_diff": (p2["loss"][-1] - a_loss) / a_loss,
                "affinity_total": h["statement_seconds"] if n == len(h["loss"]) else None,
                "peer_total": part["export_seconds"] + p2["process_seconds"],
            }
            c = part["compare"]
            B.log("  fit alone, per sweep: peer %.3f s / affinity %.3f s = %.2fx; loss after %d "
                  "sweeps: affinity %.6g, peer %.6g (%+.2f%%)"
                  % (B.median(p2["sweep_seconds"]), B.median(h["sweep_seconds"]),
                     c["sweep_ratio_t2"], n, a_loss, p2["loss"][-1], 100 * c["loss_rel_diff"]))
            if tag == "1m" and "grid" in part:
                g1 = [g for g in part["grid"] if g["options"]["factors"] == 64
                      and g["options"]["solver"] == "cg" and g["options"]["threads"] == 1
                      and "error" not in g]
            if tag == "1m" and "grid" in part and g1:
                g1 = g1[0]
                c["sweep_ratio_t1"] = B.median(part["peer_t1"]["sweep_seconds"]) / g1["sweep_median"]
                B.log("  one thread, per sweep: peer %.3f s / affinity %.3f s = %.2fx"
                      % (B.median(part["peer_t1"]["sweep_seconds"]), g1["sweep_median"],
                         c["sweep_ratio_t1"]))
            if c["affinity_total"]:
                B.log("  whole job: in-database statement %.1f s vs export %.1f s + peer process "
                      "%.1f s = %.1f s" % (c["affinity_total"], part["export_seconds"],
                                           p2["process_seconds"], c["peer_total"]))

        if not args.no_profile and tag == "1m":
            B.log("-- profiles (%s)" % tag)
            part["profile_cg"] = profile(conn, table, {"factors": 64, "solver": "cg",
                                                       "threads": 2, "iterations": 5}, "cg")
            part["profile_cholesky"] = profile(conn, table, {"factors": 64, "solver": "cholesky",
                                                             "threads": 2, "iterations": 2},
                                               "cholesky")
        if not args.no_profile and tag == "10m":
            B.log("-- profiles (%s)" % tag)
            part["profile_ingest"] = profile(conn, table, {"factors": 1, "iterations": 1,
                                                           "threads": 2}, "ingest10m")
            B.query(conn, "SET affinity.max_fit_memory = '64GB'")
            part["profile_cg"] = profile(conn, table, {"factors": 64, "solver": "cg",
                                                       "threads": 2, "iterations": 2}, "cg10m")
            B.query(conn, "RESET affinity.max_fit_memory")
        B.query(conn, "DROP TABLE %s" % table)

    res["errors"] = ERRORS
    log_path = os.environ.get("AFF_CLUSTER_LOG")
    if log_path and os.path.exists(log_path):
        with open(log_path, errors="replace") as fh:
            res["server_log_problems"] = [ln.rstrip() for ln in fh
                                          if any(w in ln for w in ("ERROR", "FATAL", "PANIC",
                                                                   "terminated by signal"))]
        for ln in res["server_log_problems"]:
            B.log("server log: " + ln)
    res["machine"]["loadavg_end"] = B.loadavg()
    B.log("== load average at the start %s, at the end %s"
          % (res["machine"]["loadavg_start"], res["machine"]["loadavg_end"]))
    summary(res)
    B.write_json(args.json, res)


def summary(res):
    B.log("\n== summary")
    for tag in ("1m", "10m"):
        if tag not in res:
            continue
        p = res[tag]
        B.log("%s: ingest %.2fx count(*) as planned (parallel), %.2fx both serial; headline fit %s"
              % (tag, p["ingest"]["ratio_parallel"], p["ingest"]["ratio_serial"],
                 "%.1f s" % p["headline"]["statement_seconds"]
                 if "error" not in p["headline"] else "failed"))
        if "compare" in p:
            B.log("%s: peer/affinity per sweep %.2fx (threads 2)%s" % (
                tag, p["compare"]["sweep_ratio_t2"],
                ("; %.2fx (threads 1)" % p["compare"]["sweep_ratio_t1"])
                if "sweep_ratio_t1" in p["compare"] else ""))
    for e in res.get("errors", []):
        B.log("ERROR: " + e)
        h = p["headline"]
        if "error" not in h and "bandwidth" in h and "ratio" in h["bandwidth"]:
            B.log("%s: sweep %.1f%% of sgemm, %.2fx its memory-bandwidth bound; matrix build %.2f s"
                  % (tag, 100 * (h["share_of_sgemm"] or 0), h["bandwidth"]["ratio"],
                     h["build_seconds"]))
    if "10m" in res and "error" not in res["10m"]["headline"]:
        B.log("10M target (< 30 s wall including ingest): %s"
              % ("met" if res["10m"]["headline"]["statement_seconds"] < 30 else "not met"))


if __name__ == "__main__":
    main()
