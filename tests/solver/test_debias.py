"""The debiasing refit on the chosen subspace, against CVXPY + Clarabel and by its own rules."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from conic import solve_conic
from ranktide.errors import ConfigError
from ranktide.model import Model
from ranktide.runs.train import train
from ranktide.solver.debias import debias, near_full_rank
from ranktide.store.memory_source import as_source
from scipy.special import logsumexp


def _problem(n: int = 240, d: int = 20, k: int = 4, seed: int = 0):
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.4, random_state=seed, format="csr", dtype=np.float64)
    W = rng.standard_normal((d, 2)) @ rng.standard_normal((2, k)) * 2.0
    y = np.argmax(X @ W + rng.gumbel(size=(n, k)), axis=1).astype(np.int64)
    return X, y


def _model(d: int, k: int, r: int, seed: int) -> Model:
    rng = np.random.default_rng(seed)
    U, _ = np.linalg.qr(rng.standard_normal((d, r)))
    V, _ = np.linalg.qr(rng.standard_normal((k, r)))
    return Model(U=U, s=np.full(r, 0.5), V=V, b=np.zeros(k), loss="softmax")


def _objective(m: Model, X, y, lam: float) -> float:
    # scipy.special.logsumexp recomputation of the mean softmax loss plus lam ||W||_*
    Z = m.scores(X)
    return float(np.mean(logsumexp(Z, axis=1) - Z[np.arange(len(y)), y]) + lam * m.s.sum())


def test_refit_solves_the_subspace_problem_like_clarabel():
    X, y = _problem()
    m = _model(20, 4, 3, seed=1)
    lam = 0.05
    # a score that grows with each call: the last candidate (the refit) is kept
    calls = iter(range(100))
    res = debias(m, as_source((X, y)), lam=lam, score=lambda mm: float(next(calls)),
                 higher=True, factors=(0.4,), tol=1e-9, max_iter=3000)
    assert res.factor == 0.4 and [t["factor"] for t in res.tried] == [1.0, 0.4]
    # the kept model lives in span(U): U U^T W = W
    W = res.model.U @ (res.model.s[:, None] * res.model.V.T)
    np.testing.assert_allclose(m.U @ (m.U.T @ W), W, atol=1e-10)
    # reference: CVXPY + Clarabel on the projected problem min f(X U N + b) + 0.4 lam ||N||_*
    ref = solve_conic(X @ m.U, y, loss="softmax", lam=0.4 * lam, n_outputs=4)
    assert _objective(res.model, X, y, 0.4 * lam) == pytest.approx(ref.objective, rel=1e-6)


def test_refit_kept_only_when_validation_improves():
    X, y = _problem(seed=2)
    m = _model(20, 4, 3, seed=3)
    # a score that prefers more shrinkage: every refit (smaller penalty) scores worse
    res = debias(m, as_source((X, y)), lam=0.05, score=lambda mm: -float(mm.s.sum()),
                 higher=True, factors=(0.3, 0.1))
    assert res.factor == 1.0 and [t["factor"] for t in res.tried] == [1.0, 0.3, 0.1]
    assert res.tried[0]["score"] == max(t["score"] for t in res.tried)
    # the kept model is the input re-factored: the same W (numpy dense products)
    np.testing.assert_allclose(res.model.U @ (res.model.s[:, None] * res.model.V.T),
                               m.U @ (m.s[:, None] * m.V.T), atol=1e-12)
    small = debias(m, as_source((X, y)), lam=0.05, score=lambda mm: 0.0, higher=True,
                   factors=(0.3,), max_bytes=100)
    assert small.model is m and "over the budget" in small.skipped
    with pytest.raises(ConfigError, match="must lie in"):
        debias(m, as_source((X, y)), lam=0.05, score=lambda mm: 0.0, higher=True,
               factors=(1.5,))


def test_near_full_rank_threshold():
    # the rule of issue 16: rank >= 0.8 min(d, k) (common practice, no source)
    assert near_full_rank(47, 1000, 58) and not near_full_rank(46, 1000, 58)
    assert not near_full_rank(0, 10, 1)


def test_path_records_the_refit_and_keeps_validation_at_least(tmp_path):
    X, y = _problem(n=600, d=30, k=5, seed=4)
    Xv, yv = X[300:], y[300:]
    res = train((X[:300], y[:300]), loss="softmax", path_steps=3, valid=(Xv, yv), max_passes=30)
    refit = res.model.meta["debias"]
    assert [t["factor"] for t in refit["tried"]] == [1.0, 0.3, 0.1, 0.03]
    # the path's own choice is the first candidate: the kept one scores at least as well
    assert refit["tried"][0]["score"] == pytest.approx(res.path[res.best_index].score)
    kept = max(t["score"] for t in refit["tried"])
    assert next(t for t in refit["tried"] if t["factor"] == refit["kept_factor"])["score"] == kept


def test_rows_of_features_absent_from_training_are_zeroed(tmp_path):
    from ranktide.model import save_model

    X, y = _problem(seed=5)
    X = sp.csr_matrix(X.multiply(np.r_[np.ones(15), np.zeros(5)][None, :]))  # 15..19 absent
    X.eliminate_zeros()
    m = _model(20, 4, 3, seed=6)  # random U: non-zero on every row
    calls = iter(range(100))  # a score that falls with each call: the first candidate wins
    res = debias(m, as_source((X, y)), lam=0.05, score=lambda mm: -float(next(calls)),
                 higher=True, factors=(0.3,))
    assert res.factor == 1.0
    np.testing.assert_array_equal(res.model.U[15:], 0.0)
    # the same scores on every training row (numpy dense products as the reference)
    Xd = X.toarray()
    np.testing.assert_allclose(Xd @ res.model.U @ (res.model.s[:, None] * res.model.V.T),
                               Xd @ m.U @ (m.s[:, None] * m.V.T), atol=1e-12)
    assert res.model.s.sum() <= m.s.sum() + 1e-12  # ||P W||_* <= ||W||_*
    save_model(tmp_path / "m", res.model)
    with np.load(tmp_path / "m" / "factors.npz", allow_pickle=False) as z:
        np.testing.assert_array_equal(z["U_rows"], np.arange(15))
