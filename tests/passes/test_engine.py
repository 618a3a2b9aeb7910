"""Pass engine, in-memory source and memory planner.

References: scipy.sparse products on the whole in-memory matrix (the block
engine must reproduce them); IEC 80000-13 / SI prefixes for memory sizes.
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.errors import ConfigError, InputError, StoreError
from ranktide.passes import engine as passes
from ranktide.passes.budget import Plan, parse_memory, plan_blocks, total_memory
from ranktide.passes.engine import PassProfile, phase, register_backend, run_pass
from ranktide.store.memory_source import MemorySource, as_source, split_ranges

REPO = Path(__file__).resolve().parents[2]


def _data(n=300, d=40, k=5, seed=0):
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.15, format="csr", random_state=rng, dtype=np.float32)
    y = rng.integers(0, k, n).astype(np.int32)
    w = rng.random(n).astype(np.float32)
    return X, y, w


# --- module-level block functions (the engine's contract) ------------------
def _sums_block(block, state):
    with phase("colsum"):
        col = np.asarray(block.X.astype(np.float64).sum(axis=0)).ravel()
    with phase("xty"):
        xtw = np.asarray(block.X.T @ (block.weights.astype(np.float64) * state), dtype=np.float64)
    return {"rows": block.stop - block.start, "col": col, "xtw": xtw, "starts": [block.start]}


def _sums_combine(parts):
    return {"rows": sum(p["rows"] for p in parts),
            "col": sum(p["col"] for p in parts[1:]) + parts[0]["col"],
            "xtw": sum(p["xtw"] for p in parts[1:]) + parts[0]["xtw"],
            "starts": [s for p in parts for s in p["starts"]]}


def _jitter_block(block, state):
    # random sleeps scramble the completion order of the threads backend
    time.sleep(float(np.random.default_rng(block.start).random()) * 0.01)
    return _sums_block(block, state)


BUDGETS = [{"block_rows": 1000}, {"block_rows": 37}, {"block_rows": 1},
           {"block_bytes": 600}, {"block_bytes": 4000}, {}]


@pytest.mark.parametrize("backend", ["serial", "threads"])
@pytest.mark.parametrize("budget", BUDGETS, ids=lambda b: str(b))
def test_pass_equals_whole_matrix(backend, budget):
    X, y, w = _data()
    src = MemorySource(X, y, weights=w)
    scale = 0.5
    out = run_pass(src, _jitter_block if backend == "threads" else _sums_block, _sums_combine,
                   state=scale, backend=backend, n_threads=3, **budget)
    # reference: scipy.sparse products on the whole matrix
    col = np.asarray(X.astype(np.float64).sum(axis=0)).ravel()
    np.testing.assert_allclose(out["col"], col, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(out["xtw"], X.T.astype(np.float64) @ (w.astype(np.float64) * scale),
                               rtol=1e-12, atol=1e-12)
    assert out["rows"] == X.shape[0]
    starts = [a for a, _ in src.block_ranges(rows=budget.get("block_rows"),
                                             block_bytes=budget.get("block_bytes"))]
    assert out["starts"] == starts  # folded strictly in block order


def _pass_threads() -> list:
    """Threads the pass engine started that are still alive. The kernels' chunk pool
    (kernels/rowchunks.py) lives as long as the process, as a decode pool does, so it
    is not the pass's to stop."""
    return [t for t in threading.enumerate()
            if t.name.startswith("ranktide-") and not t.name.startswith("ranktide-chunk")]


def test_serial_and_threads_agree():
    X, y, w = _data(n=500, seed=3)
    src = MemorySource(X, y, weights=w)
    a = run_pass(src, _sums_block, _sums_combine, state=1.5, block_rows=23)
    b = run_pass(src, _jitter_block, _sums_combine, state=1.5, block_rows=23,
                 backend="threads", n_threads=4)
    rel = np.abs(a["xtw"] - b["xtw"]).max() / np.abs(a["xtw"]).max()
    assert rel <= 1e-12


def test_init_is_fold_start_and_empty_source():
    X, y, w = _data(n=20)
    src = MemorySource(X, y, weights=w)
    init = {"rows": 100, "col": np.zeros(X.shape[1]), "xtw": np.zeros(X.shape[1]), "starts": []}
    out = run_pass(src, _sums_block, _sums_combine, state=1.0, init=init, block_rows=7)
    assert out["rows"] == 120
    empty = MemorySource(sp.csr_matrix((0, 4), dtype=np.float32))
    assert run_pass(empty, _sums_block, _sums_combine, state=1.0) is None
    assert run_pass(empty, _sums_block, _sums_combine, state=1.0, init=init) is init


class _FailingSource(MemorySource):
    def read_block(self, start, stop):
        if start >= 40:
            raise StoreError("store.zarr: chunk 3 of data is missing; re-ingest the store")
        return super().read_block(start, stop)


def _failing_block(block, state):
    if block.start >= 60:
        raise InputError(f"block at row {block.start}: bad value")
    return _sums_block(block, state)


@pytest.mark.parametrize("backend", ["serial", "threads"])
def test_errors_propagate_without_hanging(backend):
    X, y, w = _data(n=200)
    t0 = time.perf_counter()
    with pytest.raises(StoreError, match="chunk 3 of data is missing"):
        run_pass(_FailingSource(X, y, weights=w), _sums_block, _sums_combine, state=1.0,
                 block_rows=10, backend=backend)
    with pytest.raises(InputError, match="block at row 60"):
        run_pass(MemorySource(X, y, weights=w), _failing_block, _sums_combine, state=1.0,
                 block_rows=10, backend=backend)
    assert time.perf_counter() - t0 < 10
    # no reader or worker thread is left behind
    time.sleep(0.2)
    assert not _pass_threads()


@pytest.mark.parametrize("backend", ["serial", "threads"])
def test_stop_check_abandons_the_pass_at_a_block_boundary(backend):
    from ranktide.signals import StopFlag, StopRequested

    X, y, w = _data(n=200)
    computed: list[int] = []
    flag = StopFlag()

    def fold_watch(parts):
        out = _sums_combine(parts)
        if len(out["starts"]) == 3:  # the third block has been folded in
            flag.request()
        return out

    def block(b, state):
        computed.append(b.start)
        return _sums_block(b, state)

    with pytest.raises(StopRequested, match="after block 2"):
        run_pass(MemorySource(X, y, weights=w), block, fold_watch, state=1.0, block_rows=10,
                 backend=backend, n_threads=2, should_stop=flag)
    # serial computes nothing past the stop; threads at most the blocks already in flight
    assert max(computed) <= (20 if backend == "serial" else 20 + 10 * 3)
    time.sleep(0.2)
    assert not _pass_threads()


def test_backend_registry_and_errors():
    X, y, w = _data(n=30)
    src = MemorySource(X, y, weights=w)
    with pytest.raises(ConfigError, match="backend 'nope': unknown"):
        run_pass(src, _sums_block, _sums_combine, state=1.0, backend="nope")
    with pytest.raises(ConfigError, match="n_threads = 0"):
        run_pass(src, _sums_block, _sums_combine, state=1.0, n_threads=0)
    seen = []

    def plain(job):
        for i, (a, b) in enumerate(job.ranges):
            block = job.source.read_block(a, b)
            seen.append(i)
            job.fold(i, block, job.block_fn(block, job.state), None, 0.0, 0.0)

    register_backend("plain-test", plain)
    out = run_pass(src, _sums_block, _sums_combine, state=1.0, backend="plain-test",
                   block_rows=8)
    assert seen == [0, 1, 2, 3] and out["rows"] == 30
    assert "plain-test" in passes.available_backends()


@pytest.mark.parametrize("backend", ["serial", "threads"])
def test_profile_records_every_block(backend):
    X, y, w = _data(n=250)
    src = MemorySource(X, y, weights=w)
    prof = PassProfile()
    for _ in range(2):
        run_pass(src, _sums_block, _sums_combine, state=1.0, block_rows=40, backend=backend,
                 profile=prof)
    assert len(prof.passes) == 2
    assert len(prof.records) == 2 * 7
    for p in range(2):
        recs = [r for r in prof.records if r.pass_index == p]
        assert [r.block for r in recs] == list(range(7))
        assert sum(r.rows for r in recs) == 250
        assert sum(r.nnz for r in recs) == X.nnz
    assert prof.phase_names() == ["colsum", "xty"]
    assert all(r.phases["colsum"] > 0 and r.compute_s >= r.phases["xty"] for r in prof.records)
    tot = prof.totals()
    assert tot["rows"] == 500 and tot["phase:xty"] > 0


def _probe_block(block, state):
    # records whether phase() hands out a live timer
    return [phase("x") is not passes._NULL_PHASE]


def _concat(parts):
    return [x for p in parts for x in p]


def test_no_timing_when_not_profiled():
    X, y, w = _data(n=30)
    src = MemorySource(X, y, weights=w)
    assert run_pass(src, _probe_block, _concat, state=None, block_rows=10) == [False] * 3
    assert run_pass(src, _probe_block, _concat, state=None, block_rows=10,
                    profile=PassProfile()) == [True] * 3


class _SlowSource(MemorySource):
    def read_block(self, start, stop):
        time.sleep(0.04)
        return super().read_block(start, stop)


def _slow_block(block, state):
    time.sleep(0.04)
    return [block.start]


def test_serial_backend_reads_ahead():
    X, y, w = _data(n=100)
    src = _SlowSource(X, y, weights=w)
    prof = PassProfile()
    t0 = time.perf_counter()
    out = run_pass(src, _slow_block, _concat, state=None, block_rows=10, profile=prof)
    wall = time.perf_counter() - t0
    assert out == list(range(0, 100, 10))
    # 10 reads and 10 computes of 40 ms each: 0.8 s back to back, about 0.44 s
    # when the read of block i+1 overlaps block i (bound: common practice, no source)
    assert wall < 0.7
    assert prof.records[0].wait_s > 0.03  # the first block is always waited for


# --- the in-memory source ---------------------------------------------------
def test_memsource_blocks_and_ranges():
    X, y, w = _data(n=123)
    src = as_source((X, y, w))
    assert src.shape == X.shape and src.nnz == X.nnz and src.target_kind == "classes"
    ranges = src.block_ranges(block_bytes=500)
    assert ranges[0][0] == 0 and ranges[-1][1] == 123
    assert all(a < b for a, b in ranges)
    assert all(r[1] == s[0] for r, s in zip(ranges, ranges[1:], strict=False))
    cost = (np.diff(X.indptr[[a for a, _ in ranges] + [123]]) * 8
            + 8 * np.diff([a for a, _ in ranges] + [123]))
    single = [(b - a) == 1 for a, b in ranges]
    assert all(c <= 500 or s for c, s in zip(cost, single, strict=True))
    blk = src.read_block(10, 20)
    np.testing.assert_array_equal(blk.X.toarray(), X[10:20].toarray())
    np.testing.assert_array_equal(blk.targets, y[10:20])
    np.testing.assert_array_equal(blk.weights, w[10:20])
    assert blk.io["bytes_decoded"] > 0


def test_split_ranges_rows_only():
    indptr = np.arange(11) * 3
    assert split_ranges(indptr, rows=4) == [(0, 4), (4, 8), (8, 10)]
    with pytest.raises(ConfigError, match="block rows = 0"):
        split_ranges(indptr, rows=0)


def test_memsource_rejects_bad_input():
    X, y, w = _data(n=10)
    # rows counted from 1 in messages (index 3 is row 4), as Matrix Market counts them
    with pytest.raises(InputError, match="row 4 has weight -1.0"):
        MemorySource(X, y, weights=np.where(np.arange(10) == 3, -1.0, 1.0))
    with pytest.raises(InputError, match="row 3 has class 9"):
        MemorySource(X, np.where(np.arange(10) == 2, 9, 0), n_outputs=5)
    bad = X.copy()
    bad.data[0] = np.nan
    with pytest.raises(InputError, match="not finite"):
        MemorySource(bad)
    with pytest.raises(InputError, match="expected a 2-D numeric matrix"):
        MemorySource(np.zeros(3))
    # a dense 2-D array is accepted, as write_store and evaluate accept it (one standardizer)
    dense = MemorySource(X.toarray(), y)
    assert (dense.X != X).nnz == 0 and dense.target_kind == "classes"
    # 1-D float targets are one column of values everywhere
    vals = MemorySource(X, np.linspace(0.0, 1.0, 10))
    assert vals.target_kind == "values" and vals.n_outputs == 1
    with pytest.raises(ConfigError, match="expected a store"):
        as_source(42)


# --- memory planner ----------------------------------------------------------
def test_parse_memory():
    # SI prefixes are powers of 1000, IEC binary prefixes powers of 1024 (IEC 80000-13)
    assert parse_memory("4GB") == 4 * 10**9
    assert parse_memory("512MiB") == 512 * 2**20
    assert parse_memory("1.5G") == int(1.5 * 2**30)
    assert parse_memory("2048") == 2048
    assert parse_memory(100) == 100
    assert parse_memory("50%") == total_memory() // 2
    assert parse_memory(None) == total_memory() // 4
    for bad, msg in [("lots", "not understood"), ("4XB", "unknown unit"), ("0", "positive"),
                     ("150%", "percentage")]:
        with pytest.raises(ConfigError, match=msg):
            parse_memory(bad)


class _Shape:
    # the planner reads only the sizes of a source
    def __init__(self, n, d, k, nnz):
        self.shape, self.n_outputs, self.nnz = (n, d), k, nnz


def test_plan_blocks_respects_budget():
    src = _Shape(20000, 3000, 50, 20000 * 450)
    plans = [plan_blocks(src, budget=b, rank=8, omega_cols=4, psi_cols=4)
             for b in (4 * 2**20, 16 * 2**20, 64 * 2**20)]
    for plan in plans:
        assert isinstance(plan, Plan)
        assert plan.peak_bytes <= plan.budget
        assert plan.n_blocks == -(-20000 // plan.block_rows)
    assert plans[0].block_rows < plans[1].block_rows <= plans[2].block_rows
    with pytest.raises(ConfigError, match="below the"):
        plan_blocks(src, budget=10_000, rank=8)


def test_plan_blocks_caps_dense_block_bytes_and_counts_targets_by_kind():
    """The planner's own rules (no outside reference; the cap is a measured trade-off,
    see MAX_BLOCK_DENSE_BYTES): with room to spare, a block's X [U, Psi] and
    R [V, Omega] stay within the cap; within a tight budget, rows of k float32 target
    values leave smaller blocks than rows of one class id; every plan fits its budget."""
    from ranktide.passes.budget import MAX_BLOCK_DENSE_BYTES

    roomy = plan_blocks(_Shape(2_000_000, 3000, 50, 2_000_000 * 40), budget=8 * 2**30,
                        rank=8, omega_cols=6, psi_cols=22)
    width = (8 + 22) + (8 + 6)  # X [U, Psi] and R [V, Omega]
    assert roomy.block_rows == MAX_BLOCK_DENSE_BYTES // (8 * width)
    plans = {}
    for kind in ("classes", "values"):
        src = _Shape(200_000, 3000, 500, 200_000 * 40)
        src.target_kind = kind
        plans[kind] = plan_blocks(src, budget=64 * 2**20, rank=8, omega_cols=6, psi_cols=6)
        assert plans[kind].peak_bytes <= plans[kind].budget
    assert plans["values"].block_rows < plans["classes"].block_rows


def test_plan_dense_gradient_and_projections_rules():
    X, y, w = _data(n=1000, d=600, k=50)
    src = MemorySource(X, y, weights=w)
    dense = 600 * 50 * 8
    # the stated rule: the dense gradient fits when its arrays are at most a third of
    # the budget; they are three d x k float64 (compensated sum, compensation, the CSR
    # path's block-term buffer), and on dask the client's range sums too
    assert plan_blocks(src, budget=9 * dense + 9, rank=2).dense_gradient_fits
    assert not plan_blocks(src, budget=9 * dense - 9, rank=2).dense_gradient_fits
    assert not plan_blocks(src, budget=9 * dense + 9, rank=2, backend="dask",
                           n_threads=2).dense_gradient_fits
    assert plan_blocks(src, budget=12 * dense + 12, rank=2, backend="dask",
                       n_threads=2).dense_gradient_fits
    with pytest.raises(ConfigError, match="dense gradient: 3 x"):
        plan_blocks(src, budget=8 * dense, rank=2, dense_gradient=True)
    plan = plan_blocks(src, budget=2**30, rank=2, dense_gradient=True)
    assert plan.breakdown["dense_gradient"] == 3 * dense
    assert plan.breakdown["accumulators"] >= 3 * 600 * 2 * 8
    big = plan_blocks(src, budget=2**30, rank=4, psi_cols=4, keep_projections=True)
    assert big.projections_fit and big.projections_bytes == 1000 * 8 * 8
    assert big.breakdown["projections"] == big.projections_bytes
    small = plan_blocks(src, budget=1_000_000, rank=4, psi_cols=4, keep_projections=True,
                        dense_gradient=False)
    assert small.projections_bytes == 64_000
    assert small.peak_bytes <= small.budget


# --- peak memory does not grow with rows ---------------------------------------
_RSS_SCRIPT = textwrap.dedent("""
    import json, sys, time, threading
    import numpy as np, psutil, scipy.sparse as sp
    from ranktide.passes.gradient import PassRequest, gradient_pass
    from ranktide.passes.budget import plan_blocks

    class Generated:
        # rows generated per block from the block's seed: nothing is held whole
        target_kind, backend, path = "classes", "memory", None
        def __init__(self, n, d, k):
            self.shape, self.n_outputs, self.nnz = (n, d), k, n * 40
        def block_ranges(self, *, rows=None, block_bytes=None):
            return [(a, min(a + rows, self.shape[0])) for a in range(0, self.shape[0], rows)]
        def read_block(self, a, b):
            rng = np.random.default_rng(a)
            m, d = b - a, self.shape[1]
            X = sp.csr_matrix((rng.random(m * 40, dtype=np.float32),
                               rng.integers(0, d, m * 40).astype(np.int32),
                               np.arange(0, m * 40 + 1, 40)), shape=(m, d))
            X.sum_duplicates()
            y = rng.integers(0, self.n_outputs, m).astype(np.int32)
            class B: pass
            blk = B(); blk.start, blk.stop, blk.X, blk.targets, blk.weights = a, b, X, y, None
            blk.io = {}
            return blk

    d, k, r = 20000, 40, 8
    rng = np.random.default_rng(0)
    U = np.linalg.qr(rng.standard_normal((d, r)))[0]
    V = np.linalg.qr(rng.standard_normal((k, r)))[0]
    req = PassRequest("softmax", U, np.ones(r), V, np.zeros(k), Psi=U[:, :4], Omega=V[:, :4],
                      keep_projections=len(sys.argv) > 1)
    proc = psutil.Process()
    peak = [proc.memory_info().rss]
    stop = threading.Event()
    def watch():
        while not stop.is_set():
            peak[0] = max(peak[0], proc.memory_info().rss); time.sleep(0.005)
    gradient_pass(Generated(2000, d, k), req, block_rows=2000)  # warm up
    t = threading.Thread(target=watch); t.start()
    out = {}
    for backend in ("serial", "threads"):
        for n in (25_000, 100_000):
            time.sleep(0.05)
            base = peak[0] = proc.memory_info().rss
            res = gradient_pass(Generated(n, d, k), req, block_rows=5000, backend=backend)
            time.sleep(0.05)
            plan = plan_blocks(Generated(n, d, k), budget=2**40, rank=r, omega_cols=4,
                               psi_cols=4, backend=backend, max_block_bytes=5000 * 328,
                               dense_gradient=False)
            out[f"{backend}-{n}"] = {"rows": res.n_rows, "peak": peak[0], "base": base,
                                     "planned": plan.peak_bytes, "plan_rows": plan.block_rows}
            del res
    stop.set(); t.join()
    print(json.dumps(out))
""")


def test_peak_rss_does_not_grow_with_rows(tmp_path):
    script = tmp_path / "rss.py"
    script.write_text(_RSS_SCRIPT)
    proc = subprocess.run([sys.executable, str(script)], cwd=REPO, capture_output=True,
                          text=True, timeout=300, check=True)
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    for backend in ("serial", "threads"):
        small, large = out[f"{backend}-25000"], out[f"{backend}-100000"]
        assert (small["rows"], large["rows"]) == (25_000, 100_000)
        # 4x the rows: peak RSS within 10% of the smaller pass's (the bound of
        # the task; holding every block would add about 40 MB here)
        assert large["peak"] <= 1.10 * small["peak"], out
        # the planner's estimate of the pass's own peak (blocks of 5000 rows, as
        # run) is not below what the pass added to the RSS
        for run in (small, large):
            assert run["plan_rows"] == 5000
            assert run["peak"] - run["base"] <= run["planned"], out
