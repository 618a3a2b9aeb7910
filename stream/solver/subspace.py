"""Power-iteration helpers for the solver (DESIGN §7 step 2).

Re-exports the block power iteration of :mod:`kernels.power`
(:func:`top_singular_pairs`, :class:`PowerResult`) and the rank-revealing
orthonormalizations (:func:`orth_rank_revealing`, :func:`orth_against`), and
adds :func:`subspace_update`: the one-step-per-pass, two-sided subspace
iteration that turns the products gathered in a gradient pass into a lower
bound of ``sigma_1(G)`` and the next pass's ``Psi`` and ``Omega``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from ranktide.errors import ConfigError
from ranktide.kernels.power import (
    PowerResult,
    orth_against,
    orth_rank_revealing,
    top_singular_pairs,
)

__all__ = [
    "PowerResult",
    "SubspaceUpdate",
    "orth_against",
    "orth_rank_revealing",
    "subspace_update",
    "top_singular_pairs",
]


@dataclass(frozen=True)
class SubspaceUpdate:
    """Result of :func:`subspace_update`.

    Attributes
    ----------
    sigma_lower : float
        Lower bound of ``sigma_1(G)``: the largest singular value of
        ``G [V, Omega]`` and of ``G^T Psi`` (Rayleigh–Ritz; valid because
        ``[V, Omega]`` and ``Psi`` have orthonormal columns).
    Psi : (d, p') float64
        Top left singular directions of ``(I - U U^T) G [V, Omega]``,
        orthonormal and orthogonal to ``U``.
    Omega : (k, p) float64
        ``orth(G^T Psi)`` made orthogonal to ``V`` (random orthonormal
        directions fill any columns the rank-revealing step dropped).
    """

    sigma_lower: float
    Psi: np.ndarray
    Omega: np.ndarray


def _top_left(A: np.ndarray, p: int, drop_tol: float) -> np.ndarray:
    """Top ``p`` left singular directions of ``A`` (fewer when rank-deficient)."""
    if p == 0 or A.shape[1] == 0:
        return np.zeros((A.shape[0], 0))
    Q = orth_rank_revealing(A, drop_tol)  # ordered by decreasing singular value
    return np.ascontiguousarray(Q[:, :p])


def _pad(B: np.ndarray, against: np.ndarray, p: int, rng: np.random.Generator) -> np.ndarray:
    for _ in range(3):
        need = p - B.shape[1]
        if need <= 0:
            break
        basis = np.hstack([against, B])
        B = np.hstack([B, orth_against(rng.standard_normal((B.shape[0], need)), basis)])
    return np.ascontiguousarray(B[:, :p])


def subspace_update(
    *,
    U: np.ndarray,
    V: np.ndarray,
    G_VO: np.ndarray,
    Gt_Psi: np.ndarray,
    p_psi: int,
    p_omega: int,
    seed: int | np.random.Generator | None = None,
    drop_tol: float = 1e-10,
) -> SubspaceUpdate:
    """One step of the warm-started two-sided subspace iteration.

    Parameters
    ----------
    U : (d, r) orthonormal model left factor
    V : (k, r) orthonormal model right factor
    G_VO : (d, r + p) ``G [V, Omega]`` (normalized gradient products)
    Gt_Psi : (k, p') ``G^T Psi``
    p_psi : int
        Columns of the next ``Psi`` (``<= d - r``).
    p_omega : int
        Columns of the next ``Omega`` (``<= k - r``).
    seed : int, Generator or None
        For random fill columns (``numpy.random.default_rng``).
    drop_tol : float
        Relative tolerance of the rank-revealing steps.

    Returns
    -------
    SubspaceUpdate
    """
    U = np.asarray(U, dtype=np.float64)
    V = np.asarray(V, dtype=np.float64)
    G_VO = np.asarray(G_VO, dtype=np.float64)
    Gt_Psi = np.asarray(Gt_Psi, dtype=np.float64)
    d, r = U.shape
    k = V.shape[0]
    if V.shape[1] != r or G_VO.shape[0] != d or Gt_Psi.shape[0] != k or G_VO.shape[1] < r:
        raise ConfigError(
            f"subspace_update: U {U.shape}, V {V.shape}, G_VO {G_VO.shape} and Gt_Psi "
            f"{Gt_Psi.shape} disagree; expect (d, r), (k, r), (d, r + p), (k, p')"
        )
    if not (0 <= p_psi <= d - r and 0 <= p_omega <= k - r):
        raise ConfigError(
            f"subspace_update: need 0 <= p_psi <= {d - r} and 0 <= p_omega <= {k - r}, "
            f"got {p_psi} and {p_omega}"
        )
    rng = np.random.default_rng(seed)
    sig = 0.0
    for A in (G_VO, Gt_Psi):
        if A.size:
            sig = max(sig, float(np.linalg.norm(A, 2)))
    P = G_VO.copy()
    if r:
        for _ in range(2):
            P -= U @ (U.T @ P)
    Psi = _pad(_top_left(P, p_psi, drop_tol), U, p_psi, rng)
    Om = orth_against(Gt_Psi, V, drop_tol) if Gt_Psi.shape[1] else np.zeros((k, 0))
    Omega = _pad(np.ascontiguousarray(Om[:, :p_omega]), V, p_omega, rng)
    return SubspaceUpdate(sigma_lower=sig, Psi=Psi, Omega=Omega)
