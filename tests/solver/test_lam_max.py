"""lam_max in at most 3 passes at W = 0 on a gradient with clustered top singular values.

Reference: numpy.linalg.svd of the dense gradient at W = 0, b = b0. For the squared
loss b0 is the mean target and G(0, b0) = -X^T (Y - mean Y) / n (DESIGN section 2).
"""

from __future__ import annotations

import time

import numpy as np
import scipy.sparse as sp
from ranktide.passes.gradient import gradient_pass
from ranktide.solver.config import SolverConfig
from ranktide.solver.greedy import GreedySolver


def _clustered(seed, n=3000, d=150, k=60):
    """Invented data: Y = X A + noise with A's top singular values within 1.5%."""
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.1, random_state=seed, format="csr", dtype=np.float64)
    X.data = rng.choice([-1.0, 1.0], X.nnz)
    X = X.astype(np.float32)
    Q1 = np.linalg.qr(rng.standard_normal((d, k)))[0]
    Q2 = np.linalg.qr(rng.standard_normal((k, k)))[0]
    s = np.concatenate([[1.0, 0.995, 0.99, 0.985], 0.6 * np.linspace(1, 0.05, k - 4)])
    Y = (X @ ((Q1 * s) @ Q2.T) + 0.3 * rng.standard_normal((n, k))).astype(np.float32)
    Xd, Yd = X.toarray().astype(np.float64), Y.astype(np.float64)
    G = -Xd.T @ (Yd - Yd.mean(axis=0)) / n
    return X, Y, np.linalg.svd(G, compute_uv=False)  # reference: numpy.linalg.svd


def test_lam_max_within_three_passes_on_clustered_values():
    for seed in (0, 1):
        X, Y, sv = _clustered(seed)
        assert sv[1] > 0.9 * sv[0]  # the top values are clustered
        cfg = SolverConfig(loss="squared", lam_scale=0.5, dense_gradient=False, seed=seed,
                           max_passes=4)
        res = GreedySolver((X, Y), cfg).run()
        at_zero = [h for h in res.history if h["phase"] == "lam_max"]
        assert len(at_zero) == 3  # the intercept's pass and two at b0
        # the third pass already fits: it refined and left atoms
        assert "refine_iterations" in at_zero[-1] and at_zero[-1]["rank"] >= 1
        # a Rayleigh-Ritz lower bound, measured 0.66-0.98% low on these problems after
        # 3 passes (the block Krylov union over the passes' products; 3.0-3.6% with the
        # last block's products alone): allow 2%
        assert res.lam_max <= sv[0] * (1 + 1e-12)
        assert res.lam_max >= 0.98 * sv[0], (res.lam_max, sv[0])
        assert res.lam == 0.5 * res.lam_max
        # not settled to lam_max_rtol: the result says lam_max is a lower bound
        assert not res.lam_max_settled and "lower bound" in res.message
        # every estimate at W = 0 (the intercept's pass included) is a lower bound
        est = [h["lam_max_estimate"] for h in at_zero]
        assert all(e <= sv[0] * (1 + 1e-12) for e in est) and est == sorted(est)


def test_more_passes_settle_lam_max():
    X, Y, sv = _clustered(2)
    cfg = SolverConfig(loss="squared", lam_scale=0.5, dense_gradient=False, seed=2,
                       lam_max_passes=12, lam_max_rtol=1e-6, max_passes=12)
    res = GreedySolver((X, Y), cfg).run()
    assert res.lam_max_settled
    assert abs(res.lam_max - sv[0]) <= 1e-6 * sv[0]  # reference: numpy.linalg.svd


def test_stopped_at_w0_says_so_and_reports_the_objective():
    X, Y, sv = _clustered(3, n=600)
    cfg = SolverConfig(loss="squared", lam_scale=0.5, dense_gradient=False, max_passes=2)
    res = GreedySolver((X, Y), cfg).run()
    assert res.status == "max_passes" and res.rank == 0
    assert "nothing fitted yet" in res.message
    # the objective at W = 0, b = b0: half the mean squared deviation from the mean
    # (closed form, numpy)
    Yd = Y.astype(np.float64)
    f0 = 0.5 * np.mean(np.sum((Yd - Yd.mean(axis=0)) ** 2, axis=1))
    assert abs(res.objective - f0) <= 1e-6 * f0


def test_rank0_passes_keep_no_projections_and_the_deadline_cuts_a_pass(monkeypatch):
    monkeypatch.setattr("ranktide.solver.memory_plan.process_floor", lambda: 0)  # tiny budgets
    X, Y, _ = _clustered(4, n=600)
    seen = []

    def pass_fn(src, req, **kw):
        seen.append((req.rank, req.keep_projections, req.projections_dir))
        return gradient_pass(src, req, **kw)

    cfg = SolverConfig(loss="squared", lam_scale=0.5, dense_gradient=False, max_passes=4,
                       memory="500KB")  # small: the fit passes write scratch projections
    res = GreedySolver((X, Y), cfg, pass_fn=pass_fn).run()
    # the intercept's pass and the next cannot be followed by a refinement: no projections
    assert [s[1] for s in seen[:2]] == [False, False] and seen[0][2] is seen[1][2] is None
    assert seen[2][1] and any(s[2] is not None for s in seen[2:])
    assert res.rank >= 1

    def slow(src, req, **kw):
        time.sleep(0.3)
        return gradient_pass(src, req, **kw)

    cfg = SolverConfig(loss="squared", lam_scale=0.5, dense_gradient=False, max_seconds=0.2,
                       block_rows=50)
    solver = GreedySolver((X, Y), cfg, pass_fn=slow)
    res = solver.run()
    # the deadline passed inside the first pass: abandoned at a block boundary, state kept
    assert res.status == "max_seconds" and solver.state.passes == 0
