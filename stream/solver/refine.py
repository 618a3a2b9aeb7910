"""Refinement of the model on cached projections ``X Q``.

Given an orthonormal basis ``Q`` (d x q) and the cached dense projections
``A = X Q`` (n x q), the solver re-optimizes

    min over N (q x k), b (k):  f(A N + 1 b^T) + lam * ||N||_*

which equals the full objective at ``W = Q N`` because ``||Q N||_* = ||N||_*``.
Nothing here touches the sparse data.

Method (chosen after measuring, see :func:`refine`): the accelerated proximal
gradient loop of :mod:`ranktide.solver.apg`, driven here by two oracles:
:class:`DenseOracle` (softmax, multilabel: the projections and the n x k
scores of its iterates in memory) and :class:`SquaredOracle` (the squared
loss: q x q / q x k sufficient statistics, no n x k work per step).
"""

from __future__ import annotations

import contextlib
import weakref
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError
from ranktide.kernels.dense import add_row, extrapolate
from ranktide.losses import Loss
from ranktide.solver.apg import Curvature
from ranktide.solver.refine_common import (
    RefineResult,
    RefineSettings,
    refine_result,
    run_apg,
    start_point,
)

__all__ = ["refine", "DenseOracle", "SquaredOracle", "rows_for_loss", "make_oracle"]

# Score matrices with fewer entries than this use vectorized numpy instead of the fused
# parallel kernels. Measured on the shared 2-core machine (n = 3000, k = 50, q = 20): numpy
# 9 ms per step, the kernels 59 ms with 2 threads (their thread team stalls when the cores
# are shared) and 7 ms with 1; below ~1e6 entries the kernels' gain is not worth that risk.
_KERNEL_MIN_ENTRIES = 1_000_000


# ---------------------------------------------------------------- helpers


def _as_array(parts, name: str):
    if parts is None:
        return None
    if isinstance(parts, (list, tuple)):
        if len(parts) == 0:
            raise ConfigError(f"refine: {name} is an empty list; pass at least one block")
        if any(p is None for p in parts):
            if all(p is None for p in parts):
                return None
            raise ConfigError(
                f"refine: {name} mixes blocks with and without values; give all or none"
            )
        if sp.issparse(parts[0]):
            return sp.vstack(parts, format="csr")
        return np.concatenate([np.asarray(p) for p in parts], axis=0)
    return parts


class _NumpyLoss:
    """Loss value and residual of dense scores in vectorized numpy (small problems)."""

    def __init__(self, loss: Loss, Y, w: np.ndarray, k: int) -> None:
        self.loss = loss
        self.Y = Y.toarray() if sp.issparse(Y) else Y
        self.w = w

    def value(self, Z: np.ndarray) -> float:
        return self.loss.dense_value_residual(Z, self.Y, self.w, want_residual=False)[0]

    def residual(self, Z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        f, R = self.loss.dense_value_residual(Z, self.Y, self.w)
        return f, R, R.sum(axis=0)

    @staticmethod
    def extrapolate(X: np.ndarray, P: np.ndarray, beta: float, out: np.ndarray) -> None:
        """``out = X + beta (X - P)`` (``out`` is neither ``X`` nor ``P``)."""
        np.subtract(X, P, out=out)
        out *= beta
        out += X

    @staticmethod
    def add_row(Z: np.ndarray, c: np.ndarray) -> None:
        Z += c


class _KernelLoss:
    """Loss value and residual of dense scores through the fused kernels of ``kernels.losses``.

    ``w`` sums to 1, so the kernels' weighted sums are the weighted means.
    """

    def __init__(self, loss: Loss, Y, w: np.ndarray, k: int) -> None:
        self.k = k
        self.w = np.ascontiguousarray(w, dtype=np.float64)
        self._value, self._resid = loss.fused_evaluators(Y, self.w)

    def value(self, Z: np.ndarray) -> float:
        out = np.zeros(1)
        self._value(Z, out)
        return float(out[0])

    def residual(self, Z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        """Loss, residual (overwrites ``Z``) and its column sums."""
        out = np.zeros(1)
        gb = np.zeros(self.k)
        R = self._resid(Z, out, gb)
        return float(out[0]), R, gb

    @staticmethod
    def extrapolate(X: np.ndarray, P: np.ndarray, beta: float, out: np.ndarray) -> None:
        """``out = X + beta (X - P)`` in one fused pass."""
        extrapolate(X, P, beta, out)

    @staticmethod
    def add_row(Z: np.ndarray, c: np.ndarray) -> None:
        add_row(Z, c)


def _blas_one_thread():
    """Limit BLAS to one thread for the refinement's thin products, when threadpoolctl exists.

    The products here are (n x q) by (q x k) with q of a few tens: measured on the 2-core
    machine shared with other processes, OpenBLAS's thread pool made each step 9x slower
    (66 ms against 7.4 ms for n = 3000, q = 20, k = 50) by spinning against the fused
    loss kernels' own threads; one BLAS thread leaves the cores to those kernels.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional: without it BLAS keeps its own setting
        return contextlib.nullcontext()
    return threadpool_limits(1, user_api="blas")


# ---------------------------------------------------------------- oracles


class _Scores:
    """Handle of a point's n x k scores; the buffer returns to its pool when dropped."""

    __slots__ = ("Z", "__weakref__")

    def __init__(self, Z: np.ndarray, pool: list | None) -> None:
        self.Z = Z
        if pool is not None:
            weakref.finalize(self, pool.append, Z)


class DenseOracle:
    """The smooth part ``f(Ac N + 1 c^T)`` on projections held in memory (softmax, multilabel).

    It works on the weighted-centered projections ``Ac = A - 1 abar^T`` with
    ``c = b + N^T abar`` (the same scores, the same ``N``), so its curvature
    bound is block diagonal: ``curv * lambda_max(Ac^T W Ac)`` in ``N`` and
    ``curv`` in ``c`` (curv = 1/2 softmax, 1/4 multilabel). The scores of every
    point it evaluates are kept in its handle (buffers reused from a pool), so
    extrapolated scores are a linear combination, not a product.

    Parameters
    ----------
    A : ndarray, shape (n, q)
        Projections.
    Y : targets as :func:`rows_for_loss` returns them
    w : ndarray, shape (n,)
        Row weights summing to 1.
    loss : Loss
        A loss with score evaluators (softmax, multilabel: not quadratic).
    k : int
        Outputs.
    """

    def __init__(self, A: np.ndarray, Y, w: np.ndarray, loss: Loss, k: int) -> None:
        self.abar = A.T @ w
        self.Ac = A - self.abar
        n, q = A.shape
        self.k = k = int(k)
        lmax = float(np.linalg.eigvalsh(self.Ac.T @ (self.Ac * w[:, None]))[-1]) if q else 0.0
        cv = loss.curvature
        self._curv = Curvature(LN=cv * lmax * (1.0 + 1e-12), Lc=cv * (1.0 + 1e-12))
        # tiny score matrices: the parallel kernels' start-up costs more than the arithmetic
        self.ev = (_KernelLoss if n * k >= _KERNEL_MIN_ENTRIES else _NumpyLoss)(loss, Y, w, k)
        self._pool: list[np.ndarray] = []
        self._R = np.empty((n, k))  # the residual (extrapolated scores are formed in it)
        self._in_R = _Scores(self._R, None)
        self.evaluations = 0

    def curvature(self) -> Curvature:
        return self._curv

    def value(self, N: np.ndarray, c: np.ndarray) -> tuple[float, _Scores]:
        Z = self._pool.pop() if self._pool else np.empty((self.Ac.shape[0], self.k))
        np.matmul(self.Ac, N, out=Z)
        self.ev.add_row(Z, c)
        self.evaluations += 1
        return self.ev.value(Z), _Scores(Z, self._pool)

    def extrapolate(self, hx: _Scores, hp: _Scores, beta: float) -> _Scores:
        self.ev.extrapolate(hx.Z, hp.Z, beta, self._R)
        return self._in_R

    def value_and_grad(self, N: np.ndarray, c: np.ndarray,
                       handle: _Scores | None = None) -> tuple[float, np.ndarray, np.ndarray]:
        if handle is None:
            np.matmul(self.Ac, N, out=self._R)
            self.ev.add_row(self._R, c)
        elif handle is not self._in_R:
            np.copyto(self._R, handle.Z)
        f, R, g_c = self.ev.residual(self._R)  # the residual overwrites the scores
        self.evaluations += 1
        return f, self.Ac.T @ R, g_c


class SquaredOracle:
    """The squared loss from its sufficient statistics (no n x k work per step).

    With centered projections and ``c = b + N^T abar``,
    ``f = 0.5 (<N, C N> - 2 <N, D> + c0) + 0.5 ||c - ybar||^2`` where
    ``C = Ac^T W Ac`` (q x q), ``D = Ac^T W Y`` (q x k),
    ``c0 = sum_i w_i ||y_i - ybar||^2`` (the cross terms vanish because
    ``sum_i w_i ac_i = 0``). The curvature is exact: ``lambda_max(C)`` in
    ``N`` and 1 in ``c``, so the step is ``1 / lambda_max(C)`` and the
    intercept lands on ``ybar`` (its closed form) at the first step.

    Parameters
    ----------
    M_AA : (q, q), m_A : (q,), M_AY : (q, k), m_Y : (k,), m_YY : float
        Weighted means (weights summing to 1) of ``a a^T``, ``a``, ``a y^T``,
        ``y`` and ``||y||^2`` over the rows.
    """

    def __init__(self, M_AA: np.ndarray, m_A: np.ndarray, M_AY: np.ndarray, m_Y: np.ndarray,
                 m_YY: float) -> None:
        self.abar = m_A
        self.ybar = m_Y
        self.C = M_AA - np.outer(m_A, m_A)
        self.D = M_AY - np.outer(m_A, m_Y)
        self.c0 = float(m_YY - m_Y @ m_Y)
        LN = float(np.linalg.eigvalsh(self.C)[-1]) * (1.0 + 1e-12) if self.C.size else 1.0
        self._curv = Curvature(LN=max(LN, 1e-300), Lc=1.0, exact=True)
        self.evaluations = 0  # no n x q x k products

    @classmethod
    def from_rows(cls, A: np.ndarray, Y: np.ndarray, w: np.ndarray) -> SquaredOracle:
        """Statistics of rows ``A`` (n, q), targets ``Y`` (n, k), weights ``w`` summing to 1."""
        Aw = A * w[:, None]
        return cls(A.T @ Aw, A.T @ w, Aw.T @ Y, Y.T @ w, float(w @ (Y * Y).sum(axis=1)))

    def curvature(self) -> Curvature:
        return self._curv

    def value(self, N: np.ndarray, c: np.ndarray) -> tuple[float, None]:
        dc = c - self.ybar
        f = 0.5 * (float(np.sum(N * (self.C @ N))) - 2.0 * float(np.sum(N * self.D)) + self.c0)
        return f + 0.5 * float(dc @ dc), None

    def extrapolate(self, hx: None, hp: None, beta: float) -> None:
        return None

    def value_and_grad(self, N: np.ndarray, c: np.ndarray,
                       handle: None = None) -> tuple[float, np.ndarray, np.ndarray]:
        CN = self.C @ N
        dc = c - self.ybar
        f = 0.5 * (float(np.sum(N * CN)) - 2.0 * float(np.sum(N * self.D)) + self.c0)
        return f + 0.5 * float(dc @ dc), CN - self.D, dc


# ---------------------------------------------------------------- main entry


def refine(XQ_blocks: Any, targets: Any, weights: Any, N0: np.ndarray, b0: np.ndarray,
           settings: RefineSettings) -> RefineResult:
    """Solve the refinement ``min f(XQ N + b) + lam ||N||_*`` on cached projections.

    Parameters
    ----------
    XQ_blocks : list of ndarray (n_b, q), or ndarray (n, q)
        Cached projections ``X Q`` per row block (or already concatenated).
    targets : list or array
        Per block (or concatenated), of the loss's target kind: int class ids
        (n_b,), float values (n_b, k) or 0/1 tags (n_b, k; dense or CSR).
    weights : list of ndarray (n_b,), ndarray (n,), or None
        Raw row weights (None: all ones). They are normalized by their total.
    N0 : ndarray, shape (q, k)
        Warm start (the current model expressed in ``Q``: ``[diag(s) V^T; 0]``).
    b0 : ndarray, shape (k,)
        Warm-start intercept.
    settings : RefineSettings
        Loss, ``lam`` and the loop's settings (tolerance, step limit, class
        weights, check interval, stall test, stop check, progress callback).

    Returns
    -------
    RefineResult

    Notes
    -----
    Choice of method: the objective is smooth + trace norm on a small q x k
    variable, but each gradient costs about ``2 n q k`` flops while the prox
    (an SVD of q x k) is negligible, so the method should need few gradients.
    FISTA with restart needs O(sqrt(L/mu) log(1/eps)) of them on these
    locally well-conditioned problems. The scores ``Z = A N + 1 b^T`` are cached
    for the last two iterates, so the extrapolated point's scores are a linear
    combination (no product), and each step costs one gradient product
    ``A^T R`` plus one score product for the backtracking test, whose loss value
    also drives the function-value restart. The iteration runs on the
    weighted-centered projections ``Ac = A - 1 abar^T`` with the intercept
    ``c = b + N^T abar`` (the same scores, the same ``N``): then the curvature
    bound is block diagonal, ``curv * diag(Ac^T W Ac, 1)`` (curv = 1/2 softmax,
    1/4 multilabel), and ``N`` and ``c`` get steps ``1/L`` and
    ``1/(L * ratio)`` with ``ratio = 1 / lambda_max(Ac^T W Ac)`` fixed by the
    bounds. Without centering one step served both and the intercept's
    eigenvalue (~1, against ~1e-3 for the ``A`` block on the benchmark problem)
    made ``N``'s step hundreds of times too short: measured on a refinement of
    the small solver benchmark (n = 5000, q = 88, k = 50, tol 1.9e-3) 140 steps
    became 15, with a lower objective. ``L`` is tried 1.25x smaller each step
    and doubled on a failed sufficient-decrease test, never above the bound.
    Measured before centering (n = 2000-5000, q = 12-20, k = 20-50, relative
    tol 1e-7): softmax needed 2.3-3x fewer products than the fixed bound step,
    multilabel 1.2-1.7x (the bound is loose once predictions are confident);
    growth factors 1.5 and 2 were no better. The sufficient-decrease test has no slack: a slack of
    even 1e-14 |f| let the step grow past the curvature near the optimum and
    the iterates wandered at the 1e-7 level, which stalls the certificate.
    The squared loss runs the same loop with the exact step
    ``1 / lambda_max(C)`` on the statistics ``C = A^T W A - abar abar^T`` and
    ``D = A^T W Y - abar ybar^T`` (:class:`SquaredOracle`; its intercept lands on
    the closed form ``b = ybar - N^T abar`` at the first step): no ``n x k``
    work per step.

    Stopping: every ``check_every`` steps, either the subproblem's own gap
    bound ``<G_N, N> + lam ||N||_* + (F / lam) max(0, ||G_N||_2 - lam)``
    (relative to F) is <= ``tol`` and ``||grad_b||_inf <= tol`` (common
    practice, no source, for the unpenalized intercept), or the refinement has
    stalled: the decrease of F over the last check interval is at most half of
    its decrease since the start (``stall``; off by default). The bound is loose (its last
    term dominates; measured: a bound of 1.9e-3 with the objective 2e-7 above
    the subproblem's optimum), and the outer loop gains nothing from a
    subproblem solved beyond its subspace's worth: with the stall test the
    solver benchmark reached its accuracy in fewer passes and less time. The
    outer certificate is computed in the pass independently of this test, so
    the optimum the solver converges to is unchanged.

    References
    ----------
    Beck & Teboulle (2009), A fast iterative shrinkage-thresholding algorithm.
    Cai, Candes & Shen (2010), A singular value thresholding algorithm.
    O'Donoghue & Candes (2015), Adaptive restart for accelerated gradient schemes.
    """
    A = np.ascontiguousarray(_as_array(XQ_blocks, "XQ_blocks"), dtype=np.float64)
    N0, b0 = start_point(N0, b0, A)
    Y, w = rows_for_loss(A.shape[0], N0.shape[1], targets, weights, settings)
    with _blas_one_thread():
        oracle = make_oracle(A, Y, w, settings.loss, N0.shape[1])
        out = run_apg(oracle, N0, b0, settings)
    return refine_result(out, oracle)


def rows_for_loss(n: int, k: int, targets: Any, weights: Any,
                  settings: RefineSettings) -> tuple[Any, np.ndarray]:
    """Targets as the loss needs them and the row weights normalized to sum 1.

    Parameters
    ----------
    n, k : int
        Rows and outputs.
    targets, weights :
        As :func:`refine` takes them (per block or concatenated).
    settings : RefineSettings
        The loss, and the class weights folded into the row weights.

    Returns
    -------
    Y : int64 (n,), CSR (n, k) or float64 (n, k)
    w : float64 (n,), summing to 1
    """
    Y = settings.loss.refine_targets(_as_array(targets, "targets"), n, k)
    wraw = _as_array(weights, "weights")
    w = np.ones(n) if wraw is None else np.asarray(wraw, dtype=np.float64).reshape(-1)
    if w.shape[0] != n:
        raise ConfigError(f"refine: {w.shape[0]} weights for {n} rows; give one per row")
    if settings.class_weights is not None:
        w = w * settings.class_weights[Y]
    total = float(w.sum())
    if not total > 0:
        raise ConfigError("refine: the row weights sum to zero; give some rows positive weight")
    return Y, w / total


def make_oracle(A: np.ndarray, Y: Any, w: np.ndarray, loss: Loss,
                k: int) -> DenseOracle | SquaredOracle:
    """The in-memory oracle of a loss: statistics for a quadratic loss, scores otherwise.

    ``w`` sums to 1 (see :func:`rows_for_loss`).
    """
    if loss.quadratic:
        return SquaredOracle.from_rows(A, Y, w)
    return DenseOracle(A, Y, w, loss, k)
