"""The refinement streamed over projection blocks (memory or scratch files).

Reference: CVXPY + Clarabel (tests/conic.py) on the same subproblem
min f(A N + b) + lam ||N||_*; and the in-memory refinement of ranktide.solver.refine.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from conic import solve_conic
from ranktide.errors import ConfigError
from ranktide.passes.projections import MemoryProjections, ScratchProjections
from ranktide.signals import StopFlag, StopRequested
from ranktide.solver.refine import refine
from ranktide.solver.refine_common import RefineSettings
from ranktide.solver.refine_stream import refine_streamed


def _sub(loss, seed=1, n=150, q=5, k=4):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((n, q))
    if loss == "softmax":
        Y = rng.integers(0, k, n).astype(np.int32)
    elif loss == "squared":
        Y = A @ rng.standard_normal((q, k)) * 0.5 + rng.standard_normal((n, k))
    else:
        Y = (rng.random((n, k)) < 0.3).astype(np.float64)
    w = rng.random(n) + 0.5
    return A, Y, w


def _blocks(A, Y, w, loss, cuts=(0, 40, 41, 110, 150)):
    out = []
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        t = sp.csr_matrix(Y[a:b]) if loss == "multilabel" else Y[a:b]
        out.append((A[a:b], t, w[a:b]))
    return out


@pytest.mark.parametrize("where", ["memory", "scratch"])
@pytest.mark.parametrize("loss", ["softmax", "squared", "multilabel"])
def test_streamed_refinement_matches_cvxpy_and_in_memory(loss, where, tmp_path):
    A, Y, w = _sub(loss)
    q, k = A.shape[1], 4
    lam = 0.04
    blocks = _blocks(A, Y, w, loss)
    if where == "memory":
        src = MemoryProjections(blocks)
    else:
        src = ScratchProjections(tmp_path / "scratch", k)
        for i, (XQ, t, wb) in enumerate(blocks):
            src.add(i, XQ, t, wb)
        assert len(list((tmp_path / "scratch").glob("xq-*.npy"))) == len(blocks)
    cfg = RefineSettings(loss=loss, lam=lam, tol=1e-9, max_iter=4000)
    res = refine_streamed(src, np.zeros((q, k)), np.zeros(k), cfg)
    con = solve_conic(A, Y, loss=loss, lam=lam, weights=w, n_outputs=k)  # CVXPY + Clarabel
    assert res.converged
    assert res.objective == pytest.approx(con.objective, rel=1e-7, abs=1e-9)
    mem = refine([b[0] for b in blocks], [b[1] for b in blocks], [b[2] for b in blocks],
                 np.zeros((q, k)), np.zeros(k), cfg)
    assert res.objective == pytest.approx(mem.objective, rel=1e-8)
    np.testing.assert_allclose(res.s, mem.s, rtol=1e-4, atol=1e-7)
    if where == "scratch":
        src.remove()
        assert not (tmp_path / "scratch").exists()


def test_streamed_refinement_class_weights_stop_and_errors():
    A, Y, w = _sub("softmax", seed=3)
    cw = np.array([1.0, 2.0, 0.5, 1.5])
    blocks = MemoryProjections(_blocks(A, Y, w, "softmax"))
    res = refine_streamed(blocks, np.zeros((5, 4)), np.zeros(4),
                          RefineSettings(loss="softmax", lam=0.03, tol=1e-9, max_iter=4000,
                                         class_weights=cw))
    # CVXPY + Clarabel with the row weights w_i c_{y_i} folded in
    con = solve_conic(A, Y, loss="softmax", lam=0.03, weights=w * cw[Y], n_outputs=4)
    assert res.objective == pytest.approx(con.objective, rel=1e-7, abs=1e-9)
    flag = StopFlag()
    flag.request()
    with pytest.raises(StopRequested):
        refine_streamed(blocks, np.zeros((5, 4)), np.zeros(4),
                        RefineSettings(loss="softmax", lam=0.03, tol=1e-6, max_iter=10,
                                       should_stop=flag))
    with pytest.raises(ConfigError, match="shapes disagree"):
        refine_streamed(blocks, np.zeros((5, 4)), np.zeros(3),
                        RefineSettings(loss="softmax", lam=0.03, tol=1e-6, max_iter=10))
    with pytest.raises(ConfigError, match="no projection blocks"):
        MemoryProjections([])


@pytest.mark.parametrize("loss", ["softmax", "multilabel"])
def test_training_under_a_small_budget_streams_the_refinement(loss, tmp_path, monkeypatch):
    """Budgets that cannot hold the refinement's scores (or even the projections) still
    reach the optimum; the scratch files are removed afterwards. The process floor is
    set to 0 here, so the budgets count the solver's own arrays alone (the floor itself
    is tested in tests/solver/test_memory_budget.py)."""
    monkeypatch.setattr("ranktide.solver.memory_plan.process_floor", lambda: 0)
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parents[1]))
    from ranktide.runs.train import train
    from test_solver_internals import _problem

    X, y = _problem(loss, n=300, d=20, k=4, seed=8)
    kw = {"loss": loss, "lam_scale": 0.15, "tol": 1e-7, "seed": 1, "dense_gradient": False}
    runs = {}
    for mem in ("1GB", "140KB", "60KB"):  # memory; projections in memory; scratch files
        out = tmp_path / f"run-{mem}"
        runs[mem] = train((X, y), memory=mem, out=out, **kw)
        assert runs[mem].status == "converged"
        assert not (out / "scratch").exists()  # every pass removed its scratch files
    modes = {m: {h.get("refine_mode") for h in r.history} - {None} for m, r in runs.items()}
    assert modes["1GB"] == {"memory"} and "blocks" in modes["140KB"]
    assert "scratch" in modes["60KB"]
    # Reference: CVXPY + Clarabel optimum of the same problem (tests/conic.py).
    con = solve_conic(X, y, loss=loss, lam=runs["1GB"].lam, n_outputs=4)
    for r in runs.values():
        assert r.objective == pytest.approx(con.objective, rel=1e-6)
