"""What the three refinements share: their settings, their result and the run of the loop.

The in-memory (:func:`ranktide.solver.refine.refine`), streamed
(:func:`ranktide.solver.refine_stream.refine_streamed`) and sampled
(:func:`ranktide.solver.refine_sample.refine_sampled`) refinements solve the same
subproblem ``min f(XQ N + b) + lam ||N||_*`` with the same loop
(:func:`ranktide.solver.apg.apg`); each builds only its own oracle. Here:

* :class:`RefineSettings`, the one frozen set of settings every caller passes
  (the greedy loop, the refinement chooser, the debiasing refit, tests),
  validated once when made;
* :func:`start_point`, the warm start as float64 arrays with its shapes checked;
* :func:`run_apg`, the loop started at the warm start in the oracle's
  centered parametrization ``c = b + N^T abar``;
* :class:`RefineResult` and :func:`refine_result`, the loop's answer back in
  the caller's parametrization.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from ranktide.errors import ConfigError
from ranktide.losses import Loss, get_loss
from ranktide.solver.apg import ApgProgress, ApgResult, Oracle, apg
from ranktide.solver.penalty import check_lam

__all__ = ["RefineSettings", "RefineResult", "start_point", "run_apg", "refine_result"]


@dataclass(frozen=True, eq=False)
class RefineSettings:
    """Settings of one refinement (keyword arguments; validated when made).

    Attributes
    ----------
    loss : Loss or str
        The loss, or its name in :data:`ranktide.losses.LOSS_NAMES` (turned
        into the :class:`ranktide.losses.Loss` object).
    lam : float
        Trace-norm penalty (> 0, finite).
    tol : float
        Relative inner tolerance (> 0) on the subproblem's conditional-gradient
        gap estimate and on ``||grad_b||_inf``; the solver ties it to the
        current outer gap.
    max_iter : int
        Most proximal steps (>= 1).
    class_weights : ndarray, shape (k,), optional
        Per-class weights, for a loss that takes them (``Loss.class_weights_ok``):
        row ``i`` weighs ``w_i * class_weights[y_i]``. Default None.
    check_every : int
        Steps between two certificate checks (each costs one extra gradient:
        an ``n q k`` product or one stream). Default 5.
    stall : float
        Also stop once the decrease of F over the last ``check_every`` steps is
        at most this fraction of its decrease since the start (the solver
        passes 0.5, see ``ranktide.solver.outer_refine._INNER_STALL``). Default 0.0
        (never). A quadratic loss (``Loss.quadratic``) takes exact steps and
        stops by its certificate alone: the test is off for it.
    should_stop : callable, optional
        Checked before every step; when it returns True the refinement is
        abandoned with :class:`ranktide.signals.StopRequested`. Default None.
    progress : callable, optional
        Called after every step with a :class:`ranktide.solver.apg.ApgProgress`
        (step, objective, gap estimate, elapsed seconds, ETA). Default None.
    """

    loss: Loss
    lam: float
    tol: float
    max_iter: int
    class_weights: np.ndarray | None = None
    check_every: int = 5
    stall: float = 0.0
    should_stop: Callable[[], bool] | None = None
    progress: Callable[[ApgProgress], Any] | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "loss", get_loss(self.loss))
        check_lam(self.lam, None, "refine")
        if not (isinstance(self.tol, (int, float, np.floating)) and self.tol > 0):
            raise ConfigError(f"refine: tol = {self.tol!r}; give a positive number")
        for name in ("max_iter", "check_every"):
            value = getattr(self, name)
            if not (isinstance(value, (int, np.integer)) and value >= 1):
                raise ConfigError(f"refine: {name} = {value!r}; give an integer >= 1")
        if not (isinstance(self.stall, (int, float)) and math.isfinite(self.stall)
                and self.stall >= 0):
            raise ConfigError(f"refine: stall = {self.stall!r}; give a fraction >= 0 "
                              "(0 turns the stall test off)")
        if self.class_weights is not None:
            self.loss.check_class_weights_allowed()
            object.__setattr__(self, "class_weights",
                               np.asarray(self.class_weights, dtype=np.float64))

    @property
    def loop_stall(self) -> float:
        """The stall fraction the loop uses (0 for a quadratic loss)."""
        return 0.0 if self.loss.quadratic else float(self.stall)


@dataclass(frozen=True)
class RefineResult:
    """Outcome of a refinement.

    Attributes
    ----------
    N : ndarray, shape (q, k)
        Coefficients in the basis ``Q`` (the prox output, exactly low-rank).
    b : ndarray, shape (k,)
        Intercept.
    A : ndarray, shape (q, r)
        Left singular vectors of ``N`` with positive singular values.
    s : ndarray, shape (r,)
        The positive singular values of ``N``, descending.
    B : ndarray, shape (k, r)
        Right singular vectors of ``N``.
    objective : float
        ``f + lam * ||N||_*`` at ``(N, b)``.
    loss : float
        The smooth part ``f`` at ``(N, b)``.
    iterations : int
        Proximal steps taken (accepted or rejected by restart).
    converged : bool
        Whether a stopping test passed (the inner certificate reached ``tol``,
        or the decrease stalled) before ``max_iter``.
    gap_estimate : float
        Relative inner gap estimate at the last check (conditional-gradient bound).
    grad_b_norm : float
        Infinity norm of the intercept gradient at the last check.
    evaluations : int
        Dense ``n x q x k`` products (or streams) spent (0 for a quadratic loss,
        which works on its sufficient statistics).
    """

    N: np.ndarray
    b: np.ndarray
    A: np.ndarray
    s: np.ndarray
    B: np.ndarray
    objective: float
    loss: float
    iterations: int
    converged: bool
    gap_estimate: float
    grad_b_norm: float
    evaluations: int


def start_point(N0: Any, b0: Any, rows: np.ndarray | None = None) -> tuple[np.ndarray,
                                                                             np.ndarray]:
    """The warm start as float64 arrays, its shapes checked.

    Parameters
    ----------
    N0 : array_like, shape (q, k)
    b0 : array_like, shape (k,)
    rows : ndarray, shape (n, q), optional
        Projections the start must fit.

    Returns
    -------
    N0 : ndarray, shape (q, k), float64 (a copy)
    b0 : ndarray, shape (k,), float64 (a copy)
    """
    N0 = np.array(N0, dtype=np.float64, ndmin=2)
    b0 = np.array(b0, dtype=np.float64).reshape(-1)
    bad = N0.ndim != 2 or b0.shape != (N0.shape[1],)
    if rows is not None:
        bad = bad or rows.ndim != 2 or rows.shape[1] != N0.shape[0]
    if bad:
        xq = "" if rows is None else f"XQ {rows.shape}, "
        raise ConfigError(f"refine: shapes disagree: {xq}N0 {N0.shape}, b0 {b0.shape}; "
                          "N0 must be (q, k), b0 (k,) and XQ (n, q)")
    return N0, b0


def run_apg(oracle: Oracle, N0: np.ndarray, b0: np.ndarray,
            settings: RefineSettings) -> ApgResult:
    """The loop of :func:`ranktide.solver.apg.apg` from ``(N0, b0)`` with ``settings``.

    The oracle works in its centered parametrization (``oracle.abar``, q): the
    loop starts at ``c0 = b0 + N0^T abar``.
    """
    s = settings
    return apg(oracle, s.lam, N0, b0 + N0.T @ oracle.abar, tol=s.tol, max_iter=int(s.max_iter),
               check_every=int(s.check_every), should_stop=s.should_stop,
               progress=s.progress, stall=s.loop_stall)


def refine_result(out: ApgResult, oracle: Any) -> RefineResult:
    """The loop's result in the caller's parametrization (``b = c - N^T abar``)."""
    return RefineResult(
        N=out.N, b=out.c - out.N.T @ oracle.abar, A=out.A, s=out.s, B=out.B,
        objective=out.objective, loss=out.loss, iterations=out.iterations,
        converged=out.converged, gap_estimate=out.gap_estimate,
        grad_b_norm=out.grad_c_norm, evaluations=int(oracle.evaluations),
    )
