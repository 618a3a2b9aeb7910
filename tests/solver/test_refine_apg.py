"""The shared APG loop over each oracle, and the gradient-corrected sampled refinement.

References: CVXPY + Clarabel (tests/conic.py) on the refinement subproblem
min f(A N + b) + lam ||N||_*; the fixed-point property of the gradient-corrected
surrogate (Shamir, Srebro & Zhang 2014: its gradient at the current iterate is
the full problem's, so the full optimum is its fixed point).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from conic import solve_conic
from ranktide.errors import ConfigError
from ranktide.losses import get_loss
from ranktide.passes.projections import MemoryProjections, ScratchProjections
from ranktide.signals import StopFlag, StopRequested
from ranktide.solver.refine import refine, rows_for_loss
from ranktide.solver.refine_common import RefineSettings
from ranktide.solver.refine_sample import (
    draw_sample,
    full_objective,
    gather_rows,
    refine_sampled,
)
from ranktide.solver.refine_stream import refine_streamed
from ranktide.solver.refinement import backtrack, refine_projections

LOSSES = ["softmax", "squared", "multilabel"]
ORACLES = ["memory", "blocks", "scratch"]
CUTS = (0, 70, 71, 180, 240)


def _sub(loss, seed=2, n=240, q=5, k=4):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((n, q)) * 0.7 + 0.2
    if loss == "softmax":
        Y = np.argmax(A @ rng.standard_normal((q, k)) + rng.gumbel(size=(n, k)), axis=1)
    elif loss == "squared":
        Y = A @ rng.standard_normal((q, k)) * 0.5 + rng.standard_normal((n, k))
    else:
        Y = (A @ rng.standard_normal((q, k)) + rng.standard_normal((n, k)) > 0.5).astype(float)
    w = rng.random(n) + 0.5
    return A, Y, w


def _blocks(A, Y, w, loss):
    out = []
    for a, b in zip(CUTS[:-1], CUTS[1:], strict=True):
        t = sp.csr_matrix(Y[a:b]) if loss == "multilabel" else Y[a:b]
        out.append((A[a:b], t, w[a:b]))
    return out


def _run(where, A, Y, w, loss, lam, N0, b0, tmp_path, **kw):
    """The same refinement through one oracle: memory, streamed blocks or scratch files."""
    cfg = RefineSettings(loss=loss, lam=lam, **kw)
    if where == "memory":
        return refine(A, Y, w, N0, b0, cfg)
    blocks = _blocks(A, Y, w, loss)
    if where == "blocks":
        return refine_streamed(MemoryProjections(blocks), N0, b0, cfg)
    src = ScratchProjections(tmp_path / "scratch", N0.shape[1])
    for i, (XQ, t, wb) in enumerate(blocks):
        src.add(CUTS[i], XQ, t, wb)
    try:
        return refine_streamed(src, N0, b0, cfg)
    finally:
        src.remove()


@pytest.mark.parametrize("where", ORACLES)
@pytest.mark.parametrize("loss", LOSSES)
def test_apg_loop_over_each_oracle(loss, where, tmp_path):
    A, Y, w = _sub(loss)
    q, k, lam = A.shape[1], 4, 0.03
    N0, b0 = np.zeros((q, k)), np.zeros(k)
    steps = []
    res = _run(where, A, Y, w, loss, lam, N0, b0, tmp_path, tol=1e-9, max_iter=4000,
               progress=steps.append)
    con = solve_conic(A, Y, loss=loss, lam=lam, weights=w, n_outputs=k)  # CVXPY + Clarabel
    assert res.converged
    assert res.objective == pytest.approx(con.objective, rel=1e-7, abs=1e-9)
    # one report per step; the accepted objective never increases (the restart keeps the
    # loop monotone: O'Donoghue & Candes 2015); the ETA is a finite non-negative number
    assert [p.step for p in steps] == list(range(1, res.iterations + 1))
    F = np.array([p.objective for p in steps])
    assert np.all(np.diff(F) <= 1e-12 * np.abs(F[:-1]))
    assert all(np.isfinite(p.eta) and p.eta >= 0 for p in steps)
    assert steps[-1].eta == 0.0 and steps[-1].gap <= 1e-9
    # a stop request is honoured before the first step
    flag = StopFlag()
    flag.request()
    with pytest.raises(StopRequested, match="step 0"):
        _run(where, A, Y, w, loss, lam, N0, b0, tmp_path, tol=1e-9, max_iter=10,
             should_stop=flag)
    # and between steps: the loop checks before every step
    calls = []

    def stop_after_three():
        calls.append(1)
        return len(calls) > 3

    with pytest.raises(StopRequested, match="step 3"):
        _run(where, A, Y, w, loss, lam, N0, b0, tmp_path, tol=1e-12, max_iter=50,
             should_stop=stop_after_three)


def _full_gradient(A, Y, w, loss, N, b, k):
    """Q^T G and grad_b of the full problem at (N, b) (what the pass supplies), in numpy."""
    cfg = RefineSettings(loss=loss, lam=1.0, tol=1.0, max_iter=1)
    Yd, wn = rows_for_loss(A.shape[0], k, Y, w, cfg)
    Yd = Yd.toarray() if sp.issparse(Yd) else Yd
    _, R = get_loss(loss).dense_value_residual(A @ N + b, Yd, wn)
    return A.T @ R, R.sum(axis=0)


@pytest.mark.parametrize("loss", LOSSES)
def test_sampled_surrogate_reaches_the_conic_optimum(loss):
    """Outer rounds of the sampled refinement (a fresh third of the rows each round, the
    correction from the full gradient) converge to the full problem's optimum."""
    A, Y, w = _sub(loss, seed=4)
    n, q, k, lam = A.shape[0], A.shape[1], 4, 0.03
    con = solve_conic(A, Y, loss=loss, lam=lam, weights=w, n_outputs=k)  # CVXPY + Clarabel
    rng = np.random.default_rng(0)
    N, b = np.zeros((q, k)), np.zeros(k)
    blocks = _blocks(A, Y, w, loss)
    F = []
    cfg = RefineSettings(loss=loss, lam=lam, tol=1e-10, max_iter=3000)
    for _ in range(60):
        GN, gb = _full_gradient(A, Y, w, loss, N, b, k)
        XQ, T, W = gather_rows(blocks, draw_sample(n, n // 3, rng))
        out = refine_sampled(XQ, T, W, N, b, GN, gb, cfg)
        N, b = out.result.N, out.result.b
        F.append(full_objective(blocks, N, b, float(out.result.s.sum()), cfg))
        if F[-1] - con.objective <= 1e-9 * abs(con.objective):
            break
    assert F[-1] == pytest.approx(con.objective, rel=1e-8, abs=1e-10)
    assert out.predicted >= 0.0


@pytest.mark.parametrize("loss", LOSSES)
def test_the_full_optimum_is_the_surrogate_fixed_point(loss):
    A, Y, w = _sub(loss, seed=6)
    n, q, k, lam = A.shape[0], A.shape[1], 4, 0.03
    opt = refine(A, Y, w, np.zeros((q, k)), np.zeros(k),
                 RefineSettings(loss=loss, lam=lam, tol=1e-11, max_iter=20000))
    assert opt.converged
    GN, gb = _full_gradient(A, Y, w, loss, opt.N, opt.b, k)
    rng = np.random.default_rng(1)
    XQ, T, W = gather_rows(_blocks(A, Y, w, loss), draw_sample(n, 40, rng))
    cfg = RefineSettings(loss=loss, lam=lam, tol=1e-11, max_iter=5000)
    out = refine_sampled(XQ, T, W, opt.N, opt.b, GN, gb, cfg)
    # a tiny sample (40 of 240 rows) with the correction stays at the full optimum
    # (Shamir, Srebro & Zhang 2014); without it the sample's own optimum is elsewhere
    scale = np.abs(opt.N).max()
    assert np.abs(out.result.N - opt.N).max() <= 1e-4 * scale
    alone = refine(XQ, T, W, opt.N, opt.b, cfg)
    assert np.abs(alone.N - opt.N).max() > 100 * np.abs(out.result.N - opt.N).max()


def test_gather_rows_and_full_objective_match_numpy():
    A, Y, w = _sub("multilabel", seed=8)
    blocks = _blocks(A, Y, w, "multilabel")
    rows = draw_sample(A.shape[0], 50, np.random.default_rng(3))
    assert np.all(np.diff(rows) > 0) and rows.size == 50  # sorted, distinct
    XQ, T, W = gather_rows(blocks, rows)
    np.testing.assert_array_equal(XQ, A[rows])  # reference: numpy fancy indexing
    np.testing.assert_array_equal(T.toarray(), Y[rows])
    np.testing.assert_array_equal(W, w[rows])
    N = np.random.default_rng(4).standard_normal((5, 4))
    b = np.array([0.1, -0.2, 0.3, 0.0])
    Z = A @ N + b
    # reference: the logistic loss log(1 + e^z) - y z in numpy, weighted mean
    f = float(w @ (np.logaddexp(0, Z) - Y * Z).sum(axis=1) / w.sum())
    nuc = float(np.linalg.svd(N, compute_uv=False).sum())
    got = full_objective(blocks, N, b, nuc,
                         RefineSettings(loss="multilabel", lam=0.05, tol=1e-6, max_iter=1))
    assert got == pytest.approx(f + 0.05 * nuc, rel=1e-12)


@pytest.mark.parametrize("loss", ["softmax", "multilabel"])
def test_refine_projections_keeps_falls_back_and_grows(loss):
    """The driver keeps a sampled answer whose full objective went down, and otherwise
    runs the exact refinement (its result equals refine's own) and grows the sample."""
    A, Y, w = _sub(loss, seed=9)
    n, q, k, lam = A.shape[0], A.shape[1], 4, 0.03
    N0, b0 = np.zeros((q, k)), np.zeros(k)
    blocks = MemoryProjections(_blocks(A, Y, w, loss))
    GN, gb = _full_gradient(A, Y, w, loss, N0, b0, k)
    cfg = RefineSettings(loss=loss, lam=lam, tol=1e-9, max_iter=3000, stall=0.0)
    F0 = full_objective(blocks, N0, b0, 0.0, cfg)
    kw = dict(n=n, full_grad_N=GN, full_grad_b=gb)
    res, info = refine_projections(blocks, "memory", N0, b0, cfg, rows=80,
                                   rng=np.random.default_rng(0), objective=F0, **kw)
    assert info["refine_sample_rows"] == 80 and not info["refine_fallback"]
    nuc = float(res.s.sum())
    # the objective it reports is the full one at its answer (reference: numpy, below)
    assert res.objective == pytest.approx(full_objective(blocks, res.N, res.b, nuc, cfg))
    assert res.objective < F0
    # told that the start was better than it is, the sampled answer looks like an increase:
    # the exact refinement replaces it and the sample grows four-fold
    res2, info2 = refine_projections(blocks, "blocks", N0, b0, cfg, rows=80,
                                     rng=np.random.default_rng(0), objective=-1.0, **kw)
    exact = refine(A, Y, w, N0, b0, cfg)
    assert info2["refine_fallback"] and info2["refine_sample_next"] == 320
    assert res2.objective == pytest.approx(exact.objective, rel=1e-9)
    res3, info3 = refine_projections(blocks, "memory", N0, b0, cfg, rows=0,
                                     rng=np.random.default_rng(0), objective=F0, **kw)
    assert info3 == {"refine_sample_rows": 0}
    assert res3.objective == exact.objective


@pytest.mark.parametrize("loss", ["softmax", "multilabel"])
def test_backtrack_finds_a_shorter_step_that_lowers_the_objective(loss):
    """An answer past the optimum (four times the exact step) raises the full objective;
    a shorter step towards it lowers it, with factors and objective that match numpy's."""
    from dataclasses import replace

    A, Y, w = _sub(loss, seed=12)
    q, k, lam = A.shape[1], 4, 0.03
    N0, b0 = np.zeros((q, k)), np.zeros(k)
    blocks = MemoryProjections(_blocks(A, Y, w, loss))
    cfg = RefineSettings(loss=loss, lam=lam, tol=1e-9, max_iter=3000, stall=0.0)
    F0 = full_objective(blocks, N0, b0, 0.0, cfg)
    exact = refine(A, Y, w, N0, b0, cfg)
    far = replace(exact, N=4.0 * exact.N, b=4.0 * exact.b)
    nuc_far = float(np.linalg.svd(far.N, compute_uv=False).sum())  # reference: numpy SVD
    assert full_objective(blocks, far.N, far.b, nuc_far, cfg) > F0  # the premise
    got = backtrack(blocks, N0, b0, far, F0, cfg)
    assert got is not None
    res, t = got
    assert t in (0.5, 0.25, 0.125)
    np.testing.assert_allclose(res.N, t * far.N, atol=1e-15)
    np.testing.assert_allclose((res.A * res.s) @ res.B.T, res.N, atol=1e-12)
    nuc = float(np.linalg.svd(res.N, compute_uv=False).sum())
    assert res.objective == pytest.approx(full_objective(blocks, res.N, res.b, nuc, cfg),
                                          rel=1e-12)
    assert res.objective < F0
    # told that the start is better than any point, no step is kept
    assert backtrack(blocks, N0, b0, far, -1.0, cfg) is None


def test_refine_settings_are_checked_once_when_made():
    """Every refinement takes its settings from one validated object (contract test:
    no outside reference applies; common practice, no source)."""
    ok = RefineSettings(loss="softmax", lam=0.1, tol=1e-6, max_iter=10)
    assert ok.loss is get_loss("softmax") and ok.check_every == 5 and ok.stall == 0.0
    assert ok.loop_stall == 0.0
    assert RefineSettings(loss="softmax", lam=0.1, tol=1e-6, max_iter=10,
                          stall=0.5).loop_stall == 0.5
    # a quadratic loss takes exact steps: the stall test is off for it
    assert RefineSettings(loss="squared", lam=0.1, tol=1e-6, max_iter=10,
                          stall=0.5).loop_stall == 0.0
    bad = [
        (dict(loss="hinge"), "loss 'hinge': unknown"),
        (dict(lam=0.0), "lam = 0.0; give a positive number"),
        (dict(lam=float("inf")), "lam = inf; give a positive number"),
        (dict(tol=0.0), "tol = 0.0; give a positive number"),
        (dict(max_iter=0), "max_iter = 0; give an integer >= 1"),
        (dict(check_every=2.5), "check_every = 2.5; give an integer >= 1"),
        (dict(stall=-0.1), "stall = -0.1; give a fraction >= 0"),
        (dict(loss="squared", class_weights=np.ones(4)), "softmax loss only"),
    ]
    for change, message in bad:
        kw = dict(loss="softmax", lam=0.1, tol=1e-6, max_iter=10)
        kw.update(change)
        with pytest.raises(ConfigError, match=message):
            RefineSettings(**kw)
