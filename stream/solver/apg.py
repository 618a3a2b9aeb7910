"""The refinement's one accelerated-proximal-gradient loop, driven through a small oracle.

Every refinement of the solver (DESIGN section 7 step 3) minimizes

    F(N, c) = f(N, c) + lam * ||N||_*        N (q x k), c (k,)

where ``f`` is smooth and only an *oracle* knows how to evaluate it: on
projections held in memory (:class:`ranktide.solver.refine.DenseOracle`),
streamed over projection blocks (:class:`ranktide.solver.refine_stream.StreamOracle`),
from the squared loss's sufficient statistics
(:class:`ranktide.solver.refine.SquaredOracle`), or on a row sample with a linear
correction (:class:`ranktide.solver.refine_sample.CorrectedOracle`). The loop here
is written once: extrapolation (FISTA, Beck & Teboulle 2009), backtracking on
the step with singular value thresholding as the prox of the trace norm (Cai,
Candes & Shen 2010), function-value restart (O'Donoghue & Candes 2015), the
certificate check and the stall test.

The oracle protocol (:class:`Oracle`):

* ``curvature() -> Curvature``: bounds ``LN`` and ``Lc`` on the curvature of
  ``f`` in ``N`` and in ``c`` (the two blocks get steps of their own) and
  whether they are exact (then the step is fixed at the bound: no shrinking,
  no backtracking);
* ``value(N, c) -> (f, handle)``: the value, and an oracle-private handle
  (the in-memory oracle keeps the scores of the point in it; others None);
* ``value_and_grad(N, c, handle) -> (f, G_N, g_c)``;
* ``extrapolate(hx, hp, beta) -> handle``: the handle of
  ``y = x + beta (x - p)`` from those of ``x`` and ``p`` (the scores are
  linear in the point, so the in-memory oracle forms them without a product);
  None when the oracle keeps nothing.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from ranktide.kernels.svd import svd
from ranktide.signals import StopRequested

__all__ = ["Curvature", "Oracle", "ApgResult", "ApgProgress", "apg", "svt", "certificate"]

# L is tried this much smaller before each step (then doubled on a failed test), never
# above the bound. Measured (n = 2000-5000, q = 12-20, k = 20-50, relative tol 1e-7):
# softmax needed 2.3-3x fewer products than the fixed bound step, multilabel 1.2-1.7x;
# growth factors 1.5 and 2 were no better.
SHRINK = 1.25


@dataclass(frozen=True)
class Curvature:
    """Curvature bounds of the smooth part: ``LN`` in ``N``, ``Lc`` in ``c``.

    ``exact``: the bound is the curvature itself (a quadratic), so the step
    stays at ``1 / LN`` (no shrinking and no backtracking test).
    """

    LN: float
    Lc: float
    exact: bool = False


class Oracle(Protocol):
    """What :func:`apg` asks of the smooth part (see the module docstring)."""

    def curvature(self) -> Curvature: ...

    def value(self, N: np.ndarray, c: np.ndarray) -> tuple[float, Any]: ...

    def value_and_grad(self, N: np.ndarray, c: np.ndarray,
                       handle: Any = None) -> tuple[float, np.ndarray, np.ndarray]: ...

    def extrapolate(self, hx: Any, hp: Any, beta: float) -> Any: ...


@dataclass(frozen=True)
class ApgProgress:
    """One step's report to a progress callback.

    Attributes
    ----------
    step, max_steps : int
    objective : float
        ``F`` at the current iterate.
    gap : float
        Relative gap estimate at the last check (inf before the first).
    elapsed : float
        Seconds since the loop started.
    eta : float
        Estimated seconds left: the steps the certificate's geometric decrease
        still needs to reach ``tol`` (capped by ``max_steps``) at the mean step
        time so far; the cap alone before two checks.
    """

    step: int
    max_steps: int
    objective: float
    gap: float
    elapsed: float
    eta: float


@dataclass(frozen=True)
class ApgResult:
    """Outcome of :func:`apg` (in the oracle's parametrization ``(N, c)``).

    ``A, s, B``: the SVD of ``N`` restricted to its positive singular values
    (``N = A diag(s) B^T``); ``objective = loss + lam * sum(s)``;
    ``iterations``: proximal steps taken (accepted or restarted);
    ``converged``: the certificate or the stall test passed before
    ``max_iter``; ``gap_estimate``, ``grad_c_norm``: at the last check.
    """

    N: np.ndarray
    c: np.ndarray
    A: np.ndarray
    s: np.ndarray
    B: np.ndarray
    objective: float
    loss: float
    iterations: int
    converged: bool
    gap_estimate: float
    grad_c_norm: float


def svt(M: np.ndarray, thresh: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Singular value thresholding: the prox of ``thresh * ||.||_*``.

    Parameters
    ----------
    M : ndarray, shape (q, k)
    thresh : float
        Non-negative threshold.

    Returns
    -------
    A : ndarray, shape (q, r)
    s : ndarray, shape (r,)
        ``max(sigma - thresh, 0)`` restricted to the positive ones.
    B : ndarray, shape (k, r)
        So that the prox is ``A @ diag(s) @ B.T`` (Cai, Candes & Shen 2010).
    """
    if M.size == 0:
        return np.zeros((M.shape[0], 0)), np.zeros(0), np.zeros((M.shape[1], 0))
    u, sig, vt = svd(M)
    shrunk = sig - thresh
    keep = shrunk > 0.0
    return u[:, keep], shrunk[keep], vt[keep].T


def certificate(GN: np.ndarray, N: np.ndarray, nuc: float, F: float, lam: float) -> float:
    """Relative conditional-gradient gap bound of the subproblem (DESIGN section 2).

    ``(<G_N, N> + lam ||N||_* + (F / lam) max(0, ||G_N||_2 - lam)) / F``.
    """
    if GN.size == 0:
        return 0.0
    sigma1 = float(np.linalg.norm(GN, 2))
    gap = float(np.sum(GN * N)) + lam * nuc + (F / lam) * max(0.0, sigma1 - lam)
    return max(gap, 0.0) / max(abs(F), 1e-300)


class _Eta:
    """Seconds-left estimate from the certificate's decrease per step (see ApgProgress)."""

    def __init__(self, tol: float, max_steps: int) -> None:
        self.tol, self.max_steps = tol, max_steps
        self.checks: list[tuple[int, float]] = []

    def add_check(self, step: int, gap: float) -> None:
        if math.isfinite(gap) and gap > 0:
            self.checks.append((step, gap))

    def __call__(self, step: int, elapsed: float) -> float:
        per_step = elapsed / max(step, 1)
        left = self.max_steps - step
        if len(self.checks) >= 2:
            (s0, g0), (s1, g1) = self.checks[0], self.checks[-1]
            if g1 < g0 and s1 > s0:
                rate = math.log(g1 / g0) / (s1 - s0)  # < 0: log-gap change per step
                need = math.log(self.tol / g1) / rate if g1 > self.tol else 0.0
                left = min(left, max(0.0, need - (step - s1)))
        return per_step * max(left, 0.0)


def apg(
    oracle: Oracle,
    lam: float,
    N0: np.ndarray,
    c0: np.ndarray,
    *,
    tol: float,
    max_iter: int,
    check_every: int = 5,
    stall: float = 0.0,
    should_stop: Callable[[], bool] | None = None,
    progress: Callable[[ApgProgress], Any] | None = None,
) -> ApgResult:
    """Minimize ``f(N, c) + lam ||N||_*`` by accelerated proximal gradient.

    Parameters
    ----------
    oracle : Oracle
        The smooth part ``f`` (see the module docstring).
    lam : float
        Trace-norm penalty (> 0).
    N0 : ndarray, shape (q, k)
    c0 : ndarray, shape (k,)
        Warm start, in the oracle's parametrization.
    tol : float
        Stop once the relative certificate (:func:`certificate`) and
        ``||grad_c||_inf`` are both <= ``tol``.
    max_iter : int
        Most proximal steps.
    check_every : int
        Steps between two checks (each costs one gradient).
    stall : float
        Also stop once the decrease of F over the last check interval is at
        most this fraction of the decrease since the start (0: never).
    should_stop : callable, optional
        Checked before every step; when True, :class:`ranktide.signals.StopRequested`.
    progress : callable, optional
        Called with an :class:`ApgProgress` after every step.

    Returns
    -------
    ApgResult

    Notes
    -----
    Each step: extrapolate ``y = x + beta (x - p)``; one gradient at ``y``;
    ``L`` shrinks by :data:`SHRINK` (floored at ``1e-12 LN``) and the prox
    step ``N+ = SVT(N_y - G_N / L, lam / L)``, ``c+ = c_y - g_c / (L Lc / LN)``
    is tried until ``f(N+, c+)`` is below the quadratic model at ``y`` (``L``
    doubles, never above ``LN``). The test has no slack: a slack of even
    1e-14 |f| let the step grow past the curvature near the optimum and the
    iterates wandered at the 1e-7 level, which stalls the certificate. When
    ``F(N+, c+) > F(x)`` after a momentum step, momentum is dropped and the
    step is retried from ``x`` (function-value restart).
    """
    curv = oracle.curvature()
    LN_max = max(float(curv.LN), 1e-12 * float(curv.Lc))
    ratio = float(curv.Lc) / LN_max  # the intercept's step is 1 / (ratio * L)
    max_iter = int(max_iter)
    L = LN_max
    Ux, sx, Bx = svt(N0, 0.0)
    N_x, c_x = N0.copy(), np.array(c0, dtype=np.float64)
    f_x, h_x = oracle.value(N_x, c_x)
    F_x = f_x + lam * float(sx.sum())
    F_start = F_check = F_x
    N_p, c_p, h_p = N_x, c_x, h_x
    t = 1.0
    it = 0
    gap_rel, gb = math.inf, math.inf
    converged = False
    t_start = time.perf_counter()
    eta = _Eta(tol, max_iter)
    while it < max_iter:
        if should_stop is not None and should_stop():
            raise StopRequested(f"stop requested at refinement step {it}")
        it += 1
        t_next = 0.5 * (1.0 + math.sqrt(1.0 + 4.0 * t * t))
        beta = (t - 1.0) / t_next
        if beta > 0:
            N_y = N_x + beta * (N_x - N_p)
            c_y = c_x + beta * (c_x - c_p)
            h_y = oracle.extrapolate(h_x, h_p, beta)
        else:
            N_y, c_y, h_y = N_x, c_x, h_x
        f_y, G_N, g_c = oracle.value_and_grad(N_y, c_y, h_y)
        h_y = None
        if not curv.exact:
            L = max(L / SHRINK, 1e-12 * LN_max)
        h_n = None
        while True:
            Lc = ratio * L
            Un, sn, Bn = svt(N_y - G_N / L, lam / L)
            N_n = (Un * sn) @ Bn.T
            c_n = c_y - g_c / Lc
            h_n = None  # release a rejected trial's buffers before the next evaluation
            f_n, h_n = oracle.value(N_n, c_n)
            if curv.exact or L >= LN_max:
                break
            dN, dc = N_n - N_y, c_n - c_y
            model = (f_y + float(np.sum(G_N * dN)) + float(g_c @ dc)
                     + 0.5 * (L * float(np.sum(dN * dN)) + Lc * float(dc @ dc)))
            if f_n <= model:
                break
            L = min(2.0 * L, LN_max)
        F_n = f_n + lam * float(sn.sum())
        if F_n > F_x and beta > 0:  # function-value restart: retry from x without momentum
            t = 1.0
            N_p, c_p, h_p = N_x, c_x, h_x
            h_n = None
        else:
            N_p, c_p, h_p = N_x, c_x, h_x
            N_x, c_x, h_x, f_x, F_x = N_n, c_n, h_n, f_n, F_n
            h_n = None
            Ux, sx, Bx = Un, sn, Bn
            t = t_next
            if it % check_every == 0 or it >= max_iter:
                _, G_x, gc_x = oracle.value_and_grad(N_x, c_x, h_x)
                gap_rel = certificate(G_x, N_x, float(sx.sum()), F_x, lam)
                gb = float(np.abs(gc_x).max()) if gc_x.size else 0.0
                eta.add_check(it, gap_rel)
                if gap_rel <= tol and gb <= tol:
                    converged = True
                elif stall > 0 and F_check - F_x <= stall * (F_start - F_x):
                    converged = True
                F_check = F_x
        if progress is not None:
            elapsed = time.perf_counter() - t_start
            progress(ApgProgress(step=it, max_steps=max_iter, objective=float(F_x),
                                 gap=float(gap_rel), elapsed=elapsed,
                                 eta=0.0 if converged else eta(it, elapsed)))
        if converged:
            break
    return ApgResult(N=N_x, c=c_x, A=Ux, s=sx, B=Bx, objective=float(F_x), loss=float(f_x),
                     iterations=it, converged=converged, gap_estimate=float(gap_rel),
                     grad_c_norm=float(gb))
