"""The certificate math: bounds on ``F - F*`` from what one pass gathers (DESIGN section 2)."""

from __future__ import annotations

import math

__all__ = ["dual_gap", "gap_estimate"]


def dual_gap(*, objective: float, conjugate: float, scale: float, lam: float,
             sigma1: float) -> float:
    """Duality gap ``F + g*(c R)`` at a scaled residual (the Fenchel dual of DESIGN section 2).

    ``g*(Theta) = sum_i omega_i loss*(theta_i / omega_i)`` is the conjugate of
    the mean loss; ``Theta = c R`` is dual feasible when ``c sigma_1 <= lam``
    (and ``grad_b f = 0``), and then ``F* >= -g*(c R)``. The pass summed the
    conjugates at the scale ``c0 = scale`` chosen before it
    (``conjugate = g*(c0 R)``). With ``c = min(1, lam / sigma_1)``:
    ``c >= c0`` makes ``c0 R`` itself feasible; ``c < c0`` uses convexity along
    the ray from ``g*(0) = 0`` (every loss here has infimum 0):
    ``g*(c R) <= (c / c0) g*(c0 R)``. Near the optimum ``c0 ~ c ~ 1`` and the
    gap loses about ``(1 - c) lam ||W||_*`` where :func:`gap_estimate` loses
    ``(1 - c) F``. An estimate like that one (``sigma_1`` from power iteration).

    Returns ``inf`` when no conjugates were summed (``scale = 0``).
    """
    if not scale > 0.0:
        return math.inf
    c = min(1.0, lam / sigma1) if sigma1 > 0.0 else 1.0
    conj = conjugate if c >= scale else (c / scale) * conjugate
    return max(0.0, objective + conj)


def gap_estimate(*, inner: float, nuclear: float, objective: float, lam: float,
                 sigma1: float) -> float:
    """``<G, W> + lam ||W||_* + (F / lam) max(0, sigma_1 - lam)`` (DESIGN section 2).

    A bound on ``F - F*`` when ``grad_b f = 0`` and ``sigma_1`` is exact; with a
    lower-bound ``sigma_1`` it is an estimate.
    """
    tau = objective / lam
    return max(0.0, inner + lam * nuclear + tau * max(0.0, sigma1 - lam))
