"""The regularization path's end: done, early stop, going on past the requested end."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from planted import planted_rows
from ranktide.runs.path import _path_end
from ranktide.runs.train import PathPoint, path_lams, train


def _pts(scores):
    return [PathPoint(index=i, lam=1.0, objective=0.0, gap=0.0, sigma_ratio=1.0, rank=1,
                      passes=1, status="converged", metrics={}, score=s)
            for i, s in enumerate(scores)]


def _end(scores, m=3, extend=4, higher=True):
    pts = _pts(scores)
    worse = 0
    for a, b in zip(scores, scores[1:], strict=False):  # consecutive worsenings at the end
        worse = worse + 1 if (b < a if higher else b > a) else 0
    return _path_end(pts, m, extend, worse, "accuracy", higher)


def test_a_path_that_fits_every_requested_value_is_done_not_early_stopped():
    assert _end([0.5, 0.7, 0.6]) == ("path_done", "all 3 requested values fitted")
    assert _end([0.8, 0.7, 0.6])[0] == "path_done"  # worse twice, but at the requested end


def test_early_stop_only_before_the_requested_end():
    status, msg = _end([0.8, 0.7, 0.6], m=5)
    assert status == "path_early_stop" and "value 3 of 5" in msg
    assert _end([0.5, 0.6], m=5) is None  # keep going


def test_best_last_goes_on_until_worse_twice_or_the_cap():
    assert _end([0.5, 0.6, 0.7]) is None  # best is the smallest requested: go on
    assert _end([0.5, 0.6, 0.7], extend=0)[0] == "path_done"  # extension switched off
    assert _end([0.5, 0.6, 0.7, 0.8]) is None
    status, msg = _end([0.5, 0.6, 0.7, 0.8, 0.75, 0.72])
    assert status == "path_extended" and "3 value(s) past" in msg and "twice" in msg
    status, msg = _end([0.5, 0.6, 0.7, 0.8, 0.85, 0.86, 0.9])  # still better at the cap
    assert status == "path_extend_cap" and "--path-extend" in msg
    # lower is better (RMSE): the same rule with the comparison turned round
    assert _end([3.0, 2.0, 1.0], higher=False) is None
    assert _end([3.0, 2.0, 1.0, 1.5, 1.7], higher=False)[0] == "path_extended"


def test_values_past_the_end_continue_the_same_geometric_sequence():
    lams = path_lams(2.0, 3, 0.05, 6)
    ratios = np.array(lams[1:]) / np.array(lams[:-1])
    # lam_j = lam_max * floor^(j / (m - 1)): a constant ratio floor^(1/2) (closed form)
    np.testing.assert_allclose(ratios, math.sqrt(0.05), rtol=1e-12)
    assert lams[2] == pytest.approx(2.0 * 0.05, rel=1e-12)


def test_a_path_whose_best_is_last_goes_on_and_says_so_in_model_json(tmp_path):
    X, y = planted_rows(11, 500)
    Xv, yv = planted_rows(12, 200)
    res = train(X, targets=y, loss="softmax", path_steps=3, path_floor=0.3, path_extend=6,
                valid=(Xv, yv), max_passes=8, tol=1e-2, seed=0, out=tmp_path / "run")
    scores = [p.score for p in res.path]
    # the requested values (down to 0.3 lam_max) all under-fit: validation improves down to
    # the last of them, so the path went on past it
    assert np.argmax(scores[:3]) == 2, scores
    assert len(res.path) > 3 and res.status in ("path_extended", "path_extend_cap"), scores
    assert len(res.path) <= 3 + 6
    if res.status == "path_extended" and len(res.path) < 9:  # ended on two worsenings
        assert scores[-1] < scores[-2] < scores[-3], scores
    best = res.path[res.best_index]
    assert all(best.score >= p.score for p in res.path)
    meta = json.loads((tmp_path / "run" / "model" / "model.json").read_text())
    info = meta["path"]
    assert info["requested"] == 3 and info["fitted"] == len(res.path)
    assert info["extended"] == len(res.path) - 3 and info["status"] == res.status
    assert info["chosen_index"] == res.best_index and meta["step_passes"] == best.passes
    assert meta["lam"] == pytest.approx(best.lam, rel=1e-12)
    history = [json.loads(x) for x in (tmp_path / "run" / "history.jsonl").read_text().splitlines()]
    steps = [h for h in history if h.get("kind") == "path"]
    assert [h["extended"] for h in steps] == [i >= 3 for i in range(len(res.path))]
    assert max(h["pass"] for h in history if h.get("kind") == "pass") == res.passes


def test_values_solved_loosely_and_the_chosen_one_finished_to_tol(tmp_path, monkeypatch):
    """path_tol: the values to a loose gap, the chosen one on to tol from its own factors
    (when the debiasing refit keeps the path's own model: forced here by offering it no
    smaller lam)."""
    import ranktide.runs.fitting as T
    from conic import solve_conic

    real = T.debias
    monkeypatch.setattr(T, "debias", lambda *a, **k: real(*a, **{**k, "factors": ()}))
    X, y = planted_rows(21, 300)
    Xv, yv = planted_rows(22, 200)
    res = train(X, targets=y, loss="softmax", path_steps=4, path_floor=0.2, path_extend=0,
                path_tol=1e-2, valid=(Xv, yv), tol=1e-7, max_passes=300, seed=0,
                out=tmp_path / "run")
    best = res.path[res.best_index]
    others = [p for p in res.path if p.index != best.index]
    # a value ends on its gap, or once a pass lowers the objective by at most a tenth of
    # path_tol (stalled: compared, not certified)
    assert all(p.gap <= 1e-2 * p.objective or p.status == "stalled" for p in others)
    assert best.gap <= 1e-7 * best.objective and best.status == "converged"
    # Reference: CVXPY + Clarabel optimum at the chosen lam (tests/conic.py).
    con = solve_conic(X.astype(np.float64), y, loss="softmax", lam=best.lam, n_outputs=5)
    assert abs(best.objective - con.objective) <= 1e-6 * abs(con.objective)
    meta = json.loads((tmp_path / "run" / "model" / "model.json").read_text())
    fin = meta["path"]["finished"]
    assert fin["index"] == best.index and fin["passes"] >= 1
    assert fin["rel_gap"] <= 1e-7 < fin["rel_gap_before"] <= 1e-2


def test_a_kept_refit_skips_the_finishing(monkeypatch):
    """When the debiasing refit replaces the path's model, the chosen value is not
    solved on (its certificate would certify a model nobody ships)."""
    X, y = planted_rows(21, 300)
    Xv, yv = planted_rows(22, 200)
    res = train(X, targets=y, loss="softmax", path_steps=4, path_floor=0.2, path_extend=0,
                path_tol=1e-2, valid=(Xv, yv), tol=1e-7, max_passes=300, seed=0)
    meta = res.model.meta
    kept = meta["debias"]["kept_factor"] != 1.0
    assert (meta["path"]["finished"] is None) == kept


def test_path_tol_none_solves_every_value_to_tol():
    X, y = planted_rows(21, 300)
    Xv, yv = planted_rows(22, 200)
    res = train(X, targets=y, loss="softmax", path_steps=3, path_floor=0.3, path_extend=0,
                path_tol=None, valid=(Xv, yv), tol=1e-5, max_passes=300, seed=0)
    assert all(p.gap <= 1e-5 * p.objective for p in res.path)
    assert res.model.meta["path"]["finished"] is None


@pytest.mark.parametrize("own_model", [True, False])
def test_refit_with_valid_fits_the_choice_on_both_parts(tmp_path, monkeypatch, own_model):
    """refit_with_valid: the chosen lam (and debiasing factor) fitted again on the
    training and validation rows together. ``own_model``: the debiasing refit is offered
    no smaller lam, so the path's own model is refitted (and checked against CVXPY)."""
    import ranktide.runs.fitting as T
    import scipy.sparse as sps
    from conic import solve_conic

    if own_model:
        real = T.debias
        monkeypatch.setattr(T, "debias", lambda *a, **k: real(*a, **{**k, "factors": ()}))

    X, y = planted_rows(31, 300)
    Xv, yv = planted_rows(32, 150)
    kw = dict(loss="softmax", path_steps=3, path_floor=0.3, path_extend=0, valid=(Xv, yv),
              tol=1e-7, max_passes=300, seed=0)
    alone = train(X, targets=y, **kw)
    res = train(X, targets=y, refit_with_valid=True, out=tmp_path / "run", **kw)
    # the path and its choice are the same as without the refit
    assert [p.score for p in res.path] == [p.score for p in alone.path]
    meta = json.loads((tmp_path / "run" / "model" / "model.json").read_text())
    info = meta["refit_with_valid"]
    assert info["rows"] == 450 and info["lam"] == pytest.approx(res.lam, rel=1e-12)
    W = (res.model.U * res.model.s) @ res.model.V.T
    if own_model:
        assert info["factor"] == 1.0
    if info["factor"] == 1.0:
        # Reference: CVXPY + Clarabel optimum on the 450 joined rows at the chosen lam.
        Xj = sps.vstack([X, Xv]).tocsr().astype(np.float64)
        con = solve_conic(Xj, np.concatenate([y, yv]), loss="softmax", lam=res.lam, n_outputs=5)
        np.testing.assert_allclose(W, con.W, atol=2e-3 * np.abs(con.W).max())
    else:  # the kept debiasing factor is applied again, on the joined rows
        assert meta["debias"]["kept_factor"] == info["factor"]
    W0 = (alone.model.U * alone.model.s) @ alone.model.V.T
    assert np.abs(W - W0).max() > 1e-6  # the extra rows changed the model


def test_refit_with_valid_needs_a_path():
    from ranktide.errors import ConfigError

    X, y = planted_rows(31, 100)
    with pytest.raises(ConfigError, match="--refit-with-valid refits a path"):
        train(X, targets=y, loss="softmax", lam_scale=0.2, refit_with_valid=True)
