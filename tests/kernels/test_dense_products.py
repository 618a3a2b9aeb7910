"""The chunked dense part of a pass block (kernels.products, kernels.rowchunks).

References: the same arithmetic in dense numpy — scores ``X U diag(s) V^T + b``
(numpy matmul on ``X.toarray()``), ``scipy.special.logsumexp`` / ``expit`` for
the losses and residuals, numpy matmul for ``R^T X [U, Psi]``, ``R [V, Omega]``
and ``G = X^T R``; the closed-form conjugates (Boyd & Vandenberghe, Convex
Optimization, 2004, example 3.25: negative entropy for log-sum-exp, the
quadratic, the binary entropy) for the dual figure; threadpoolctl's own report
of BLAS thread counts.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.kernels import rowchunks
from ranktide.kernels.errors import KernelConfigError, KernelInputError
from ranktide.kernels.products import (
    CHUNK_BYTES,
    ProductBuffers,
    block_dense,
    block_products,
    block_projections,
    dense_chunk_rows,
    prepare_operands,
)
from scipy.special import expit, logsumexp, softmax, xlogy
from threadpoolctl import threadpool_info

LOSSES = ["softmax", "squared", "multilabel"]
FIELDS = ("loss_sum", "weight_sum", "n_rows", "grad_b", "G_VO", "Gt_Psi", "Gt_U", "gw", "conj")


def _problem(loss, *, n=61, d=90, k=7, r=3, pp=2, p=2, seed=0, weighted=True):
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.08, format="csr", dtype=np.float64, random_state=rng)
    X.data = (X.data - 0.5).astype(np.float32)
    U = np.linalg.qr(rng.standard_normal((d, r)))[0] if r else None
    V = np.linalg.qr(rng.standard_normal((k, r)))[0] if r else None
    s = np.sort(rng.random(r) * 3 + 0.5)[::-1] if r else None
    Psi = rng.standard_normal((d, pp))
    Om = rng.standard_normal((k, p))
    b = rng.standard_normal(k) * 0.3
    w = (rng.random(n) + 0.1).astype(np.float32) if weighted else None
    if loss == "softmax":
        y = rng.integers(0, k, n).astype(np.int32)
    elif loss == "squared":
        y = rng.standard_normal((n, k)).astype(np.float32)
    else:
        y = sp.csr_matrix((rng.random((n, k)) < 0.3).astype(np.float32))
    return X, y, w, U, s, V, b, Psi, Om


def _reference(X, y, w, U, s, V, b, Psi, Om, loss, *, cw=None, c=0.0):
    """Dense numpy/scipy: loss sum, weight sum, residual R and the products."""
    Xd = X.toarray().astype(np.float64)
    n, k = Xd.shape[0], b.shape[0]
    r = 0 if U is None else U.shape[1]
    S = (Xd @ (U * s) @ V.T if r else np.zeros((n, k))) + b
    ww = np.ones(n) if w is None else np.asarray(w, dtype=np.float64)
    if cw is not None:
        ww = ww * cw[y]
    if loss == "softmax":
        lse = logsumexp(S, axis=1)  # reference: scipy.special.logsumexp
        li = lse - S[np.arange(n), y]
        A = softmax(S, axis=1)
        E = np.eye(k)[y]
        A = A - E
        q = c * A + E  # conjugate: negative entropy of c p + (1 - c) e_y
        conj = xlogy(q, q).sum(axis=1)
    elif loss == "squared":
        Y = np.asarray(y, dtype=np.float64)
        li = 0.5 * np.sum((S - Y) ** 2, axis=1)
        A = S - Y
        conj = (0.5 * (c * A) ** 2 + c * A * Y).sum(axis=1)  # conjugate of the quadratic
    else:
        T = y.toarray().astype(np.float64)
        li = np.sum(np.logaddexp(0.0, S) - T * S, axis=1)
        A = expit(S) - T  # reference: scipy.special.expit
        t = np.clip(c * A + T, 0.0, 1.0)  # conjugate: binary entropy at c a + y
        conj = (xlogy(t, t) + xlogy(1.0 - t, 1.0 - t)).sum(axis=1)
    R = A * ww[:, None]
    Q = np.hstack([U, Psi]) if r else Psi
    VO = np.hstack([V, Om]) if r else Om
    G = Xd.T @ R
    out = {"loss_sum": np.sum(ww * li), "weight_sum": np.sum(ww), "grad_b": R.sum(axis=0),
           "Gt_U": R.T @ (Xd @ U) if r else np.zeros((k, 0)), "Gt_Psi": R.T @ (Xd @ Psi),
           "G_VO": G @ VO, "G": G, "R": R, "RVO": R @ VO, "XQ": Xd @ Q,
           "gw": np.sum(G * ((U * s) @ V.T)) if r else 0.0, "conj": np.sum(ww * conj)}
    return out


def _ops(loss, U, s, V, b, Psi, Om, d, cw=None, c=0.0):
    ops = prepare_operands(U=U, s=s, V=V, b=b, loss=loss, Psi=Psi, Omega=Om,
                           class_weights=cw, n_cols=d)
    if c:
        ops = replace(ops, dual_scale=c)
    return ops


@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("rank", [0, 3])
def test_block_dense_in_chunks_matches_numpy(loss, weighted, rank):
    X, y, w, U, s, V, b, Psi, Om = _problem(loss, r=rank, weighted=weighted, seed=rank + 1)
    ops = _ops(loss, U, s, V, b, Psi, Om, X.shape[1], c=0.6)
    ref = _reference(X, y, w, U, s, V, b, Psi, Om, loss, c=0.6)
    XQ = block_projections(X, ops)
    np.testing.assert_allclose(XQ, ref["XQ"], rtol=1e-12, atol=1e-12)
    m = ops.VO.shape[1]
    RVO, R = np.empty((X.shape[0], m)), np.empty((X.shape[0], 7))
    bufs = ProductBuffers.zeros(ops)
    # 61 rows in chunks of 8: nine chunks, the last one short
    block_dense(XQ, y, w, ops, bufs, out_RVO=RVO, out_R=R, chunk_rows=8, workers=2)
    tol = {"rtol": 1e-10, "atol": 1e-11}
    for name in ("loss_sum", "weight_sum", "conj", "gw"):
        np.testing.assert_allclose(getattr(bufs, name)[0], ref[name], **tol, err_msg=name)
    for name in ("grad_b", "Gt_U", "Gt_Psi"):
        np.testing.assert_allclose(getattr(bufs, name), ref[name], **tol, err_msg=name)
    np.testing.assert_allclose(R, ref["R"], **tol)
    np.testing.assert_allclose(RVO, ref["RVO"], **tol)
    assert bufs.n_rows[0] == X.shape[0]
    assert not np.any(bufs.G_VO)  # block_dense leaves the sparse X^T products alone


@pytest.mark.parametrize("loss", LOSSES)
def test_block_products_do_not_depend_on_workers(loss):
    X, y, w, U, s, V, b, Psi, Om = _problem(loss, n=83, seed=5)
    ops = _ops(loss, U, s, V, b, Psi, Om, X.shape[1], c=0.3)
    got = []
    for workers in (1, 2, 3):
        bufs = ProductBuffers.zeros(ops, dense_G=True)
        XQ = block_products(X, y, w, ops, bufs, chunk_rows=6, workers=workers)
        got.append((bufs, XQ))
    for bufs, XQ in got[1:]:
        np.testing.assert_array_equal(XQ, got[0][1])
        for name in FIELDS + ("G",):
            np.testing.assert_array_equal(getattr(bufs, name), getattr(got[0][0], name),
                                          err_msg=name)
    ref = _reference(X, y, w, U, s, V, b, Psi, Om, loss, c=0.3)
    bufs = got[0][0]
    np.testing.assert_allclose(bufs.G, ref["G"], rtol=1e-10, atol=1e-11)  # X^T R: numpy
    np.testing.assert_allclose(bufs.G_VO, ref["G_VO"], rtol=1e-10, atol=1e-11)
    # other chunkings change only the order of the sums
    whole = ProductBuffers.zeros(ops, dense_G=True)
    block_products(X, y, w, ops, whole, chunk_rows=1000)
    for name in FIELDS + ("G",):
        np.testing.assert_allclose(getattr(whole, name), getattr(bufs, name), rtol=1e-12,
                                   atol=1e-13, err_msg=name)


def test_block_products_class_weights_in_chunks_and_out_RVO():
    X, y, w, U, s, V, b, Psi, Om = _problem("softmax", n=70, seed=8)
    cw = np.array([1.0, 2.0, 0.5, 1.5, 1.0, 3.0, 0.0])
    ops = _ops("softmax", U, s, V, b, Psi, Om, X.shape[1], cw=cw)
    ref = _reference(X, y, w, U, s, V, b, Psi, Om, "softmax", cw=cw)
    bufs = ProductBuffers.zeros(ops)
    D = np.empty((70, ops.VO.shape[1]))
    block_products(X, y, w, ops, bufs, out_RVO=D, chunk_rows=9)
    np.testing.assert_allclose(D, ref["RVO"], rtol=1e-10, atol=1e-12)
    assert not np.any(bufs.G_VO)  # with out_RVO the caller adds X^T D
    np.testing.assert_allclose(bufs.loss_sum[0], ref["loss_sum"], rtol=1e-10)
    np.testing.assert_allclose(bufs.weight_sum[0], ref["weight_sum"], rtol=1e-12)
    np.testing.assert_allclose(bufs.Gt_Psi, ref["Gt_Psi"], rtol=1e-10, atol=1e-12)


def test_bad_row_in_a_later_chunk_is_named():
    X, y, w, U, s, V, b, Psi, Om = _problem("softmax", n=40, seed=9)
    y = y.copy()
    y[23] = 7
    y[31] = -1
    ops = _ops("softmax", U, s, V, b, Psi, Om, X.shape[1])
    with pytest.raises(KernelInputError, match="train.zarr: row 1024 has class id 7 outside"):
        block_products(X, y, w, ops, ProductBuffers.zeros(ops), chunk_rows=5, workers=2,
                       row_offset=1000, where="train.zarr")
    XQ = block_projections(X, ops)
    with pytest.raises(KernelConfigError, match="out_RVO is needed"):
        block_dense(XQ, y, w, ops, ProductBuffers.zeros(ops))
    with pytest.raises(KernelConfigError, match="XQ must be a 2-D float64 array of 5 columns"):
        block_dense(XQ[:, :4], y, w, ops, ProductBuffers.zeros(ops))
    with pytest.raises(KernelConfigError, match="out_R must be a writable C-contiguous"):
        block_dense(XQ, y, w, ops, ProductBuffers.zeros(ops), out_RVO=np.empty((40, 5)),
                    out_R=np.empty((7, 40)).T)


def test_map_chunks_order_errors_and_blas_limits():
    def blas_threads():
        return sorted({lib["num_threads"] for lib in threadpool_info()
                       if lib["user_api"] == "blas"})

    before = blas_threads()
    chunks = rowchunks.chunk_ranges(23, 5)
    assert chunks == [(0, 5), (5, 10), (10, 15), (15, 20), (20, 23)]
    seen = list(rowchunks.map_chunks(lambda ab: (ab, blas_threads()), chunks, workers=2))
    assert [c for c, _ in seen] == chunks
    assert all(t == [1] for _, t in seen)  # one BLAS thread while the chunks run
    assert blas_threads() == before  # and the limits are back afterwards

    def bad(ab):
        if ab[0] >= 10:
            raise ValueError(f"chunk {ab[0]}")
        return ab

    with pytest.raises(ValueError, match="chunk 10"):
        list(rowchunks.map_chunks(bad, chunks, workers=2))
    assert blas_threads() == before
    # a chunk's scores fit the chunk budget, and tiny budgets still give whole rows
    assert 8 <= dense_chunk_rows(500) and dense_chunk_rows(500) * 500 * 8 <= CHUNK_BYTES
    assert dense_chunk_rows(10**9) == 8
