"""Benchmark: streaming read rate of the store for each backend and codec.

Builds one invented bag-of-words matrix (default 20 M nonzeros: word counts of
fictional product reviews over 2^20 hashed word ids, one class per row), writes
it as a store for every backend x codec, and reads each back block by block
(default 64 MiB budget) in a fresh subprocess, so that each figure has its own
peak RSS. The baseline of the same run is the *raw floor*: the same bytes kept
as uncompressed ``.npy`` files, read block by block (same row ranges) from the
page cache with ``readinto``.

Two read rates are reported per store: the first pass of a freshly opened
store (every chunk's CRC-32 is checked as it is decoded, the default) and the
best later pass over the same open store (chunks already verified). Each
configuration runs ``--repeat`` times, round-robin, and the best time counts
(the machine is shared). Target (issue 2): the default backend + codec reads
at >= 50% of the raw floor.

``--sweep-zstd`` also measures zstd variants (levels; plain zstd vs blosc zstd
with byte or bit shuffle) on the zarr backend, the measurement that picks the
form and level used by codec ``"zstd"`` (see ``ranktide.store.format.ZSTD_LEVEL``).

If ``tools/bench_ingest.py`` exists and defines ``run(out_dir) -> dict``, it is
called and its figures are merged under ``"ingest"``.

Usage::

    .venv/bin/python tools/bench_store.py --out bench-out [--nnz 20000000]
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import resource
import shutil
import subprocess
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

import ranktide.store.format as store_format  # noqa: E402
from ranktide import store as store_mod  # noqa: E402
from ranktide.atomic import atomic_write_json  # noqa: E402
from ranktide.store.format import DEFAULT_CODEC  # noqa: E402

RAW_NAMES = ("indptr", "indices", "data", "classes")


# ----------------------------------------------------------------------------- data


def make_matrix(nnz: int, *, seed: int = 0) -> tuple[sp.csr_matrix, np.ndarray]:
    """Invented word-count matrix with about ``nnz`` entries and class labels.

    Row lengths are geometric (mean 100); word ids are skewed towards low ids
    (frequent words), values are small counts as float32.
    """
    rng = np.random.default_rng(seed)
    n_cols = 1 << 20
    mean_len = 100
    n = max(1, nnz // mean_len)
    lengths = rng.geometric(1.0 / mean_len, n)
    rows = np.repeat(np.arange(n, dtype=np.int64), lengths)
    cols = np.minimum(n_cols - 1, (n_cols * rng.random(rows.shape[0]) ** 3).astype(np.int64))
    X = sp.csr_matrix((np.ones(rows.shape[0], np.float32), (rows, cols)), shape=(n, n_cols))
    X.sum_duplicates()
    X.data = rng.geometric(0.6, X.nnz).astype(np.float32)
    y = rng.integers(0, 200, n).astype(np.int32)
    return X, y


def decoded_bytes(X: sp.csr_matrix) -> int:
    """Bytes of the decoded arrays one pass returns (indptr int64, ids, values, classes)."""
    return (X.shape[0] + 1) * 8 + X.nnz * (4 + 4) + X.shape[0] * 4


def write_raw(dirpath: Path, X: sp.csr_matrix, y: np.ndarray) -> None:
    dirpath.mkdir(parents=True, exist_ok=True)
    arrays = {
        "indptr": X.indptr.astype(np.int64),
        "indices": X.indices.astype(np.int32),
        "data": X.data.astype(np.float32),
        "classes": y.astype(np.int32),
    }
    for name, arr in arrays.items():
        np.save(dirpath / f"{name}.npy", arr, allow_pickle=False)


# ----------------------------------------------------------------------------- child side


def _rss_mb() -> float:
    """Peak resident set of this process in MB.

    ``VmHWM`` is per address space, so it starts afresh in an exec'd child;
    ``ru_maxrss`` keeps the parent's peak across fork+exec on Linux and is only
    the fallback.
    """
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _warm(paths: list[Path]) -> None:
    """Read files once so every configuration starts from the page cache."""
    buf = bytearray(16 << 20)
    for p in paths:
        files = [p] if p.is_file() else [Path(r) / f for r, _, fs in os.walk(p) for f in fs]
        for f in files:
            with open(f, "rb", buffering=0) as fh:
                while fh.readinto(buf):
                    pass


def _store_pass(s: Any, ranges: list[tuple[int, int]]) -> tuple[float, float]:
    """One pass; returns (wall seconds, CPU seconds of all this process's threads)."""
    t, c = time.perf_counter(), time.process_time()
    for a, b in ranges:
        blk = s.read_block(a, b)
        del blk
    return time.perf_counter() - t, time.process_time() - c


def _timed(passes: list[tuple[float, float]]) -> dict[str, float]:
    """First pass, and the best of the later ones (wall and CPU seconds)."""
    later = passes[1:] or passes[:1]
    return {
        "first_s": passes[0][0],
        "first_cpu_s": passes[0][1],
        "later_s": min(p[0] for p in later),
        "later_cpu_s": min(p[1] for p in later),
    }


def child_store(path: Path, passes: int, block_bytes: int) -> dict[str, Any]:
    _warm([path])
    base = _rss_mb()
    s = store_mod.open_store(path)
    ranges = s.block_ranges(block_bytes=block_bytes)
    res = _timed([_store_pass(s, ranges) for _ in range(max(2, passes))])
    s.close()
    return {
        **res,
        "base_rss_mb": base,
        "peak_rss_mb": _rss_mb(),
        "n_blocks": len(ranges),
    }


class _RawReader:
    """Reads element ranges of a ``.npy`` file into a reused buffer."""

    def __init__(self, path: Path) -> None:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
        self.dtype = arr.dtype
        self.offset = int(arr.offset)
        del arr
        self.fh = open(path, "rb", buffering=0)  # noqa: SIM115
        self.buf = np.empty(0, dtype=self.dtype)

    def read(self, lo: int, hi: int) -> np.ndarray:
        m = hi - lo
        if self.buf.shape[0] < m:
            self.buf = np.empty(m, dtype=self.dtype)
        out = self.buf[:m]
        self.fh.seek(self.offset + lo * self.dtype.itemsize)
        self.fh.readinto(memoryview(out).cast("B"))
        return out


def _raw_pass(readers: dict[str, _RawReader], ranges: list[tuple[int, int]]) -> tuple[float, float]:
    t, c = time.perf_counter(), time.process_time()
    for a, b in ranges:
        ip = readers["indptr"].read(a, b + 1)
        lo, hi = int(ip[0]), int(ip[-1])
        readers["indices"].read(lo, hi)
        readers["data"].read(lo, hi)
        readers["classes"].read(a, b)
    return time.perf_counter() - t, time.process_time() - c


def child_raw(dirpath: Path, passes: int, ranges: list[tuple[int, int]]) -> dict[str, Any]:
    _warm([dirpath])
    base = _rss_mb()
    readers = {name: _RawReader(dirpath / f"{name}.npy") for name in RAW_NAMES}
    res = _timed([_raw_pass(readers, ranges) for _ in range(max(2, passes))])
    return {
        **res,
        "base_rss_mb": base,
        "peak_rss_mb": _rss_mb(),
        "n_blocks": len(ranges),
    }


def run_child(spec: dict[str, Any]) -> dict[str, Any]:
    if spec["mode"] == "raw":
        ranges = [tuple(r) for r in spec["ranges"]]
        return child_raw(Path(spec["path"]), spec["passes"], ranges)
    return child_store(Path(spec["path"]), spec["passes"], spec["block_bytes"])


def spawn(spec: dict[str, Any]) -> dict[str, Any]:
    """Run one measurement in a fresh interpreter (its own peak RSS)."""
    with tempfile.NamedTemporaryFile("w", suffix=".json", delete=False) as fh:
        json.dump(spec, fh)
        spec_path = fh.name
    try:
        out = subprocess.run(
            [sys.executable, __file__, "--child", spec_path],
            check=True,
            capture_output=True,
            text=True,
        )
    finally:
        os.unlink(spec_path)
    return json.loads(out.stdout.strip().splitlines()[-1])


# ----------------------------------------------------------------------------- parent side


def dir_size(p: Path) -> int:
    if p.is_file():
        return p.stat().st_size
    return sum((Path(r) / f).stat().st_size for r, _, fs in os.walk(p) for f in fs)


def write_variant(path: Path, X, y, *, backend: str, codec: str) -> dict[str, Any]:
    t = time.perf_counter()
    s = store_mod.write_store(path, X, y, backend=backend, codec=codec, overwrite=True)
    dt = time.perf_counter() - t
    impl = s.attrs["codec_impl"]
    s.close()
    return {"write_s": dt, "disk_bytes": dir_size(path), "codec_impl": impl}


def measure(
    configs: list[dict[str, Any]],
    *,
    repeat: int,
    passes: int,
    block_bytes: int,
    ranges: list[tuple[int, int]],
) -> None:
    """Round-robin ``repeat`` times over ``configs``; keep each one's best times."""
    for _ in range(repeat):
        for cfg in configs:
            spec = {
                "mode": cfg["mode"],
                "path": cfg["path"],
                "passes": passes,
                "block_bytes": block_bytes,
            }
            if cfg["mode"] == "raw":
                spec["ranges"] = ranges
            res = spawn(spec)
            for key in ("first_s", "later_s", "first_cpu_s", "later_cpu_s"):
                cfg[key] = min(cfg.get(key, np.inf), res[key])
            cfg["peak_rss_mb"] = max(cfg.get("peak_rss_mb", 0.0), res["peak_rss_mb"])
            cfg["base_rss_mb"] = res["base_rss_mb"]
            cfg["n_blocks"] = res["n_blocks"]


def zstd_sweep_configs(work: Path, X, y) -> list[dict[str, Any]]:
    """zarr stores written with zstd variants (monkeypatching the codec table)."""
    from unittest import mock

    import ranktide.store._zarr as zmod
    from zarr.codecs import BloscCodec, ZstdCodec

    variants = {
        "zstd level -1": [ZstdCodec(level=-1)],
        "zstd level 1": [ZstdCodec(level=1)],
        "zstd level 3": [ZstdCodec(level=3)],
        "blosc zstd 1 + shuffle": [BloscCodec(cname="zstd", clevel=1, shuffle="shuffle")],
        "blosc zstd 1 + bitshuffle": [BloscCodec(cname="zstd", clevel=1, shuffle="bitshuffle")],
        "blosc zstd 3 + bitshuffle": [BloscCodec(cname="zstd", clevel=3, shuffle="bitshuffle")],
    }
    out = []
    for i, (label, comp) in enumerate(variants.items()):
        path = work / f"sweep{i}.zarr"
        with mock.patch.object(zmod, "_compressors", lambda codec, level, c=comp: c):
            info = write_variant(path, X, y, backend="zarr", codec="zstd")
        info.update(
            {
                "mode": "store",
                "path": str(path),
                "backend": "zarr",
                "codec": "zstd",
                "codec_impl": label,
                "sweep": True,
            }
        )
        out.append(info)
    return out


def call_ingest_hook(out_dir: Path) -> dict[str, Any] | None:
    hook = Path(__file__).with_name("bench_ingest.py")
    if not hook.is_file():
        return None
    spec = importlib.util.spec_from_file_location("bench_ingest", hook)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    run = getattr(mod, "run", None)
    return run(out_dir) if callable(run) else None


def print_table(rows: list[dict[str, Any]]) -> None:
    cols = [
        ("backend", "backend", "{}"),
        ("codec", "codec", "{}"),
        ("impl", "codec_impl", "{}"),
        ("disk MB", "disk_mb", "{:.1f}"),
        ("ratio", "ratio", "{:.3f}"),
        ("write MB/s", "write_mbps", "{:.0f}"),
        ("read MB/s 1st", "first_mbps", "{:.0f}"),
        ("read MB/s later", "later_mbps", "{:.0f}"),
        ("% floor 1st", "first_pct", "{:.0f}"),
        ("% floor later", "later_pct", "{:.0f}"),
        ("MB/cpu-s 1st", "first_mb_per_cpu_s", "{:.0f}"),
        ("MB/cpu-s later", "later_mb_per_cpu_s", "{:.0f}"),
        ("peak RSS MB", "peak_rss_mb", "{:.0f}"),
    ]
    cells = [[c[0] for c in cols]]
    for r in rows:
        cells.append(
            [fmt.format(r[key]) if r.get(key) is not None else "-" for _, key, fmt in cols]
        )
    widths = [max(len(row[i]) for row in cells) for i in range(len(cols))]
    for j, row in enumerate(cells):
        print(
            "  ".join(
                c.ljust(w) if i < 3 else c.rjust(w)
                for i, (c, w) in enumerate(zip(row, widths, strict=True))
            )
        )
        if j == 0:
            print("  ".join("-" * w for w in widths))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", default="bench-out", help="directory for bench_store.json")
    ap.add_argument("--nnz", type=int, default=20_000_000, help="nonzeros of the test matrix")
    ap.add_argument("--repeat", type=int, default=3, help="round-robin repetitions (best kept)")
    ap.add_argument("--passes", type=int, default=3, help="passes per measurement process")
    ap.add_argument("--block-bytes", type=int, default=store_format.DEFAULT_BLOCK_BYTES)
    ap.add_argument("--workdir", default=None, help="where the stores go (default: a temp dir)")
    ap.add_argument("--sweep-zstd", action="store_true", help="also measure zstd variants")
    ap.add_argument("--no-ingest", action="store_true", help="skip tools/bench_ingest.py")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        spec = json.loads(Path(args.child).read_text())
        print(json.dumps(run_child(spec)))
        return 0

    out_dir = Path(args.out)
    out_dir.mkdir(parents=True, exist_ok=True)
    work = Path(args.workdir or tempfile.mkdtemp(prefix="bench-store-"))
    work.mkdir(parents=True, exist_ok=True)
    try:
        return _run(args, out_dir, work)
    finally:
        if args.workdir is None:
            shutil.rmtree(work, ignore_errors=True)


def _run(args: argparse.Namespace, out_dir: Path, work: Path) -> int:
    t0 = time.perf_counter()
    X, y = make_matrix(args.nnz)
    total = decoded_bytes(X)
    print(
        f"matrix: {X.shape[0]} rows x {X.shape[1]} cols, {X.nnz} nonzeros, "
        f"{total / 1e6:.0f} MB decoded; generated in {time.perf_counter() - t0:.1f} s"
    )
    write_raw(work / "raw", X, y)
    configs: list[dict[str, Any]] = [
        {
            "mode": "raw",
            "path": str(work / "raw"),
            "backend": "raw .npy",
            "codec": "none",
            "codec_impl": "page cache readinto",
            "write_s": None,
            "disk_bytes": dir_size(work / "raw"),
        }
    ]
    for backend in ("zarr", "hdf5"):
        for codec in ("zstd", "lz4", "none"):
            suffix = ".zarr" if backend == "zarr" else ".h5"
            path = work / f"{codec}{suffix}"
            info = write_variant(path, X, y, backend=backend, codec=codec)
            info.update({"mode": "store", "path": str(path), "backend": backend, "codec": codec})
            configs.append(info)
    if args.sweep_zstd:
        configs.extend(zstd_sweep_configs(work, X, y))
    with store_mod.open_store(configs[1]["path"], verify=False) as s:
        ranges = s.block_ranges(block_bytes=args.block_bytes)
    del X
    measure(
        configs, repeat=args.repeat, passes=args.passes, block_bytes=args.block_bytes, ranges=ranges
    )

    floor = configs[0]
    for cfg in configs:
        cfg["disk_mb"] = cfg["disk_bytes"] / 1e6
        cfg["ratio"] = cfg["disk_bytes"] / total
        cfg["write_mbps"] = total / cfg["write_s"] / 1e6 if cfg.get("write_s") else None
        cfg["first_mbps"] = total / cfg["first_s"] / 1e6
        cfg["later_mbps"] = total / cfg["later_s"] / 1e6
        cfg["first_pct"] = 100.0 * floor["later_s"] / cfg["first_s"]
        cfg["later_pct"] = 100.0 * floor["later_s"] / cfg["later_s"]
        cfg["first_mb_per_cpu_s"] = total / max(cfg["first_cpu_s"], 1e-9) / 1e6
        cfg["later_mb_per_cpu_s"] = total / max(cfg["later_cpu_s"], 1e-9) / 1e6
    print_table(configs)
    default = next(c for c in configs if c["backend"] == "zarr" and c["codec"] == DEFAULT_CODEC)
    verdict = {
        "target": f"default backend (zarr) + codec ({DEFAULT_CODEC}) read >= 50% of the raw floor",
        "first_pass_pct": default["first_pct"],
        "later_pass_pct": default["later_pct"],
        "met_first_pass": default["first_pct"] >= 50.0,
        "met_later_passes": default["later_pct"] >= 50.0,
    }
    print(
        f"target: {verdict['target']}: first pass {verdict['first_pass_pct']:.0f}%, "
        f"later passes {verdict['later_pass_pct']:.0f}%"
    )
    result: dict[str, Any] = {
        "benchmark": "store",
        "nnz": int(args.nnz),
        "decoded_bytes": total,
        "block_bytes": args.block_bytes,
        "n_blocks": floor["n_blocks"],
        "repeat": args.repeat,
        "passes": args.passes,
        "zstd_level": store_format.ZSTD_LEVEL,
        "cpu_count": os.cpu_count(),
        "rows": [{k: v for k, v in c.items() if k not in ("path", "mode")} for c in configs],
        "verdict": verdict,
    }
    ingest = None if args.no_ingest else call_ingest_hook(out_dir)
    if ingest is not None:
        result["ingest"] = ingest
    atomic_write_json(out_dir / "bench_store.json", result)
    print(f"wrote {out_dir / 'bench_store.json'} in {time.perf_counter() - t0:.0f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
