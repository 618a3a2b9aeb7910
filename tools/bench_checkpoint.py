"""Benchmark: the cost of checkpoints next to training time.

Generates an invented softmax problem (fictional warehouse pick lists: rows of
hashed item ids, each routed to one of ``k`` packing stations by a hidden
low-rank rule), writes it as a zarr store, and trains it in the same run:

* ``no run dir``: :func:`ranktide.runs.train.train` without ``out`` (no checkpoints,
  the baseline);
* ``default cadence``: with a run directory at the default cadence (every 60 s
  of training, and at the end);
* ``every pass``: a checkpoint after every pass (the worst case).

Every :meth:`ranktide.runs.checkpoint.CheckpointManager.save` is timed. Reported:
checkpoint seconds as a share of training seconds for each scenario, the mean
seconds per checkpoint and its projection at the default cadence
(``mean write / 60 s``, the steady-state share on a long run). Target (issue
5): <= 3% at the default cadence.

Usage::

    .venv/bin/python tools/bench_checkpoint.py --out bench-out [--rows 20000]
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from ranktide.atomic import atomic_write_json  # noqa: E402
from ranktide.runs.checkpoint import CheckpointManager  # noqa: E402
from ranktide.runs.train import train  # noqa: E402
from ranktide.store import write_store  # noqa: E402

DEFAULT_SECONDS = 60.0


def make_problem(*, rows: int, cols: int, outputs: int, per_row: int, seed: int):
    """Invented pick lists: (X csr float32 (rows, cols), station ids int32 (rows,))."""
    rng = np.random.default_rng(seed)
    ids = np.minimum((cols * rng.random((rows, per_row)) ** 1.5).astype(np.int64), cols - 1)
    ids.sort(axis=1)
    keep = np.ones_like(ids, dtype=bool)
    keep[:, 1:] = ids[:, 1:] != ids[:, :-1]
    counts = keep.sum(axis=1)
    indptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    indices = ids[keep].astype(np.int32)
    data = rng.integers(1, 4, size=indices.size).astype(np.float32)
    X = sp.csr_matrix((data, indices, indptr), shape=(rows, cols))
    rank = 6
    W = rng.standard_normal((cols, rank)) @ rng.standard_normal((rank, outputs)) / np.sqrt(per_row)
    scores = X @ W + rng.gumbel(size=(rows, outputs))
    return X, np.argmax(scores, axis=1).astype(np.int32)


class _SaveTimer:
    """Wraps CheckpointManager.save to time every checkpoint write."""

    def __init__(self) -> None:
        self.seconds: list[float] = []
        self._orig = CheckpointManager.save

    def __enter__(self) -> _SaveTimer:
        orig, record = self._orig, self.seconds

        def timed(mgr, arrays, meta):
            t0 = time.perf_counter()
            out = orig(mgr, arrays, meta)
            record.append(time.perf_counter() - t0)
            return out

        CheckpointManager.save = timed
        return self

    def __exit__(self, *exc: object) -> None:
        CheckpointManager.save = self._orig


def _scenario(name: str, store: Path, work: Path, settings: dict, **ckpt: Any) -> dict:
    with _SaveTimer() as timer:
        t0 = time.perf_counter()
        res = train(str(store), **settings, **ckpt)
        wall = time.perf_counter() - t0
    writes = timer.seconds
    state_bytes = 0
    run = ckpt.get("out")
    if run is not None:
        latest = Path(run) / "checkpoints"
        state_bytes = max((p.stat().st_size for p in latest.glob("save-*/state.npz")), default=0)
    print(f"  {name}: {res.passes} passes, {wall:.2f} s, {len(writes)} checkpoints "
          f"({sum(writes):.3f} s)", file=sys.stderr, flush=True)  # fmt: skip
    return {
        "scenario": name,
        "passes": int(res.passes),
        "status": res.status,
        "objective": float(res.objective),
        "train_s": wall,
        "checkpoints": len(writes),
        "checkpoint_s": float(sum(writes)),
        "mean_write_s": float(np.mean(writes)) if writes else 0.0,
        "share": float(sum(writes)) / wall if wall > 0 else 0.0,
        "state_mb": state_bytes / 2**20,
    }


def _table(rows: list[dict]) -> str:
    cols = [
        ("scenario", "scenario", 16, "s"),
        ("passes", "passes", 6, "d"),
        ("train s", "train_s", 9, ".2f"),
        ("ckpts", "checkpoints", 6, "d"),
        ("ckpt s", "checkpoint_s", 8, ".3f"),
        ("s/ckpt", "mean_write_s", 8, ".4f"),
        ("state MB", "state_mb", 9, ".2f"),
        ("share", "share", 8, ".3%"),
    ]
    lines = ["  ".join(h.rjust(w) if i else h.ljust(w) for i, (h, _, w, _) in enumerate(cols))]
    for r in rows:
        cells = []
        for i, (_, key, w, fmt) in enumerate(cols):
            text = format(r[key], fmt)
            cells.append(text.rjust(w) if i else text.ljust(w))
        lines.append("  ".join(cells))
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True, help="directory for bench_checkpoint.json")
    ap.add_argument("--rows", type=int, default=20_000)
    ap.add_argument("--cols", type=int, default=20_000)
    ap.add_argument("--outputs", type=int, default=40)
    ap.add_argument("--per-row", type=int, default=40)
    ap.add_argument("--max-passes", type=int, default=60)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)

    work = Path(tempfile.mkdtemp(prefix="bench-ckpt-"))
    try:
        X, y = make_problem(rows=args.rows, cols=args.cols, outputs=args.outputs,
                            per_row=args.per_row, seed=args.seed)  # fmt: skip
        store = work / "picks.zarr"
        write_store(store, X, y, kind="classes").close()
        settings = dict(loss="softmax", lam_scale=0.2, tol=1e-6, max_passes=args.max_passes,
                        seed=args.seed, dense_gradient=False)  # fmt: skip
        # warm-up: compile the kernels outside the timed runs
        train(str(store), **dict(settings, max_passes=2))
        rows = [
            _scenario("no run dir", store, work, settings),
            _scenario("default cadence", store, work, settings, out=work / "run-default",
                      checkpoint_seconds=DEFAULT_SECONDS),  # fmt: skip
            _scenario("every pass", store, work, settings, out=work / "run-every",
                      checkpoint_seconds=DEFAULT_SECONDS, checkpoint_passes=1),  # fmt: skip
        ]
    finally:
        shutil.rmtree(work, ignore_errors=True)
    base = rows[0]["train_s"]
    per_pass = base / max(1, rows[0]["passes"])
    mean_write = rows[2]["mean_write_s"]
    projected = mean_write / DEFAULT_SECONDS
    summary = {
        "problem": {"rows": args.rows, "cols": args.cols, "outputs": args.outputs,
                    "nnz": int(X.nnz)},  # fmt: skip
        "scenarios": rows,
        "seconds_per_pass": per_pass,
        "projected_share_default_cadence": projected,
        "measured_share_default_cadence": rows[1]["share"],
        "target_share": 0.03,
        "meets_target": bool(max(projected, rows[1]["share"]) <= 0.03),
    }
    print(_table(rows))
    print(f"seconds per pass {per_pass:.3f}; mean checkpoint write {mean_write:.4f} s; "
          f"share at the default cadence: measured {rows[1]['share']:.3%}, "
          f"steady state {projected:.3%} (target <= 3%)")  # fmt: skip
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    atomic_write_json(out / "bench_checkpoint.json", json.loads(json.dumps(summary)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
