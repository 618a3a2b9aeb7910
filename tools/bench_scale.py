"""Training at scale inside a memory cgroup: seconds per pass against the floors, memory, gap.

Builds (or reuses) an invented store of ``12,000,000 x fraction`` rows, 2^18 hashed
features with Zipf-like frequencies (~40 nonzeros a row), 500 classes drawn from a
planted rank-8 model plus Gumbel noise, written with the streaming writer
(:func:`ranktide.store.create_store`). In the same run it measures

* the read floor: reading and decoding the whole store once (seconds, decoded MB/s);
* the compute floor of a pass: the pass's dense per-row work (scores, R [V, Omega],
  R^T X Psi: ``2 n k (r + (r + p) + p')`` flops at rank r) at the float64 matmul rate
  numpy's BLAS reaches on blocks of that shape here, plus the softmax over the k
  classes at the measured rate of numpy's exp;

then trains ``ranktide train --loss softmax --lam-scale 0.2 --memory 1GB`` as a child
process confined to a memory cgroup (v1: a child group of /sys/fs/cgroup/memory with
memory.limit_in_bytes; v2: a child group with memory.max), watches its checkpoints
for the held-out accuracy over time, and writes JSON: seconds per pass by rank,
pass / max(floors), the child's peak RSS, the cgroup's peak and OOM kills, the gap and
held-out accuracy over time.

Usage (as root, for the cgroup)::

    NUMBA_CACHE_DIR=/tmp/numba-bench .venv/bin/python tools/bench_scale.py \\
        --fraction 0.05 --work /tmp/scale --out bench-out --max-seconds 900
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp

N_FULL, D, K, RANK, NNZ_ROW = 12_000_000, 2**18, 500, 8, 40
CHUNK = 100_000  # rows generated and written at a time


# ---------------------------------------------------------------- the data


class Planted:
    """The invented generator: Zipf-like feature ids, a rank-8 planted model."""

    def __init__(self, seed: int = 0) -> None:
        rng = np.random.default_rng(seed)
        # Zipf-like frequencies p_j ~ 1 / (j + 10)^1.1 over a random permutation of ids
        w = 1.0 / (np.arange(D) + 10.0) ** 1.1
        self.cdf = np.cumsum(w / w.sum())
        self.perm = rng.permutation(D).astype(np.int32)
        # planted model: scores = X A B^T; column scales make the frequent features carry
        # the signal about as much as the rare ones
        self.A = rng.standard_normal((D, RANK)) * 0.9
        self.B = rng.standard_normal((K, RANK))

    def rows(self, m: int, rng: np.random.Generator) -> tuple[sp.csr_matrix, np.ndarray]:
        ids = self.perm[np.searchsorted(self.cdf, rng.random(m * NNZ_ROW), side="right")
                        .clip(0, D - 1)]
        indptr = np.arange(0, m * NNZ_ROW + 1, NNZ_ROW, dtype=np.int64)
        X = sp.csr_matrix((np.ones(m * NNZ_ROW, np.float32), ids, indptr), shape=(m, D))
        X.sum_duplicates()  # repeated ids count: values 1, 2, ...
        X.data = np.log1p(X.data).astype(np.float32) / np.sqrt(NNZ_ROW / 4)
        Z = np.asarray(X @ self.A) @ self.B.T
        y = np.argmax(Z + rng.gumbel(size=Z.shape), axis=1).astype(np.int32)
        return X, y


def build_store(path: Path, n: int, gen: Planted, seed: int) -> dict:
    from ranktide.store import create_store

    rng = np.random.default_rng(seed)
    t0 = time.perf_counter()
    nnz = 0
    with create_store(path, n_cols=D, kind="classes", n_outputs=K) as w:
        for a in range(0, n, CHUNK):
            X, y = gen.rows(min(CHUNK, n - a), rng)
            w.append(X.indptr, X.indices, X.data)
            w.append_targets(classes=y)
            nnz += X.nnz
    return {"rows": n, "nnz": int(nnz), "build_s": time.perf_counter() - t0}


# ---------------------------------------------------------------- floors


def read_floor(path: Path) -> dict:
    from ranktide.store import open_store

    t0 = time.perf_counter()
    decoded = 0
    with open_store(path, verify=False) as st:
        for blk in st.blocks():
            decoded += int(blk.io.get("bytes_decoded", 0)) or (
                blk.X.data.nbytes + blk.X.indices.nbytes + blk.X.indptr.nbytes)
    secs = time.perf_counter() - t0
    return {"read_s": secs, "decoded_MB": decoded / 1e6, "MB_per_s": decoded / 1e6 / secs}


def blas_rates(rows: int = 20000, reps: int = 3) -> dict:
    """float64 matmul FLOP/s on the pass's block shapes, and exp per second."""
    rng = np.random.default_rng(1)
    R = rng.standard_normal((rows, K))
    out = {}
    for width in (12, 24, 48):
        B = rng.standard_normal((K, width))
        best = min(_timed(lambda B=B: R @ B) for _ in range(reps))
        out[f"gemm_{width}"] = 2.0 * rows * K * width / best
    best = min(_timed(lambda: np.exp(R)) for _ in range(reps))
    out["exp_per_s"] = rows * K / best
    return out


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def _gemm_rate(width: int, rates: dict) -> float:
    """The measured float64 matmul rate of the nearest measured width at or above
    ``width`` (narrow products run slower per FLOP)."""
    for w in (12, 24, 48):
        if width <= w:
            return rates[f"gemm_{w}"]
    return rates["gemm_48"]


def compute_floor(n: int, rank: int, p: int, pp: int, rates: dict) -> float:
    """Seconds of a pass's dense per-row work at rank ``rank`` at the measured rates.

    Three n x K products, each at the rate measured for its width: the scores
    ``XU (S V^T)`` (width ``rank``), ``R [V, Omega]`` (``rank + p``) and
    ``R^T X [U, Psi]`` (``rank + pp``), and one exp per score.
    """
    secs = 0.0
    for width in (rank, rank + p, rank + pp):
        if width:
            secs += 2.0 * n * K * width / _gemm_rate(width, rates)
    return secs + n * K / rates["exp_per_s"]


# ---------------------------------------------------------------- the cgroup


class MemoryGroup:
    """A child memory cgroup (v1 when /sys/fs/cgroup/memory exists, else v2)."""

    def __init__(self, cap: int) -> None:
        v1 = Path("/sys/fs/cgroup/memory")
        name = f"ranktide-bench-{os.getpid()}"
        if (v1 / "memory.limit_in_bytes").exists():
            self.version, self.path = 1, v1 / name
            self.path.mkdir()
            (self.path / "memory.limit_in_bytes").write_text(str(cap))
        elif Path("/sys/fs/cgroup/cgroup.controllers").exists():
            self.version, self.path = 2, Path("/sys/fs/cgroup") / name
            self.path.mkdir()
            (self.path / "memory.max").write_text(str(cap))
        else:
            raise SystemExit("no memory cgroup (v1 or v2) to confine the run to")
        self.cap = cap

    def stats(self) -> dict:
        if self.version == 1:
            peak = int((self.path / "memory.max_usage_in_bytes").read_text())
            oom = _field(self.path / "memory.oom_control", "oom_kill")
        else:
            peak_file = self.path / "memory.peak"
            peak = int(peak_file.read_text()) if peak_file.exists() else None
            oom = _field(self.path / "memory.events", "oom_kill")
        return {"cgroup_version": self.version, "cap_bytes": self.cap, "cgroup_peak_bytes": peak,
                "oom_kills": oom}

    def remove(self) -> None:
        for _ in range(50):
            try:
                self.path.rmdir()
                return
            except OSError:
                time.sleep(0.1)


def _field(path: Path, key: str) -> int | None:
    try:
        for line in path.read_text().splitlines():
            parts = line.split()
            if len(parts) == 2 and parts[0] == key:
                return int(parts[1])
    except OSError:
        return None
    return None


# ---------------------------------------------------------------- the run


def watch_checkpoints(run: Path, into: Path, stop: threading.Event, t0: float) -> list:
    """Copy each new checkpoint's arrays while the child trains (for accuracy over time)."""
    seen, got = set(), []
    while not stop.is_set():
        ptr = run / "checkpoints" / "newest.txt"
        try:
            name = ptr.read_text().strip()
            if name and name not in seen:
                src = run / "checkpoints" / name / "state.npz"
                dst = into / f"{name}.npz"
                shutil.copyfile(src, dst)
                seen.add(name)
                got.append((time.perf_counter() - t0, dst))
        except OSError:
            pass
        stop.wait(0.5)
    return got


def used_holdout_columns(store: Path, Xh: sp.csr_matrix) -> sp.csr_matrix:
    """The held-out rows on the training store's used columns, the space a checkpoint's U
    lives in when some hashed ids never occur in training (the trainer solves there)."""
    from ranktide.passes.columns import used_columns
    from ranktide.store import open_store

    with open_store(store, verify=False) as st:
        cols = used_columns(st)
    return Xh[:, cols].tocsr()


def accuracy(npz: Path, Xh: sp.csr_matrix, yh: np.ndarray,
             Xh_used: sp.csr_matrix | None = None) -> tuple[float, int]:
    with np.load(npz, allow_pickle=False) as z:
        U, s, V, b = z["U"], z["s"], z["V"], z["b"]
    X = Xh if U.shape[0] == Xh.shape[1] else Xh_used
    scores = (np.asarray(X @ U) * s) @ V.T + b
    return float(np.mean(np.argmax(scores, axis=1) == yh)), int(s.shape[0])


def lam_flag() -> str:
    return "--lam-scale"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--fraction", type=float, default=1.0,
                    help="share of the 12,000,000 rows (default 1)")
    ap.add_argument("--work", default="bench-scale-work", help="store, run and snapshots")
    ap.add_argument("--out", default="bench-out", help="directory of the JSON")
    ap.add_argument("--cap", default="1.4GB", help="cgroup memory limit (default 1.4GB)")
    ap.add_argument("--memory", default="1GB", help="--memory of train (default 1GB)")
    ap.add_argument("--lam-scale", type=float, default=0.2)
    ap.add_argument("--max-seconds", type=float, default=1800.0)
    ap.add_argument("--max-passes", type=int, default=100)
    ap.add_argument("--tol", type=float, default=1e-2)
    ap.add_argument("--holdout", type=int, default=20000, help="held-out rows (in memory)")
    args = ap.parse_args(argv)

    from ranktide.passes.budget import parse_memory

    work, out = Path(args.work), Path(args.out)
    work.mkdir(parents=True, exist_ok=True)
    out.mkdir(parents=True, exist_ok=True)
    n = max(1000, int(round(N_FULL * args.fraction)))
    gen = Planted(seed=0)
    store = work / f"store-{n}.zarr"
    figures: dict = {"fraction": args.fraction, "rows": n, "cols": D, "classes": K,
                     "load_avg_start": os.getloadavg()}
    if not store.exists():
        figures["build"] = build_store(store, n, gen, seed=1)
        print(f"built {store}: {figures['build']}")
    Xh, yh = gen.rows(args.holdout, np.random.default_rng(2))
    figures["read_floor"] = read_floor(store)
    rates = blas_rates()
    figures["rates"] = rates
    print(f"read floor {figures['read_floor']}; rates {rates}")

    run = work / "run"
    snaps = work / "snapshots"
    shutil.rmtree(run, ignore_errors=True)
    shutil.rmtree(snaps, ignore_errors=True)
    snaps.mkdir()
    cmd = [sys.executable, "-m", "ranktide.cli.main", "train", str(store), "--loss", "softmax",
           lam_flag(), str(args.lam_scale), "--memory", args.memory, "--out", str(run),
           "--max-seconds", str(args.max_seconds), "--max-passes", str(args.max_passes),
           "--tol", str(args.tol), "--checkpoint-passes", "1", "--json"]
    group = MemoryGroup(parse_memory(args.cap))
    stop = threading.Event()
    t0 = time.perf_counter()
    got: list = []
    watcher = threading.Thread(target=lambda: got.extend(watch_checkpoints(run, snaps, stop, t0)))
    watcher.start()
    try:
        # the child joins the group before it execs the trainer (it allocates nothing first)
        shell = f'echo $$ > "{group.path}/cgroup.procs" && exec "$0" "$@"'
        child = subprocess.run(["sh", "-c", shell, *cmd], capture_output=True, text=True)
        wall = time.perf_counter() - t0
    finally:
        stop.set()
        watcher.join()
        figures.update(group.stats())
        group.remove()
    figures["child_peak_rss_bytes"] = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
    figures["budget_bytes"] = parse_memory(args.memory)
    figures["exit_status"] = child.returncode
    figures["wall_s"] = wall
    figures["stderr_tail"] = child.stderr[-2000:]
    figures["summary"] = _last_json(child.stdout)
    hist = []
    hp = run / "history.jsonl"
    if hp.exists():
        for line in hp.read_text().splitlines():
            try:
                rec = json.loads(line)
            except ValueError:
                continue
            if rec.get("kind", "pass") == "pass" and "pass" in rec:
                hist.append(rec)
    rfloor = figures["read_floor"]["read_s"]
    passes = []
    for h in hist:
        r = int(h.get("rank_before", 0) or 0)
        at0 = h.get("phase") == "lam_max"
        # the pass's own widths (recorded since the history has them; older runs: the
        # configured ones, which leave out the rotation directions in Psi)
        p_cols = int(h.get("omega_cols") or (12 if at0 else 6))
        pp_cols = int(h.get("psi_cols") or (12 if at0 else 6))
        cfloor = compute_floor(n, r, p_cols, pp_cols, rates)
        ps = float(h.get("pass_seconds") or 0.0)
        passes.append({"pass": h["pass"], "phase": h.get("phase"), "rank": r,
                       "omega_cols": p_cols, "psi_cols": pp_cols,
                       "pass_s": ps, "refine_s": h.get("refine_seconds"),
                       "refine_mode": h.get("refine_mode"),
                       "compute_floor_s": cfloor, "read_floor_s": rfloor,
                       "pass_over_floor": ps / max(cfloor, rfloor),
                       "elapsed_s": h.get("seconds"), "rel_gap": h.get("rel_gap"),
                       "rel_gap_after": h.get("rel_gap_after"),
                       "objective": h.get("objective"), "lam_max_note": h.get("lam_max_note"),
                       "memory_floor": h.get("memory_floor"),
                       "rss_peak_bytes": h.get("rss_peak"), "blocks": h.get("blocks")})
    figures["passes"] = passes
    figures["accuracy"] = []
    Xh_used = used_holdout_columns(store, Xh) if got else None
    for t, path in got:
        acc, rank = accuracy(path, Xh, yh, Xh_used)
        figures["accuracy"].append({"t_s": t, "rank": rank, "holdout_accuracy": acc})
    figures["load_avg_end"] = os.getloadavg()
    dest = out / f"bench_scale-{n}.json"
    dest.write_text(json.dumps(figures, indent=1, default=float))
    _print(figures)
    print(f"wrote {dest}")
    return 0 if child.returncode == 0 else 1


def _last_json(text: str):
    for line in reversed(text.strip().splitlines()):
        try:
            return json.loads(line)
        except ValueError:
            continue
    return None


def _print(f: dict) -> None:
    mib = 2**20
    print(f"rows {f['rows']}  read floor {f['read_floor']['read_s']:.1f} s "
          f"({f['read_floor']['MB_per_s']:.0f} MB/s decoded)  exit {f['exit_status']}  "
          f"wall {f['wall_s']:.0f} s")
    print(f"peak RSS {f['child_peak_rss_bytes'] / mib:.0f} MiB (budget "
          f"{f['budget_bytes'] / mib:.0f} MiB)  cgroup peak "
          f"{(f['cgroup_peak_bytes'] or 0) / mib:.0f} MiB of {f['cap_bytes'] / mib:.0f}  "
          f"OOM kills {f['oom_kills']}")
    print(f"{'pass':>4} {'phase':>8} {'rank':>4} {'pass s':>8} {'refine s':>8} "
          f"{'cfloor s':>8} {'x floor':>7} {'rel gap':>9} {'t s':>7} {'RSS hw MiB':>10} "
          f"{'q':>3} {'blocks':>6}")
    for p in f["passes"]:
        print(f"{p['pass']:>4} {str(p['phase']):>8} {p['rank']:>4} {p['pass_s']:>8.1f} "
              f"{(p['refine_s'] or 0):>8.1f} {p['compute_floor_s']:>8.1f} "
              f"{p['pass_over_floor']:>7.2f} {(p['rel_gap'] or float('nan')):>9.2e} "
              f"{(p['elapsed_s'] or 0):>7.0f} {(p['rss_peak_bytes'] or 0) / mib:>10.0f} "
              f"{p['rank'] + p['psi_cols']:>3} {p.get('blocks') or '-':>6}")
    for a in f["accuracy"]:
        print(f"  t {a['t_s']:7.0f} s  rank {a['rank']:3d}  held-out accuracy "
              f"{a['holdout_accuracy']:.4f}")


if __name__ == "__main__":
    raise SystemExit(main())
