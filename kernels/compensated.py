"""Compensated sums of d-row partials: the same result whatever the grouping.

A pass sums one ``d x m`` term per block (``X_b^T D_b``). Added in plain
floating point the result depends on how the blocks are grouped (one running
sum on the serial backend, one sum per worker range and then across ranges on
dask), by about one rounding per addition. Here the sum is kept as a pair
``(S, C)``: each block term is added with an error-free transformation, the
two-sum ``s + e = a + b`` exactly (Knuth, *The Art of Computer Programming*
vol. 2, §4.2.2, Theorem B; branch-free, no ordering of ``|a|, |b|``), ``S``
takes ``s`` and ``C`` collects the errors ``e``. Two pairs combine the same
way: two-sum of ``S1 + S2``, then ``C = C1 + C2 + e``. The value is
``S + C``. This is the cascaded summation ``Sum2`` of Ogita, Rump and Oishi,
"Accurate sum and dot product", SIAM J. Sci. Comput. 26(6), 2005
(Neumaier's 1974 compensated sum with Knuth's two-sum in place of the
ordered one). Its error bound there (quoted from memory), ``|S + C - sum| <= eps |sum| +
gamma_{n-1}^2 sum |x_i|``, means ``S + C`` is the exactly rounded sum unless
the exact sum lies within ``gamma_{n-1}^2 sum |x_i|`` (about ``n^2 * 1e-32``
relative) of a rounding boundary — so every grouping of the same block terms
gives the same bits except with that (vanishing) chance.

Kernels (pure functions over float64 C arrays, parallel over rows, each
element read once):

* :func:`compensated_add_kernel` — ``(S, C) += B`` for a block term formed in
  a zeroed buffer ``B`` (CSR path), and ``B`` set back to zero in the same
  sweep so the buffer serves the next block;
* :func:`compensated_combine_kernel` — ``(S, C) += (S2, C2)``;
* :func:`csc_t_matmul_compensated_kernel` — ``(S, C) += X^T D`` on a
  transposed block (:mod:`kernels.csc`): each column's block term is formed in
  an ``m``-value buffer of its thread, in the row order of the CSR kernel, so
  no ``d x m`` buffer is needed and both paths give the same bits.

A row whose block term is all zeros is skipped (adding an exact zero changes
nothing), so on both paths an untouched row costs one read of ``B`` at most.
Numba compiles without fast-math and LLVM does not contract ``a * b + c``
into a fused multiply-add unless asked, so the two-sum stays exact.
"""

from __future__ import annotations

import numba
import numpy as np
from numba import njit, prange

from .errors import KernelInputError
from .sparse import _check_dense
from .threads import kernel_guard

__all__ = ["compensated_add", "compensated_combine", "csc_t_matmul_compensated"]

# columns dealt to threads in interleaved groups of 64, as in kernels.csc
_GROUP = 64


@njit(nogil=True, cache=True, inline="always")
def _two_sum(a, b):  # pragma: no cover - compiled
    """``(s, e)`` with ``s = fl(a + b)`` and ``s + e = a + b`` exactly (Knuth's two-sum)."""
    s = a + b
    bp = s - a
    ap = s - bp
    return s, (a - ap) + (b - bp)


@njit(nogil=True, cache=True, parallel=True)
def compensated_add_kernel(B, S, C):  # pragma: no cover - compiled
    """``(S, C) += B`` then ``B = 0``; all (d, m) float64 C arrays."""
    d, m = B.shape
    for i in prange(d):
        nonzero = False
        for j in range(m):
            if B[i, j] != 0.0:
                nonzero = True
                break
        if not nonzero:
            continue
        for j in range(m):
            s, e = _two_sum(S[i, j], B[i, j])
            S[i, j] = s
            C[i, j] += e
            B[i, j] = 0.0


@njit(nogil=True, cache=True, parallel=True)
def compensated_combine_kernel(S, C, S2, C2):  # pragma: no cover - compiled
    """``(S, C) += (S2, C2)``: ``S = fl(S + S2)``, ``C = C + C2 + error``."""
    d, m = S.shape
    for i in prange(d):
        for j in range(m):
            s, e = _two_sum(S[i, j], S2[i, j])
            S[i, j] = s
            C[i, j] = (C[i, j] + C2[i, j]) + e


@njit(nogil=True, cache=True, parallel=True)
def csc_t_matmul_compensated_kernel(seg, rows, vals, D, S, C, n_threads):  # pragma: no cover
    """``(S, C) += X^T D`` for a transposed block, one column's term at a time.

    Parameters
    ----------
    seg, rows, vals : a :class:`kernels.csc.BlockCSC`
    D : (n_b, m) float64
    S, C : (d, m) float64, the compensated accumulator
    n_threads : int
        Threads dealt interleaved groups of 64 columns (any value gives the same result).
    """
    n_parts = seg.shape[0] - 1
    d = seg.shape[1]
    m = D.shape[1]
    n_groups = (d + _GROUP - 1) // _GROUP
    for t in prange(n_threads):
        term = np.empty(m)  # the thread's block-term buffer, one column at a time
        for g in range(t, n_groups, n_threads):
            for c in range(g * _GROUP, min(d, (g + 1) * _GROUP)):
                a = seg[0, c]
                z = seg[n_parts, c]
                if a == z:
                    continue
                for j in range(m):
                    term[j] = 0.0
                for q in range(a, z):
                    i = rows[q]
                    v = np.float64(vals[q])
                    for j in range(m):
                        term[j] += v * D[i, j]
                nonzero = False
                for j in range(m):
                    if term[j] != 0.0:
                        nonzero = True
                        break
                if not nonzero:
                    continue
                for j in range(m):
                    s, e = _two_sum(S[c, j], term[j])
                    S[c, j] = s
                    C[c, j] += e


def _check_pair(names: tuple[str, ...], arrays: tuple[np.ndarray, ...], where: str) -> None:
    shape = arrays[0].shape
    for name, a in zip(names, arrays, strict=True):
        if (
            not isinstance(a, np.ndarray)
            or a.dtype != np.float64
            or a.ndim != 2
            or a.shape != shape
            or not a.flags.c_contiguous
            or not a.flags.writeable
        ):
            raise KernelInputError(
                f"{where}: {name} must be a writable C-contiguous float64 array of shape "
                f"{shape}, got {getattr(a, 'dtype', type(a).__name__)} "
                f"{getattr(a, 'shape', None)}; allocate it with numpy.zeros"
            )


def compensated_add(B: np.ndarray, S: np.ndarray, C: np.ndarray, *,
                    where: str = "compensated sum") -> None:
    """Add a block term into a compensated accumulator and zero the term's buffer.

    Parameters
    ----------
    B : (d, m) float64
        The block term (formed in a zeroed buffer); zero again on return.
    S, C : (d, m) float64
        Sum and compensation, updated in place; the value is ``S + C``.
    where : str
        Name for error messages.
    """
    _check_pair(("B", "S", "C"), (B, S, C), where)
    if B.size == 0:
        return
    with kernel_guard():
        compensated_add_kernel(B, S, C)


def compensated_combine(S: np.ndarray, C: np.ndarray, S2: np.ndarray, C2: np.ndarray, *,
                        where: str = "compensated sum") -> None:
    """``(S, C) += (S2, C2)``: combine two compensated accumulators (in place in the first).

    Parameters
    ----------
    S, C : (d, m) float64
        The first accumulator, updated in place.
    S2, C2 : (d, m) float64
        The second, read only (need not be writable).
    where : str
        Name for error messages.
    """
    _check_pair(("S", "C"), (S, C), where)
    for name, a in (("S2", S2), ("C2", C2)):
        if not isinstance(a, np.ndarray) or a.dtype != np.float64 or a.shape != S.shape:
            raise KernelInputError(f"{where}: {name} must be a float64 array of shape {S.shape}, "
                             f"got {getattr(a, 'dtype', type(a).__name__)} "
                             f"{getattr(a, 'shape', None)}")
    if S.size == 0:
        return
    with kernel_guard():
        compensated_combine_kernel(S, C, np.ascontiguousarray(S2), np.ascontiguousarray(C2))


def csc_t_matmul_compensated(T, D: np.ndarray, S: np.ndarray, C: np.ndarray, *,
                             where: str = "CSR block") -> None:
    """``(S, C) += X^T D`` for a transposed block (:class:`kernels.csc.BlockCSC`).

    Gives the bits of :func:`kernels.sparse.csr_t_matmul_accumulate` into a
    zeroed buffer followed by :func:`compensated_add`, on sorted blocks, for
    any thread count.

    Parameters
    ----------
    T : BlockCSC
        The block, shape (n_b, d).
    D : (n_b, m) float32 or float64
    S, C : (d, m) float64
        Compensated accumulator, updated in place.
    where : str
        Data source name for error messages.
    """
    n, d = T.shape
    _check_dense("D", D, n, where)
    D = np.ascontiguousarray(D, dtype=np.float64)
    _check_pair(("S", "C"), (S, C), where)
    if S.shape != (d, D.shape[1]):
        raise KernelInputError(f"{where}: S and C must be {(d, D.shape[1])}, got {S.shape}")
    if n == 0 or D.shape[1] == 0 or T.nnz == 0:
        return
    threads = max(1, min(int(numba.get_num_threads()), (d + _GROUP - 1) // _GROUP))
    with kernel_guard():
        csc_t_matmul_compensated_kernel(T.seg, T.rows, T.vals, D, S, C, threads)
