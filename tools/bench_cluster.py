"""Pass throughput: serial backend vs a local dask.distributed cluster.

Generates (or reuses) a store with >= 20 M nonzeros, then times solver-style
gradient passes (rank 16, k = 200) on the serial backend and on ``local:2``.
The per-pass overhead of the cluster backend is measured in the same run as
the pass's wall time minus the longest worker's own work (its block reads and
kernels, summed from the per-block records the workers send back), so it is
the time spent scattering the model, scheduling, and moving and folding the
partials. Also measured: what keeping the cached projections costs (they come
back in the gather).

Target (issue "Beyond one machine"): overhead <= 0.5 s + 10% of the serial pass.

    .venv/bin/python tools/bench_cluster.py --out bench-out [--nnz 20000000]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_store import make_matrix  # noqa: E402

from stream.cluster import cluster_client  # noqa: E402
from stream.gradient_pass import PassRequest, gradient_pass  # noqa: E402
from stream.store import open_store, write_store  # noqa: E402

K = 200
RANK = 16
N_COLS = 1 << 18


def build_store(path: Path, nnz: int, seed: int) -> None:
    if path.exists():
        return
    X, _ = make_matrix(nnz, seed=seed)
    X = X.tocoo()
    X = type(X)((X.data, (X.row, X.col % N_COLS)), shape=(X.shape[0], N_COLS)).tocsr()
    X.sum_duplicates()
    rng = np.random.default_rng(seed + 1)
    y = rng.integers(0, K, X.shape[0]).astype(np.int32)
    write_store(path, X, y)


def request(d: int, seed: int, keep: bool) -> PassRequest:
    rng = np.random.default_rng(seed)
    U, _ = np.linalg.qr(rng.standard_normal((d, RANK)))
    V, _ = np.linalg.qr(rng.standard_normal((K, RANK)))
    return PassRequest(
        loss="softmax", U=U, s=np.linspace(2.0, 0.1, RANK), V=V, b=np.zeros(K),
        Omega=np.linalg.qr(rng.standard_normal((K, 4)))[0],
        Psi=np.linalg.qr(rng.standard_normal((d, 4)))[0], keep_projections=keep,
    )


def timed_pass(path: Path, req: PassRequest, backend: str) -> tuple[float, object]:
    t0 = time.perf_counter()
    res = gradient_pass(path, req, backend=backend, profile=True)
    return time.perf_counter() - t0, res


def worker_critical_path(res, n_workers: int) -> float:
    """Longest per-worker sum of read + compute seconds (blocks are split in order)."""
    from stream.cluster import split_groups

    recs = sorted(res.profile.records, key=lambda r: r.first_row)
    groups = split_groups(len(recs), n_workers)
    return max(sum(r.read_s + r.compute_s for r in recs[a:b]) for a, b in groups)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="bench-out")
    ap.add_argument("--nnz", type=int, default=20_000_000)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    path = out / f"cluster-store-{args.nnz}.zarr"
    build_store(path, args.nnz, args.seed)
    with open_store(path) as st:
        n, d = st.shape
        nnz = st.nnz
    rows = []
    for keep in (False, True):
        req = request(d, args.seed, keep)
        timed_pass(path, req, "serial")  # warm the page cache and numba
        serial = min(timed_pass(path, req, "serial")[0] for _ in range(args.repeat))
        with cluster_client(f"local:{args.workers}") as _client:
            timed_pass(path, req, "dask")  # workers open the store and load kernels
            runs = [timed_pass(path, req, "dask") for _ in range(args.repeat)]
        wall, res = min(runs, key=lambda t: t[0])
        crit = worker_critical_path(res, args.workers)
        overhead = max(0.0, wall - crit)
        budget = 0.5 + 0.1 * serial
        rows.append({
            "keep_projections": keep, "serial_s": serial, "dask_s": wall,
            "speedup": serial / wall, "worker_critical_path_s": crit,
            "overhead_s": overhead, "overhead_budget_s": budget,
            "overhead_ok": overhead <= budget,
            "serial_nnz_per_s": nnz / serial, "dask_nnz_per_s": nnz / wall,
        })
    report = {"n_rows": n, "n_cols": d, "nnz": nnz, "k": K, "rank": RANK,
              "workers": args.workers, "results": rows}
    (out / "bench_cluster.json").write_text(json.dumps(report, indent=2))
    print(f"store: {n} rows x {d} cols, {nnz / 1e6:.1f} M nonzeros; k={K}, rank={RANK}")
    head = (f"{'projections':>11} {'serial s':>9} {f'local:{args.workers} s':>10} "
            f"{'speedup':>8} {'overhead s':>11} {'budget s':>9} {'ok':>4}")
    print(head)
    for r in rows:
        print(f"{'kept' if r['keep_projections'] else 'none':>11} {r['serial_s']:>9.2f} "
              f"{r['dask_s']:>10.2f} {r['speedup']:>8.2f} {r['overhead_s']:>11.2f} "
              f"{r['overhead_budget_s']:>9.2f} {'yes' if r['overhead_ok'] else 'NO':>4}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
