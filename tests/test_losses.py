"""Fused loss + residual kernels, and the loss objects' evaluators and predictions.

References: ``sklearn.metrics.log_loss`` (softmax and per-tag logistic
losses), ``scipy.special.logsumexp`` / ``softmax`` / ``expit`` (closed forms
of the losses and their derivatives), ``scipy.optimize.approx_fprime``
(finite-difference gradients).
"""

from __future__ import annotations

import numba
import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.errors import ConfigError
from ranktide.kernels.errors import KernelInputError
from ranktide.kernels.losses import (
    exp_nonpositive_kernel,
    fold_class_weights,
    multilabel_loss_only,
    multilabel_residual,
    softmax_loss_only,
    softmax_residual,
    squared_loss_only,
    squared_residual,
)
from ranktide.losses import get_loss
from scipy.optimize import approx_fprime
from scipy.special import expit, logsumexp, softmax
from sklearn.metrics import log_loss


def _data(n=200, k=5, seed=0, scale=2.0):
    rng = np.random.default_rng(seed)
    Z = rng.standard_normal((n, k)) * scale
    y = rng.integers(0, k, n).astype(np.int32)
    w = rng.random(n).astype(np.float32) + 0.1
    T = sp.csr_matrix((rng.random((n, k)) < 0.3).astype(np.float32))
    Y = rng.standard_normal((n, k)).astype(np.float32)
    return Z, y, w, T, Y


def _acc(k):
    return np.zeros(1), np.zeros(k)


# --------------------------------------------------------------------------- softmax


@pytest.mark.parametrize("weighted", [False, True])
def test_softmax_matches_sklearn_log_loss(weighted):
    Z, y, w, _, _ = _data()
    w = w if weighted else None
    L, g = _acc(5)
    R = softmax_residual(Z.copy(), y, w, L, g)
    # reference: sklearn.metrics.log_loss, unnormalized weighted sum
    ref = log_loss(y, softmax(Z, axis=1), sample_weight=w, labels=np.arange(5), normalize=False)
    np.testing.assert_allclose(L[0], ref, rtol=1e-10)
    # reference: closed form of the derivative, softmax(z) - e_y (scipy.special.softmax)
    P = softmax(Z, axis=1)
    P[np.arange(200), y] -= 1.0
    if w is not None:
        P *= w[:, None].astype(np.float64)
    np.testing.assert_allclose(R, P, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(g, P.sum(axis=0), rtol=1e-11, atol=1e-13)


def test_softmax_gradient_matches_finite_differences():
    Z, y, w, _, _ = _data(n=4, k=3, seed=1)

    def f(z):
        return softmax_loss_only(z.reshape(4, 3), y, w, np.zeros(1))

    fd = approx_fprime(Z.ravel(), f, 1e-7)  # reference: scipy.optimize.approx_fprime
    R = softmax_residual(Z.copy(), y, w, *_acc(3))
    np.testing.assert_allclose(R.ravel(), fd, atol=1e-6)


def test_softmax_extreme_logits_are_finite():
    Z = np.array([[1e4, -1e4, 0.0], [-1e4, 1e4, 1e4], [-1e4, -1e4, -1e4]])
    y = np.array([0, 0, 2], dtype=np.int32)
    L, g = _acc(3)
    R = softmax_residual(Z.copy(), y, None, L, g)
    assert np.all(np.isfinite(R)) and np.isfinite(L[0])
    # closed form: row 0 loss ~ 0, row 1 loss = 2e4 + log 2, row 2 loss = log 3
    ref = logsumexp(Z, axis=1) - Z[np.arange(3), y]  # reference: scipy.special.logsumexp
    np.testing.assert_allclose(L[0], ref.sum(), rtol=1e-12)
    np.testing.assert_allclose(R[1], [-1.0, 0.5, 0.5], atol=1e-15)


def test_exp_helper_matches_numpy():
    rng = np.random.default_rng(21)
    x = np.concatenate([-rng.exponential(3.0, 200_000), -rng.uniform(0.0, 708.0, 200_000),
                        [0.0, -0.0, -1e-300, -np.log(2.0) / 2, -708.0, -1.0 / 3.0]])
    out = np.empty_like(x)
    exp_nonpositive_kernel(x, out)
    ref = np.exp(x)  # reference: numpy.exp
    np.testing.assert_allclose(out, ref, rtol=1e-15, atol=0.0)
    # below -708 (subnormal results) the helper returns 0; NaN passes through
    tail = np.array([-708.5, -745.0, -1e4, -np.inf, np.nan])
    out = np.empty_like(tail)
    exp_nonpositive_kernel(tail, out)
    assert np.array_equal(out[:4], np.zeros(4)) and np.isnan(out[4])


def test_softmax_loss_only_leaves_scores_and_matches():
    Z, y, w, _, _ = _data(seed=2)
    Z0 = Z.copy()
    L = np.zeros(1)
    got = softmax_loss_only(Z, y, w, L)
    assert np.array_equal(Z, Z0)
    L2, g2 = _acc(5)
    softmax_residual(Z.copy(), y, w, L2, g2)
    np.testing.assert_allclose(got, L2[0], rtol=1e-13)
    # reference: scipy.special.logsumexp
    ref = np.sum(w * (logsumexp(Z, axis=1) - Z[np.arange(200), y]))
    np.testing.assert_allclose(got, ref, rtol=1e-10)


def test_accumulates_and_empty_block():
    Z, y, w, _, _ = _data(seed=3)
    L, g = np.array([10.0]), np.ones(5)
    softmax_residual(Z.copy(), y, w, L, g)
    L1, g1 = _acc(5)
    softmax_residual(Z.copy(), y, w, L1, g1)
    np.testing.assert_allclose(L[0], 10.0 + L1[0], rtol=1e-14)
    np.testing.assert_allclose(g, 1.0 + g1, rtol=1e-14, atol=1e-14)
    L0, g0 = _acc(5)
    softmax_residual(np.zeros((0, 5)), np.zeros(0, np.int32), None, L0, g0)
    squared_residual(np.zeros((0, 5)), np.zeros((0, 5), np.float32), None, L0, g0)
    multilabel_residual(np.zeros((0, 5)), np.zeros(1, np.int32), np.zeros(0, np.int32),
                        None, L0, g0)
    assert L0[0] == 0.0 and np.all(g0 == 0.0)


def test_deterministic_across_thread_counts():
    Z, y, w, T, _ = _data(n=3000, k=7, seed=4)
    old = numba.get_num_threads()
    out = []
    try:
        for nt in (1, old, 1, old):
            numba.set_num_threads(nt)
            L, g = _acc(7)
            R = softmax_residual(Z.copy(), y, w, L, g)
            L2, g2 = _acc(7)
            multilabel_residual(Z.copy(), T.indptr, T.indices, w, L2, g2)
            out.append((L[0], g.copy(), R, L2[0], g2.copy()))
    finally:
        numba.set_num_threads(old)
    for o in out[1:]:
        assert o[0] == out[0][0] and o[3] == out[0][3]  # bit-identical sums
        assert np.array_equal(o[1], out[0][1]) and np.array_equal(o[4], out[0][4])
        assert np.array_equal(o[2], out[0][2])


def test_fold_class_weights_and_bad_labels():
    _, y, w, _, _ = _data(seed=5)
    cw = np.array([0.5, 1.0, 2.0, 0.0, 3.0])
    got = fold_class_weights(y, cw, w)
    np.testing.assert_allclose(got, w.astype(np.float64) * cw[y], rtol=1e-15)  # numpy reference
    np.testing.assert_allclose(fold_class_weights(y, cw), cw[y], rtol=0)
    y_bad = y.copy()
    y_bad[12] = -1
    # index 12 of a block starting at index 500: row 513 counted from 1 (issue 13)
    with pytest.raises(KernelInputError, match=r"labels.bin: row 513 has class id -1 outside 0..4"):
        softmax_residual(np.zeros((200, 5)), y_bad, None, *_acc(5), row_offset=500,
                         where="labels.bin")
    with pytest.raises(KernelInputError, match="row 13 has class id -1"):
        fold_class_weights(y_bad, cw)
    with pytest.raises(KernelInputError, match="class weights must be"):
        fold_class_weights(y, -cw)
    with pytest.raises(KernelInputError, match="weights must be a 1-D float array of 200 values"):
        softmax_residual(np.zeros((200, 5)), y, w[:10], *_acc(5))
    with pytest.raises(KernelInputError, match="out_gradb must be a float64 array of shape"):
        softmax_residual(np.zeros((200, 5)), y, None, np.zeros(1), np.zeros(4))
    with pytest.raises(KernelInputError, match="scores must be a 2-D float64"):
        softmax_residual(np.zeros((200, 5), np.float32), y, None, *_acc(5))


# --------------------------------------------------------------------------- squared


def test_squared_closed_form_and_gradient():
    Z, _, w, _, Y = _data(seed=6)
    L, g = _acc(5)
    R = squared_residual(Z.copy(), Y, w, L, g)
    Yd = Y.astype(np.float64)
    wd = w.astype(np.float64)
    # closed form: 0.5 * ||z - y||^2 and its derivative z - y
    np.testing.assert_allclose(L[0], 0.5 * np.sum(wd * np.sum((Z - Yd) ** 2, axis=1)),
                               rtol=1e-12)
    np.testing.assert_allclose(R, wd[:, None] * (Z - Yd), rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(g, R.sum(axis=0), rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(squared_loss_only(Z, Y, w, np.zeros(1)), L[0], rtol=1e-13)
    Zs, Ys, ws = Z[:3, :2].copy(), Y[:3, :2].copy(), w[:3]
    fd = approx_fprime(Zs.ravel(), lambda z: squared_loss_only(z.reshape(3, 2), Ys, ws,
                                                               np.zeros(1)), 1e-7)
    Rs = squared_residual(Zs.copy(), Ys, ws, *_acc(2))  # reference: scipy approx_fprime
    np.testing.assert_allclose(Rs.ravel(), fd, atol=1e-6)
    with pytest.raises(KernelInputError, match="target values must be a float array of shape"):
        squared_residual(Z.copy(), Y[:, :3], w, *_acc(5))


# --------------------------------------------------------------------------- multilabel


def test_multilabel_matches_sklearn_per_tag():
    Z, _, w, T, _ = _data(seed=7)
    L, g = _acc(5)
    R = multilabel_residual(Z.copy(), T.indptr, T.indices, w, L, g)
    Td = T.toarray()
    # reference: sum over tags of sklearn.metrics.log_loss on each binary column
    ref = sum(log_loss(Td[:, j], expit(Z[:, j]), sample_weight=w, labels=[0, 1],
                       normalize=False) for j in range(5))
    np.testing.assert_allclose(L[0], ref, rtol=1e-9)
    # reference: scipy.special.expit, derivative sigmoid(z) - y
    np.testing.assert_allclose(R, w[:, None].astype(np.float64) * (expit(Z) - Td),
                               rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(g, R.sum(axis=0), rtol=1e-11, atol=1e-13)
    Z0 = Z.copy()
    got = multilabel_loss_only(Z, T.indptr, T.indices, w, np.zeros(1))
    assert np.array_equal(Z, Z0)
    np.testing.assert_allclose(got, L[0], rtol=1e-13)


def test_multilabel_gradient_fd_and_extremes():
    Z, _, w, T, _ = _data(n=4, k=3, seed=8)
    Ti, Tx = T.indptr, T.indices

    def f(z):
        return multilabel_loss_only(z.reshape(4, 3), Ti, Tx, w, np.zeros(1))

    fd = approx_fprime(Z.ravel(), f, 1e-7)  # reference: scipy.optimize.approx_fprime
    R = multilabel_residual(Z.copy(), Ti, Tx, w, *_acc(3))
    np.testing.assert_allclose(R.ravel(), fd, atol=1e-6)
    # logits of +-1e4: softplus(z) = max(z, 0) + log1p(exp(-|z|)) stays finite
    Ze = np.array([[1e4, -1e4], [1e4, -1e4]])
    tp = np.array([0, 0, 2], dtype=np.int64)
    ti = np.array([0, 1], dtype=np.int64)  # row 0 no tags, row 1 both tags
    L, g = _acc(2)
    Re = multilabel_residual(Ze.copy(), tp, ti, None, L, g)
    assert np.all(np.isfinite(Re)) and np.isfinite(L[0])
    # closed form: row 0 loss = 1e4 + 0, row 1 loss = 0 + 1e4 (to rounding)
    np.testing.assert_allclose(L[0], 2e4, rtol=1e-12)
    np.testing.assert_allclose(Re, [[1.0, 0.0], [0.0, -1.0]], atol=1e-15)


def test_multilabel_bad_tags():
    Z, _, _, T, _ = _data(seed=9)
    bad = T.indices.copy()
    bad[0] = 5
    row = int(np.searchsorted(T.indptr, 0, side="right"))  # counted from 1 (issue 13)
    with pytest.raises(KernelInputError, match=rf"tags.txt: row {row} has a tag id outside 0..4"):
        multilabel_residual(Z.copy(), T.indptr, bad, None, *_acc(5), where="tags.txt")
    with pytest.raises(KernelInputError, match="tag_indptr has 200 pointers for 200 rows"):
        multilabel_residual(Z.copy(), T.indptr[:-1], T.indices, None, *_acc(5))


def test_more_error_messages():
    Z, y, w, T, Y = _data(n=10, seed=10)
    ro = Z.copy()
    ro.flags.writeable = False
    cases = [
        (lambda: softmax_residual(ro, y, None, *_acc(5)), "scores must be writable"),
        (lambda: softmax_residual(Z.copy(), y, None, np.zeros(2), np.zeros(5)),
         r"out_loss must be a float64 array of shape \(1,\)"),
        (lambda: softmax_residual(Z.copy(), y.astype(np.float64), None, *_acc(5)),
         "class ids must be a 1-D integer array of 10 values"),
        (lambda: softmax_residual(Z.copy(), np.full(10, 2**63, np.uint64), None, *_acc(5)),
         "a class id does not fit in int64"),
        (lambda: multilabel_residual(Z.copy(), T.indptr.astype(np.float32), T.indices, None,
                                     *_acc(5)), "tag_indptr must be a 1-D integer array"),
        (lambda: fold_class_weights(y, np.ones(5), out=np.zeros(3)),
         r"out must be a float64 array of shape \(10,\)"),
        (lambda: squared_loss_only(Z, Y[:, :2], None, np.zeros(1)),
         "target values must be a float array"),
    ]
    for call, msg in cases:
        with pytest.raises(KernelInputError, match=msg):
            call()


@pytest.mark.parametrize("name", ["softmax", "squared", "multilabel"])
def test_loss_objects_dense_evaluators_and_predictions(name):
    """What the refinement and the model ask a loss object, against scipy closed forms."""
    loss = get_loss(name)
    Z, y, w, T, Y = _data(n=60, k=4, seed=7)
    wn = w.astype(np.float64) / w.sum()
    targets = {"softmax": y, "squared": Y, "multilabel": T}[name]
    Yr = loss.refine_targets(targets, 60, 4)
    Yd = Yr.toarray() if sp.issparse(Yr) else Yr
    f, R = loss.dense_value_residual(Z, Yd, wn)
    # references: logsumexp - z_y / softmax - onehot (scipy.special); 0.5 ||z - y||^2 / z - y;
    # log(1 + e^z) - y z / expit(z) - y (scipy.special), each weighted by w / sum(w)
    if name == "softmax":
        onehot = np.eye(4)[y]
        ref_f = float(wn @ (logsumexp(Z, axis=1) - Z[np.arange(60), y]))
        ref_R = wn[:, None] * (softmax(Z, axis=1) - onehot)
    elif name == "squared":
        ref_f = float(wn @ (0.5 * ((Z - Yd) ** 2).sum(axis=1)))
        ref_R = wn[:, None] * (Z - Yd)
    else:
        ref_f = float(wn @ (np.logaddexp(0, Z) - Yd * Z).sum(axis=1))
        ref_R = wn[:, None] * (expit(Z) - Yd)
    assert f == pytest.approx(ref_f, rel=1e-12)
    np.testing.assert_allclose(R, ref_R, rtol=1e-10, atol=1e-15)
    assert loss.dense_value_residual(Z, Yd, wn, want_residual=False) == (f, None)
    if loss.quadratic:
        # the squared loss refines from its statistics: no score evaluators
        with pytest.raises(ConfigError, match="sufficient statistics"):
            loss.fused_evaluators(Yr, wn)
        assert name == "squared"
    else:
        value, residual = loss.fused_evaluators(Yr, np.ascontiguousarray(wn))
        out = np.zeros(1)
        value(Z, out)
        assert out[0] == pytest.approx(ref_f, rel=1e-10)
        out, gb = np.zeros(1), np.zeros(4)
        Rk = residual(Z.copy(), out, gb)
        np.testing.assert_allclose(Rk, ref_R, rtol=1e-8, atol=1e-14)
        np.testing.assert_allclose(gb, ref_R.sum(axis=0), rtol=1e-8, atol=1e-14)
    # predictions: argmax, expit(z) >= 0.5 (scipy), or the values themselves
    P = loss.predict(Z)
    if name == "softmax":
        np.testing.assert_array_equal(P, np.argmax(Z, axis=1))
    elif name == "multilabel":
        np.testing.assert_array_equal(P.toarray(), (expit(Z) >= 0.5).astype(np.float32))
    else:
        assert P is Z
    # invented targets have the kind the loss's residual kernel takes
    t = loss.random_targets(np.random.default_rng(0), 8, 4)
    loss.value_residual(np.zeros((8, 4)), t)
    with pytest.raises(ConfigError, match="expected|for 59 rows"):
        loss.refine_targets(targets, 59, 4)
