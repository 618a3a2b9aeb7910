"""Ingest memory is bounded: a 4x larger file does not raise peak RSS by more than 10%.

Each ingest runs in its own process, which reports its peak resident set size
(``VmHWM`` of ``/proc/self/status``: unlike ``getrusage``, it is not inherited
from the forking parent). The 10% allowance is common practice, no source.
"""

from __future__ import annotations

import importlib.util
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[2]

_spec = importlib.util.spec_from_file_location("bench_ingest", ROOT / "tools" / "bench_ingest.py")
bench = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(bench)

_CHILD = r"""
import json, sys
from ranktide.ingest.build import ingest
s = ingest(sys.argv[1], sys.argv[2], memory="32MB")
hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0]
print(json.dumps({"peak_kib": int(hwm.split()[1]),
                  "nnz": s.nnz, "entries": s.entries_read, "sorted": s.sorted_input,
                  "buckets": s.buckets}))
"""


def _peak(src: Path, out: Path) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    res = subprocess.run([sys.executable, "-c", _CHILD, str(src), str(out)],
                         capture_output=True, text=True, env=env, check=False, timeout=300)
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout.strip().splitlines()[-1])


# Holding the 8M-entry file's entries in memory would add ~190 MiB (24 bytes
# each) to a ~200 MiB baseline, far beyond the 10% allowed. The smaller file
# must be large enough for the writer's thread pool to reach its steady state
# (about 2M entries here), or that warm-up would count as growth.
@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
@pytest.mark.parametrize("order,small", [("sorted", 2_000_000), ("shuffled", 500_000)])
def test_peak_rss_flat_in_file_size(tmp_path, order, small):
    peaks = []
    for n in (small, 4 * small):
        rows, cols = bench.make_entries(n, n // 20, 50_000, seed=n)
        if order == "shuffled":
            perm = np.random.default_rng(n).permutation(n)
            rows, cols = rows[perm], cols[perm]
        src = tmp_path / f"m{n}.mtx"
        bench.write_mm(src, rows, cols, n // 20, 50_000, digits=6)
        del rows, cols
        r = _peak(src, tmp_path / f"m{n}.zarr")
        assert r["entries"] == n and r["sorted"] == (order == "sorted")
        peaks.append(r["peak_kib"])
        src.unlink()
    assert peaks[1] <= 1.10 * peaks[0], f"peak RSS {peaks[0]} KiB -> {peaks[1]} KiB"
