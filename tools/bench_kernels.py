"""Benchmark: the CSR kernels against scipy.sparse on a block set.

Builds ``--nnz`` stored entries (default 20 M) as row blocks of ``--block-nnz``
entries (default 1 M) over ``--cols`` columns, with two column distributions:
``uniform`` (hashed features) and ``skewed`` (a power law, as in a vocabulary
sorted by frequency). Times, over all blocks of a set:

* ``X @ B`` (B: d x m) — ``csr_matmul_dense`` vs scipy's ``X @ B``;
* ``out += X^T @ D`` (D: n_b x m) — ``csr_t_matmul_accumulate`` vs scipy's
  ``out += X.T @ D``,

each with numba's full thread count and with one thread. The baseline of the
same run is scipy (``speedup = scipy seconds / ours``). The row ``X^T @ D*``
is the alternative design (thread-private d x m buffers summed in a fixed
order), timed for comparison with the shipped column-partition kernel. The rows
``csc X @ B``, ``csc X^T @ D`` and ``csc both`` are the transposed-block path
(:mod:`kernels.csc`) that the gradient pass takes on large blocks: each op
includes one transposition per block, ``csc both`` is the pass's pair of
products on one transposition. Compilation is done before timing; each figure is
the best of ``--repeat`` runs.

    .venv/bin/python tools/bench_kernels.py --out bench-out
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numba
import numpy as np
import scipy.sparse as sp
from numba import njit, prange

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from ranktide.atomic import atomic_write_json  # noqa: E402
from ranktide.kernels.csc import block_csc, csc_matmul_dense, csc_t_matmul_accumulate  # noqa: E402
from ranktide.kernels.sparse import csr_matmul_dense, csr_t_matmul_accumulate  # noqa: E402


@njit(nogil=True, cache=True, parallel=True)
def _t_matmul_private_buffers(indptr, indices, data, D, bufs, out):  # pragma: no cover
    """The alternative we did not ship: thread-private d x m buffers, one per
    fixed row chunk, summed in chunk order (deterministic for a fixed chunk
    count, but T extra d x m buffers and a d x m x T reduction per call)."""
    n, m = D.shape
    T = bufs.shape[0]
    d = out.shape[0]
    for t in prange(T):
        for c in range(d):
            for j in range(m):
                bufs[t, c, j] = 0.0
        for i in range(n * t // T, n * (t + 1) // T):
            for q in range(indptr[i], indptr[i + 1]):
                c = indices[q]
                v = np.float64(data[q])
                for j in range(m):
                    bufs[t, c, j] += v * D[i, j]
    for c in prange(d):
        for t in range(T):
            for j in range(m):
                out[c, j] += bufs[t, c, j]


def make_blocks(*, nnz: int, block_nnz: int, cols: int, per_row: int, kind: str,
                seed: int) -> list[sp.csr_matrix]:
    """Row blocks of a random CSR matrix (sorted, unique column ids per row)."""
    rng = np.random.default_rng(seed)
    blocks = []
    rows_per_block = max(1, block_nnz // per_row)
    left = nnz
    while left > 0:
        n_b = min(rows_per_block, max(1, left // per_row))
        size = n_b * per_row
        if kind == "uniform":
            idx = rng.integers(0, cols, size=size)
        else:  # power law over column ids: low ids are frequent
            idx = np.minimum((rng.pareto(1.1, size=size) * 10).astype(np.int64), cols - 1)
        idx = idx.reshape(n_b, per_row)
        idx.sort(axis=1)
        X = sp.csr_matrix(
            (rng.random(size, dtype=np.float32), idx.reshape(-1).astype(np.int32),
             np.arange(0, size + 1, per_row, dtype=np.int64)),
            shape=(n_b, cols),
        )
        X.sum_duplicates()
        blocks.append(X)
        left -= size
    return blocks


def _best(fn, repeat: int) -> float:
    best = np.inf
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def bench_set(blocks, *, m: int, repeat: int, threads: int, seed: int) -> list[dict]:
    rng = np.random.default_rng(seed)
    d = blocks[0].shape[1]
    B = rng.standard_normal((d, m))
    Ds = [rng.standard_normal((X.shape[0], m)) for X in blocks]
    outs = [np.empty((X.shape[0], m)) for X in blocks]
    acc = np.zeros((d, m))
    nnz = sum(X.nnz for X in blocks)

    def ours_mm():
        for X, o in zip(blocks, outs, strict=True):
            csr_matmul_dense(X.indptr, X.indices, X.data, B, o)

    def scipy_mm():
        for X in blocks:
            X @ B

    def ours_tm():
        acc[...] = 0.0
        for X, D in zip(blocks, Ds, strict=True):
            csr_t_matmul_accumulate(X.indptr, X.indices, X.data, D, acc)

    bufs = np.zeros((threads, d, m))

    def private_tm():
        acc[...] = 0.0
        for X, D in zip(blocks, Ds, strict=True):
            _t_matmul_private_buffers(X.indptr, X.indices, X.data, D, bufs, acc)

    def scipy_tm():
        acc[...] = 0.0
        for X, D in zip(blocks, Ds, strict=True):
            acc.__iadd__(X.T @ D)

    def _csc(X):
        return block_csc(X.indptr, X.indices, X.data, d)

    def csc_mm():
        for X, o in zip(blocks, outs, strict=True):
            csc_matmul_dense(_csc(X), B, o)

    def csc_tm():
        acc[...] = 0.0
        for X, D in zip(blocks, Ds, strict=True):
            csc_t_matmul_accumulate(_csc(X), D, acc)

    def csc_both():
        acc[...] = 0.0
        for X, D, o in zip(blocks, Ds, outs, strict=True):
            T = _csc(X)
            csc_matmul_dense(T, B, o)
            csc_t_matmul_accumulate(T, D, acc)

    def scipy_both():
        scipy_mm()
        scipy_tm()

    X0 = blocks[0]  # compile (and check) before timing
    o0 = np.empty((X0.shape[0], m))
    csr_matmul_dense(X0.indptr, X0.indices, X0.data, B, o0)
    if not np.allclose(o0, X0 @ B, rtol=1e-5, atol=1e-6):
        raise SystemExit("bench_kernels: csr_matmul_dense disagrees with scipy")
    a0 = np.zeros((d, m))
    csr_t_matmul_accumulate(X0.indptr, X0.indices, X0.data, Ds[0], a0)
    if not np.allclose(a0, X0.T @ Ds[0], rtol=1e-5, atol=1e-6):
        raise SystemExit("bench_kernels: csr_t_matmul_accumulate disagrees with scipy")

    _t_matmul_private_buffers(X0.indptr, X0.indices, X0.data, Ds[0], bufs, np.zeros((d, m)))
    T0 = _csc(X0)
    c0, ca = np.empty_like(o0), np.zeros((d, m))
    csc_matmul_dense(T0, B, c0)
    csc_t_matmul_accumulate(T0, Ds[0], ca)
    if not (np.array_equal(c0, o0) and np.array_equal(ca, a0)):
        raise SystemExit("bench_kernels: the transposed-block kernels disagree with the CSR ones")
    rows = []
    t_sc_mm = _best(scipy_mm, repeat)
    t_sc_tm = _best(scipy_tm, repeat)
    t_sc_both = _best(scipy_both, repeat)
    for nt in sorted({1, threads}):
        numba.set_num_threads(nt)
        t_mm = _best(ours_mm, repeat)
        t_tm = _best(ours_tm, repeat)
        t_pb = _best(private_tm, repeat) if nt == threads else np.nan
        t_cm, t_ct, t_cb = _best(csc_mm, repeat), _best(csc_tm, repeat), _best(csc_both, repeat)
        for op, ours, base in (("X @ B", t_mm, t_sc_mm), ("X^T @ D", t_tm, t_sc_tm),
                               ("X^T @ D*", t_pb, t_sc_tm), ("csc X @ B", t_cm, t_sc_mm),
                               ("csc X^T @ D", t_ct, t_sc_tm), ("csc both", t_cb, t_sc_both)):
            if not np.isfinite(ours):
                continue
            rows.append({"op": op, "m": m, "threads": nt, "nnz": nnz, "blocks": len(blocks),
                         "ours_s": ours, "scipy_s": base, "speedup": base / ours,
                         "ours_mnnz_per_s": nnz / ours / 1e6})
    numba.set_num_threads(threads)
    return rows


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=None, help="directory for bench_kernels.json")
    ap.add_argument("--nnz", type=int, default=20_000_000)
    ap.add_argument("--block-nnz", type=int, default=1_000_000)
    ap.add_argument("--cols", type=int, default=1 << 20)
    ap.add_argument("--per-row", type=int, default=100)
    ap.add_argument("--m", type=int, nargs="+", default=[8, 32])
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    threads = numba.get_num_threads()
    results = []
    for kind in ("uniform", "skewed"):
        blocks = make_blocks(nnz=args.nnz, block_nnz=args.block_nnz, cols=args.cols,
                             per_row=args.per_row, kind=kind, seed=args.seed)
        for m in args.m:
            for row in bench_set(blocks, m=m, repeat=args.repeat, threads=threads,
                                 seed=args.seed):
                row["columns"] = kind
                results.append(row)
        del blocks
    head = f"{'columns':<8} {'op':<11} {'m':>3} {'thr':>3} {'nnz':>10} " \
           f"{'ours s':>8} {'scipy s':>8} {'speedup':>8} {'Mnnz/s':>8}"
    print(head)
    print("-" * len(head))
    for r in results:
        print(f"{r['columns']:<8} {r['op']:<11} {r['m']:>3} {r['threads']:>3} {r['nnz']:>10} "
              f"{r['ours_s']:>8.3f} {r['scipy_s']:>8.3f} {r['speedup']:>8.2f} "
              f"{r['ours_mnnz_per_s']:>8.1f}")
    if args.out:
        out = Path(args.out)
        out.mkdir(parents=True, exist_ok=True)
        atomic_write_json(out / "bench_kernels.json", {
            "benchmark": "kernels", "baseline": "scipy.sparse in the same run",
            "numba_threads": threads, "threading_layer": numba.threading_layer(),
            "settings": vars(args), "results": results})
        print(f"wrote {out / 'bench_kernels.json'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
