"""CSR and transposed-block kernels, fused block products and threading set-up.

References: scipy.sparse products (``X @ B``, ``X.T @ D``) for the sparse kernels;
dense numpy arithmetic (``scipy.special.logsumexp``/``expit`` for the losses)
for the fused products; numba's own ``threading_layer()`` for the threading
report.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.kernels import threads
from ranktide.kernels.csc import (
    block_csc,
    csc_matmul_dense,
    csc_t_matmul_accumulate,
    worth_transposing,
)
from ranktide.kernels.errors import KernelConfigError, KernelInputError
from ranktide.kernels.products import ProductBuffers, block_products, prepare_operands
from ranktide.kernels.sparse import csr_matmul_dense, csr_t_matmul_accumulate
from scipy.special import expit, logsumexp

DTYPES = [(np.int32, np.float32), (np.int64, np.float32), (np.int32, np.float64),
          (np.int64, np.float64)]


def _block(n, d, *, density=0.05, seed=0, used_cols=None, empty_every=5,
           itype=np.int32, dtype=np.float32):
    """Random CSR with empty rows and, optionally, only the first columns used."""
    rng = np.random.default_rng(seed)
    cols = d if used_cols is None else used_cols
    X = sp.random(n, cols, density=density, format="lil", dtype=np.float64, random_state=rng)
    X[::empty_every, :] = 0.0
    X = sp.csr_matrix(X)
    X.resize((n, d))
    X.data = X.data.astype(dtype) - np.asarray(0.5, dtype)
    return X.indptr.astype(itype), X.indices.astype(itype), X.data, X


# --------------------------------------------------------------------------- sparse
# The transposed-block kernels (kernels.csc) are checked beside each CSR kernel:
# against scipy.sparse, and bit for bit against the CSR kernel on sorted blocks.


@pytest.mark.parametrize("itype,dtype", DTYPES)
def test_csr_matmul_dense_matches_scipy(itype, dtype):
    ip, ix, da, X = _block(120, 3000, used_cols=80, itype=itype, dtype=dtype, seed=1)
    B = np.random.default_rng(2).standard_normal((3000, 7))
    out = np.full((120, 7), np.nan)  # overwritten, not accumulated
    csr_matmul_dense(ip, ix, da, B, out)
    ref = X.astype(np.float64) @ B  # reference: scipy.sparse CSR product
    np.testing.assert_allclose(out, ref, rtol=1e-12, atol=1e-12)
    assert np.all(out[::5] == 0.0)  # the empty rows


@pytest.mark.parametrize("itype,dtype", DTYPES)
def test_csr_t_matmul_accumulate_matches_scipy(itype, dtype):
    ip, ix, da, X = _block(150, 2500, used_cols=90, itype=itype, dtype=dtype, seed=3)
    rng = np.random.default_rng(4)
    D = rng.standard_normal((150, 5))
    out0 = rng.standard_normal((2500, 5))
    out = out0.copy()
    csr_t_matmul_accumulate(ip, ix, da, D, out)
    ref = out0 + X.T.astype(np.float64) @ D  # reference: scipy.sparse transpose product
    np.testing.assert_allclose(out, ref, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("itype,dtype", DTYPES)
@pytest.mark.parametrize("parts", [1, 2, 5])
def test_transposed_block_products_match_scipy_and_csr(itype, dtype, parts):
    ip, ix, da, X = _block(130, 2600, used_cols=85, itype=itype, dtype=dtype, seed=11)
    rng = np.random.default_rng(12)
    T = block_csc(ip, ix, da, 2600, n_parts=parts)
    assert T.nnz == X.nnz and T.vals.dtype == dtype
    B = rng.standard_normal((2600, 6))
    out = np.full((130, 6), np.nan)
    csc_matmul_dense(T, B, out)
    np.testing.assert_allclose(out, X.astype(np.float64) @ B, rtol=1e-12, atol=1e-12)  # scipy
    ref = np.empty((130, 6))
    csr_matmul_dense(ip, ix, da, B, ref)
    assert np.array_equal(out, ref)  # the same sums in the same order
    D = rng.standard_normal((130, 4))
    acc0 = rng.standard_normal((2600, 4))
    acc, acc_csr = acc0.copy(), acc0.copy()
    csc_t_matmul_accumulate(T, D, acc)
    np.testing.assert_allclose(acc, acc0 + X.T.astype(np.float64) @ D, rtol=1e-12,
                               atol=1e-12)  # scipy.sparse transpose product
    csr_t_matmul_accumulate(ip, ix, da, D, acc_csr)
    assert np.array_equal(acc, acc_csr)


def test_transposed_block_edge_cases():
    # one column; absolute (unrebased) pointers; empty block; unsorted ids; bad ids
    ip, ix, da, X = _block(40, 1, density=0.6, seed=13)
    T = block_csc(ip, ix, da, 1, n_parts=3)
    out = np.zeros((40, 1))
    csc_matmul_dense(T, np.array([[2.5]]), out)
    np.testing.assert_allclose(out, X.astype(np.float64).toarray() * 2.5, rtol=1e-12)  # scipy
    ip, ix, da, X = _block(60, 200, seed=14)
    T = block_csc(ip[10:31], ix, da, 200, n_parts=2)
    B = np.random.default_rng(15).standard_normal((200, 3))
    sub = np.zeros((20, 3))
    csc_matmul_dense(T, B, sub)
    np.testing.assert_allclose(sub, X[10:30].astype(np.float64) @ B, rtol=1e-12)  # scipy
    E = block_csc(ip[:1], ix, da, 200)
    assert E.shape == (0, 200) and E.nnz == 0
    acc = np.ones((200, 3))
    csc_t_matmul_accumulate(E, np.zeros((0, 3)), acc)
    assert np.all(acc == 1.0)
    Xu = X.copy()
    for i in range(Xu.shape[0]):  # reverse the column ids within each row
        a, b = Xu.indptr[i], Xu.indptr[i + 1]
        Xu.indices[a:b] = Xu.indices[a:b][::-1].copy()
        Xu.data[a:b] = Xu.data[a:b][::-1].copy()
    assert not Xu.has_sorted_indices
    Tu = block_csc(Xu.indptr, Xu.indices, Xu.data, 200)
    o = np.zeros((60, 3))
    csc_matmul_dense(Tu, B, o)
    np.testing.assert_allclose(o, X.astype(np.float64) @ B, rtol=1e-12, atol=1e-12)  # scipy
    bad = ix.copy()
    bad[7] = 200
    with pytest.raises(KernelInputError,
                       match=r"row \d+: column id 200 \(column 201 of 200\) is outside 0\.\.199"):
        block_csc(ip, bad, da, 200)
    with pytest.raises(KernelInputError, match="pointers"):
        block_csc(np.array([0, 5, 3], dtype=np.int32), ix, da, 200)
    assert worth_transposing(100, 200) and not worth_transposing(99, 200)
    assert not worth_transposing(0, 0)


def test_one_column_and_one_output():
    ip, ix, da, X = _block(40, 1, density=0.6, seed=5)
    B = np.array([[2.5]])
    out = np.zeros((40, 1))
    csr_matmul_dense(ip, ix, da, B, out)
    np.testing.assert_allclose(out, X.astype(np.float64) @ B, rtol=1e-12)  # scipy reference
    acc = np.zeros((1, 1))
    D = np.arange(40.0).reshape(40, 1)
    csr_t_matmul_accumulate(ip, ix, da, D, acc)
    np.testing.assert_allclose(acc, X.T.astype(np.float64) @ D, rtol=1e-12)  # scipy reference


def test_empty_block_and_unrebased_pointers():
    ip, ix, da, X = _block(60, 200, seed=6)
    B = np.random.default_rng(7).standard_normal((200, 3))
    out = csr_matmul_dense(ip[:1], ix, da, B, np.zeros((0, 3)))
    assert out.shape == (0, 3)
    acc = np.ones((200, 3))
    csr_t_matmul_accumulate(ip[:1], ix, da, np.zeros((0, 3)), acc)
    assert np.all(acc == 1.0)
    # rows 10..29 of a bigger CSR without rebasing indptr (absolute pointers)
    sub = np.zeros((20, 3))
    csr_matmul_dense(ip[10:31], ix, da, B, sub)
    np.testing.assert_allclose(sub, X[10:30].astype(np.float64) @ B, rtol=1e-12)  # scipy


def test_t_matmul_deterministic_across_thread_counts():
    ip, ix, da, X = _block(400, 700, density=0.1, seed=8)
    D = np.random.default_rng(9).standard_normal((400, 6))
    results = []
    old = numba.get_num_threads()
    try:
        for nt in (1, old, 1, old):
            numba.set_num_threads(nt)
            out = np.zeros((700, 6))
            csr_t_matmul_accumulate(ip, ix, da, D, out)
            results.append(out)
    finally:
        numba.set_num_threads(old)
    for r in results[1:]:
        assert np.array_equal(r, results[0])  # bit-identical, whatever the thread count
    np.testing.assert_allclose(results[0], X.T.astype(np.float64) @ D, rtol=1e-12)  # scipy


def test_sparse_bad_input_raises():
    ip, ix, da, _ = _block(30, 50, seed=10)
    B = np.zeros((50, 2))
    bad_ix = ix.copy()
    bad_ix[3] = 50
    with pytest.raises(KernelInputError,
                       match=r"part-0\.mtx: row \d+: column id 50 \(column 51 of 50\) is outside"):
        csr_matmul_dense(ip, bad_ix, da, B, np.zeros((30, 2)), where="part-0.mtx")
    with pytest.raises(KernelInputError, match="column id 50"):
        csr_t_matmul_accumulate(ip, bad_ix, da, np.zeros((30, 2)), np.zeros((50, 2)))
    bad_ip = ip.copy()
    bad_ip[-1] = ix.shape[0] + 5
    with pytest.raises(KernelInputError, match="row 30: its row pointers"):
        csr_matmul_dense(bad_ip, ix, da, B, np.zeros((30, 2)))
    with pytest.raises(KernelInputError, match="out must be a writable float64"):
        csr_matmul_dense(ip, ix, da, B, np.zeros((30, 2), dtype=np.float32))
    with pytest.raises(KernelInputError, match="D has 29 rows but the block has 30"):
        csr_t_matmul_accumulate(ip, ix, da, np.zeros((29, 2)), np.zeros((50, 2)))
    with pytest.raises(KernelInputError, match="indices has"):
        csr_matmul_dense(ip, ix[:-1], da, B, np.zeros((30, 2)))


# --------------------------------------------------------------------------- threads


def test_threading_info_reports_numba_layer():
    info = threads.threading_info()
    assert set(info) == {"layer", "threads", "serialized", "cache_dir"}
    assert info["layer"] == numba.threading_layer()  # reference: numba's own report
    assert info["threads"] == numba.get_num_threads()
    assert info["serialized"] == (info["layer"] == "workqueue")
    import ranktide.kernels as kernels

    assert kernels.threading_info() == info


def test_serialized_guard_is_the_lock(monkeypatch):
    monkeypatch.setitem(threads._STATE, "serialized", True)
    assert threads.kernel_guard() is threads._LOCK
    ip, ix, da, X = _block(50, 40, seed=11)
    out = np.zeros((40, 2))
    csr_t_matmul_accumulate(ip, ix, da, np.ones((50, 2)), out)  # runs under the lock
    np.testing.assert_allclose(out, X.T.astype(np.float64) @ np.ones((50, 2)), rtol=1e-12)


def test_two_python_threads_at_once():
    ip, ix, da, X = _block(500, 300, density=0.08, seed=12)
    rng = np.random.default_rng(13)
    D = rng.standard_normal((500, 4))
    B = rng.standard_normal((300, 4))
    ref_t = X.T.astype(np.float64) @ D  # scipy references
    ref_m = X.astype(np.float64) @ B

    def work(i):
        ok = True
        for _ in range(15):
            if i % 2:
                out = np.zeros((300, 4))
                csr_t_matmul_accumulate(ip, ix, da, D, out)
                ok &= np.allclose(out, ref_t, rtol=1e-12, atol=1e-12)
            else:
                out = np.zeros((500, 4))
                csr_matmul_dense(ip, ix, da, B, out)
                ok &= np.allclose(out, ref_m, rtol=1e-12, atol=1e-12)
        return ok

    with ThreadPoolExecutor(max_workers=2) as ex:
        assert all(ex.map(work, range(4)))


# --------------------------------------------------------------------------- products


def _dense_reference(Xd, targets, w, U, s, V, b, loss, cw=None):
    """The same arithmetic in dense numpy/scipy: scores, residual, products."""
    n = Xd.shape[0]
    S = Xd @ (U * s) @ V.T + b
    w = np.ones(n) if w is None else np.asarray(w, dtype=np.float64)
    if cw is not None:
        w = w * cw[targets]
    if loss == "softmax":
        lse = logsumexp(S, axis=1)  # reference: scipy.special.logsumexp
        li = lse - S[np.arange(n), targets]
        R = np.exp(S - lse[:, None])
        R[np.arange(n), targets] -= 1.0
    elif loss == "squared":
        li = 0.5 * np.sum((S - targets) ** 2, axis=1)
        R = S - targets
    else:
        T = targets.toarray()
        li = np.sum(np.logaddexp(0.0, S) - T * S, axis=1)
        R = expit(S) - T  # reference: scipy.special.expit
    R = R * w[:, None]
    return float(np.sum(w * li)), float(np.sum(w)), R


def _problem(loss, *, n=90, d=400, k=6, r=3, pp=2, p=3, seed=0):
    rng = np.random.default_rng(seed)
    _, _, _, X = _block(n, d, density=0.06, seed=seed + 100)
    U = np.linalg.qr(rng.standard_normal((d, r)))[0]
    V = np.linalg.qr(rng.standard_normal((k, r)))[0]
    s = np.sort(rng.random(r) * 3 + 0.5)[::-1]
    Psi = rng.standard_normal((d, pp))
    Om = rng.standard_normal((k, p))
    b = rng.standard_normal(k) * 0.3
    w = rng.random(n).astype(np.float32)
    if loss == "softmax":
        y = rng.integers(0, k, n).astype(np.int32)
    elif loss == "squared":
        y = rng.standard_normal((n, k)).astype(np.float32)
    else:
        y = sp.csr_matrix((rng.random((n, k)) < 0.3).astype(np.float32))
    return X, y, w, U, s, V, b, Psi, Om


@pytest.mark.parametrize("loss", ["softmax", "squared", "multilabel"])
def test_block_products_match_dense_arithmetic(loss):
    X, y, w, U, s, V, b, Psi, Om = _problem(loss)
    ops = prepare_operands(U=U, s=s, V=V, b=b, loss=loss, Psi=Psi, Omega=Om)
    bufs = ProductBuffers.zeros(ops, dense_G=True)
    XQ = block_products(X, y, w, ops, bufs)
    Xd = X.toarray().astype(np.float64)
    loss_sum, wsum, R = _dense_reference(Xd, y, w, U, s, V, b, loss)
    G = Xd.T @ R
    tol = {"rtol": 1e-10, "atol": 1e-11}
    np.testing.assert_allclose(XQ, Xd @ np.hstack([U, Psi]), **tol)
    np.testing.assert_allclose(bufs.loss_sum[0], loss_sum, **tol)
    np.testing.assert_allclose(bufs.weight_sum[0], wsum, rtol=1e-12)
    np.testing.assert_allclose(bufs.grad_b, R.sum(axis=0), **tol)
    np.testing.assert_allclose(bufs.G, G, **tol)
    np.testing.assert_allclose(bufs.G_VO, G @ np.hstack([V, Om]), **tol)
    np.testing.assert_allclose(bufs.Gt_Psi, G.T @ Psi, **tol)
    np.testing.assert_allclose(bufs.Gt_U, G.T @ U, **tol)
    np.testing.assert_allclose(bufs.gw[0], np.sum(G * ((U * s) @ V.T)), **tol)  # <G, W>
    assert bufs.n_rows[0] == X.shape[0]


def test_block_products_two_blocks_combine_and_class_weights():
    X, y, w, U, s, V, b, Psi, Om = _problem("softmax", n=120, seed=4)
    cw = np.array([1.0, 2.0, 0.5, 1.5, 1.0, 3.0])
    ops = prepare_operands(U=U, s=s, V=V, b=b, loss="softmax", Psi=Psi, Omega=Om,
                           class_weights=cw)
    whole = ProductBuffers.zeros(ops)
    block_products(X, y, w, ops, whole)
    parts = ProductBuffers.zeros(ops)
    for a, e in ((0, 50), (50, 50), (50, 120)):  # includes an empty block
        one = ProductBuffers.zeros(ops)
        block_products(X[a:e], y[a:e], w[a:e], ops, one, row_offset=a,
                       scratch=np.empty(120 * 6))
        parts.add(one)
    for name in ("loss_sum", "weight_sum", "grad_b", "G_VO", "Gt_Psi", "Gt_U", "gw"):
        np.testing.assert_allclose(getattr(parts, name), getattr(whole, name),
                                   rtol=1e-12, atol=1e-13)
    Xd = X.toarray().astype(np.float64)
    loss_sum, wsum, R = _dense_reference(Xd, y, w, U, s, V, b, "softmax", cw=cw)
    np.testing.assert_allclose(whole.loss_sum[0], loss_sum, rtol=1e-10)  # dense numpy reference
    np.testing.assert_allclose(whole.weight_sum[0], wsum, rtol=1e-12)
    np.testing.assert_allclose(whole.G_VO, Xd.T @ R @ np.hstack([V, Om]), rtol=1e-10,
                               atol=1e-11)


def test_block_products_zero_model():
    X, y, w, _, _, _, b, Psi, Om = _problem("multilabel", seed=7)
    ops = prepare_operands(U=None, s=None, V=None, b=b, loss="multilabel", Psi=Psi,
                           Omega=Om)
    bufs = ProductBuffers.zeros(ops)
    XQ = block_products(X, (y.indptr, y.indices), None, ops, bufs)
    Xd = X.toarray().astype(np.float64)
    T = y.toarray()
    R = expit(np.broadcast_to(b, T.shape)) - T  # reference: scipy.special.expit at W = 0
    np.testing.assert_allclose(XQ, Xd @ Psi, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(bufs.G_VO, Xd.T @ R @ Om, rtol=1e-10, atol=1e-11)
    np.testing.assert_allclose(bufs.Gt_Psi, R.T @ Xd @ Psi, rtol=1e-10, atol=1e-11)
    assert bufs.Gt_U.shape == (6, 0) and bufs.gw[0] == 0.0
    np.testing.assert_allclose(bufs.weight_sum[0], X.shape[0])


def test_block_products_bad_input():
    X, y, w, U, s, V, b, Psi, Om = _problem("softmax", seed=9)
    ops = prepare_operands(U=U, s=s, V=V, b=b, loss="softmax", Psi=Psi, Omega=Om)
    bufs = ProductBuffers.zeros(ops)
    y_bad = y.copy()
    y_bad[4] = 6
    with pytest.raises(KernelInputError, match="train.zarr: row 1005 has class id 6 outside 0..5"):
        block_products(X, y_bad, w, ops, bufs, row_offset=1000, where="train.zarr")
    with pytest.raises(KernelInputError, match="block has 399 columns but the model has 400"):
        block_products(X[:, :399], y, w, ops, ProductBuffers.zeros(ops))
    with pytest.raises(KernelConfigError, match="unknown loss"):
        prepare_operands(U=U, s=s, V=V, b=b, loss="hinge")
    with pytest.raises(KernelConfigError, match="s has 2 values but U has 3 columns"):
        prepare_operands(U=U, s=s[:2], V=V, b=b, loss="softmax")


_WORKQUEUE_SCRIPT = r"""
import json
from concurrent.futures import ThreadPoolExecutor
import numpy as np
import scipy.sparse as sp
from ranktide.kernels.sparse import csr_t_matmul_accumulate
from ranktide.kernels.threads import threading_info

X = sp.random(300, 200, density=0.1, format="csr", random_state=0)
D = np.ones((300, 3))
ref = X.T @ D
def work(_):
    ok = True
    for _ in range(10):
        out = np.zeros((200, 3))
        csr_t_matmul_accumulate(X.indptr, X.indices, X.data, D, out)
        ok &= bool(np.allclose(out, ref, rtol=1e-12))
    return ok
with ThreadPoolExecutor(max_workers=2) as ex:
    ok = all(ex.map(work, range(4)))
print(json.dumps({"info": threading_info(), "ok": ok}))
"""


def test_workqueue_layer_is_serialized(tmp_path):
    # numba's workqueue layer aborts on concurrent parallel calls (numba docs,
    # "Threading layers"); under it the kernels must serialize and stay correct.
    import json
    import os
    import subprocess
    import sys

    env = dict(os.environ, NUMBA_THREADING_LAYER="workqueue")
    proc = subprocess.run([sys.executable, "-c", _WORKQUEUE_SCRIPT], env=env,
                          capture_output=True, text=True, timeout=240,
                          cwd=os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
    assert proc.returncode == 0, proc.stderr[-2000:]
    got = json.loads(proc.stdout.strip().splitlines()[-1])
    assert got["info"]["layer"] == "workqueue"
    assert got["info"]["serialized"] is True
    assert got["ok"] is True


def test_block_products_from_two_threads():
    X, y, w, U, s, V, b, Psi, Om = _problem("softmax", n=200, seed=12)
    ops = prepare_operands(U=U, s=s, V=V, b=b, loss="softmax", Psi=Psi, Omega=Om)
    ref = ProductBuffers.zeros(ops)
    block_products(X, y, w, ops, ref)

    def work(_):
        ok = True
        for _ in range(10):
            bufs = ProductBuffers.zeros(ops)
            block_products(X, y, w, ops, bufs)
            ok &= bool(np.array_equal(bufs.G_VO, ref.G_VO) and bufs.loss_sum[0] == ref.loss_sum[0])
        return ok

    with ThreadPoolExecutor(max_workers=2) as ex:
        assert all(ex.map(work, range(4)))


def test_block_products_scratch_holds_residual():
    X, y, w, U, s, V, b, Psi, Om = _problem("squared", n=50, seed=13)
    ops = prepare_operands(U=U, s=s, V=V, b=b, loss="squared", Psi=Psi, Omega=Om)
    scratch = np.empty(50 * 6 + 7)
    block_products(X, y, w, ops, ProductBuffers.zeros(ops), scratch=scratch)
    _, _, R = _dense_reference(X.toarray().astype(np.float64), y, w, U, s, V, b, "squared")
    np.testing.assert_allclose(scratch[:300].reshape(50, 6), R, rtol=1e-10, atol=1e-12)
    with pytest.raises(KernelConfigError, match="scratch must be a C-contiguous float64 array"):
        block_products(X, y, w, ops, ProductBuffers.zeros(ops), scratch=np.empty(10))


def test_more_error_messages():
    ip, ix, da, _ = _block(10, 20, seed=14)
    B = np.zeros((20, 2))
    cases = [
        (lambda: csr_matmul_dense(ip.astype(np.float64), ix, da, B, np.zeros((10, 2))),
         "indptr must be a 1-D integer array"),
        (lambda: csr_matmul_dense(ip, ix, da.astype(np.int32), B, np.zeros((10, 2))),
         "data must be a 1-D float array"),
        (lambda: csr_matmul_dense(ip[:0], ix, da, B, np.zeros((0, 2))), "indptr is empty"),
        (lambda: csr_matmul_dense(ip, ix, da, B[:, 0], np.zeros((10, 2))),
         "B must be a 2-D float32/float64 array"),
        (lambda: csr_t_matmul_accumulate(ip, ix, da, np.zeros((10, 2)), np.zeros((20, 3))),
         r"out must be \(d, 2\) to accumulate"),
    ]
    for call, msg in cases:
        with pytest.raises(KernelInputError, match=msg):
            call()
    X, y, w, U, s, V, b, Psi, Om = _problem("multilabel", n=20, seed=15)
    with pytest.raises(KernelConfigError, match="give U, Psi or n_cols"):
        prepare_operands(U=None, s=None, V=None, b=b, loss="squared")
    with pytest.raises(KernelConfigError, match="class weights apply to the softmax loss only"):
        prepare_operands(U=U, s=s, V=V, b=b, loss="multilabel", class_weights=np.ones(6))
    with pytest.raises(KernelConfigError, match="class_weights must have 6 values"):
        prepare_operands(U=U, s=s, V=V, b=b, loss="softmax", class_weights=np.ones(5))
    with pytest.raises(KernelConfigError, match=r"U must have shape \(400, any\)"):
        prepare_operands(U=U[:10], s=s, V=V, b=b, loss="softmax", n_cols=400)
    ops = prepare_operands(U=U, s=s, V=V, b=b, loss="multilabel", Psi=Psi, Omega=Om)
    with pytest.raises(KernelInputError, match="tags must be a scipy CSR matrix"):
        block_products(X, y.toarray(), w, ops, ProductBuffers.zeros(ops))
    small = prepare_operands(U=U, s=s, V=V, b=b, loss="multilabel")
    with pytest.raises(KernelConfigError, match="G_VO has shape"):
        block_products(X, y, w, ops, ProductBuffers.zeros(small))
