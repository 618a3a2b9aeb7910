"""The dense reference solver against outside references.

* CVXPY + Clarabel (an independent conic solver, see tests/conic.py) on small
  problems of every loss, with row weights and an intercept;
* closed forms for the squared loss with an orthonormal, centred design:
  W* = SVT(X^T Y, n lam) (Cai, Candès & Shen 2010, Theorem 2.1);
* scikit-learn's log_loss for the loss values, scipy's check_grad for the
  gradient, and the nuclear-norm subdifferential (Watson 1992) for lam_max.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from conic import orthonormal_centred_design, solve_conic, svt_numpy
from ranktide.errors import ConfigError, InputError
from ranktide.solver.reference import (
    dense_gradient,
    dense_objective,
    lam_max_dense,
    reference_solve,
)
from scipy.optimize import check_grad
from scipy.special import expit
from scipy.special import softmax as sm
from sklearn.metrics import log_loss
from threadpoolctl import threadpool_limits

LOSSES = ["softmax", "squared", "multilabel"]


@pytest.fixture(autouse=True, scope="module")
def _one_blas_thread():
    # OpenBLAS's own thread pool made these small dense products 5-20x slower when the two
    # cores are shared with other processes (measured on the CI machine); one thread is steady.
    with threadpool_limits(1, user_api="blas"):
        yield


def make_problem(loss: str, *, n=200, d=20, k=5, rank=2, density=0.3, seed=0, weights=True):
    """A small planted low-rank problem: sparse X (n, d), targets, row weights."""
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=density, random_state=rng, format="csr") * 2.0
    A = rng.standard_normal((d, rank)) @ rng.standard_normal((rank, k))
    Z = np.asarray(X @ A) + 0.3 * rng.standard_normal(k)
    if loss == "softmax":
        y = np.argmax(Z + rng.gumbel(size=Z.shape), axis=1)
    elif loss == "squared":
        y = Z + 0.5 * rng.standard_normal(Z.shape)
    else:
        y = (Z + rng.logistic(size=Z.shape) > 0.0).astype(np.float64)
    w = rng.uniform(0.2, 2.0, n) if weights else None
    return X, y, w, k


@pytest.mark.parametrize("loss", LOSSES)
def test_reference_matches_cvxpy_clarabel(loss):
    X, y, w, k = make_problem(loss, seed=11)
    lam = 0.2 * lam_max_dense(X, y, loss, weights=w, n_outputs=k)
    ref = reference_solve(X, y, loss=loss, lam=lam, weights=w, n_outputs=k, tol=1e-10)
    con = solve_conic(X, y, loss=loss, lam=lam, weights=w, n_outputs=k)
    assert ref.status == "converged", ref.message
    # Reference: CVXPY + Clarabel optimum (tests/conic.py).
    assert abs(ref.objective - con.objective) <= 1e-7 * abs(con.objective)
    np.testing.assert_allclose(ref.singular_values, con.singular_values,
                               atol=1e-4 * con.singular_values[0])
    # the objective the solver reports is F at the W, b it returns (numpy, independent path)
    F = dense_objective(X, y, ref.W, ref.b, loss=loss, lam=lam, weights=w, n_outputs=k)
    assert abs(F - ref.objective) <= 1e-12 * abs(F)


@pytest.mark.parametrize("keep", [1, 3])
def test_squared_orthogonal_design_closed_form(keep):
    n, d, k = 120, 15, 6
    X = orthonormal_centred_design(n, d, seed=2)
    rng = np.random.default_rng(3)
    Y = rng.standard_normal((n, k)) + np.arange(k)
    sv = np.linalg.svd(X.T @ Y, compute_uv=False)
    lam = 0.5 * (sv[keep - 1] + sv[keep]) / n  # threshold between the keep-th and next
    ref = reference_solve(X, Y, loss="squared", lam=lam, tol=1e-12)
    # Closed form: f = (1/2n)||XW + 1b^T - Y||^2 with X^T X = I, 1^T X = 0 gives
    # b* = mean(Y) and W* = SVT(X^T Y, n lam) (Cai, Candès & Shen 2010, Thm 2.1).
    W_star = svt_numpy(X.T @ Y, n * lam)
    np.testing.assert_allclose(ref.W, W_star, atol=1e-8)
    np.testing.assert_allclose(ref.b, Y.mean(axis=0), atol=1e-8)
    assert ref.rank(rtol=1e-6) == keep


def test_rank_one_targets_closed_form():
    n, d, k = 100, 12, 5
    X = orthonormal_centred_design(n, d, seed=4)
    rng = np.random.default_rng(5)
    u = rng.standard_normal(d)
    u /= np.linalg.norm(u)
    v = rng.standard_normal(k)
    v /= np.linalg.norm(v)
    s = 3.0
    Y = X @ (s * np.outer(u, v))
    for lam in (0.01, 0.02, 0.04):
        ref = reference_solve(X, Y, loss="squared", lam=lam, tol=1e-12)
        # Closed form: X^T Y = s u v^T, so W* = (s - n lam)_+ u v^T (SVT of a rank-one matrix).
        want = max(s - n * lam, 0.0) * np.outer(u, v)
        np.testing.assert_allclose(ref.W, want, atol=1e-8)


def test_lam_max_squared_closed_form_and_zero_solution():
    n, d, k = 150, 10, 4
    X = orthonormal_centred_design(n, d, seed=6)
    Y = np.random.default_rng(7).standard_normal((n, k))
    lm = lam_max_dense(X, Y, "squared")
    # Closed form: G(0, mean Y) = -X^T (Y - mean Y) / n, so lam_max = ||X^T Y_c||_2 / n.
    assert lm == pytest.approx(np.linalg.norm(X.T @ (Y - Y.mean(axis=0)), 2) / n, rel=1e-12)


@pytest.mark.parametrize("loss", LOSSES)
def test_lam_max_is_the_zero_threshold(loss):
    X, y, w, k = make_problem(loss, seed=21)
    lm = lam_max_dense(X, y, loss, weights=w, n_outputs=k)
    # Nuclear-norm subdifferential (Watson 1992): W = 0 is optimal iff ||G(0, b0)||_2 <= lam.
    above = reference_solve(X, y, loss=loss, lam=1.01 * lm, weights=w, n_outputs=k)
    assert np.abs(above.W).max() == 0.0
    below = reference_solve(X, y, loss=loss, lam=0.9 * lm, weights=w, n_outputs=k)
    assert below.rank() >= 1


def test_loss_values_match_sklearn_log_loss():
    X, y, w, k = make_problem("softmax", seed=31)
    rng = np.random.default_rng(0)
    W = 0.3 * rng.standard_normal((X.shape[1], k))
    b = rng.standard_normal(k)
    Z = X.toarray() @ W + b
    F = dense_objective(X, y, W, b, loss="softmax", lam=0.0, weights=w, n_outputs=k)
    # Reference: scikit-learn's weighted multinomial log loss.
    assert F == pytest.approx(log_loss(y, sm(Z, axis=1), sample_weight=w, labels=range(k)),
                              rel=1e-12)
    Xm, T, wm, km = make_problem("multilabel", seed=32)
    Wm = 0.3 * rng.standard_normal((Xm.shape[1], km))
    Zm = Xm.toarray() @ Wm
    Fm = dense_objective(Xm, T, Wm, np.zeros(km), loss="multilabel", lam=0.0, weights=wm)
    # Reference: per-tag binary log loss of scikit-learn, summed over tags.
    want = sum(log_loss(T[:, j], expit(Zm[:, j]), sample_weight=wm, labels=[0, 1])
               for j in range(km))
    assert Fm == pytest.approx(want, rel=1e-10)


@pytest.mark.parametrize("loss", LOSSES)
def test_gradient_matches_finite_differences(loss):
    X, y, w, k = make_problem(loss, n=60, d=6, k=4, seed=41)
    d = X.shape[1]
    cw = np.linspace(0.5, 1.5, k)

    def f(theta):
        return dense_objective(X, y, theta[: d * k].reshape(d, k), theta[d * k:], loss=loss,
                               lam=0.0, weights=w, class_weights=cw, n_outputs=k)

    def g(theta):
        GW, Gb = dense_gradient(X, y, theta[: d * k].reshape(d, k), theta[d * k:], loss=loss,
                                weights=w, class_weights=cw, n_outputs=k)
        return np.concatenate([GW.ravel(), Gb])

    theta = 0.2 * np.random.default_rng(1).standard_normal(d * k + k)
    # Reference: scipy.optimize.check_grad (forward differences, step ~1.5e-8).
    assert check_grad(f, g, theta) <= 1e-5 * max(1.0, np.linalg.norm(g(theta)))


def test_class_weights_equal_row_weights_for_softmax():
    X, y, _, k = make_problem("softmax", seed=51, weights=False)
    cw = np.linspace(0.5, 2.0, k)
    lam = 0.01
    a = reference_solve(X, y, loss="softmax", lam=lam, class_weights=cw, n_outputs=k)
    # Definition (DESIGN §2 with row weights w_i = c_{y_i}), solved by CVXPY + Clarabel.
    con = solve_conic(X, y, loss="softmax", lam=lam, weights=cw[y], n_outputs=k)
    assert abs(a.objective - con.objective) <= 1e-7 * con.objective


def test_warm_start_callback_and_budgets():
    X, y, w, k = make_problem("squared", seed=61)
    lam = 0.05
    first = reference_solve(X, y, loss="squared", lam=lam, weights=w)
    warm = reference_solve(X, y, loss="squared", lam=lam, weights=w, W0=first.W, b0=first.b)
    assert warm.iterations < first.iterations / 4
    seen = []
    stopped = reference_solve(X, y, loss="squared", lam=lam, weights=w,
                              callback=lambda rec: seen.append(rec["objective"]) or len(seen) >= 3)
    assert stopped.status == "stopped" and stopped.iterations == 3 and len(seen) == 3
    capped = reference_solve(X, y, loss="squared", lam=lam, weights=w, max_iter=2)
    assert capped.status == "max_iter" and capped.iterations == 2
    # each iteration costs at least two evaluations (gradient + one trial)
    assert capped.passes >= 1 + 2 * 2


def test_size_limits_and_bad_input():
    X, y, w, k = make_problem("softmax", seed=71)
    with pytest.raises(ConfigError, match=r"d\*k = 20\*5 = 100 dense entries exceed"):
        reference_solve(X, y, loss="softmax", lam=0.1, max_dense_entries=99)
    with pytest.raises(ConfigError, match="stored entries exceed"):
        reference_solve(X, y, loss="softmax", lam=0.1, max_nnz=10)
    with pytest.raises(ConfigError, match="loss 'hinge': unknown"):
        reference_solve(X, y, loss="hinge", lam=0.1)
    with pytest.raises(ConfigError, match="lam = -1"):
        reference_solve(X, y, loss="softmax", lam=-1.0)
    bad = y.copy()
    bad[7] = 9
    with pytest.raises(InputError, match="row 7 has class id 9, outside 0..4"):
        reference_solve(X, bad, loss="softmax", lam=0.1, n_outputs=5)
    ww = np.ones(X.shape[0])
    ww[3] = -1.0
    with pytest.raises(InputError, match="weights: row 3 has weight -1.0"):
        reference_solve(X, y, loss="softmax", lam=0.1, weights=ww)
    T = np.zeros((X.shape[0], 3))
    T[4, 1] = 0.5
    with pytest.raises(InputError, match="row 4, tag 1 is 0.5"):
        reference_solve(X, T, loss="multilabel", lam=0.1)
    with pytest.raises(InputError, match="targets: shape"):
        reference_solve(X, np.zeros((5, 2)), loss="squared", lam=0.1)
