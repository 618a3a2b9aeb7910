"""dask.distributed backend: same pass partials as the serial backend, worker loss.

The serial backend is the reference here; the gradient pass itself is checked
against numpy/scipy in tests/passes/test_gradient.py.
"""

from __future__ import annotations

import os
import signal
import threading
import time

import numpy as np
import pytest
import scipy.sparse as sp

distributed = pytest.importorskip("distributed", reason="dask.distributed not installed")

from ranktide.errors import ConfigError  # noqa: E402
from ranktide.passes.dask_backend import (  # noqa: E402
    cluster_client,
    from_wire,
    parse_cluster,
    split_groups,
    to_wire,
)
from ranktide.passes.gradient import PassRequest, gradient_pass  # noqa: E402
from ranktide.store import write_store  # noqa: E402


def _problem(tmp_path, n=3000, d=400, k=12, r=3, seed=5):
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.02, format="csr", random_state=seed, dtype=np.float32)
    y = rng.integers(0, k, size=n).astype(np.int32)
    w = rng.uniform(0.5, 2.0, size=n).astype(np.float32)
    path = tmp_path / "train.zarr"
    write_store(path, X, y, weights=w)
    U, _ = np.linalg.qr(rng.standard_normal((d, r)))
    V, _ = np.linalg.qr(rng.standard_normal((k, r)))
    Om = rng.standard_normal((k, 2))
    Ps = rng.standard_normal((d, 2))
    req = PassRequest(loss="softmax", U=U, s=np.array([3.0, 2.0, 1.0]), V=V,
                      b=rng.standard_normal(k), Omega=Om, Psi=Ps, keep_projections=True)
    return path, req


@pytest.fixture(scope="module")
def client():
    with cluster_client("local:2") as c:
        yield c


def _assert_same(a, b, rtol):
    assert a.n_rows == b.n_rows
    np.testing.assert_allclose(a.loss, b.loss, rtol=rtol)
    np.testing.assert_allclose(a.inner, b.inner, rtol=rtol, atol=1e-14)
    for name in ("grad_b", "G_VO", "Gt_Psi", "Gt_U"):
        x, y = getattr(a, name), getattr(b, name)
        scale = max(np.abs(x).max(), 1e-300)
        np.testing.assert_allclose(x, y, rtol=0, atol=rtol * scale, err_msg=name)
    xq_a = np.vstack([p.XQ for p in a.projections])
    xq_b = np.vstack([p.XQ for p in b.projections])
    np.testing.assert_allclose(xq_a, xq_b, rtol=rtol)


def test_parse_cluster_specs():
    assert parse_cluster("local:3").n_workers == 3
    assert parse_cluster("tcp://10.0.0.1:8786").address == "tcp://10.0.0.1:8786"
    with pytest.raises(ConfigError, match="positive integer"):
        parse_cluster("local:0")
    with pytest.raises(ConfigError, match="expected local:N"):
        parse_cluster("somewhere")


def test_split_groups_contiguous():
    assert split_groups(5, 2) == [(0, 2), (2, 5)] or split_groups(5, 2) == [(0, 3), (3, 5)]
    assert split_groups(1, 4) == [(0, 1)]
    groups = split_groups(17, 4)
    assert groups[0][0] == 0 and groups[-1][1] == 17
    assert all(a[1] == b[0] for a, b in zip(groups, groups[1:], strict=False))


def test_split_groups_balances_rows():
    # the bench store's blocks: by count the first worker got 84% of the rows
    assert split_groups(3, 2, sizes=[83800, 83853, 32347]) == [(0, 1), (1, 3)]
    assert split_groups(4, 2, sizes=[1, 1, 1, 1]) == [(0, 2), (2, 4)]
    # a huge first block still leaves every group at least one block
    groups = split_groups(4, 3, sizes=[100, 1, 1, 1])
    assert groups[0] == (0, 1) and len(groups) == 3
    assert all(b > a for a, b in groups) and groups[-1][1] == 4
    assert split_groups(0, 2) == []


def test_wire_form_rebuilds_objects_without_copying_big_arrays():
    from ranktide.passes.gradient import Projection, _Partial

    rng = np.random.default_rng(0)
    X = sp.random(6, 5, density=0.5, format="csr", random_state=0, dtype=np.float32)
    proj = Projection(start=0, stop=6, XQ=rng.standard_normal((6, 2)), targets=X, weights=None)
    part = _Partial(rows=6, weight=2.5, loss=1.25, grad_b=rng.standard_normal(3),
                    Gt_Psi=np.zeros((3, 0)), Gt_U=rng.standard_normal((3, 2)),
                    G_VO=rng.standard_normal((5000, 4)), projections=[proj],
                    G_VO_err=rng.standard_normal((5000, 4)) * 1e-17,
                    scratch={"G_VO": np.zeros((5000, 4))})
    arrays, desc = to_wire(("split", [part], {"n": 1}))
    # the two big arrays (the compensated sum and its compensation) travel as
    # themselves, the seven small ones packed in one buffer; the block-term buffer stays
    assert len(arrays) == 3 and arrays[0] is part.G_VO and arrays[1] is part.G_VO_err
    assert arrays[2].dtype == np.uint8
    tag, [back], extra = from_wire((arrays, desc))
    assert tag == "split" and extra == {"n": 1}
    assert type(back) is _Partial and back.rows == 6 and back.weight == 2.5
    assert back.G_VO is part.G_VO and back.G_VO_err is part.G_VO_err
    assert back.scratch is None
    assert back.G is None and back.G_err is None and back.terms == []
    for name in ("grad_b", "Gt_Psi", "Gt_U"):
        got, want = getattr(back, name), getattr(part, name)
        assert got.dtype == want.dtype and got.flags.writeable
        np.testing.assert_array_equal(got, want)
    p2 = back.projections[0]
    assert type(p2) is Projection and p2.weights is None
    np.testing.assert_array_equal(p2.XQ, proj.XQ)
    assert type(p2.targets) is type(X) and p2.targets.dtype == np.float32
    assert (p2.targets != X).nnz == 0


def test_dask_pass_equals_serial(tmp_path, client):
    path, req = _problem(tmp_path)
    serial = gradient_pass(path, req, backend="serial", block_rows=400)
    dist = gradient_pass(path, req, backend="dask", block_rows=400)
    _assert_same(serial, dist, 1e-12)


def test_dask_pass_is_the_serial_pass_bit_for_bit(tmp_path, client):
    # Reference: the serial backend. Each block's own small figures come back and are
    # folded on the client in block order; the d-row accumulators (G [V, Omega] and the
    # dense G) are compensated sums whose value does not depend on how the blocks were
    # grouped (one running sum; a range per worker, then combined; the threads backend's
    # fold), so every figure is bit-identical.
    from dataclasses import replace

    path, req = _problem(tmp_path)
    req = replace(req, dense_gradient=True)
    serial = gradient_pass(path, req, backend="serial", block_rows=400)
    threads = gradient_pass(path, req, backend="threads", n_threads=2, block_rows=400)
    dist = gradient_pass(path, req, backend="dask", block_rows=400)
    for other in (dist, threads):
        assert other.weight_total == serial.weight_total and other.loss == serial.loss
        assert other.inner == serial.inner
        for name in ("grad_b", "Gt_Psi", "Gt_U", "G_VO", "G"):
            np.testing.assert_array_equal(getattr(other, name), getattr(serial, name),
                                          err_msg=name)


def test_dask_pass_keeps_the_same_row_sample_as_serial(tmp_path, client):
    # Reference: the serial backend's kept rows (themselves checked against scipy's
    # X @ [U, Psi] in tests/passes/test_gradient.py).
    from dataclasses import replace

    path, req = _problem(tmp_path)
    rows = np.array([0, 399, 400, 1234, 2999])
    req = replace(req, sample_rows=rows)
    serial = gradient_pass(path, req, backend="serial", block_rows=400)
    dist = gradient_pass(path, req, backend="dask", block_rows=400)
    for res in (serial, dist):
        assert np.array_equal(np.concatenate([p.rows for p in res.projections]), rows)
    np.testing.assert_array_equal(np.concatenate([p.XQ for p in dist.projections]),
                                  np.concatenate([p.XQ for p in serial.projections]))
    np.testing.assert_array_equal(np.concatenate([p.targets for p in dist.projections]),
                                  np.concatenate([p.targets for p in serial.projections]))


def test_dask_pass_profile_has_every_block(tmp_path, client):
    path, req = _problem(tmp_path)
    res = gradient_pass(path, req, backend="dask", block_rows=500, profile=True)
    recs = res.profile.records
    assert sorted(r.first_row for r in recs) == list(range(0, 3000, 500))
    assert sum(r.rows for r in recs) == 3000
    # the workers' fold (the X^T D products) is part of each block's work
    assert all(r.fold_phases.get("xt_products", 0.0) > 0 for r in recs)
    tasks = res.profile.passes[-1]["cluster"]["tasks"]
    assert [t["blocks"] for t in tasks] == [[0, 3], [3, 6]]
    assert sum(t["rows"] for t in tasks) == 3000
    for t in tasks:
        assert t["busy_s"] >= t["compute_s"] + t["combine_s"] > 0
        assert 0 <= t["start_s"] <= t["end_s"] <= t["arrived_s"] + 1e-3


def test_dask_pass_stop_request_cancels_the_pass(tmp_path, client):
    from ranktide.signals import StopFlag, StopRequested

    path, req = _problem(tmp_path, n=20000)
    flag = StopFlag()
    timer = threading.Timer(0.2, flag.request)
    timer.start()
    t0 = time.perf_counter()
    with pytest.raises(StopRequested):
        gradient_pass(path, req, backend="dask", block_rows=50, should_stop=flag)
    timer.join()
    assert time.perf_counter() - t0 < 30
    # the cluster is idle again and the next pass is whole
    deadline = time.monotonic() + 10
    while any(client.processing().values()) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not any(client.processing().values())
    serial = gradient_pass(path, req, backend="serial", block_rows=2000)
    dist = gradient_pass(path, req, backend="dask", block_rows=2000)
    _assert_same(serial, dist, 1e-12)


def test_worker_killed_mid_pass_gives_same_result(tmp_path, client):
    path, req = _problem(tmp_path, n=40000)
    serial = gradient_pass(path, req, backend="serial", block_rows=100)
    pids = list(client.run(os.getpid).values())

    def kill_one():
        time.sleep(0.15)
        os.kill(pids[0], signal.SIGKILL)

    killer = threading.Thread(target=kill_one)
    killer.start()
    t0 = time.perf_counter()
    dist = gradient_pass(path, req, backend="dask", block_rows=50)
    wall = time.perf_counter() - t0
    killer.join()
    assert wall > 0.15, "the pass ended before the worker was killed; make it longer"
    _assert_same(serial, dist, 1e-12)
    # the killed worker really died (its nanny starts a new process)
    deadline = time.monotonic() + 60
    while True:
        try:
            now = set(client.run(os.getpid).values())
            if len(now) == 2:
                break
        except Exception:
            pass
        if time.monotonic() > deadline:
            raise AssertionError("the cluster did not recover two workers")
        time.sleep(0.5)
    assert pids[0] not in now


def test_unreachable_scheduler_is_one_clear_error():
    with pytest.raises(ConfigError, match="cannot reach the scheduler"):
        with cluster_client("tcp://127.0.0.1:9", timeout=1):
            pass


def _model(tmp_path, req):
    from ranktide.model import Model, save_model

    m = Model(U=req.U, s=req.s, V=req.V, b=req.b, loss="softmax")
    return save_model(tmp_path / "model", m)


def test_evaluate_and_predict_on_cluster_equal_serial(tmp_path, client):
    from ranktide.scoring.evaluate import evaluate
    from ranktide.scoring.predict import predict_to_file

    path, req = _problem(tmp_path)
    model_dir = _model(tmp_path, req)
    serial = evaluate(model_dir, path, block_rows=700)
    dist = evaluate(model_dir, path, block_rows=700, backend="dask")
    for key in ("accuracy", "top_k_accuracy", "log_loss", "macro_f1", "n_rows"):
        np.testing.assert_allclose(dist[key], serial[key], rtol=1e-12, err_msg=key)
    a = predict_to_file(model_dir, path, tmp_path / "serial.csv", top_k=3, block_rows=700)
    b = predict_to_file(model_dir, path, tmp_path / "dask.csv", top_k=3, block_rows=700,
                        backend="dask")
    assert a["n_rows"] == b["n_rows"] == 3000
    assert (tmp_path / "serial.csv").read_text() == (tmp_path / "dask.csv").read_text()


def test_evaluate_in_memory_data_on_the_cluster_equals_serial(client):
    # evaluate runs through the pass engine, whose dask backend ships in-memory sources
    from ranktide.model import Model
    from ranktide.scoring.evaluate import evaluate

    rng = np.random.default_rng(0)
    X = sp.random(50, 10, density=0.2, format="csr", random_state=0)
    y = rng.integers(0, 3, 50)
    m = Model(U=np.eye(10, 2), s=np.ones(2), V=np.eye(3, 2), b=np.zeros(3), loss="softmax")
    on_cluster = evaluate(m, (X, y), backend="dask", block_rows=7)
    serial = evaluate(m, (X, y), block_rows=7)
    for key in ("accuracy", "log_loss", "macro_f1", "total_weight"):
        assert on_cluster[key] == pytest.approx(serial[key], rel=1e-12)


@pytest.mark.parametrize("dense", [True, False])
def test_trained_model_on_cluster_equals_serial(tmp_path, client, dense):
    from ranktide.runs.train import train

    path, _ = _problem(tmp_path, n=800, d=60, k=5)
    # Reference: the serial backend. Every figure of a pass is the serial one bit for
    # bit (small figures folded in block order on the client, d-row accumulators as
    # compensated sums that do not depend on the grouping of blocks into worker
    # ranges), so the solver takes the same steps: the trained model U diag(s) V^T, the
    # intercept, the objective and the number of passes must agree to 1e-9 (the
    # demand of issue 7), at an ordinary tolerance, on both the dense-gradient path
    # and the power-iteration path. Measured: identical (difference 0, same passes).
    # With plain range sums (before the compensated ones) they rounded differently from
    # the serial running sum and, at this tolerance, W differed by 5e-4 (dense path)
    # and 9e-4 (power path) of its largest entry, with 24 passes against 22.
    kw = dict(loss="softmax", lam_scale=0.3, seed=3, block_rows=200, tol=1e-6,
              max_passes=150, dense_gradient=dense)
    serial = train(path, backend="serial", **kw)
    dist = train(path, backend="dask", **kw)
    assert serial.status == dist.status == "converged"
    assert dist.rank == serial.rank and dist.passes == serial.passes
    np.testing.assert_allclose(dist.objective, serial.objective, rtol=1e-12)
    W_s = serial.model.U @ np.diag(serial.model.s) @ serial.model.V.T
    W_d = dist.model.U @ np.diag(dist.model.s) @ dist.model.V.T
    np.testing.assert_allclose(W_d, W_s, rtol=0, atol=1e-9 * np.abs(W_s).max())
    np.testing.assert_allclose(dist.model.b, serial.model.b, rtol=0,
                               atol=1e-9 * max(np.abs(serial.model.b).max(), 1.0))


def test_workers_single_threaded_and_client_env_untouched(client):
    # The client process keeps its own thread settings (numba refuses a changed
    # NUMBA_NUM_THREADS once its threads run); each worker runs one numba thread.
    assert "NUMBA_NUM_THREADS" not in os.environ or os.environ["NUMBA_NUM_THREADS"] != "1"

    def probe():
        import numba

        return numba.config.NUMBA_NUM_THREADS, os.environ.get("OMP_NUM_THREADS")

    assert set(client.run(probe).values()) == {(1, "1")}
