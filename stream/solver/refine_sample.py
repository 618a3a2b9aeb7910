"""The refinement on a row sample, corrected by the full gradient (a subsampled surrogate).

The exact refinement (:mod:`ranktide.solver.refine`, :mod:`ranktide.solver.refine_stream`)
spends ``n q k`` of dense work on every inner step; at large ``n`` its tens of
steps cost more than the pass (DESIGN section 7). Here the inner problem is
solved on an in-memory random sample ``S`` of ``m`` rows of the projections,
with a linear correction built from the full gradient on the subspace, which
the pass has already computed (``G^T Q = R^T (X Q)``, i.e. ``PassResult.Gt_U``
and ``Gt_Psi``, and ``grad_b``) at the current iterate ``(N_t, b_t)``::

    min over N, b   f_S(A_S N + b) + <G_N - G_S,N, N> + <g_b - g_S,b, b> + lam ||N||_*

where ``G_S,N``, ``g_S,b`` are the sample's own gradients at ``(N_t, b_t)``. The
surrogate's gradient at ``(N_t, b_t)`` is the full problem's, so a point where
the surrogate cannot move is optimal for the full problem: the correction
changes the path to the optimum, not the optimum (the gradient-corrected local
problem of Shamir, Srebro & Zhang 2014, with their ``eta = 1`` and ``mu = 0``).
Each inner step costs ``m q k``; a caller checks the full objective at the
answer once (``n q k``, :func:`full_objective`) and grows the sample, or falls
back to the exact refinement, when the surrogate's decrease does not carry over.

References
----------
Shamir, Srebro & Zhang (2014), Communication-efficient distributed optimization
using an approximate Newton-type method (ICML).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError
from ranktide.passes.projections import take_rows
from ranktide.solver.apg import Curvature
from ranktide.solver.refine import make_oracle, rows_for_loss
from ranktide.solver.refine_common import (
    RefineResult,
    RefineSettings,
    refine_result,
    run_apg,
    start_point,
)
from ranktide.solver.refine_stream import _block_weights

__all__ = ["CorrectedOracle", "SampledRefinement", "refine_sampled", "draw_sample",
           "gather_rows", "stack_rows", "full_objective"]


class CorrectedOracle:
    """An oracle plus a linear term: ``f(N, c) + <D_N, N> + <d_c, c>``.

    Parameters
    ----------
    base : oracle
        See :mod:`ranktide.solver.apg` (here: the sample's in-memory oracle).
    D_N : (q, k) array
    d_c : (k,) array
        The correction, in ``base``'s parametrization.
    """

    def __init__(self, base: Any, D_N: np.ndarray, d_c: np.ndarray) -> None:
        self.base, self.D_N, self.d_c = base, D_N, d_c
        self.abar = base.abar

    @property
    def evaluations(self) -> int:
        return int(self.base.evaluations)

    def _linear(self, N: np.ndarray, c: np.ndarray) -> float:
        return float(np.sum(self.D_N * N)) + float(self.d_c @ c)

    def curvature(self) -> Curvature:
        return self.base.curvature()  # a linear term adds no curvature

    def value(self, N: np.ndarray, c: np.ndarray) -> tuple[float, Any]:
        f, h = self.base.value(N, c)
        return f + self._linear(N, c), h

    def extrapolate(self, hx: Any, hp: Any, beta: float) -> Any:
        return self.base.extrapolate(hx, hp, beta)

    def value_and_grad(self, N: np.ndarray, c: np.ndarray,
                       handle: Any = None) -> tuple[float, np.ndarray, np.ndarray]:
        f, G, g = self.base.value_and_grad(N, c, handle)
        return f + self._linear(N, c), G + self.D_N, g + self.d_c


@dataclass(frozen=True)
class SampledRefinement:
    """Outcome of :func:`refine_sampled`.

    ``result``: the surrogate's solution (``objective`` and ``loss`` are the
    surrogate's, not the full problem's); ``predicted``: the surrogate's
    decrease of its objective from the warm start (>= 0), which the full
    objective's decrease is compared against.
    """

    result: RefineResult
    predicted: float


def refine_sampled(XQ: np.ndarray, targets: Any, weights: np.ndarray | None, N0: np.ndarray,
                   b0: np.ndarray, full_grad_N: np.ndarray, full_grad_b: np.ndarray,
                   settings: RefineSettings) -> SampledRefinement:
    """Solve the gradient-corrected refinement on a row sample.

    Parameters
    ----------
    XQ : ndarray, shape (m, q)
        The sample's projections.
    targets, weights :
        The sample's targets and raw row weights (as :func:`ranktide.solver.refine.refine`).
    N0 : ndarray, shape (q, k)
    b0 : ndarray, shape (k,)
        The current iterate (where the full gradient was taken).
    full_grad_N : ndarray, shape (q, k)
        ``Q^T G`` of the full problem at ``(N0, b0)`` (the pass's
        ``[Gt_U, Gt_Psi]^T``).
    full_grad_b : ndarray, shape (k,)
        The full problem's intercept gradient at ``(N0, b0)``.
    settings : RefineSettings
        As :func:`ranktide.solver.refine.refine` takes them; the certificate is
        the surrogate's.

    Returns
    -------
    SampledRefinement
    """
    A = np.ascontiguousarray(XQ, dtype=np.float64)
    N0, b0 = start_point(N0, b0, A)
    q, k = N0.shape
    if full_grad_N.shape != (q, k):
        raise ConfigError(f"refine: the full gradient has shape {full_grad_N.shape}; it must "
                          f"be N0's, {(q, k)}")
    Y, w = rows_for_loss(A.shape[0], k, targets, weights, settings)
    base = make_oracle(A, Y, w, settings.loss, k)
    c0 = b0 + N0.T @ base.abar
    _, G_S, g_S = base.value_and_grad(N0, c0)
    # the full gradient in the sample's centered parametrization (c = b + N^T abar_S)
    G_full = full_grad_N - np.outer(base.abar, full_grad_b)
    oracle = CorrectedOracle(base, G_full - G_S, np.asarray(full_grad_b, np.float64) - g_S)
    f0, _ = oracle.value(N0, c0)
    lam = settings.lam
    F0 = f0 + lam * float(np.linalg.svd(N0, compute_uv=False).sum()) if N0.size else f0
    out = run_apg(oracle, N0, b0, settings)
    return SampledRefinement(refine_result(out, oracle), max(0.0, F0 - out.objective))


def draw_sample(n: int, m: int, rng: np.random.Generator) -> np.ndarray:
    """``m`` distinct row indices of ``0..n-1``, sorted (uniform, without replacement)."""
    if not 0 < m <= n:
        raise ConfigError(f"refine: a sample of {m} rows out of {n}; it must be 1..{n}")
    return np.sort(rng.choice(n, size=m, replace=False)).astype(np.int64)


def gather_rows(blocks: Iterable, rows: np.ndarray) -> tuple[np.ndarray, Any, Any]:
    """The sample's rows from projection blocks in row order.

    Parameters
    ----------
    blocks : iterable of (XQ_b, targets_b, weights_b)
        In row order, covering rows ``0..n-1``.
    rows : int64 array, sorted
        Global row indices.

    Returns
    -------
    XQ : (m, q) array
    targets : (m,) class ids, (m, k) values, or CSR (m, k) tags
    weights : (m,) array or None
    """
    parts, tparts, wparts = [], [], []
    start = 0
    for XQ, targets, w in blocks:
        taken, XQ_s, T, W = take_rows(rows, start, XQ, targets, w)
        if taken.size:
            parts.append(XQ_s)
            tparts.append(T)
            wparts.append(W)
        start += XQ.shape[0]
    return stack_rows(parts, tparts, wparts)


def stack_rows(parts: list, tparts: list, wparts: list) -> tuple[np.ndarray, Any, Any]:
    """One ``(XQ, targets, weights)`` of the sample from its pieces in row order.

    Parameters
    ----------
    parts : list of (m_j, q) arrays
    tparts : list of targets of the same rows (class ids, value rows or CSR tag rows)
    wparts : list of (m_j,) arrays or None (None: weights of one)

    Returns
    -------
    XQ : (m, q) array
    targets : (m,) class ids, (m, k) values, or CSR (m, k) tags
    weights : (m,) array or None
    """
    if not parts or not sum(p.shape[0] for p in parts):
        raise ConfigError("refine: the sample has no rows; the projection blocks are empty")
    if sp.issparse(tparts[0]):
        T: Any = sp.vstack(tparts, format="csr")
    else:
        T = np.concatenate([np.asarray(t) for t in tparts], axis=0)
    W = None if all(x is None for x in wparts) else np.concatenate(
        [np.ones(p.shape[0]) if x is None else x for p, x in zip(parts, wparts, strict=True)])
    return np.concatenate(parts, axis=0), T, W


def full_objective(blocks: Iterable, N: np.ndarray, b: np.ndarray, nuclear: float,
                   settings: RefineSettings) -> float:
    """``f(A N + b) + lam * nuclear`` over every block (one stream, ``n q k`` work).

    Parameters
    ----------
    blocks : iterable of (XQ_b, targets_b, weights_b)
    N : (q, k) array
    b : (k,) array
    nuclear : float
        ``||N||_*`` (the caller has the singular values).
    settings : RefineSettings
        The loss, ``lam`` and the class weights.
    """
    lf, cw = settings.loss, settings.class_weights
    f, total = 0.0, 0.0
    for XQ, targets, w in blocks:
        Z = XQ @ N
        Z += b
        loss_sum, _, _ = lf.value_residual(Z, targets, w, class_weights=cw, out=Z,
                                           where="refinement block")
        f += loss_sum
        total += float(_block_weights(XQ.shape[0], targets, w, cw).sum())
    if not total > 0:
        raise ConfigError("refine: the row weights sum to zero; give some rows positive weight")
    return f / total + settings.lam * float(nuclear)
