"""Benchmark: the greedy low-rank solver against the dense reference solver.

A planted low-rank softmax problem (sparse rows with Zipf-like feature
frequencies) at lam = lam_scale * lam_max. Each solver runs in its own
subprocess (so peak RSS is its own; psutil polls it); every pass / objective /
time record comes back as JSON. F* is the lowest objective of a long greedy run
(certified by its gap estimate). Reported: passes and seconds to reach 1e-3
and 1e-4 relative suboptimality, and peak RSS three ways: the whole process;
above its RSS once the data is loaded; and above its fixed floor (the data
loaded and the solver warmed up on a tiny problem: interpreter, libraries,
compiled kernels), which is what the solver itself adds.
The ``greedy-budget`` run gives the greedy solver a memory budget
(``--greedy-memory``), as a user short of memory would.

Targets (issue 4): the greedy solver needs >= 50x fewer passes and >= 10x less
time than the reference to 1e-4, and >= 5x smaller peak RSS.

Reference passes count every evaluation of the loss over the data: the gradient
at the extrapolated point and every backtracking trial.

Usage::

    .venv/bin/python tools/bench_solver.py --out bench-out            # full size
    .venv/bin/python tools/bench_solver.py --out /tmp/b --small       # smoke run

The long runs can be made one at a time and summarized together::

    .venv/bin/python tools/bench_solver.py --out R --solvers reference --cap 6600
    .venv/bin/python tools/bench_solver.py --out G --solvers greedy --tol 1e-8 --max-passes 150
    .venv/bin/python tools/bench_solver.py --out B --solvers greedy-budget --greedy-memory 96MB \
        --tol 1e-8 --max-passes 90
    .venv/bin/python tools/bench_solver.py --out R --from-runs --merge-runs \
        G/bench_solver_runs.json B/bench_solver_runs.json

Peak memory where the fixed floor no longer dominates (short runs; only the
peak RSS columns mean anything there)::

    .venv/bin/python tools/bench_solver.py --out M --n 200000 --solvers greedy-budget,reference \
        --max-passes 32 --max-iter 3 --greedy-memory 96MB
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

THRESHOLDS = (1e-3, 1e-4)
BLAS_THREADS = [1]
NUMBA_THREADS = [0]


# --------------------------------------------------------------------------- data


def make_problem(*, n: int, d: int, k: int, nnz_row: int, rank: int, seed: int):
    """Planted low-rank softmax data: X (n, d) CSR float32 with unit-norm rows, y (n,) int32.

    Feature j is drawn with probability proportional to 1 / (j + 10) (Zipf-like);
    duplicates within a row are merged, so rows have at most ``nnz_row`` entries.
    Classes are sampled from softmax(X W_true + b_true) with W_true of rank ``rank``.
    """
    rng = np.random.default_rng(seed)
    p = 1.0 / (np.arange(d) + 10.0)
    p /= p.sum()
    cols = np.sort(rng.choice(d, size=(n, nnz_row), p=p), axis=1)
    keep = np.ones_like(cols, dtype=bool)
    keep[:, 1:] = cols[:, 1:] != cols[:, :-1]
    counts = keep.sum(axis=1)
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])
    indices = cols[keep].astype(np.int32)
    vals = 1.0 + rng.exponential(1.0, size=indices.size)
    X = sp.csr_matrix((vals, indices, indptr), shape=(n, d))
    norms = np.sqrt(np.asarray(X.multiply(X).sum(axis=1)).ravel())
    X = sp.diags(1.0 / norms) @ X
    X = sp.csr_matrix(X, dtype=np.float32)
    A = rng.standard_normal((d, rank))
    B = rng.standard_normal((k, rank))
    Z = np.asarray(X @ A) @ B.T
    Z *= 3.0 / Z.std()
    b_true = -0.7 * np.log1p(np.arange(k))
    y = np.argmax(Z + b_true + rng.gumbel(size=Z.shape), axis=1).astype(np.int32)
    return X, y


def save_problem(path: Path, X: sp.csr_matrix, y: np.ndarray) -> None:
    from ranktide.atomic import save_npz

    save_npz(path, {"indptr": X.indptr.astype(np.int64), "indices": X.indices,
                    "data": X.data, "shape": np.array(X.shape), "y": y})


def load_problem(path: Path):
    from ranktide.atomic import load_npz

    z = load_npz(path)
    X = sp.csr_matrix((z["data"], z["indices"], z["indptr"]), shape=tuple(z["shape"]))
    return X, z["y"]


# --------------------------------------------------------------------------- children


def _rss() -> int:
    import psutil

    return int(psutil.Process().memory_info().rss)


def _vm_hwm() -> int:
    """Peak RSS of this process image in bytes (VmHWM; getrusage's ru_maxrss survives exec
    and can report the parent's peak)."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def _tiny_problem():
    """A 400 x 60 softmax problem for warming a child up (imports, compiled kernels)."""
    X, y = make_problem(n=400, d=60, k=5, nnz_row=8, rank=2, seed=1)
    return X, y


def child_greedy(args) -> dict:
    from ranktide.runs.train import train

    X, y = load_problem(Path(args.data))
    base = _rss()
    # the fixed floor: interpreter, libraries, the data and the compiled kernels (numba
    # loads them from its cache on first call); both paths and a budgeted run, so every
    # kernel the real run calls is loaded
    tX, ty = _tiny_problem()
    for kw in ({}, {"dense_gradient": False}, {"memory": "8MB", "dense_gradient": False}):
        train((tX, ty), loss="softmax", lam_scale=0.3, max_passes=3, seed=0, **kw)
    floor = _rss()
    kw = {}
    if args.streaming:
        kw["dense_gradient"] = False
    if args.greedy_memory:
        kw["memory"] = args.greedy_memory
    t0 = time.perf_counter()

    def show(rec):
        print(f"  greedy pass {rec.get('pass')}: F={rec.get('objective')} "
              f"rel_gap={rec.get('rel_gap')} rank={rec.get('rank')} "
              f"t={rec.get('seconds', 0):.1f}s", file=sys.stderr, flush=True)

    res = train((X, y), loss="softmax", lam=args.lam, tol=args.tol, max_passes=args.max_passes,
                max_seconds=args.greedy_cap, seed=0, on_pass=show, **kw)
    wall = time.perf_counter() - t0
    hist = []
    for i, rec in enumerate(res.history):
        obj = rec.get("objective")
        if obj is None:
            continue
        hist.append({"passes": int(rec.get("pass", i + 1)), "objective": float(obj),
                     "seconds": float(rec.get("seconds", float("nan"))),
                     "gap": rec.get("gap_estimate")})
    return {"history": hist, "objective": float(res.objective), "gap": float(res.gap),
            "status": res.status, "message": res.message, "passes": int(res.passes),
            "rank": int(res.rank), "seconds": float(res.seconds), "wall": wall,
            "baseline_rss": base, "floor_rss": floor}


def child_reference(args) -> dict:
    from ranktide.solver.reference import reference_solve

    X, y = load_problem(Path(args.data))
    base = _rss()
    tX, ty = _tiny_problem()
    reference_solve(tX, ty, loss="softmax", lam=1e-3, tol=1e-8, max_iter=20)
    floor = _rss()
    t0 = time.perf_counter()

    def show(rec):
        if rec["iteration"] % 25 == 0:
            print(f"  reference iteration {rec['iteration']}: passes={rec['passes']} "
                  f"F={rec['objective']} t={rec['seconds']:.1f}s", file=sys.stderr, flush=True)

    res = reference_solve(X, y, loss="softmax", lam=args.lam, tol=1e-12,
                          max_iter=args.max_iter, max_seconds=args.cap, callback=show)
    wall = time.perf_counter() - t0
    hist = [{"passes": h["passes"], "objective": h["objective"], "seconds": h["seconds"]}
            for h in res.history]
    return {"history": hist, "objective": float(res.objective), "status": res.status,
            "message": res.message, "passes": int(res.passes), "rank": res.rank(rtol=1e-6),
            "seconds": float(res.seconds), "wall": wall, "iterations": res.iterations,
            "baseline_rss": base, "floor_rss": floor}


def child_lam_max(args) -> dict:
    from ranktide.solver.reference import lam_max_dense

    X, y = load_problem(Path(args.data))
    return {"lam_max": lam_max_dense(X, y, "softmax")}


CHILDREN = {"greedy": child_greedy, "reference": child_reference, "lam_max": child_lam_max}


def run_child(kind: str, data: Path, workdir: Path, extra: list[str]) -> dict:
    """Run one solver in a subprocess; poll its RSS with psutil; return its JSON result."""
    import psutil

    out = workdir / f"{kind}-{len(list(workdir.iterdir()))}.json"
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", kind, "--data", str(data),
           "--result", str(out), *extra]
    env = dict(os.environ)
    if BLAS_THREADS[0]:
        # OpenBLAS's own thread pool is ~20x slower on small factorizations when the
        # cores are shared (measured here); both solvers get the same setting.
        env["OPENBLAS_NUM_THREADS"] = str(BLAS_THREADS[0])
    if NUMBA_THREADS[0]:
        env["NUMBA_NUM_THREADS"] = str(NUMBA_THREADS[0])
    proc = subprocess.Popen(cmd, cwd=str(ROOT), env=env)
    ps = psutil.Process(proc.pid)
    peak = 0
    while proc.poll() is None:
        try:
            peak = max(peak, ps.memory_info().rss)
        except psutil.NoSuchProcess:
            break
        time.sleep(0.05)
    if proc.returncode != 0:
        raise RuntimeError(f"{kind} child failed with exit status {proc.returncode}")
    result = json.loads(out.read_text())
    result["peak_rss"] = max(peak, int(result.get("vm_hwm", 0)))
    return result


# --------------------------------------------------------------------------- figures


def first_reaching(history: list[dict], f_star: float, eps: float):
    """(passes, seconds) of the first record with (F - F*) / |F*| <= eps, or None."""
    for rec in history:
        if (rec["objective"] - f_star) / abs(f_star) <= eps:
            return rec["passes"], rec["seconds"]
    return None


def _cell(x, spec: str) -> str:
    return "-" if x is None else format(x, spec)


def summarize(results: dict, f_star: float) -> tuple[list[dict], dict]:
    rows = []
    for name, res in results.items():
        row = {"solver": name, "status": res["status"], "final_objective": res["objective"],
               "final_rel_subopt": (res["objective"] - f_star) / abs(f_star),
               "passes_total": res["passes"], "seconds_total": res["seconds"],
               "peak_rss_mb": res["peak_rss"] / 2**20,
               "peak_rss_above_data_mb": (res["peak_rss"] - res["baseline_rss"]) / 2**20,
               "floor_rss_mb": res.get("floor_rss", float("nan")) / 2**20,
               "peak_rss_above_floor_mb": (res["peak_rss"] - res.get("floor_rss", float("nan")))
               / 2**20}
        for eps in THRESHOLDS:
            hit = first_reaching(res["history"], f_star, eps)
            row[f"passes_to_{eps:g}"] = None if hit is None else hit[0]
            row[f"seconds_to_{eps:g}"] = None if hit is None else hit[1]
        rows.append(row)
    ratios = {}
    if not rows or rows[-1]["solver"] != "reference":
        return rows, ratios
    r = rows[-1]  # the reference
    for g in rows[:-1]:
        tag = g["solver"]
        for eps in THRESHOLDS:
            for what in ("passes", "seconds"):
                a, b = g[f"{what}_to_{eps:g}"], r[f"{what}_to_{eps:g}"]
                key = f"{tag}: {what} ratio to {eps:g}"
                if a is None:
                    ratios[key] = None
                elif b is None:
                    # the reference did not get there: the ratio is at least its total / greedy's
                    ratios[key] = f">= {r[f'{what}_total'] / a:.3g} (reference not reached)"
                else:
                    ratios[key] = b / a if a else None
        ratios[f"{tag}: peak RSS ratio"] = r["peak_rss_mb"] / g["peak_rss_mb"]
        ratios[f"{tag}: peak RSS above data ratio"] = (
            r["peak_rss_above_data_mb"] / max(g["peak_rss_above_data_mb"], 1e-9))
        ratios[f"{tag}: peak RSS above floor ratio"] = (
            r["peak_rss_above_floor_mb"] / max(g["peak_rss_above_floor_mb"], 1e-9))
    return rows, ratios


def print_table(rows: list[dict], ratios: dict, meta: dict) -> None:
    print(f"problem: n={meta['n']} d={meta['d']} k={meta['k']} nnz={meta['nnz']} "
          f"lam={meta['lam']:.6g} (= {meta['lam_scale']} lam_max) F*={meta['f_star']:.10g} "
          f"(certified rel gap {meta['f_star_rel_gap']:.2e})")
    head = (f"{'solver':<18}{'status':>12}{'passes@1e-3':>13}{'s@1e-3':>10}{'passes@1e-4':>13}"
            f"{'s@1e-4':>10}{'passes':>8}{'seconds':>10}{'final subopt':>14}{'peak MB':>10}"
            f"{'peak-data MB':>14}{'floor MB':>10}")
    print(head)
    print("-" * len(head))
    for r in rows:
        print(f"{r['solver']:<18}{r['status']:>12}"
              f"{_cell(r['passes_to_0.001'], 'd'):>13}{_cell(r['seconds_to_0.001'], '.1f'):>10}"
              f"{_cell(r['passes_to_0.0001'], 'd'):>13}{_cell(r['seconds_to_0.0001'], '.1f'):>10}"
              f"{r['passes_total']:>8d}{r['seconds_total']:>10.1f}"
              f"{r['final_rel_subopt']:>14.2e}{r['peak_rss_mb']:>10.0f}"
              f"{r['peak_rss_above_data_mb']:>14.0f}{r['floor_rss_mb']:>10.0f}")
    print("('-' = not reached within the pass budget / time cap)")
    for key, val in ratios.items():
        print(f"  {key:<44} {val if not isinstance(val, float) else format(val, '.3g')}")


# --------------------------------------------------------------------------- main


def parse(argv):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, help="directory for bench_solver.json")
    ap.add_argument("--n", type=int, default=50_000)
    ap.add_argument("--d", type=int, default=20_000)
    ap.add_argument("--k", type=int, default=200)
    ap.add_argument("--nnz-row", type=int, default=40)
    ap.add_argument("--rank", type=int, default=10, help="rank of the planted weights")
    ap.add_argument("--lam-scale", type=float, default=0.1)
    ap.add_argument("--cap", type=float, default=1200.0, help="reference time cap, seconds")
    ap.add_argument("--greedy-cap", type=float, default=None,
                    help="greedy time budget, seconds (default none)")
    ap.add_argument("--from-runs", action="store_true",
                    help="summarize the runs saved under --out instead of running again")
    ap.add_argument("--max-iter", type=int, default=100_000)
    ap.add_argument("--tol", type=float, default=1e-7, help="greedy tolerance (long run)")
    ap.add_argument("--max-passes", type=int, default=300)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--blas-threads", type=int, default=1,
                    help="OPENBLAS_NUM_THREADS of both solvers (0: leave unset)")
    ap.add_argument("--numba-threads", type=int, default=0,
                    help="NUMBA_NUM_THREADS of both solvers (0: leave unset); on a loaded "
                    "machine OpenMP kernels were ~7x slower per call with 2 threads than 1")
    ap.add_argument("--small", action="store_true", help="smoke run: n=5000 d=2000 k=50")
    ap.add_argument("--no-streaming", action="store_true",
                    help="skip the run that forbids the dense-gradient path")
    ap.add_argument("--solvers", default="greedy,greedy-streaming,reference",
                    help="comma-separated runs to make (of greedy, greedy-streaming, "
                    "greedy-budget, reference); with --merge the others come from the saved runs")
    ap.add_argument("--merge", action="store_true",
                    help="keep the runs saved under --out that this invocation does not make "
                    "(same problem: the data is regenerated from --seed)")
    ap.add_argument("--greedy-memory", default=None,
                    help="memory budget of the greedy-budget run (default 160MB)")
    ap.add_argument("--merge-runs", type=Path, nargs="*", default=[],
                    help="with --from-runs: also take the runs saved in these "
                    "bench_solver_runs.json files (same problem)")
    # child mode (internal)
    ap.add_argument("--child", choices=sorted(CHILDREN), help=argparse.SUPPRESS)
    ap.add_argument("--data", help=argparse.SUPPRESS)
    ap.add_argument("--result", help=argparse.SUPPRESS)
    ap.add_argument("--lam", type=float, help=argparse.SUPPRESS)
    ap.add_argument("--streaming", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child is None and args.out is None:
        ap.error("--out DIR is required")
    if args.small:
        args.n, args.d, args.k = 5000, 2000, 50
    return args


def _run_all(args) -> tuple[dict, float, float, list[int]]:
    """Make the data, then run lam_max, the greedy solver(s) and the reference in subprocesses."""
    with tempfile.TemporaryDirectory(prefix="bench-solver-") as tmp:
        tmpd = Path(tmp)
        data = tmpd / "problem.npz"
        t0 = time.perf_counter()
        X, y = make_problem(n=args.n, d=args.d, k=args.k, nnz_row=args.nnz_row, rank=args.rank,
                            seed=args.seed)
        save_problem(data, X, y)
        shape = [int(X.shape[0]), int(X.shape[1]), int(args.k), int(X.nnz)]
        print(f"data: {X.shape[0]} x {X.shape[1]}, {X.nnz} nonzeros, {args.k} classes "
              f"({time.perf_counter() - t0:.1f} s)", flush=True)
        del X, y
        runs = tmpd / "runs"
        runs.mkdir()
        lam_max = run_child("lam_max", data, runs, [])["lam_max"]
        lam = args.lam_scale * lam_max
        common = ["--lam", repr(lam)]
        greedy = [*common, "--tol", repr(args.tol), "--max-passes", str(args.max_passes)]
        if args.greedy_cap is not None:
            greedy += ["--greedy-cap", repr(args.greedy_cap)]
        wanted = [name.strip() for name in args.solvers.split(",") if name.strip()]
        if args.no_streaming and "greedy-streaming" in wanted:
            wanted.remove("greedy-streaming")
        results = {}
        for name in wanted:
            if name == "greedy":
                results[name] = run_child("greedy", data, runs, greedy)
            elif name == "greedy-streaming":
                results[name] = run_child("greedy", data, runs, [*greedy, "--streaming"])
            elif name == "greedy-budget":
                results[name] = run_child("greedy", data, runs,
                                          [*greedy, "--greedy-memory",
                                                         args.greedy_memory or "160MB"])
            elif name == "reference":
                results[name] = run_child(
                    "reference", data, runs, [*common, "--cap", repr(args.cap),
                                              "--max-iter", str(args.max_iter)])
            else:
                raise SystemExit(f"bench_solver: unknown solver {name!r} in --solvers")
            print(f"{name}: {results[name]['message']}", flush=True)
    return results, lam, lam_max, shape


def main(argv=None) -> int:
    args = parse(argv)
    if args.child:
        res = CHILDREN[args.child](args)
        res["vm_hwm"] = _vm_hwm()
        Path(args.result).write_text(json.dumps(res))
        return 0
    args.out.mkdir(parents=True, exist_ok=True)
    BLAS_THREADS[0] = args.blas_threads
    NUMBA_THREADS[0] = args.numba_threads
    saved = args.out / "bench_solver_runs.json"
    if args.from_runs:
        doc = json.loads(saved.read_text())
        results, lam, lam_max, shape = doc["results"], doc["lam"], doc["lam_max"], doc["shape"]
        for other in args.merge_runs:
            more = json.loads(other.read_text())
            if more["shape"] != shape or not np.isclose(more["lam"], lam, rtol=1e-12):
                raise SystemExit(f"bench_solver: {other} holds another problem")
            results = {**results, **more["results"]}
        results = {k: results[k] for k in sorted(results, key=lambda k: k == "reference")}
    else:
        results, lam, lam_max, shape = _run_all(args)
        if args.merge and saved.exists():
            old = json.loads(saved.read_text())
            if old["shape"] != shape or not np.isclose(old["lam"], lam, rtol=1e-12):
                raise SystemExit(f"bench_solver: {saved} holds another problem; drop --merge")
            results = {**{k: v for k, v in old["results"].items() if k not in results},
                       **results}
        # the reference goes last: summarize() compares every other run with it
        results = {k: results[k] for k in sorted(results, key=lambda k: k == "reference")}
        from ranktide.atomic import atomic_write_json

        atomic_write_json(saved, {"results": results, "lam": lam, "lam_max": lam_max,
                                  "shape": shape})
    # F*: the best objective seen; the long greedy run's gap certifies how close it is.
    best = min(results, key=lambda name: results[name]["objective"])
    f_star = results[best]["objective"]
    g = results.get("greedy", results[best])
    g_gap = float(g.get("gap", float("nan")))  # the reference alone has no gap
    f_lower = g["objective"] - g_gap if np.isfinite(g_gap) else float("nan")
    rows, ratios = summarize(results, f_star)
    meta = {"n": shape[0], "d": shape[1], "k": shape[2], "nnz": shape[3],
            "lam": lam, "lam_max": lam_max, "lam_scale": args.lam_scale, "f_star": f_star,
            "f_star_from": best, "f_star_lower_bound": f_lower,
            "f_star_rel_gap": (f_star - f_lower) / abs(f_star), "reference_cap_s": args.cap,
            "greedy_tol": args.tol, "seed": args.seed, "blas_threads": args.blas_threads,
            "numba_threads": args.numba_threads, "greedy_cap_s": args.greedy_cap,
            "cpu_count": os.cpu_count(),
            "targets": {"passes_ratio_1e-4": 50, "seconds_ratio_1e-4": 10,
                        "peak_rss_ratio": 5}}
    print_table(rows, ratios, meta)
    doc = {"benchmark": "bench_solver", "meta": meta, "rows": rows, "ratios": ratios,
           "histories": {name: res["history"] for name, res in results.items()}}
    from ranktide.atomic import atomic_write_json

    atomic_write_json(args.out / "bench_solver.json", doc)
    print(f"wrote {args.out / 'bench_solver.json'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
