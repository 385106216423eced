#!/usr/bin/python3
"""bench/peer_als.py: the same implicit ALS fit as affinity's, written with numpy and scipy.sparse.

The peer that bench/fit measures affinity against: what a careful data scientist would write
after exporting the purchase table to a file. Same objective, same confidence, same solver and
the same loss as src/core/als.c:

    minimise  sum_{u,i} c_ui (p_ui - x_u . y_i)^2 + lambda (sum |x_u|^2 + sum |y_i|^2)
    c_ui = 1 + alpha * log(1 + w_ui / epsilon)   (or 1 + alpha * w_ui with --confidence linear)

A sweep solves every user row against the fixed item factors, then every item row against the
new user factors, each row by `cg_steps` steps of conjugate gradient started from its previous
value (Takacs, Pilaszy, Tikk 2011) on (Y^T Y + lambda I + Y^T (C_u - I) Y) x_u = Y^T C_u p_u;
then the loss with the same Gram trick. Rows are processed together, a block at a time: the
fixed side's vectors of a block's interactions are gathered once, every CG step is a handful of
whole-block array operations (a dense product with the Gram matrix through BLAS, a row-wise dot
product over the interactions, a sparse-times-dense product through scipy.sparse). The initial
factors come from numpy's generator (normal, standard deviation 0.01), so they differ from
affinity's: losses agree roughly, not digit for digit.

Input: the table exported with COPY ... TO ... (FORMAT binary), columns user_id bigint,
item_id bigint, weight real, no NULLs. Duplicate (user, item) rows are summed, zero weights
dropped, as affinity does.

Usage: peer_als.py FILE [--factors 64] [--iterations 15] [--cg-steps 3] [--regularization 30]
                        [--alpha 10] [--epsilon 1] [--confidence log|linear] [--seed 42]
                        [--threads N] [--json OUT]
bench/fit passes every option as affinity used it (describe()'s "options"), so the defaults here
only matter when the peer is run by hand.
Threads: BLAS (OpenBLAS through threadpoolctl) gets N threads; numpy's element-wise operations
and scipy.sparse products run on one thread, as they do for anyone who uses them.
Prints one line per sweep and, with --json, writes every figure to OUT.
"""

import argparse
import json
import os
import sys
import time


def parse_args():
    ap = argparse.ArgumentParser(description="implicit ALS with numpy/scipy (the benchmark peer)")
    ap.add_argument("file")
    ap.add_argument("--factors", type=int, default=64)
    ap.add_argument("--iterations", type=int, default=15)
    ap.add_argument("--cg-steps", type=int, default=3)
    ap.add_argument("--regularization", type=float, default=30.0)
    ap.add_argument("--alpha", type=float, default=10.0)
    ap.add_argument("--epsilon", type=float, default=1.0)
    ap.add_argument("--confidence", choices=["log", "linear"], default="log")
    ap.add_argument("--seed", type=int, default=42)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--block-floats", type=int, default=1 << 25,
                    help="bound on gathered floats per block (memory: 4 bytes each)")
    ap.add_argument("--json")
    return ap.parse_args()


args = parse_args()
# Before numpy is imported, so that OpenBLAS starts with the right pool.
os.environ["OPENBLAS_NUM_THREADS"] = str(args.threads)

import numpy as np  # noqa: E402
import scipy.sparse as sp  # noqa: E402

try:
    from threadpoolctl import threadpool_info, threadpool_limits  # noqa: E402
except ImportError:  # pragma: no cover
    threadpool_info = None
    threadpool_limits = None


def read_copy_binary(path):
    """(users int64, items int64, weights float32) from a COPY BINARY file of 3 columns."""
    raw = np.fromfile(path, dtype=np.uint8)
    if raw[:11].tobytes() != b"PGCOPY\n\xff\r\n\x00":
        sys.exit("%s: not a COPY BINARY file" % path)
    ext_len = int.from_bytes(raw[15:19].tobytes(), "big")
    body = raw[19 + ext_len:len(raw) - 2]   # the trailer is a 16-bit -1
    row = np.dtype([("nf", ">i2"), ("l1", ">i4"), ("u", ">i8"), ("l2", ">i4"),
                    ("i", ">i8"), ("l3", ">i4"), ("w", ">f4")])
    if len(body) % row.itemsize:
        sys.exit("%s: rows are not (bigint, bigint, real) without NULLs" % path)
    rec = np.frombuffer(body, dtype=row)
    if len(rec) and not ((rec["nf"] == 3).all() and (rec["l1"] == 8).all()
                         and (rec["l2"] == 8).all() and (rec["l3"] == 4).all()):
        sys.exit("%s: rows are not (bigint, bigint, real) without NULLs" % path)
    return (rec["u"].astype(np.int64), rec["i"].astype(np.int64),
            rec["w"].astype(np.float32))


def confidence(w):
    if args.confidence == "linear":
        return (1.0 + args.alpha * w).astype(np.float32)
    return (1.0 + args.alpha * np.log1p(w.astype(np.float64) / args.epsilon)).astype(np.float32)


def blocks(indptr, f):
    """Row ranges [r0, r1) whose gathered interaction vectors stay under the float bound."""
    n = len(indptr) - 1
    limit = max(args.block_floats // f, 1)
    out = []
    r0 = 0
    while r0 < n:
        r1 = int(np.searchsorted(indptr, indptr[r0] + limit, side="right")) - 1
        r1 = min(max(r1, r0 + 1), n)
        out.append((r0, r1))
        r0 = r1
    return out


def half_sweep(C, F, X, lam, steps):
    """Rows of X solved in place against the fixed side F, for the confidences in CSR C."""
    f = F.shape[1]
    G = F.T @ F                                  # BLAS (sgemm)
    G[np.diag_indices(f)] += lam                 # G + lambda I
    for r0, r1 in blocks(C.indptr, f):
        lo, hi = C.indptr[r0], C.indptr[r1]
        idx = C.indices[lo:hi]
        conf = C.data[lo:hi]
        cm1 = conf - 1.0
        ptr = C.indptr[r0:r1 + 1] - lo
        rows = np.repeat(np.arange(r1 - r0), np.diff(ptr))  # block row of each interaction
        seg = np.arange(hi - lo, dtype=ptr.dtype)
        Fg = F[idx]                              # the block's fixed-side vectors, gathered once
        x = X[r0:r1].copy()

        def segment_sum(vals):
            """Per row: sum over its interactions of vals_j * Fg_j (a sparse product that reads
            Fg in order, which is several times faster than one against F)."""
            return sp.csr_matrix((vals, seg, ptr), shape=(r1 - r0, hi - lo)) @ Fg

        def sparse_part(v):
            """sum over the row's interactions of (c - 1) (y . v) y, for every row."""
            return segment_sum(np.einsum("ij,ij->i", Fg, v[rows]) * cm1)

        # r = b - A x with b = sum c y
        b = segment_sum(conf)
        r = b - x @ G - sparse_part(x)
        p = r.copy()
        rs = np.einsum("ij,ij->i", r, r)
        active = np.ones(r1 - r0, dtype=bool)
        for _ in range(steps):
            active &= rs >= 1e-30
            if not active.any():
                break
            Ap = p @ G + sparse_part(p)
            pAp = np.einsum("ij,ij->i", p, Ap)
            active &= pAp > 0
            a = np.where(active, rs / np.where(pAp > 0, pAp, 1), 0).astype(np.float32)
            x += a[:, None] * p
            r -= a[:, None] * Ap
            rs_new = np.einsum("ij,ij->i", r, r)
            beta = np.where(rs > 0, rs_new / np.where(rs > 0, rs, 1), 0).astype(np.float32)
            p = r + beta[:, None] * p
            rs = rs_new
        X[r0:r1] = x


def loss(C, X, Y, lam):
    """The objective, with the Gram trick: x^T (Y^T Y) x over all items, corrected where observed."""
    f = X.shape[1]
    G = (Y.T @ Y).astype(np.float64)
    total = float(np.einsum("ij,ij->", X @ G.astype(np.float32), X, dtype=np.float64))
    for r0, r1 in blocks(C.indptr, f):
        lo, hi = C.indptr[r0], C.indptr[r1]
        rows = np.repeat(np.arange(r0, r1), np.diff(C.indptr[r0:r1 + 1]))
        s = np.einsum("ij,ij->i", Y[C.indices[lo:hi]], X[rows]).astype(np.float64)
        c = C.data[lo:hi].astype(np.float64)
        total += float(np.sum(c * (1.0 - s) ** 2 - s * s))
    total += lam * (float(np.einsum("ij,ij->", X, X, dtype=np.float64))
                    + float(np.einsum("ij,ij->", Y, Y, dtype=np.float64)))
    return total


def main():
    out = {"factors": args.factors, "iterations": args.iterations, "cg_steps": args.cg_steps,
           "regularization": args.regularization, "alpha": args.alpha,
           "epsilon": args.epsilon, "confidence": args.confidence, "threads": args.threads,
           "numpy": np.__version__}
    if threadpool_info is not None:
        out["blas"] = [{k: d.get(k) for k in ("internal_api", "version", "architecture",
                                               "num_threads", "threading_layer")}
                       for d in threadpool_info()]
    limits = threadpool_limits(args.threads) if threadpool_limits else None

    t0 = time.perf_counter()
    users, items, w = read_copy_binary(args.file)
    out["read_seconds"] = time.perf_counter() - t0
    out["rows"] = int(len(w))

    t0 = time.perf_counter()
    keep = w != 0
    ukeys, urow = np.unique(users[keep], return_inverse=True)
    ikeys, icol = np.unique(items[keep], return_inverse=True)
    R = sp.csr_matrix((w[keep].astype(np.float64), (urow, icol)),
                      shape=(len(ukeys), len(ikeys)))
    R.sum_duplicates()
    Cu = sp.csr_matrix((confidence(R.data), R.indices, R.indptr), shape=R.shape)
    Ci = Cu.T.tocsr()                            # item-major, same confidences
    Ci.sort_indices()
    out["build_seconds"] = time.perf_counter() - t0
    out["users"], out["items"], out["interactions"] = int(R.shape[0]), int(R.shape[1]), int(R.nnz)

    rng = np.random.default_rng(args.seed)
    f = args.factors
    Y = (rng.standard_normal((R.shape[1], f), dtype=np.float32) * np.float32(0.01))
    X = (rng.standard_normal((R.shape[0], f), dtype=np.float32) * np.float32(0.01))
    lam = np.float32(args.regularization)

    out["loss"] = []
    out["sweep_seconds"] = []
    for it in range(args.iterations):
        t0 = time.perf_counter()
        half_sweep(Cu, Y, X, lam, args.cg_steps)
        half_sweep(Ci, X, Y, lam, args.cg_steps)
        L = loss(Cu, X, Y, args.regularization)
        secs = time.perf_counter() - t0
        out["loss"].append(L)
        out["sweep_seconds"].append(secs)
        print("peer sweep %d: loss %.6g, %.3f s" % (it + 1, L, secs), flush=True)
    out["fit_seconds"] = sum(out["sweep_seconds"])
    if limits is not None:
        limits.restore_original_limits()
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(out, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
