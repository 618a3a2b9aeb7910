"""The refinement when its n x k scores do not fit in memory: streamed over blocks.

:func:`ranktide.solver.refine.refine` keeps the n x k scores of its iterates to save
products; for data with many rows they do not fit. :func:`refine_streamed`
solves the same subproblem (DESIGN §7 step 3)::

    min over N (q x k), b   f(A N + b) + lam * ||N||_*

keeping only q x k iterates: every evaluation streams over the blocks of the
cached projections ``A = X Q`` (held in memory, or in scratch files written
by the gradient pass, see :mod:`ranktide.passes.projections`), forms one block's
scores ``A_b N + b``, its loss and residual ``R_b``, and adds ``A_b^T R_b``.
The loop is :func:`ranktide.solver.apg.apg`, the same as the in-memory
refinement's, driven by :class:`StreamOracle` (one stream per evaluation,
centered as the in-memory oracle: separate steps for N and the intercept) or,
for the squared loss, by the sufficient statistics that one stream gives
(:func:`squared_oracle`). Peak memory: one block's scores.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError
from ranktide.losses import Loss
from ranktide.solver.apg import Curvature
from ranktide.solver.refine import SquaredOracle
from ranktide.solver.refine_common import (
    RefineResult,
    RefineSettings,
    refine_result,
    run_apg,
    start_point,
)

__all__ = ["refine_streamed", "StreamOracle", "squared_oracle"]


# ---------------------------------------------------------------- the streamed oracle
class StreamOracle:
    """The smooth part on projection blocks, one stream per evaluation (softmax, multilabel).

    Centered as :class:`ranktide.solver.refine.DenseOracle` (``c = b + N^T abar``,
    curvature ``curv * lambda_max(cov A)`` in ``N`` and ``curv`` in ``c``); the
    weighted means and covariance come from one stream at construction.
    Handles are None: nothing of size n is kept.

    Parameters
    ----------
    blocks : re-iterable of (XQ_b, targets_b, weights_b)
    loss : Loss
        Not quadratic (softmax, multilabel).
    k : int
    class_weights : (k,) array, optional
    """

    def __init__(self, blocks: Iterable, loss: Loss, k: int,
                 class_weights: np.ndarray | None) -> None:
        self.blocks = blocks
        self.loss = loss
        self.k = k
        self.cw = class_weights
        self.evaluations = 0
        self.total, gram, _ = _moments(blocks, class_weights, None)
        q = gram.shape[0] - 1
        self.abar = gram[:q, q].copy()
        # weighted covariance of A: the curvature of the centered problem in N
        cov = gram[:q, :q] - np.outer(self.abar, self.abar)
        lmax = float(np.linalg.eigvalsh(cov)[-1]) if cov.size else 0.0
        cv = loss.curvature
        self._curv = Curvature(LN=cv * lmax * (1.0 + 1e-12), Lc=cv * (1.0 + 1e-12))

    def curvature(self) -> Curvature:
        return self._curv

    def value(self, N: np.ndarray, c: np.ndarray) -> tuple[float, None]:
        return self._stream(N, c - N.T @ self.abar, grad=False)[0], None

    def extrapolate(self, hx: None, hp: None, beta: float) -> None:
        return None

    def value_and_grad(self, N: np.ndarray, c: np.ndarray,
                       handle: None = None) -> tuple[float, np.ndarray, np.ndarray]:
        f, G, gb = self._stream(N, c - N.T @ self.abar, grad=True)
        G -= np.outer(self.abar, gb)  # (A - 1 abar^T)^T R
        return f, G, gb

    def _stream(self, N: np.ndarray, b: np.ndarray, *, grad: bool):
        self.evaluations += 1
        f = 0.0
        G = np.zeros_like(N) if grad else None
        gb = np.zeros(self.k) if grad else None
        for XQ, targets, w in self.blocks:
            Z = XQ @ N
            Z += b
            loss_sum, _, R = self.loss.value_residual(Z, targets, w, class_weights=self.cw,
                                                      out=Z, where="refinement block")
            f += loss_sum
            if grad:
                G += XQ.T @ R
                gb += R.sum(axis=0)
        inv = 1.0 / self.total
        if grad:
            G *= inv
            gb *= inv
        return f * inv, G, gb


def _block_weights(n: int, targets: Any, w: np.ndarray | None,
                   cw: np.ndarray | None) -> np.ndarray:
    ww = np.ones(n) if w is None else np.asarray(w, dtype=np.float64)
    if cw is not None:
        ww = ww * np.asarray(cw, dtype=np.float64)[np.asarray(targets, dtype=np.int64)]
    return ww


def _moments(blocks: Iterable, cw: np.ndarray | None, k: int | None):
    """One stream: total weight, ``[A, 1]^T W [A, 1] / total`` and (with ``k``) the
    squared loss's target moments ``(A^T W Y, Y^T w, sum w ||y||^2) / total``."""
    total, gram, AY, Ysum, YY = 0.0, None, None, None, 0.0
    for XQ, targets, w in blocks:
        ww = _block_weights(XQ.shape[0], targets, w, cw)
        A1 = np.hstack([XQ, np.ones((XQ.shape[0], 1))])
        g = A1.T @ (A1 * ww[:, None])
        gram = g if gram is None else gram + g
        total += float(ww.sum())
        if k is not None:
            Y = targets.toarray() if sp.issparse(targets) else np.asarray(targets, np.float64)
            Y = Y.reshape(XQ.shape[0], k)
            Yw = Y * ww[:, None]
            AY = XQ.T @ Yw if AY is None else AY + XQ.T @ Yw
            Ysum = Yw.sum(axis=0) if Ysum is None else Ysum + Yw.sum(axis=0)
            YY += float((Yw * Y).sum())
    if gram is None:
        raise ConfigError("refine: no projection blocks; the pass kept none")
    if not total > 0:
        raise ConfigError("refine: the row weights sum to zero; give some rows positive weight")
    gram = gram / total
    if k is None:
        return total, gram, None
    return total, gram, (AY / total, Ysum / total, YY / total)


def squared_oracle(blocks: Iterable, k: int) -> SquaredOracle:
    """The squared loss's statistics from one stream over the blocks."""
    _, gram, (M_AY, m_Y, m_YY) = _moments(blocks, None, k)
    q = gram.shape[0] - 1
    return SquaredOracle(gram[:q, :q], gram[:q, q].copy(), M_AY, m_Y, m_YY)


def refine_streamed(blocks: Iterable[tuple[np.ndarray, Any, np.ndarray | None]],
                    N0: np.ndarray, b0: np.ndarray, settings: RefineSettings) -> RefineResult:
    """Solve the refinement subproblem streaming over projection blocks.

    Parameters
    ----------
    blocks : iterable of (XQ_b, targets_b, weights_b), re-iterable
        :class:`MemoryProjections` or :class:`ScratchProjections`: ``XQ_b``
        (n_b, q) float64, the block's targets, raw row weights or None.
    N0 : (q, k) array
        Warm start.
    b0 : (k,) array
        Warm-start intercept.
    settings : RefineSettings
        As :func:`ranktide.solver.refine.refine` takes them; a certificate
        check costs one extra stream here.

    Returns
    -------
    RefineResult
        As :func:`ranktide.solver.refine.refine`; ``evaluations`` counts streams
        (a quadratic loss streams once, for its statistics, and reports 0).
    """
    N0, b0 = start_point(N0, b0)
    k = N0.shape[1]
    if settings.loss.quadratic:
        oracle: Any = squared_oracle(blocks, k)
    else:
        oracle = StreamOracle(blocks, settings.loss, k, settings.class_weights)
    return refine_result(run_apg(oracle, N0, b0, settings), oracle)
