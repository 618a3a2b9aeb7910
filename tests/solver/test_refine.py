"""The refinement's dense kernels and its stopping tests.

References: numpy elementwise arithmetic (the expressions the fused kernels
replace); the refinement run to a tight certificate (its own optimum, which
the solver suites check against CVXPY + Clarabel).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
from ranktide.kernels.dense import add_row, extrapolate
from ranktide.solver.refine import refine
from ranktide.solver.refine_common import RefineSettings


def test_fused_extrapolation_and_row_add_equal_numpy_bitwise():
    rng = np.random.default_rng(3)
    X, P = rng.standard_normal((2, 301, 17))
    c = rng.standard_normal(17)
    out = np.empty_like(X)
    extrapolate(X, P, 0.37, out)
    assert np.array_equal(out, X + 0.37 * (X - P))  # reference: numpy
    Z = X.copy()
    add_row(Z, c)
    assert np.array_equal(Z, X + c)  # reference: numpy


def _problem(n=1500, q=8, k=12, seed=5):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((n, q)) * 0.1 + 0.3  # columns far from centered
    W = rng.standard_normal((q, k)) * 3.0
    y = np.argmax(A @ W + rng.gumbel(size=(n, k)), axis=1)
    return A, y


def test_stall_test_stops_early_near_the_optimum():
    A, y = _problem()
    q, k = A.shape[1], 12
    N0, b0 = np.zeros((q, k)), np.zeros(k)
    cfg = RefineSettings(loss="softmax", lam=0.02, tol=1e-9, max_iter=5000)
    tight = refine(A, y, None, N0, b0, cfg)
    assert tight.converged
    loose = refine(A, y, None, N0, b0, replace(cfg, stall=0.5))
    assert loose.converged and loose.iterations < tight.iterations
    F0 = float(np.log(k))  # W = 0, b = 0: every row's loss is log k
    # the stalled solve keeps most of the decrease (common practice, no source: 1%)
    assert loose.objective - tight.objective <= 0.01 * (F0 - tight.objective)
    assert loose.objective >= tight.objective - 1e-12
    # the intercept comes back in the caller's parametrization: at the optimum grad_b = 0,
    # i.e. the mean predicted probabilities equal the class frequencies (DESIGN section 2)
    Zt = A @ tight.N + tight.b
    p = np.exp(Zt - Zt.max(1, keepdims=True))
    p /= p.sum(1, keepdims=True)
    assert np.abs(p.mean(0) - np.bincount(y, minlength=k) / len(y)).max() < 1e-6
