"""Thin SVD with a fallback LAPACK driver, and a QR for tall matrices through BLAS.

numpy's SVD calls LAPACK ``gesdd`` (divide and conquer), which can fail to
converge on ordinary matrices: measured here on a 20000 x 200 float64 gradient
of the planted softmax benchmark, where ``gesdd`` raised "SVD did not converge"
and ``gesvd`` (QR iteration) returned the same singular values as the SVD of
the transpose. :func:`svd` tries ``gesdd`` first (the faster) and falls back to
``gesvd`` through ``scipy.linalg.svd``.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

__all__ = ["svd", "singular_values", "qr_tall"]


def svd(A: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Thin SVD ``A = U diag(s) Vt``.

    Parameters
    ----------
    A : (m, n) array

    Returns
    -------
    U : (m, min(m, n)) ndarray
    s : (min(m, n),) ndarray, descending
    Vt : (min(m, n), n) ndarray
    """
    try:
        return np.linalg.svd(A, full_matrices=False)
    except np.linalg.LinAlgError:
        return scipy.linalg.svd(A, full_matrices=False, lapack_driver="gesvd", check_finite=True)


def singular_values(A: np.ndarray) -> np.ndarray:
    """Singular values of ``A`` (m, n), descending, shape (min(m, n),)."""
    try:
        return np.linalg.svd(A, compute_uv=False)
    except np.linalg.LinAlgError:
        return scipy.linalg.svd(A, compute_uv=False, lapack_driver="gesvd", check_finite=True)


#: CholeskyQR2 is used while the first Cholesky factor's diagonal spans at most this
#: ratio (a cheap bound on the conditioning); beyond it, LAPACK's Householder QR.
#: After two passes orthogonality is at rounding level for condition numbers up to
#: about 1e7 (Yamamoto et al. 2015, CholeskyQR2); 1e6 keeps a margin.
_CHOLQR_MAX_RATIO = 1e6


def qr_tall(A: np.ndarray, *, overwrite: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Thin QR ``A = Q R`` of a tall matrix, ``Q`` (m, c) orthonormal, ``R`` (c, c).

    For ``m >= 8 c`` it uses CholeskyQR2 (Fukaya, Nakatsukasa, Yanagisawa &
    Yamamoto 2014; Yamamoto et al. 2015): ``R1 = chol(A^T A)``, ``Q1 = A R1^{-1}``,
    then once more on ``Q1``. Both passes are matrix products and triangular
    solves (BLAS level 3), several times faster than Householder QR on tall
    blocks (measured here: 262144 x 50 in 0.6 s against 2.1 s). When ``A`` is
    rank deficient or ill-conditioned (the Cholesky factor fails or its diagonal
    spans more than ``1e6``), and for other shapes, LAPACK's Householder QR is
    used. ``R``'s diagonal is positive on the CholeskyQR2 path.

    Parameters
    ----------
    A : (m, c) array
    overwrite : bool
        ``A`` (a C-ordered float64 array) may be overwritten: on the
        CholeskyQR2 path ``Q`` then takes its memory, so the factorization needs
        no ``m x c`` array besides ``A`` (the caller drops ``A``).

    Returns
    -------
    Q : (m, c) ndarray
    R : (c, c) ndarray
    """
    A = np.asarray(A, dtype=np.float64)
    m, c = A.shape
    if c == 0 or m < 8 * c:
        return np.linalg.qr(A)
    in_place = overwrite and A.flags.c_contiguous and A.flags.writeable
    R = np.eye(c)
    Q = A
    for _ in range(2):
        try:
            L = np.linalg.cholesky(Q.T @ Q)
            diag = np.abs(np.diag(L))
            ok = diag.min() > diag.max() / _CHOLQR_MAX_RATIO
        except np.linalg.LinAlgError:
            ok = False
        if not ok:  # Householder on what is left: Q R = (Q' R') R
            Qh, Rh = np.linalg.qr(Q)
            return Qh, Rh @ R
        # Q L^-T: a triangular solve on Q^T (in Q's memory when it may be overwritten)
        Q = scipy.linalg.solve_triangular(L, Q.T, lower=True, check_finite=False,
                                          overwrite_b=in_place).T
        in_place = in_place or Q.flags.c_contiguous  # a copy of A is ours to overwrite
        R = L.T @ R
    return np.ascontiguousarray(Q), R

