"""CSR products: ``X @ B`` and ``out += X^T @ D`` for one row block.

The jitted kernels (``*_kernel``) are pure functions over raw CSR arrays
(``indptr``, ``indices``, ``data``), a dense operand and a caller-owned
``out`` buffer; they accumulate in float64 and never allocate. The public
functions are a thin Python layer that checks shapes and dtypes, holds the
threading guard (see :mod:`kernels.threads`) and turns the kernels' bad-entry
count into a :class:`~.errors.KernelInputError`.

Both products are deterministic: the result does not depend on the number of
threads or on their timing. ``X @ B`` is parallel over rows (each output row
is written by one thread); ``X^T @ D`` is parallel over fixed groups of output
rows (feature columns of ``X``): each thread scans the whole block but only
accumulates the columns it owns, in row order, so every output entry is summed
in exactly the order of a serial pass and no thread-private d x m buffers are
needed.
"""

from __future__ import annotations

import numba
import numpy as np
from numba import njit, prange

from .errors import KernelInputError
from .threads import kernel_guard

# Columns are dealt to threads in groups of 2**_GROUP_SHIFT consecutive ids:
# interleaving balances skewed (frequency-sorted) vocabularies, and groups of
# 64 rows of ``out`` keep threads off each other's cache lines.
_GROUP_SHIFT = 6


@njit(nogil=True, cache=True, parallel=True)
def csr_matmul_dense_kernel(indptr, indices, data, B, out):  # pragma: no cover - compiled
    """``out[:] = X @ B``; returns the number of bad rows/entries skipped.

    Parameters
    ----------
    indptr : (n_b + 1,) int32 or int64
    indices : (nnz,) int32 or int64, column ids in ``[0, d)``
    data : (nnz,) float32 or float64
    B : (d, m) float32 or float64
    out : (n_b, m) float64, overwritten
    """
    n = out.shape[0]
    m = out.shape[1]
    d = B.shape[0]
    nnz = min(indices.shape[0], data.shape[0])
    bad = 0
    for i in prange(n):
        for j in range(m):
            out[i, j] = 0.0
        a = indptr[i]
        e = indptr[i + 1]
        if a < 0 or e > nnz or a > e:
            bad += 1
            continue
        for q in range(a, e):
            c = indices[q]
            if c < 0 or c >= d:
                bad += 1
                continue
            v = np.float64(data[q])
            for j in range(m):
                out[i, j] += v * B[c, j]
    return bad


@njit(nogil=True, cache=True, parallel=True)
def csr_t_matmul_accumulate_kernel(
    indptr, indices, data, D, out, n_parts
):  # pragma: no cover - compiled
    """``out += X^T @ D``; returns the number of bad rows/entries skipped.

    Parameters
    ----------
    indptr : (n_b + 1,) int32 or int64
    indices : (nnz,) int32 or int64, column ids in ``[0, d)``
    data : (nnz,) float32 or float64
    D : (n_b, m) float32 or float64
    out : (d, m) float64, accumulated into
    n_parts : int
        Number of column groups worked on in parallel. The result is the same
        for every value (each ``out`` row is summed in row order by one part).
    """
    n = D.shape[0]
    m = D.shape[1]
    d = out.shape[0]
    nnz = min(indices.shape[0], data.shape[0])
    bad = 0
    for t in prange(n_parts):
        for i in range(n):
            a = indptr[i]
            e = indptr[i + 1]
            if a < 0 or e > nnz or a > e:
                if t == 0:
                    bad += 1
                continue
            for q in range(a, e):
                c = indices[q]
                if c < 0 or c >= d:
                    if t == 0:
                        bad += 1
                    continue
                if (c >> _GROUP_SHIFT) % n_parts != t:
                    continue
                v = np.float64(data[q])
                for j in range(m):
                    out[c, j] += v * D[i, j]
    return bad


def _check_csr(indptr: np.ndarray, indices: np.ndarray, data: np.ndarray, where: str) -> int:
    """Validate the raw CSR arrays' kinds and lengths; return the row count."""
    for name, arr, kinds in (
        ("indptr", indptr, "iu"),
        ("indices", indices, "iu"),
        ("data", data, "f"),
    ):
        if not isinstance(arr, np.ndarray) or arr.ndim != 1 or arr.dtype.kind not in kinds:
            raise KernelInputError(
                f"{where}: {name} must be a 1-D {'integer' if kinds == 'iu' else 'float'} "
                f"array, got {getattr(arr, 'dtype', type(arr).__name__)} with shape "
                f"{getattr(arr, 'shape', None)}; pass the CSR arrays of a scipy.sparse matrix"
            )
    if indptr.shape[0] < 1:
        raise KernelInputError(
            f"{where}: indptr is empty; a CSR block of n rows needs n + 1 pointers"
        )
    if indices.shape[0] != data.shape[0]:
        raise KernelInputError(
            f"{where}: indices has {indices.shape[0]} entries but data has {data.shape[0]}; "
            "both must hold one value per stored entry"
        )
    return indptr.shape[0] - 1


def _check_out(out: np.ndarray, shape: tuple[int, int], where: str) -> None:
    if (
        not isinstance(out, np.ndarray)
        or out.dtype != np.float64
        or out.shape != shape
        or not out.flags.writeable
    ):
        raise KernelInputError(
            f"{where}: out must be a writable float64 array of shape {shape}, got "
            f"{getattr(out, 'dtype', type(out).__name__)} {getattr(out, 'shape', None)}; "
            "allocate it with numpy.zeros(shape)"
        )


def _check_dense(name: str, arr: np.ndarray, rows: int | None, where: str) -> None:
    if not isinstance(arr, np.ndarray) or arr.ndim != 2 or arr.dtype.kind != "f":
        raise KernelInputError(
            f"{where}: {name} must be a 2-D float32/float64 array, got "
            f"{getattr(arr, 'dtype', type(arr).__name__)} {getattr(arr, 'shape', None)}"
        )
    if rows is not None and arr.shape[0] != rows:
        raise KernelInputError(
            f"{where}: {name} has {arr.shape[0]} rows but the block has {rows}; "
            "pass one row of the dense operand per block row"
        )


def _raise_bad_entries(indptr, indices, n_cols: int, where: str, row_offset: int = 0) -> None:
    """Locate the first bad pointer or column id (error path only).

    Rows and columns are named as the user counts them: from 1, the block's
    first row being ``row_offset + 1`` (as Matrix Market and the ingest
    messages count).
    """
    nnz = indices.shape[0]
    ptr = np.asarray(indptr, dtype=np.int64)
    bad_rows = np.flatnonzero((ptr[:-1] < 0) | (ptr[1:] > nnz) | (ptr[:-1] > ptr[1:]))
    if bad_rows.size:
        r = int(bad_rows[0])
        raise KernelInputError(
            f"{where}: row {row_offset + r + 1}: its row pointers (indptr[{r}]={int(ptr[r])}, "
            f"indptr[{r + 1}]={int(ptr[r + 1])} in the block) lie outside 0..{nnz} or decrease; "
            "rebuild the block from a valid CSR matrix"
        )
    bad = np.flatnonzero((indices < 0) | (indices >= n_cols))
    q = int(bad[0]) if bad.size else -1
    row = int(np.searchsorted(ptr, q, side="right") - 1) if q >= 0 else -1
    c = int(indices[q]) if q >= 0 else None
    col = "?" if c is None else f"{c} (column {c + 1} of {n_cols})"
    raise KernelInputError(
        f"{where}: row {row_offset + row + 1}: column id {col} is outside 0..{n_cols - 1}; "
        "the dense operand must have one row per column of the matrix"
    )


def csr_matmul_dense(
    indptr: np.ndarray,
    indices: np.ndarray,
    data: np.ndarray,
    B: np.ndarray,
    out: np.ndarray,
    *,
    where: str = "CSR block",
    row_offset: int = 0,
) -> np.ndarray:
    """Dense product of a CSR row block: ``out[:] = X @ B``.

    Parameters
    ----------
    indptr : (n_b + 1,) int32 or int64
        Row pointers of the block (``indptr[0]`` need not be 0).
    indices : (nnz,) int32 or int64
        Column ids in ``[0, d)``.
    data : (nnz,) float32 or float64
    B : (d, m) float32 or float64
        Dense operand (C order is fastest).
    out : (n_b, m) float64
        Caller-owned output, overwritten.
    where : str
        Name of the data source for error messages.
    row_offset : int
        Index of the block's first row in the data source (0-based), so that
        messages name rows as the user counts them (from 1).

    Returns
    -------
    out : (n_b, m) float64

    Raises
    ------
    KernelInputError
        On wrong shapes/dtypes, or pointers/column ids out of range.
    """
    n = _check_csr(indptr, indices, data, where)
    _check_dense("B", B, None, where)
    B = np.asarray(B, dtype=np.float64)  # one compiled variant for the dense operand
    _check_out(out, (n, B.shape[1]), where)
    if n == 0 or B.shape[1] == 0:
        out[...] = 0.0
        if n == 0:
            return out
    with kernel_guard():
        bad = csr_matmul_dense_kernel(indptr, indices, data, B, out)
    if bad:
        _raise_bad_entries(indptr, indices, B.shape[0], where, row_offset)
    return out


def csr_t_matmul_accumulate(
    indptr: np.ndarray,
    indices: np.ndarray,
    data: np.ndarray,
    D: np.ndarray,
    out: np.ndarray,
    *,
    where: str = "CSR block",
    row_offset: int = 0,
) -> np.ndarray:
    """Accumulate the transposed product of a CSR row block: ``out += X^T @ D``.

    Deterministic: the same inputs give bit-identical results for any number
    of threads (each output row is summed in row order by one thread).

    Parameters
    ----------
    indptr : (n_b + 1,) int32 or int64
    indices : (nnz,) int32 or int64
        Column ids in ``[0, d)``.
    data : (nnz,) float32 or float64
    D : (n_b, m) float32 or float64
        One dense row per block row.
    out : (d, m) float64
        Caller-owned accumulator (not zeroed).
    where : str
        Name of the data source for error messages.
    row_offset : int
        Index of the block's first row in the data source (0-based), for messages.

    Returns
    -------
    out : (d, m) float64

    Raises
    ------
    KernelInputError
        On wrong shapes/dtypes, or pointers/column ids out of range (``out``
        then holds the contributions of the valid entries only).
    """
    n = _check_csr(indptr, indices, data, where)
    _check_dense("D", D, n, where)
    D = np.asarray(D, dtype=np.float64)
    if not isinstance(out, np.ndarray) or out.ndim != 2 or out.shape[1] != D.shape[1]:
        raise KernelInputError(
            f"{where}: out must be (d, {D.shape[1]}) to accumulate X^T @ D, got "
            f"{getattr(out, 'shape', None)}"
        )
    _check_out(out, (out.shape[0], D.shape[1]), where)
    if n == 0 or D.shape[1] == 0 or indices.shape[0] == 0:
        return out
    n_parts = max(1, min(int(numba.get_num_threads()), (out.shape[0] >> _GROUP_SHIFT) + 1))
    with kernel_guard():
        bad = csr_t_matmul_accumulate_kernel(indptr, indices, data, D, out, n_parts)
    if bad:
        _raise_bad_entries(indptr, indices, out.shape[0], where, row_offset)
    return out
