"""Benchmark: one solver-style gradient pass over a store.

Generates (once, cached in ``--work``) an invented store: hashed word counts of
fictional support tickets routed to one of ``k`` teams (default 200k rows x
2^18 word ids x ~100 words per row = ~20 M nonzeros, 200 teams), zarr, the
default codec. At rank 16 with 8 power and 8 expansion columns it times, in
the same run:

* ``pass``: :func:`ranktide.passes.gradient.gradient_pass` over the store (our
  kernels and engine; serial backend with read-ahead, and the threads backend);
* ``floor``: the read-only floor — reading and decoding every block, nothing
  else;
* ``kernels``: the same pass over the matrix already in memory (our kernels
  and engine, no I/O);
* ``scipy``: the same arithmetic with scipy.sparse products and numpy on the
  whole in-memory matrix (the baseline).

Targets (issue 3): ``scipy / kernels >= 2`` on 2 cores;
``pass <= 1.25 * max(floor, kernels)``; and the peak RSS of a pass over a 4x
larger store (``--rss``, each pass in a fresh subprocess) within 10% of the
smaller one's. Each timing is the best of ``--repeat`` runs (the machine is
shared).

With ``--floors`` it instead measures, in one run and for each rank of ``--ranks``
(default 0 and 24; k = ``--outputs``, default 500 in this mode), the pass
against its floors (issue 14):

* ``read floor``: reading and decoding every block, nothing else;
* ``compute floor``: the sparse products alone (``X [U, Psi]`` and
  ``X^T (R [V, Omega])`` per block with the kernels of ``kernels.csc`` —
  transposition included — or ``kernels.sparse``, whichever path is faster,
  plain sums, no compensation) plus the pure numpy matmuls of the same shapes
  at BLAS rates (float64, numpy's BLAS threads): ``X U @ diag(s) V^T``
  (n_b x r times r x k), ``R^T @ X [U, Psi]`` (k x n_b times n_b x q) and
  ``R @ [V, Omega]`` (n_b x k times k x m) on every block;
* ``pass``: :func:`ranktide.passes.gradient.gradient_pass` over the store
  (serial backend, profiled: seconds per phase);

and prints ``pass / max(read floor, compute floor)`` (target <= 1.5), and for
the record the pass's CPU seconds over the compute floor's (``cpu ratio``;
threads that busy-wait count as CPU time, the floor's BLAS threads too). Each
figure is the best of ``--repeat`` interleaved runs. At
rank r the request has ``p = 6`` power columns and ``p' = 2r + 6`` expansion
columns (r rotations, 6 new atoms, r momentum directions), so ``q = 3r + 6``
and ``m = r + 6`` (r = 24: q = 78, m = 30). Benchmark BLAS as users run it: where
OPENBLAS_CORETYPE is set for old OpenBLAS builds, unset it (and
OPENBLAS_L2_SIZE) for this command; the JSON records the BLAS kernel in use.

Usage::

    .venv/bin/python tools/bench_pass.py --out bench-out [--rows 200000] [--rss]
    env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE .venv/bin/python tools/bench_pass.py \
        --floors --out bench-out [--rows 200000] [--ranks 0,24]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numba
import numpy as np
import scipy.sparse as sp
from threadpoolctl import threadpool_info

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from ranktide.atomic import atomic_write_json  # noqa: E402
from ranktide.kernels import products  # noqa: E402
from ranktide.kernels.csc import block_csc, csc_matmul_dense, csc_t_matmul_accumulate  # noqa: E402
from ranktide.kernels.sparse import csr_matmul_dense, csr_t_matmul_accumulate  # noqa: E402
from ranktide.passes.engine import PassProfile  # noqa: E402
from ranktide.passes.gradient import PassRequest, gradient_pass  # noqa: E402
from ranktide.store import create_store, open_store  # noqa: E402
from ranktide.store.memory_source import MemorySource  # noqa: E402

RANK, POWER = 16, 8


# ----------------------------------------------------------------------------- data
def _rows(rng: np.random.Generator, m: int, d: int, per_row: int, k: int):
    """``m`` rows of invented word counts (skewed word ids) and their team ids."""
    # word ids skewed towards small ids, as hashed vocabularies are
    ids = np.minimum((d * rng.random((m, per_row)) ** 2).astype(np.int64), d - 1)
    ids.sort(axis=1)
    keep = np.ones_like(ids, dtype=bool)
    keep[:, 1:] = ids[:, 1:] != ids[:, :-1]
    counts = keep.sum(axis=1)
    indptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    indices = ids[keep].astype(np.int32)
    data = (1.0 + rng.poisson(0.4, indices.shape[0])).astype(np.float32)
    teams = rng.integers(0, k, m).astype(np.int32)
    return indptr, indices, data, teams


def make_store(path: Path, *, rows: int, d: int, per_row: int, k: int, seed: int) -> Path:
    """Write the invented store at ``path`` in bounded memory (skipped if present)."""
    if path.exists():
        return path
    rng = np.random.default_rng(seed)
    writer = create_store(path, n_cols=d, kind="classes", n_outputs=k,
                          names=[f"team-{j:03d}" for j in range(k)])
    with writer:
        step = 20_000
        for a in range(0, rows, step):
            ip, ind, dat, teams = _rows(rng, min(step, rows - a), d, per_row, k)
            writer.append(ip, ind, dat)
            writer.append_targets(classes=teams)
        writer.commit()
    return path


def _request(d: int, k: int, seed: int = 1) -> PassRequest:
    rng = np.random.default_rng(seed)
    U = np.linalg.qr(rng.standard_normal((d, RANK)))[0]
    V = np.linalg.qr(rng.standard_normal((k, RANK)))[0]
    s = np.sort(rng.random(RANK))[::-1].copy()
    Omega = np.linalg.qr(rng.standard_normal((k, POWER)))[0]
    Psi = np.linalg.qr(rng.standard_normal((d, POWER)))[0]
    return PassRequest("softmax", U, s, V, 0.1 * rng.standard_normal(k), Omega=Omega, Psi=Psi)


# ----------------------------------------------------------------------------- baselines
def scipy_pass(X: sp.csr_matrix, y: np.ndarray, req: PassRequest) -> dict[str, Any]:
    """The pass's arithmetic with scipy.sparse and numpy on the whole matrix."""
    r = req.rank
    XQ = X @ np.hstack([req.U, req.Psi])
    Z = (XQ[:, :r] * req.s) @ req.V.T + req.b
    m = Z.max(axis=1, keepdims=True)
    E = np.exp(Z - m)
    tot = E.sum(axis=1, keepdims=True)
    rows = np.arange(Z.shape[0])
    loss = float(np.sum(m[:, 0] + np.log(tot[:, 0]) - Z[rows, y]))
    R = E / tot
    R[rows, y] -= 1.0
    n = X.shape[0]
    R /= n
    G_VO = X.T @ (R @ np.hstack([req.V, req.Omega]))
    T = R.T @ XQ
    return {"loss": loss / n, "grad_b": R.sum(axis=0), "G_VO": G_VO, "Gt_U": T[:, :r],
            "Gt_Psi": T[:, r:]}


def read_floor(store_path: Path, block_bytes: int) -> float:
    """Seconds to read and decode every block, nothing else."""
    with open_store(store_path) as st:
        t0 = time.perf_counter()
        for a, b in st.block_ranges(block_bytes=block_bytes):
            st.read_block(a, b)
        return time.perf_counter() - t0


def load_whole(store_path: Path) -> tuple[sp.csr_matrix, np.ndarray]:
    with open_store(store_path) as st:
        blocks = list(st.blocks(block_bytes=64 * 2**20))
        return (sp.vstack([b.X for b in blocks], format="csr"),
                np.concatenate([b.targets for b in blocks]))


_CPU: dict[int, float] = {}


def _best(fn, repeat: int) -> tuple[float, Any]:
    """Best wall seconds of ``repeat`` runs (the CPU seconds of that run go to ``_CPU``)."""
    best, out = float("inf"), None
    for _ in range(repeat):
        c0, t0 = time.process_time(), time.perf_counter()
        out = fn()
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
        if wall < best:
            best = wall
            _CPU[id(fn)] = cpu
    return best, out


def _timed(fn, repeat: int) -> tuple[float, float, Any]:
    best, out = _best(fn, repeat)
    return best, _CPU.pop(id(fn)), out


def _rel(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.abs(a - b).max() / max(np.abs(b).max(), 1e-300))


# ----------------------------------------------------------------------------- RSS child
def _peak_rss() -> int:
    """Peak RSS of this process in bytes.

    ``VmHWM`` from ``/proc/self/status`` (Linux): unlike ``ru_maxrss``, it is
    not inherited from the parent across fork + exec.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def child_rss(store_path: str, block_bytes: int, backend: str) -> None:
    """Run one pass and print its peak RSS (a fresh process per store)."""
    with open_store(store_path) as st:
        n, d = st.shape
        req = _request(d, int(st.n_outputs))
        before = _peak_rss()
        res = gradient_pass(st, req, block_bytes=block_bytes, backend=backend)
        peak = _peak_rss()
    print(json.dumps({"rows": res.n_rows, "peak_rss": peak, "before_pass_rss": before}))


def rss_pair(small: Path, large: Path, block_bytes: int, backend: str) -> dict[str, Any]:
    out = {}
    for name, path in (("small", small), ("large", large)):
        proc = subprocess.run([sys.executable, __file__, "--child-rss", str(path),
                               "--block-bytes", str(block_bytes), "--backend", backend],
                              capture_output=True, text=True, check=True, cwd=ROOT)
        out[name] = json.loads(proc.stdout.strip().splitlines()[-1])
    out["ratio"] = out["large"]["peak_rss"] / out["small"]["peak_rss"]
    return out


# ----------------------------------------------------------------------------- floors
FLOOR_POWER = 6


def _floor_request(d: int, k: int, rank: int, seed: int = 1) -> PassRequest:
    """A softmax request at ``rank`` with 6 power and ``2 rank + 6`` expansion columns."""
    rng = np.random.default_rng(seed)
    p_exp = 2 * rank + 6
    U = np.linalg.qr(rng.standard_normal((d, rank + p_exp)))[0]
    V = np.linalg.qr(rng.standard_normal((k, rank + FLOOR_POWER)))[0]
    s = np.sort(rng.random(rank))[::-1].copy()
    return PassRequest("softmax", U[:, :rank], s, V[:, :rank], 0.1 * rng.standard_normal(k),
                       Omega=V[:, rank:], Psi=U[:, rank:])


def sparse_floor(blocks: list[sp.csr_matrix], Q: np.ndarray, m: int) -> dict[str, float]:
    """Seconds of the two sparse products alone over ``blocks``, on each path.

    ``X Q`` and ``acc += X^T D`` (D: n_b x m) per block: the transposed-block
    kernels (transposition included) and the CSR kernels; plain sums.
    """
    rng = np.random.default_rng(2)
    d = Q.shape[0]
    acc = np.zeros((d, m))
    nmax = max(X.shape[0] for X in blocks)
    D = rng.standard_normal((nmax, m))
    out = np.empty((nmax, Q.shape[1]))
    t0 = time.perf_counter()
    for X in blocks:
        n_b = X.shape[0]
        T = block_csc(X.indptr, X.indices, X.data, d)
        csc_matmul_dense(T, Q, out[:n_b])
        csc_t_matmul_accumulate(T, D[:n_b], acc)
    t_csc = time.perf_counter() - t0
    t0 = time.perf_counter()
    for X in blocks:
        n_b = X.shape[0]
        csr_matmul_dense(X.indptr, X.indices, X.data, Q, out[:n_b])
        csr_t_matmul_accumulate(X.indptr, X.indices, X.data, D[:n_b], acc)
    t_csr = time.perf_counter() - t0
    return {"csc": t_csc, "csr": t_csr}


def dense_floor(rows: list[int], k: int, r: int, q: int, m: int,
                dtype: type = np.float64) -> float:
    """Seconds of the pass's n_b x k matmuls alone (numpy, BLAS) over blocks of ``rows``.

    Per block: ``A @ B`` (n_b x r times r x k, the scores), ``R^T @ XQ``
    (k x n_b times n_b x q) and ``R @ VO`` (n_b x k times k x m).
    """
    rng = np.random.default_rng(3)
    nmax = max(rows)
    A = rng.standard_normal((nmax, r)).astype(dtype)
    B = rng.standard_normal((r, k)).astype(dtype)
    R = rng.standard_normal((nmax, k)).astype(dtype)
    XQ = rng.standard_normal((nmax, q)).astype(dtype)
    VO = rng.standard_normal((k, m)).astype(dtype)
    S = np.empty((nmax, k), dtype=dtype)
    t0 = time.perf_counter()
    for n_b in rows:
        if r:
            np.matmul(A[:n_b], B, out=S[:n_b])
        R[:n_b].T @ XQ[:n_b]
        R[:n_b] @ VO
    return time.perf_counter() - t0


def _blas_info() -> dict[str, Any]:
    info = {"OPENBLAS_CORETYPE": os.environ.get("OPENBLAS_CORETYPE"),
            "OPENBLAS_L2_SIZE": os.environ.get("OPENBLAS_L2_SIZE"),
            "numba_threads": int(numba.get_num_threads())}
    info["blas"] = [{key: lib.get(key) for key in ("internal_api", "version", "architecture",
                                                 "num_threads")}
                    for lib in threadpool_info() if lib.get("user_api") == "blas"]
    return info


def floors_main(args: argparse.Namespace, out: Path, work: Path) -> int:
    """The ``--floors`` mode: pass time against read and compute floors, per rank."""
    k = args.outputs
    tag = f"{args.rows}x{args.cols}x{args.per_row}x{k}"
    store = make_store(work / f"tickets-{tag}.zarr", rows=args.rows, d=args.cols,
                       per_row=args.per_row, k=k, seed=0)
    bb = args.block_bytes
    with open_store(store) as st:
        n, d = st.shape
        nnz = st.nnz
        ranges = st.block_ranges(block_bytes=bb)
    X, y = load_whole(store)
    blocks = [X[a:b] for a, b in ranges]
    for Xb in blocks:
        Xb.has_sorted_indices = True
    rows_per_block = [b - a for a, b in ranges]
    load0 = os.getloadavg()[0]
    report: dict[str, Any] = {
        "config": {"rows": n, "cols": d, "nnz": nnz, "outputs": k, "block_bytes": bb,
                   "chunk_bytes": getattr(products, "CHUNK_BYTES", None),
                   "blocks": len(ranges), "rows_per_block": int(np.median(rows_per_block)),
                   "repeat": args.repeat, "store": str(store)},
        "environment": _blas_info(), "ranks": {}}
    table = [("rank (q, m)", "pass s", "read s", "compute s", "sparse s", "blas s",
              "pass/max", "cpu ratio", "phases (s)")]
    for rank in [int(v) for v in args.ranks.split(",")]:
        req = _floor_request(d, k, rank)
        Q = np.hstack([req.U, req.Psi])
        q, m = Q.shape[1], rank + FLOOR_POWER
        warm = MemorySource(X[: sum(rows_per_block[:4])], y[: sum(rows_per_block[:4])],
                            n_outputs=k)
        gradient_pass(warm, req, block_bytes=bb)  # compile; the path chooser's probes
        best: dict[str, float] = {}
        cpu: dict[str, float] = {}
        prof_best = None
        for _ in range(args.repeat):  # interleaved, best of each (the machine is shared)
            c0 = time.process_time()
            cand = {"read": read_floor(store, bb)}
            cc = {"read": time.process_time() - c0}
            c0 = time.process_time()
            sf = sparse_floor(blocks, Q, m)
            cand["sparse_csc"], cand["sparse_csr"] = sf["csc"], sf["csr"]
            cc["sparse"] = time.process_time() - c0
            c0 = time.process_time()
            cand["blas_f64"] = dense_floor(rows_per_block, k, rank, q, m)
            cc["blas_f64"] = time.process_time() - c0
            cand["blas_f32"] = dense_floor(rows_per_block, k, rank, q, m, np.float32)
            prof = PassProfile()
            c0, t0 = time.process_time(), time.perf_counter()
            gradient_pass(store, req, block_bytes=bb, profile=prof)
            cand["pass"] = time.perf_counter() - t0
            cc["pass"] = time.process_time() - c0
            if cand["pass"] < best.get("pass", np.inf):
                prof_best = prof
            for key, val in cand.items():
                best[key] = min(best.get(key, np.inf), val)
            for key, val in cc.items():
                cpu[key] = min(cpu.get(key, np.inf), val)
        sparse = min(best["sparse_csc"], best["sparse_csr"])
        compute = sparse + best["blas_f64"]
        ratio = best["pass"] / max(best["read"], compute)
        tot = prof_best.totals()
        phases = {key[6:]: round(val, 3) for key, val in tot.items() if key.startswith("phase:")}
        phases["wait_for_read"] = round(tot["wait_s"], 3)
        report["ranks"][str(rank)] = {
            "q": q, "m": m, "seconds": {**best, "sparse_floor": sparse,
                                        "compute_floor": compute},
            "pass_over_max_floor": ratio, "pass_phases_s": phases,
            "cpu_seconds": {**cpu, "compute_floor": cpu["sparse"] + cpu["blas_f64"]},
            "cpu_pass_over_cpu_compute_floor": cpu["pass"] / (cpu["sparse"] + cpu["blas_f64"]),
            "target pass <= 1.5 max(floors)": ratio <= 1.5}
        table.append((f"{rank} ({q}, {m})", f"{best['pass']:.2f}", f"{best['read']:.2f}",
                      f"{compute:.2f}", f"{sparse:.2f}", f"{best['blas_f64']:.2f}",
                      f"{ratio:.2f}",
                      f"{report['ranks'][str(rank)]['cpu_pass_over_cpu_compute_floor']:.2f}",
                      ", ".join(f"{a} {b:.2f}" for a, b in phases.items())))
    report["load_average_1min"] = [load0, os.getloadavg()[0]]
    w = [max(len(r[i]) for r in table) for i in range(len(table[0]))]
    for j, r in enumerate(table):
        print("  ".join(c.ljust(w[i]) if i in (0, 8) else c.rjust(w[i])
                        for i, c in enumerate(r)).rstrip())
        if j == 0:
            print("  ".join("-" * x for x in w))
    print(f"store {n} x {d}, {nnz / 1e6:.1f} M nnz, k = {k}, {len(ranges)} blocks of "
          f"~{report['config']['rows_per_block']} rows; load average "
          f"{load0:.1f} -> {report['load_average_1min'][1]:.1f}; BLAS "
          f"{report['environment']['blas']}")
    atomic_write_json(out / "bench_pass_floors.json", report)
    print(f"wrote {out / 'bench_pass_floors.json'}")
    return 0


# ----------------------------------------------------------------------------- main
def _table(rows: list[tuple[str, str, str]]) -> str:
    w = [max(len(r[i]) for r in rows) for i in range(3)]
    lines = []
    for j, r in enumerate(rows):
        lines.append(f"{r[0].ljust(w[0])}  {r[1].rjust(w[1])}  {r[2].ljust(w[2])}".rstrip())
        if j == 0:
            lines.append("  ".join("-" * x for x in w))
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="bench-out", help="directory for bench_pass.json")
    ap.add_argument("--work", default=None, help="where the generated stores live "
                    "(default OUT/bench_pass_data)")
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--cols", type=int, default=2**18)
    ap.add_argument("--per-row", type=int, default=105, help="words drawn per row")
    ap.add_argument("--outputs", type=int, default=None,
                    help="classes (default 200; 500 with --floors)")
    ap.add_argument("--block-bytes", type=int, default=16 * 2**20)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--rss", action="store_true", help="also compare peak RSS with a 4x store")
    ap.add_argument("--floors", action="store_true",
                    help="measure pass / max(read floor, compute floor) per rank instead")
    ap.add_argument("--ranks", default="0,24", help="with --floors: ranks to measure")
    ap.add_argument("--chunk-bytes", type=int, default=None,
                    help="bytes of scores per dense row chunk (default: the kernels' own)")
    ap.add_argument("--backend", default="serial", help=argparse.SUPPRESS)
    ap.add_argument("--child-rss", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child_rss:
        child_rss(args.child_rss, args.block_bytes, args.backend)
        return 0

    if args.outputs is None:
        args.outputs = 500 if args.floors else 200
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    work = Path(args.work) if args.work else out / "bench_pass_data"
    work.mkdir(parents=True, exist_ok=True)
    if args.chunk_bytes is not None:
        products.CHUNK_BYTES = int(args.chunk_bytes)
    if args.floors:
        return floors_main(args, out, work)
    tag = f"{args.rows}x{args.cols}x{args.per_row}x{args.outputs}"
    t0 = time.perf_counter()
    small = make_store(work / f"tickets-{tag}.zarr", rows=args.rows, d=args.cols,
                       per_row=args.per_row, k=args.outputs, seed=0)
    gen_s = time.perf_counter() - t0
    with open_store(small) as st:
        n, d = st.shape
        nnz, k = st.nnz, int(st.n_outputs)
        n_blocks = len(st.block_ranges(block_bytes=args.block_bytes))
    req = _request(d, k)
    X, y = load_whole(small)
    mem = MemorySource(X, y, n_outputs=k)
    bb = args.block_bytes
    gradient_pass(MemorySource(X[:100], y[:100], n_outputs=k), req)  # load the kernels

    t_floor, c_floor, _ = _timed(lambda: read_floor(small, bb), args.repeat)
    t_kern, c_kern, res_mem = _timed(lambda: gradient_pass(mem, req, block_bytes=bb),
                                     args.repeat)
    t_pass, c_pass, res = _timed(lambda: gradient_pass(small, req, block_bytes=bb), args.repeat)
    t_thr, c_thr, res_thr = _timed(
        lambda: gradient_pass(small, req, block_bytes=bb, backend="threads"), args.repeat)
    t_scipy, c_scipy, ref = _timed(lambda: scipy_pass(X, y, req), args.repeat)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else None
    agree = {name: _rel(getattr(res, name), ref[name])
             for name in ("grad_b", "G_VO", "Gt_U", "Gt_Psi")}
    agree["loss"] = abs(res.loss - ref["loss"]) / abs(ref["loss"])
    agree["threads_vs_serial"] = _rel(res_thr.G_VO, res.G_VO)

    report: dict[str, Any] = {
        "config": {"rows": n, "cols": d, "nnz": nnz, "outputs": k, "rank": RANK,
                   "omega_cols": POWER, "psi_cols": POWER, "block_bytes": bb,
                   "blocks": n_blocks, "repeat": args.repeat, "store": str(small),
                   "generate_s": gen_s},
        "seconds": {"pass_serial": t_pass, "pass_threads": t_thr, "read_floor": t_floor,
                    "in_memory_kernels": t_kern, "scipy_in_memory": t_scipy},
        "cpu_seconds": {"pass_serial": c_pass, "pass_threads": c_thr, "read_floor": c_floor,
                        "in_memory_kernels": c_kern, "scipy_in_memory": c_scipy},
        "load_average_1min": load,
        "ratios": {"scipy_over_kernels": t_scipy / t_kern,
                   "pass_over_max_floor_kernels": t_pass / max(t_floor, t_kern),
                   "threads_pass_over_max_floor_kernels": t_thr / max(t_floor, t_kern)},
        "agreement_rel": agree,
    }
    report["targets"] = {
        "scipy_over_kernels >= 2": report["ratios"]["scipy_over_kernels"] >= 2,
        "pass <= 1.25 max(floor, kernels)":
            report["ratios"]["pass_over_max_floor_kernels"] <= 1.25,
    }
    if args.rss:
        large = make_store(work / f"tickets-{4 * args.rows}x{args.cols}x{args.per_row}x"
                           f"{args.outputs}.zarr", rows=4 * args.rows, d=args.cols,
                           per_row=args.per_row, k=args.outputs, seed=1)
        report["rss"] = {be: rss_pair(small, large, bb, be) for be in ("serial", "threads")}
        report["targets"]["peak RSS 4x store within 10%"] = all(
            v["ratio"] <= 1.10 for v in report["rss"].values())

    rows = [("figure", "value", "note"),
            ("store", f"{n} x {d}", f"{nnz / 1e6:.1f} M nnz, k = {k}, {n_blocks} blocks"),
            ("pass (serial)", f"{t_pass:.3f} s", f"over the store; cpu {c_pass:.2f} s"),
            ("pass (threads)", f"{t_thr:.3f} s", f"threads backend; cpu {c_thr:.2f} s"),
            ("read-only floor", f"{t_floor:.3f} s", f"read + decode only; cpu {c_floor:.2f} s"),
            ("in-memory kernels", f"{t_kern:.3f} s", f"matrix in memory; cpu {c_kern:.2f} s"),
            ("scipy in memory", f"{t_scipy:.3f} s", f"scipy + numpy; cpu {c_scipy:.2f} s"),
            ("load average", f"{load:.1f}" if load is not None else "n/a",
             "other work on the machine during the run"),
            ("scipy / kernels", f"{t_scipy / t_kern:.2f}", "target >= 2"),
            ("pass / max(floor, kernels)",
             f"{report['ratios']['pass_over_max_floor_kernels']:.2f}", "target <= 1.25"),
            ("max rel. diff vs scipy", f"{max(agree.values()):.1e}", "G_VO, Gt_U, Gt_Psi, ...")]
    if args.rss:
        for be, v in report["rss"].items():
            rows.append((f"peak RSS 4x / 1x ({be})", f"{v['ratio']:.3f}",
                         f"{v['small']['peak_rss'] / 2**20:.0f} -> "
                         f"{v['large']['peak_rss'] / 2**20:.0f} MiB, target <= 1.10"))
    print(_table(rows))
    atomic_write_json(out / "bench_pass.json", report)
    print(f"wrote {out / 'bench_pass.json'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
