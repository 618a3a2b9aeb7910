"""Solving on the used columns only: the same optimum, zero rows on empty columns.

References: CVXPY + Clarabel (tests/conic.py) on the full feature space, and the
solver itself on the full space (``used_columns=False``).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from conic import solve_conic
from ranktide.runs.train import train
from ranktide.solver.config import SolverConfig
from ranktide.solver.greedy import GreedySolver
from ranktide.solver.reference import lam_max_dense

LOSSES = ["softmax", "squared", "multilabel"]


def _problem(loss: str, seed: int):
    """n = 150 rows on 30 features of which 12 never occur (float32-exact values)."""
    rng = np.random.default_rng(seed)
    used = np.sort(rng.choice(30, 18, replace=False))
    Xu = sp.random(150, 18, density=0.3, random_state=rng, format="csr")
    Xu.data = (2.0 * Xu.data).astype(np.float32).astype(np.float64)
    X = sp.csr_matrix((Xu.data, used[Xu.indices], Xu.indptr), shape=(150, 30))
    A = rng.standard_normal((30, 2)) @ rng.standard_normal((2, 5))
    Z = np.asarray(X @ A)
    if loss == "softmax":
        y = np.argmax(Z + rng.gumbel(size=Z.shape), axis=1).astype(np.int32)
        yd = y
    elif loss == "squared":
        y = (Z + 0.5 * rng.standard_normal(Z.shape)).astype(np.float32).astype(np.float64)
        yd = y
    else:
        yd = (Z + rng.logistic(size=Z.shape) > 0.0).astype(np.float64)
        y = sp.csr_matrix(yd)
    return X, y, yd, np.setdiff1d(np.arange(30), np.unique(X.indices))


@pytest.mark.parametrize("loss", LOSSES)
def test_used_columns_reach_the_conic_optimum_with_zero_rows(loss):
    X, y, yd, empty = _problem(loss, 7)
    assert empty.size >= 10
    lam = 0.2 * lam_max_dense(X, yd, loss, n_outputs=5)
    con = solve_conic(X, yd, loss=loss, lam=lam, n_outputs=5)
    res = train((X, y), loss=loss, lam=lam, tol=1e-8, max_passes=300, seed=0,
                checkpoint_seconds=None)
    assert res.status == "converged", res.message
    # Reference: CVXPY + Clarabel optimum on all 30 columns (tests/conic.py).
    assert abs(res.objective - con.objective) <= 1e-6 * abs(con.objective)
    W = (res.model.U * res.model.s) @ res.model.V.T
    assert W.shape == (30, 5)
    assert np.all(W[empty] == 0.0)  # an empty column's row is exactly zero
    np.testing.assert_allclose(W, con.W, atol=2e-3 * np.abs(con.W).max())


def test_full_and_narrowed_space_agree():
    X, y, _yd, empty = _problem("softmax", 3)
    out = {}
    for flag in (False, True):
        solver = GreedySolver((X, y), SolverConfig(loss="softmax", lam_scale=0.1, tol=1e-8,
                                                   used_columns=flag, max_passes=300))
        assert solver.d == (30 - empty.size if flag else 30)
        out[flag] = solver.run()
    # Reference: the same solver on the full feature space.
    assert abs(out[True].objective - out[False].objective) <= 1e-7 * out[False].objective
    assert out[True].U.shape == out[False].U.shape == (30, out[True].U.shape[1])
