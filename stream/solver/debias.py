"""Debiasing refit: the chosen model re-solved on its own subspace with a smaller penalty.

The trace norm shrinks every singular value by the same ``lam``; the directions
with small singular values (where rare outputs live) are shrunk most in
relative terms, or cut. Once a path has chosen ``lam`` (and with it the
subspace ``U`` of the model), the refit keeps that subspace and re-solves

    min over N (r x k), b:  f(X U N + b) + (factor * lam) ||N||_*

for a few ``factor < 1``, warm-started from ``N = diag(s) V^T``, each from the
previous one. This is the solver's own refinement (:func:`ranktide.solver.refine.refine`)
on the cached projections ``A = X U`` with a smaller ``lam``: no second solver.
The refit whose validation score is best wins; the model without refit is the
first candidate, so a refit is kept only when validation improves on it.

Features that never occur in the training rows get zero rows in every candidate:
the data cannot see those rows of ``U``, so zeroing them leaves the loss as it is
and can only lower the trace norm (``||P W||_* <= ||W||_*`` for the projection
``P`` onto the present coordinates); the solver's random fill directions leave
tiny values there otherwise. The first candidate is the path's model with those
rows zeroed (re-factored: same scores on every training row), and the model file
then stores only the present rows (:mod:`ranktide.model`).

Relaxed fits of this kind after a convex selection step are common in sparse
regression (Meinshausen 2007, relaxed lasso; Belloni & Chernozhukov 2013,
post-selection least squares); here the "selection" is the subspace.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from ranktide.errors import ConfigError
from ranktide.kernels.sparse import csr_matmul_dense
from ranktide.kernels.svd import svd
from ranktide.model import Model
from ranktide.solver.refine import refine
from ranktide.solver.refine_common import RefineSettings

__all__ = ["DebiasResult", "debias", "debias_summary", "refit_at", "near_full_rank",
           "DEBIAS_FACTORS", "projection_bytes"]

#: penalty factors tried after the path, largest first (each a fraction of the chosen lam)
DEBIAS_FACTORS: tuple[float, ...] = (0.3, 0.1, 0.03)


@dataclass(frozen=True)
class DebiasResult:
    """Outcome of :func:`debias`.

    Attributes
    ----------
    model : Model
        The best model by validation (the input model, its rows of absent features
        zeroed, when no refit beat it).
    factor : float
        ``lam`` factor of the kept model (1.0: the input model was kept).
    tried : list of dict
        One row per candidate: ``factor``, ``lam``, ``rank``, ``score``,
        ``iterations``, ``seconds``.
    seconds : float
        Total seconds (projections, refits, validation).
    skipped : str or None
        Why no refit was tried (e.g. the projections do not fit the budget).
    """

    model: Model
    factor: float
    tried: list = field(default_factory=list)
    seconds: float = 0.0
    skipped: str | None = None


def projection_bytes(n: int, r: int, k: int) -> int:
    """Bytes the refit holds: ``A`` (n, r) and the refinement's n x k scores (about four)."""
    return 8 * int(n) * (int(r) + 4 * int(k))


def _projections(src: Any, U: np.ndarray,
                 block_rows: int | None) -> tuple[list, list, Any, np.ndarray]:
    """``X U`` per block (n_b, r), the blocks' targets and weights, and which of the d
    features occur in the data (bool (d,))."""
    A, Y, w = [], [], []
    present = np.zeros(U.shape[0], dtype=bool)
    for a, b in src.block_ranges(rows=block_rows):
        blk = src.read_block(a, b)
        X = blk.X
        present[X.indices] = True
        out = np.zeros((X.shape[0], U.shape[1]))
        A.append(csr_matmul_dense(X.indptr, X.indices, X.data, U, out, where="X"))
        Y.append(blk.targets)
        w.append(blk.weights)
    if all(x is None for x in w):
        w = None
    return A, Y, w, present


def _present_basis(model: Model, present: np.ndarray,
                   A: list) -> tuple[np.ndarray, list, np.ndarray]:
    """An orthonormal basis (d, r') of ``P U`` (rows of absent features zeroed), the
    projections in it (``X basis = X U T``, since ``X P = X``) and the model's
    coefficients in it (r', k): ``basis @ N0 = P U diag(s) V^T``."""
    P, S, Qt = svd(model.U[present])
    keep = S > (S[0] * 1e-10 if S.size else 0.0)
    basis = np.zeros((model.n_features, int(keep.sum())))
    basis[present] = P[:, keep]
    T = Qt[keep].T / S[keep]
    N0 = (S[keep, None] * Qt[keep]) @ (model.s[:, None] * model.V.T)
    return basis, [a @ T for a in A], N0


def debias(
    model: Model,
    src: Any,
    *,
    lam: float,
    score: Callable[[Model], float],
    higher: bool,
    factors: Sequence[float] = DEBIAS_FACTORS,
    class_weights: np.ndarray | None = None,
    tol: float = 1e-5,
    max_iter: int = 300,
    block_rows: int | None = None,
    max_bytes: int | None = None,
) -> DebiasResult:
    """Refit ``model`` on its subspace with ``factor * lam`` for each factor; keep the best.

    Parameters
    ----------
    model : Model
        The chosen model, ``U`` (d, r), ``s`` (r,), ``V`` (k, r), ``b`` (k,).
    src : data source
        The training data (store or in-memory source: ``block_ranges``, ``read_block``).
    lam : float
        The chosen penalty.
    score : callable
        Validation score of a model (the path's metric).
    higher : bool
        True when a higher score is better.
    factors : sequence of float
        Penalty factors in (0, 1), tried in the order given (warm starts).
    class_weights : ndarray (k,), optional
        Softmax class weights, as in the fit.
    tol, max_iter :
        The refinement's inner tolerance and step limit.
    block_rows : int, optional
        Rows per block when reading the training data.
    max_bytes : int, optional
        Memory the refit may use (:func:`projection_bytes`); larger problems are
        skipped with a reason.

    Returns
    -------
    DebiasResult
    """
    if any(not (0 < f < 1) for f in factors):
        raise ConfigError(f"debias: factors {list(factors)!r} must lie in (0, 1)")
    t0 = time.perf_counter()

    def unchanged(why: str) -> DebiasResult:
        row = {"factor": 1.0, "lam": lam, "rank": model.rank, "score": score(model),
               "iterations": 0, "seconds": 0.0}
        return DebiasResult(model, 1.0, [row], time.perf_counter() - t0, skipped=why)

    need = projection_bytes(int(src.shape[0]), model.rank, model.n_outputs)
    if model.rank == 0 or not factors:
        return unchanged("the model has rank 0" if model.rank == 0 else "no factors")
    if max_bytes is not None and need > max_bytes:
        return unchanged(f"the refit needs {need / 2**20:.0f} MiB, over the budget of "
                         f"{max_bytes / 2**20:.0f} MiB")
    A, Y, w, present = _projections(src, model.U, block_rows)
    basis, A, N = _present_basis(model, present, A)
    if basis.shape[1] == 0:
        return unchanged("the model's directions lie on features absent from the data")
    a_, s_, bt_ = svd(N)
    nz = s_ > 0
    best = replace(model, U=basis @ a_[:, nz], s=s_[nz], V=bt_[nz].T)
    best_score = score(best)
    tried = [{"factor": 1.0, "lam": lam, "rank": best.rank, "score": best_score,
              "iterations": 0, "seconds": time.perf_counter() - t0}]
    best_factor, b = 1.0, model.b
    for f in factors:
        t1 = time.perf_counter()
        res = refine(A, Y, w, N, b, RefineSettings(loss=model.loss, lam=f * lam, tol=tol,
                                                   max_iter=max_iter, class_weights=class_weights))
        N, b = res.N, res.b
        cand = replace(model, U=basis @ res.A, s=res.s, V=res.B, b=res.b)
        sc = score(cand)
        tried.append({"factor": f, "lam": f * lam, "rank": int(res.s.size), "score": sc,
                      "iterations": res.iterations, "seconds": time.perf_counter() - t1})
        if sc > best_score if higher else sc < best_score:
            best, best_score, best_factor = cand, sc, f
    return DebiasResult(best, best_factor, tried, time.perf_counter() - t0)


def refit_at(model: Model, src: Any, *, lam: float, factor: float,
             class_weights: np.ndarray | None = None, tol: float = 1e-5, max_iter: int = 300,
             block_rows: int | None = None) -> Model:
    """``model`` (fitted at ``lam``) refitted on its own subspace at ``factor * lam``.

    The same refits :func:`debias` makes, through the same factors down to
    ``factor`` (warm starts), without choosing: used when the factor was chosen
    on validation and the model has since been refitted on more rows.
    """
    if model.rank == 0 or factor >= 1.0:
        return model
    A, Y, w, present = _projections(src, model.U, block_rows)
    basis, A, N = _present_basis(model, present, A)
    if basis.shape[1] == 0:
        return model
    b = model.b
    for f in [x for x in DEBIAS_FACTORS if x > factor] + [factor]:
        res = refine(A, Y, w, N, b, RefineSettings(loss=model.loss, lam=f * lam, tol=tol,
                                                   max_iter=max_iter,
                                                   class_weights=class_weights))
        N, b = res.N, res.b
    return replace(model, U=basis @ res.A, s=res.s, V=res.B, b=res.b)


def debias_summary(res: DebiasResult) -> dict:
    """The refit's figures for model.json (JSON-ready)."""
    return {"kept_factor": res.factor, "tried": res.tried, "seconds": res.seconds,
            "skipped": res.skipped,
            "kept": "the model as the path chose it" if res.factor == 1.0 else
                    f"the refit at {res.factor:g} x lam"}


def near_full_rank(rank: int, d: int, k: int, share: float = 0.8) -> bool:
    """True when ``rank >= share * min(d, k)`` (the low-rank structure bought little)."""
    return rank >= math.ceil(share * min(d, k)) and rank > 0
