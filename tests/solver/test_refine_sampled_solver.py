"""The solver with the gradient-corrected sampled refinement (refine_sample_rows).

References: CVXPY + Clarabel (tests/conic.py) optimum of the full problem; the
pass's G^T Q against the same product formed from the cached projections in
numpy; the checkpoint round trip (the uninterrupted run's arrays, bit for bit).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from conic import solve_conic
from ranktide.solver.config import SolverConfig
from ranktide.solver.greedy import GreedySolver
from ranktide.solver.refinement import sample_rows
from scipy.special import expit
from statefiles import through_files


def _problem(loss: str, *, n=300, d=20, k=4, seed=0):
    """Invented low-rank data: sparse X, targets from a rank-2 signal plus noise."""
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.2, random_state=seed, format="csr", dtype=np.float32)
    X.data = (X.data * 2.0 - 1.0).astype(np.float32)
    Z = np.asarray(X @ (rng.standard_normal((d, 2)) @ rng.standard_normal((2, k))))
    if loss == "softmax":
        return X, np.argmax(Z + rng.gumbel(size=(n, k)), axis=1).astype(np.int32)
    if loss == "squared":
        return X, (Z + 0.5 * rng.standard_normal((n, k))).astype(np.float32)
    return X, sp.csr_matrix((rng.random((n, k)) < expit(Z - 0.5)).astype(np.float32))


@pytest.mark.parametrize("check", ["at_once", "next_pass"])
@pytest.mark.parametrize("loss", ["softmax", "squared", "multilabel"])
def test_sampled_refinement_reaches_the_conic_optimum(loss, check):
    X, y = _problem(loss, n=300, d=20, k=4, seed=8)
    cfg = SolverConfig(loss=loss, lam_scale=0.15, tol=1e-7, seed=1, dense_gradient=False,
                       refine_sample_rows=60, max_passes=200, refine_check=check)
    res = GreedySolver((X, y), cfg).run()
    assert res.status == "converged"
    sampled = [h for h in res.history if h.get("refine_sample_rows")]
    assert sampled, "the sampled refinement never ran"
    # Reference: CVXPY + Clarabel optimum of the same problem (tests/conic.py).
    con = solve_conic(X, y, loss=loss, lam=res.lam, n_outputs=4)
    assert res.objective == pytest.approx(con.objective, rel=1e-6)
    recs = [h for h in res.history if "objective_pass" in h]
    for a, b in zip(recs[:-1], recs[1:], strict=True):
        if not a.get("refine_sample_rows"):
            continue
        if check == "at_once":
            # the objective recorded after a sampled refinement is the full one: the next
            # pass's own objective at that model agrees (same model, same data)
            assert b["objective_pass"] == pytest.approx(a["objective_after"], rel=1e-9)
        else:
            # recorded: the sample's prediction; the next pass measures the decrease
            assert a["refine_checked"] is False
            assert a["objective_after"] == pytest.approx(
                a["objective_pass"] - a["refine_predicted"], rel=1e-12)
            assert b["refine_check_decrease"] == pytest.approx(
                a["objective_pass"] - b["objective_pass"], rel=1e-9, abs=1e-15)


def test_pass_gradient_on_the_subspace_matches_the_projections():
    """The correction's full gradient comes from the pass (G^T U, G^T Psi): it must equal
    A^T R / sum(w) formed from the cached projections A = X Q (numpy)."""
    X, y = _problem("softmax", n=300, d=20, k=4, seed=3)
    cfg = SolverConfig(loss="softmax", lam_scale=0.15, seed=1, dense_gradient=False)
    solver = GreedySolver((X, y), cfg)
    seen = {}
    orig = solver._run_refinement

    def spy(req, res, proj, mode, N0, rel_gap, *rest):
        A = np.concatenate([p.XQ for p in proj])
        Z = A @ N0 + req.b
        P = np.exp(Z - Z.max(1, keepdims=True))
        P /= P.sum(1, keepdims=True)
        P[np.arange(len(y)), y] -= 1.0
        seen["numpy"] = A.T @ P / len(y)
        seen["pass"] = np.hstack([res.Gt_U, res.Gt_Psi]).T
        return orig(req, res, proj, mode, N0, rel_gap, *rest)

    solver._run_refinement = spy
    for _ in range(6):
        solver.step()
    assert "pass" in seen
    np.testing.assert_allclose(seen["pass"], seen["numpy"], rtol=1e-6, atol=1e-9)


def test_sampled_run_resumes_exactly_from_a_checkpoint(tmp_path):
    X, y = _problem("softmax", n=300, d=20, k=4, seed=6)
    cfg = SolverConfig(loss="softmax", lam_scale=0.2, dense_gradient=False, tol=1e-8,
                       refine_sample_rows=80)
    a = GreedySolver((X, y), cfg)
    for _ in range(5):
        a.step()
    restored = through_files(a.state, tmp_path)  # npz without pickle, and JSON
    b = GreedySolver((X, y), cfg, state=restored)
    for _ in range(4):
        ra, rb = a.step(), b.step()
        for key in ("objective", "gap_estimate", "rank", "refine_sample_rows"):
            assert ra.get(key) == rb.get(key), key
    for name in ("U", "s", "V", "b", "Psi"):
        assert np.array_equal(getattr(a.state, name), getattr(b.state, name)), name
    assert a.state.rng_state == b.state.rng_state
    assert a.state.refine_sample_rows == b.state.refine_sample_rows >= 80


def test_progress_reports_and_the_pre_step_state_during_a_refinement():
    X, y = _problem("multilabel", n=300, d=20, k=4, seed=2)
    cfg = SolverConfig(loss="multilabel", lam_scale=0.15, seed=1, dense_gradient=False)
    solver = GreedySolver((X, y), cfg)
    seen = []

    def on_step(p):
        st = solver.state_before_step()
        seen.append((p.step, p.objective, st.passes, solver.state.passes))

    solver.refine_progress = on_step
    for _ in range(5):
        solver.step()
    assert seen and solver.state_before_step() is None
    # during a refinement the pre-step state is one pass behind the running state
    assert all(before == now - 1 for _, _, before, now in seen)


def test_sample_size_rule():
    # common practice, no source: exact below 4x the sample; squared exact unless asked
    kw = dict(q=40, k=500, budget=1 << 30, configured=None, grown=0)
    assert sample_rows(n=50_000, loss="softmax", **kw) == 0
    m = sample_rows(n=12_000_000, loss="softmax", **kw)
    assert 2_000 <= m <= 20_000 and 8 * m * (40 + 5 * 500) <= (1 << 30) // 4
    assert sample_rows(n=12_000_000, loss="squared", **kw) == 0
    kw.update(configured=0)
    assert sample_rows(n=12_000_000, loss="softmax", **kw) == 0
    kw.update(configured=100, grown=400)
    assert sample_rows(n=1000, loss="squared", **kw) == 400
    assert sample_rows(n=700, loss="squared", **kw) == 0  # half the rows or more: exact


def test_an_unchecked_refinement_that_raised_the_objective_makes_the_rest_check_at_once():
    """A 5-row sample of 300 rows predicts badly: the next pass finds the objective went
    up, the sample grows four-fold and, from the refinement after the next pass on, each
    refinement is checked at once (and never raises the objective); the run still
    reaches the CVXPY + Clarabel optimum (tests/conic.py)."""
    X, y = _problem("softmax", n=300, d=20, k=4, seed=0)
    cfg = SolverConfig(loss="softmax", lam_scale=0.15, tol=1e-7, seed=1, dense_gradient=False,
                       refine_sample_rows=5, max_passes=200)
    res = GreedySolver((X, y), cfg).run()
    assert res.status == "converged"
    recs = {h["pass"]: h for h in res.history}
    rose = [p for p, h in recs.items() if h.get("refine_check_rose")]
    assert rose, "no unchecked refinement raised the objective"
    assert recs[rose[0]]["refine_check_decrease"] < 0
    later = [h for p, h in recs.items() if p > rose[0] + 1 and "objective_after" in h]
    assert later and all(h.get("refine_checked", True) for h in later)
    assert all(h["objective_after"] <= h["objective_pass"] for h in later)
    con = solve_conic(X, y, loss="softmax", lam=res.lam, n_outputs=4)
    assert res.objective == pytest.approx(con.objective, rel=1e-6)


def test_a_run_stopped_after_an_unchecked_refinement_says_its_objective_is_predicted():
    """Stopped by max_passes right after a refinement the next pass would have checked:
    the result keeps the refined model, its objective is the sample's prediction (finite,
    the recorded one), and the message says so; the same run given one more pass
    measures that model's objective, and its check records the measured decrease."""
    X, y = _problem("softmax", n=300, d=20, k=4, seed=8)
    kw = dict(loss="softmax", lam_scale=0.15, tol=1e-7, seed=1, dense_gradient=False,
              refine_sample_rows=60)
    res = GreedySolver((X, y), SolverConfig(max_passes=6, **kw)).run()
    assert res.status == "max_passes"
    last = res.history[-1]
    assert last["refine_checked"] is False
    assert np.isfinite(res.objective) and res.objective == last["objective_after"]
    assert "predicted decrease" in res.message
    more = GreedySolver((X, y), SolverConfig(max_passes=7, **kw)).run()
    measured = more.history[-1]["objective_pass"]
    # the check's own figure: the measured decrease over the predicted one
    assert more.history[-1]["refine_check_decrease"] == pytest.approx(
        last["objective_pass"] - measured, rel=1e-9)


def test_sample_outcome_rule():
    # the project's own rule (common practice, no source): the share of the predicted
    # decrease that carried over; the sample quadruples when the objective went up and
    # doubles when less than half carried over
    from ranktide.solver.refinement import sample_outcome

    assert sample_outcome(0.9, 1.0, 100) == (0.9, 100)
    assert sample_outcome(0.3, 1.0, 100) == (0.3, 200)
    assert sample_outcome(-0.1, 1.0, 100) == (-0.1, 400)
    assert sample_outcome(0.0, 0.0, 100) == (1.0, 100)
    assert sample_outcome(-1e-9, 0.0, 100) == (0.0, 400)
