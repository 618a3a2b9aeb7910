"""Rank-revealing orthonormalization for the solver's subspace step.

``orth`` must be rank-revealing: a plain QR of a rank-deficient block returns
spurious directions (DESIGN section 7 step 2). :func:`orth_rank_revealing` takes a
Householder QR and then the SVD of its small triangular factor, and keeps only
the directions whose singular value is above ``tol`` times the largest;
:func:`orth_against` first projects out an orthonormal basis (twice). The block
power iteration that uses them is :mod:`ranktide.solver.subspace` (one copy).
"""

from __future__ import annotations

import numpy as np

from .errors import KernelConfigError
from .svd import qr_tall, svd


def orth_rank_revealing(A: np.ndarray, tol: float = 1e-10, *, atol: float = 0.0) -> np.ndarray:
    """Orthonormal basis of the numerical range of ``A``, dependent columns dropped.

    Parameters
    ----------
    A : (m, c) array
    tol : float
        Relative drop tolerance: directions with singular value
        ``<= tol * sigma_max(A)`` are dropped.
    atol : float
        Absolute drop tolerance (directions with singular value ``<= atol``
        are dropped as well).

    Returns
    -------
    Q : (m, c') float64 with orthonormal columns, ``c' <= min(m, c)``
        Ordered by decreasing singular value of ``A``; ``c' = 0`` for a zero
        block.
    """
    A = np.asarray(A, dtype=np.float64)
    if A.ndim != 2:
        raise KernelConfigError(f"orth_rank_revealing: A must be 2-D, got shape {A.shape}")
    m, c = A.shape
    if c == 0 or m == 0:
        return np.zeros((m, 0))
    if not np.all(np.isfinite(A)):
        raise KernelConfigError("orth_rank_revealing: A has a non-finite entry")
    Q, R = qr_tall(A)
    Ur, S, _ = svd(R)
    if S[0] <= 0.0:
        return np.zeros((m, 0))
    keep = S > max(tol * S[0], atol)
    return np.ascontiguousarray(Q @ Ur[:, keep])


def orth_against(A: np.ndarray, U: np.ndarray | None, tol: float = 1e-10) -> np.ndarray:
    """Orthonormal basis of ``(I - U U^T) A``, dependent columns dropped.

    Projects twice (classical Gram–Schmidt with reorthogonalization, Giraud
    et al. 2005) and drops directions whose norm after projection is at most
    ``tol`` times the largest column norm of ``A`` (so columns of ``A`` that
    lie in ``span(U)`` do not come back as noise).

    Parameters
    ----------
    A : (m, c) array
    U : (m, r) array with orthonormal columns, or None
    tol : float

    Returns
    -------
    Q : (m, c') float64, orthonormal columns, orthogonal to ``U``
    """
    A = np.array(A, dtype=np.float64)
    if A.ndim != 2:
        raise KernelConfigError(f"orth_against: A must be 2-D, got shape {A.shape}")
    if A.shape[1] == 0:
        return np.zeros((A.shape[0], 0))
    scale = float(np.max(np.linalg.norm(A, axis=0)))
    if U is not None and np.shape(U)[1]:
        U = np.asarray(U, dtype=np.float64)
        if U.shape[0] != A.shape[0]:
            raise KernelConfigError(
                f"orth_against: U has {U.shape[0]} rows but A has {A.shape[0]}; they must match"
            )
        for _ in range(2):
            A -= U @ (U.T @ A)
    return orth_rank_revealing(A, tol, atol=tol * scale)
