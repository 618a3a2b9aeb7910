"""Conjugate sums for the duality gap (kernels.conjugates).

References: the closed-form conjugates (Boyd & Vandenberghe, Convex
Optimization, 2004: example 3.25 for log-sum-exp, the quadratic, the binary
entropy), evaluated here with ``scipy.special.softmax`` / ``expit`` /
``xlogy``; the Fenchel-Young equality ``loss*(grad loss(z)) = <grad loss(z), z>
- loss(z)`` (same book, section 3.3.2); ``scipy.optimize.minimize_scalar`` for
the conjugate as a supremum.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.kernels.conjugates import conjugate_sum
from ranktide.kernels.errors import KernelInputError
from ranktide.kernels.losses import multilabel_residual, softmax_residual, squared_residual
from scipy.optimize import minimize_scalar
from scipy.special import expit, logsumexp, softmax, xlogy


def _data(n=150, k=5, seed=0):
    rng = np.random.default_rng(seed)
    Z = rng.standard_normal((n, k)) * 2.0
    y = rng.integers(0, k, n).astype(np.int32)
    w = rng.random(n) + 0.1
    w[::17] = 0.0  # rows of weight 0 contribute nothing
    T = sp.csr_matrix((rng.random((n, k)) < 0.3).astype(np.float32))
    Y = rng.standard_normal((n, k))
    return Z, y, w, T, Y


def _residual(loss, Z, y, w, T, Y):
    """The residual, the targets and the extra arguments conjugate_sum takes for ``loss``."""
    R = Z.copy()
    acc, gb = np.zeros(1), np.zeros(Z.shape[1])
    if loss == "softmax":
        H = np.empty(Z.shape[0])
        softmax_residual(R, y, w, acc, gb, out_negent=H)
        return R, y, {"negentropy": H}
    elif loss == "squared":
        squared_residual(R, Y, w, acc, gb)
        tgt = Y
    else:
        multilabel_residual(R, T.indptr, T.indices, w, acc, gb)
        tgt = (T.indptr, T.indices)
    return R, tgt, {}


def _closed_form(loss, Z, y, w, T, Y, c):
    """sum_i w_i loss*(c a_i) from the textbook conjugates, a_i = grad loss(z_i)."""
    k = Z.shape[1]
    if loss == "softmax":
        E = np.eye(k)[y]
        q = c * (softmax(Z, axis=1) - E) + E
        per_row = xlogy(q, q).sum(axis=1)
    elif loss == "squared":
        v = c * (Z - Y)
        per_row = (0.5 * v * v + v * Y).sum(axis=1)
    else:
        Yt = T.toarray().astype(np.float64)
        t = c * (expit(Z) - Yt) + Yt
        per_row = (xlogy(t, t) + xlogy(1 - t, 1 - t)).sum(axis=1)
    return float(np.sum(w * per_row))


@pytest.mark.parametrize("loss", ["softmax", "squared", "multilabel"])
@pytest.mark.parametrize("c", [0.0, 0.3, 0.97, 1.0])
def test_conjugate_sum_matches_closed_forms(loss, c):
    Z, y, w, T, Y = _data(seed=1)
    R, tgt, kw = _residual(loss, Z, y, w, T, Y)
    got = conjugate_sum(R, tgt, w, loss, c, **kw)
    want = _closed_form(loss, Z, y, w, T, Y, c)
    assert got == pytest.approx(want, rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("loss", ["softmax", "squared", "multilabel"])
def test_fenchel_young_equality_at_scale_one(loss):
    Z, y, w, T, Y = _data(seed=2)
    R, tgt, kw = _residual(loss, Z, y, w, T, Y)
    k = Z.shape[1]
    if loss == "softmax":
        A = softmax(Z, axis=1) - np.eye(k)[y]
        ell = logsumexp(Z, axis=1) - Z[np.arange(len(y)), y]
    elif loss == "squared":
        A = Z - Y
        ell = 0.5 * ((Z - Y) ** 2).sum(axis=1)
    else:
        Yt = T.toarray()
        A = expit(Z) - Yt
        ell = (np.logaddexp(0, Z) - Yt * Z).sum(axis=1)
    want = float(np.sum(w * ((A * Z).sum(axis=1) - ell)))
    assert conjugate_sum(R, tgt, w, loss, 1.0, **kw) == pytest.approx(want, rel=1e-11)


def test_binary_entropy_is_the_softplus_conjugate():
    # loss*(v) = sup_z (v z - log(1 + e^z) + y z) for one tag, by numerical maximization
    for ytag, sig, c in ((0.0, 0.3, 0.8), (1.0, 0.6, 0.5)):
        v = c * (sig - ytag)
        def neg(z, v=v, ytag=ytag):
            return -(v * z - np.logaddexp(0, z) + ytag * z)

        best = minimize_scalar(neg, bounds=(-40, 40), method="bounded",
                               options={"xatol": 1e-10})
        z = np.array([[np.log(sig / (1 - sig))]])
        tags = (np.array([0, int(ytag)]), np.array([0] * int(ytag), dtype=np.int64))
        R = expit(z) - ytag
        got = conjugate_sum(R, tags, None, "multilabel", c)
        assert got == pytest.approx(-best.fun, abs=1e-8)


def test_softmax_negentropy_per_row_against_scipy():
    # sum_j p_j log p_j with p = scipy.special.softmax, logits up to +-700 included: the
    # residual kernel forms it from the scores without a log per entry
    rng = np.random.default_rng(5)
    Z = rng.standard_normal((400, 37)) * 3.0
    Z[:40] *= 200.0
    y = rng.integers(0, 37, 400).astype(np.int32)
    H = np.empty(400)
    softmax_residual(Z.copy(), y, None, np.zeros(1), np.zeros(37), out_negent=H)
    P = softmax(Z, axis=1)
    np.testing.assert_allclose(H, xlogy(P, P).sum(axis=1), rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("c", [0.0, 1e-9, 0.5, 1.0])
def test_softmax_conjugate_with_confident_rows(c):
    # rows whose target probability is within rounding of 1 or of 0 (logit gaps of 30-60),
    # against the textbook conjugate from scipy.special.softmax / xlogy
    rng = np.random.default_rng(6)
    Z = rng.standard_normal((300, 9))
    y = rng.integers(0, 9, 300).astype(np.int32)
    Z[np.arange(0, 300, 2), y[::2]] += 40.0
    Z[np.arange(1, 300, 4), y[1::4]] -= 60.0
    w = rng.random(300) + 0.5
    R, tgt, kw = _residual("softmax", Z, y, w, None, None)
    want = _closed_form("softmax", Z, y, w, None, None, c)
    assert conjugate_sum(R, tgt, w, "softmax", c, **kw) == pytest.approx(want, rel=1e-11,
                                                                        abs=1e-11)


def test_bad_scale_and_shapes_are_one_clear_error():
    R = np.zeros((3, 2))
    with pytest.raises(KernelInputError, match="dual scale"):
        conjugate_sum(R, np.zeros(3, np.int32), None, "softmax", 1.5)
    with pytest.raises(KernelInputError, match="negative entropies"):
        conjugate_sum(R, np.zeros(3, np.int32), None, "softmax", 0.5)
    with pytest.raises(KernelInputError, match="out_negent"):
        softmax_residual(R.copy(), np.zeros(3, np.int32), None, np.zeros(1), np.zeros(2),
                         out_negent=np.zeros(2))
    with pytest.raises(KernelInputError, match="target values"):
        conjugate_sum(R, np.zeros((3, 3)), None, "squared", 0.5)
    assert conjugate_sum(np.zeros((0, 2)), np.zeros(0, np.int32), None, "softmax", 0.5) == 0.0
