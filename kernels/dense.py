"""Dense elementwise kernels of the refinement (n x k score matrices).

Each is one parallel pass over rows with no temporaries, where the numpy
expression would make two or three passes and allocate n x k arrays. Every
entry is computed independently with the same arithmetic as the numpy
expression it replaces, so the results do not depend on the thread count.
"""

from __future__ import annotations

from numba import njit, prange

from .threads import kernel_guard

__all__ = ["extrapolate", "add_row"]


@njit(nogil=True, cache=True, parallel=True)
def extrapolate_kernel(X, P, beta, out):  # pragma: no cover - compiled
    """``out = X + beta * (X - P)``; all (n, k) float64, ``out`` may not alias ``P``."""
    n, k = X.shape
    for i in prange(n):
        for j in range(k):
            x = X[i, j]
            out[i, j] = x + beta * (x - P[i, j])


@njit(nogil=True, cache=True, parallel=True)
def add_row_kernel(Z, c):  # pragma: no cover - compiled
    """``Z += c`` in place, ``Z`` (n, k) float64, ``c`` (k,) float64."""
    n, k = Z.shape
    for i in prange(n):
        for j in range(k):
            Z[i, j] += c[j]


def extrapolate(X, P, beta: float, out):
    """``out = X + beta (X - P)`` for (n, k) float64 C arrays (momentum step).

    Parameters
    ----------
    X, P : ndarray, shape (n, k)
        Current and previous scores.
    beta : float
    out : ndarray, shape (n, k)
        Written; may be ``X`` itself but not ``P``.

    Returns
    -------
    out : ndarray, shape (n, k)
    """
    with kernel_guard():
        extrapolate_kernel(X, P, float(beta), out)
    return out


def add_row(Z, c):
    """``Z += c`` (broadcast over rows) for a (n, k) float64 C array; returns ``Z``."""
    with kernel_guard():
        add_row_kernel(Z, c)
    return Z
