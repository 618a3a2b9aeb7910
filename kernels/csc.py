"""A row block in column-major order, and the two products of a pass on it.

The solver pass needs both ``X @ Q`` (Q: d x q, gathered by column id) and
``out += X^T @ D`` (scattered by column id). On a CSR block both touch the d-row
operand in random order, and when it is larger than the cache every entry costs
a cache miss. Transposed once per block, the block is walked column by
column instead: ``Q`` and ``out`` are read and written in order, and the
random accesses go to the block's own ``n_b``-row operands, which stay in
cache. Measured on a 21 M-entry store (d = 262,144, q = 24, 2 cores), the two
products took 1.85 s on CSR and 1.0 s here, transposition included
(``tools/bench_kernels.py`` reports the same comparison).

Layout (:class:`BlockCSC`): the rows are cut into ``P`` contiguous parts of
about equal entry counts; within column ``c``, part ``t``'s entries are
``seg[t, c] : seg[t + 1, c]`` and the whole column is ``seg[0, c] : seg[P, c]``,
rows ascending. Each part is transposed by one thread, so the result does not
depend on the thread count or timing; and every sum is taken in the order of
the CSR kernels of :mod:`kernels.sparse` (``X^T D`` in row order; ``X Q`` in
column order, which is the CSR order when column ids are sorted within rows),
so both paths give bit-identical results on sorted blocks.

The column walk costs ``O(d)`` per part on top of ``O(nnz)``, so a block needs
at least about ``d / 2`` entries (:func:`worth_transposing`); and when a few
frequent columns take most entries, the CSR kernels find their operand rows in
cache and stay faster. The gradient pass therefore measures both paths on its
first blocks and keeps the faster (:mod:`ranktide.passes.kernel_path`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np
from numba import njit, prange

from .errors import KernelInputError
from .sparse import _check_csr, _check_dense, _check_out, _raise_bad_entries
from .threads import kernel_guard

# the transposition pays off from about d / 2 entries per block (measured: see
# the module docstring); below that the CSR kernels are used
MIN_ENTRIES_PER_COLUMN = 0.5
# columns are dealt to threads in interleaved groups of 64 (skewed vocabularies)
_GROUP = 64


@njit(nogil=True, cache=True, parallel=True)
def csc_count_kernel(indptr, indices, cuts, seg):  # pragma: no cover - compiled
    """Count each part's entries per column into ``seg[t + 1, c]``; return bad entries.

    Parameters
    ----------
    indptr : (n_b + 1,) int, pointers into ``indices`` (need not start at 0)
    indices : (nnz,) int
    cuts : (P + 1,) int64, row cuts of the parts (``cuts[0] = 0``, ``cuts[P] = n_b``)
    seg : (P + 1, d) int64, zeroed
    """
    n_parts = cuts.shape[0] - 1
    d = seg.shape[1]
    nnz = indices.shape[0]
    bad = 0
    for t in prange(n_parts):
        row = seg[t + 1]
        for i in range(cuts[t], cuts[t + 1]):
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
                row[c] += 1
    return bad


@njit(nogil=True, cache=True)
def csc_scan_kernel(seg):  # pragma: no cover - compiled
    """Turn the counts ``seg[1:]`` into part offsets in place; return the entry count."""
    n_parts = seg.shape[0] - 1
    d = seg.shape[1]
    pos = 0
    for c in range(d):
        for t in range(n_parts):
            k = seg[t + 1, c]  # part t's count, read before step t + 1 overwrites it
            seg[t, c] = pos
            pos += k
        seg[n_parts, c] = pos
    return pos


@njit(nogil=True, cache=True, parallel=True)
def csc_scatter_kernel(indptr, indices, data, cuts, seg, cursor, rows, vals):  # pragma: no cover
    """Place every entry at its column slot (rows ascending within a column).

    Parameters
    ----------
    indptr, indices, data : the CSR block (validated by :func:`csc_count_kernel`)
    cuts : (P + 1,) int64
    seg : (P + 1, d) int64, the offsets from :func:`csc_scan_kernel`
    cursor : (P, d) int64, scratch
    rows : (nnz,) int32, out: block-local row ids
    vals : (nnz,) float, out: values
    """
    n_parts = cuts.shape[0] - 1
    d = seg.shape[1]
    for t in prange(n_parts):
        cur = cursor[t]
        for c in range(d):
            cur[c] = seg[t, c]
        for i in range(cuts[t], cuts[t + 1]):
            for q in range(indptr[i], indptr[i + 1]):
                c = indices[q]
                p = cur[c]
                cur[c] = p + 1
                rows[p] = i
                vals[p] = data[q]


@njit(nogil=True, cache=True, parallel=True)
def csc_matmul_dense_kernel(seg, rows, vals, cuts, B, out):  # pragma: no cover - compiled
    """``out[:] = X @ B``: part ``t`` walks the columns and writes only its own rows.

    Parameters
    ----------
    seg, rows, vals, cuts : a :class:`BlockCSC`
    B : (d, m) float64
    out : (n_b, m) float64, overwritten
    """
    n_parts = cuts.shape[0] - 1
    d = seg.shape[1]
    m = out.shape[1]
    for t in prange(n_parts):
        for i in range(cuts[t], cuts[t + 1]):
            for j in range(m):
                out[i, j] = 0.0
        for c in range(d):
            for q in range(seg[t, c], seg[t + 1, c]):
                i = rows[q]
                v = np.float64(vals[q])
                for j in range(m):
                    out[i, j] += v * B[c, j]


@njit(nogil=True, cache=True, parallel=True)
def csc_t_matmul_accumulate_kernel(seg, rows, vals, D, out, n_threads):  # pragma: no cover
    """``out += X^T @ D``: each output row is summed by one thread, in row order.

    Parameters
    ----------
    seg, rows, vals : a :class:`BlockCSC`
    D : (n_b, m) float64
    out : (d, m) float64, accumulated into
    n_threads : int
        Threads dealt interleaved groups of 64 columns (any value gives the same result).
    """
    n_parts = seg.shape[0] - 1
    d = seg.shape[1]
    m = D.shape[1]
    n_groups = (d + _GROUP - 1) // _GROUP
    for t in prange(n_threads):
        for g in range(t, n_groups, n_threads):
            for c in range(g * _GROUP, min(d, (g + 1) * _GROUP)):
                for q in range(seg[0, c], seg[n_parts, c]):
                    i = rows[q]
                    v = np.float64(vals[q])
                    for j in range(m):
                        out[c, j] += v * D[i, j]


@dataclass(frozen=True)
class BlockCSC:
    """A CSR row block transposed by :func:`block_csc` (see the module docstring).

    Attributes
    ----------
    shape : (n_b, d)
    cuts : (P + 1,) int64
        Row cuts of the parts.
    seg : (P + 1, d) int64
        Part offsets within each column.
    rows : (nnz,) int32
        Block-local row id of each entry, column by column.
    vals : (nnz,) float32 or float64
        The entries' values, in the same order.
    """

    shape: tuple[int, int]
    cuts: np.ndarray
    seg: np.ndarray
    rows: np.ndarray
    vals: np.ndarray

    @property
    def nnz(self) -> int:
        return int(self.rows.shape[0])

    @property
    def nbytes(self) -> int:
        return int(self.seg.nbytes + self.rows.nbytes + self.vals.nbytes + self.cuts.nbytes)


def worth_transposing(nnz: int, n_cols: int) -> bool:
    """True when a block of ``nnz`` entries over ``n_cols`` columns is faster transposed."""
    return nnz > 0 and nnz >= MIN_ENTRIES_PER_COLUMN * n_cols


def _cuts(indptr: np.ndarray, n_parts: int) -> np.ndarray:
    """Row cuts of ``n_parts`` parts with about equal entry counts."""
    n = indptr.shape[0] - 1
    ptr = np.asarray(indptr, dtype=np.int64)
    targets = ptr[0] + (ptr[-1] - ptr[0]) * np.arange(n_parts + 1) // max(n_parts, 1)
    cuts = np.searchsorted(ptr, targets, side="left").astype(np.int64)
    cuts[0], cuts[-1] = 0, n
    return np.maximum.accumulate(np.clip(cuts, 0, n))


def block_csc(
    indptr: np.ndarray,
    indices: np.ndarray,
    data: np.ndarray,
    n_cols: int,
    *,
    n_parts: int | None = None,
    where: str = "CSR block",
    row_offset: int = 0,
) -> BlockCSC:
    """Transpose a CSR row block for :func:`csc_matmul_dense` and :func:`csc_t_matmul_accumulate`.

    Parameters
    ----------
    indptr : (n_b + 1,) int32 or int64
    indices : (nnz,) int32 or int64, column ids in ``[0, n_cols)``
    data : (nnz,) float32 or float64
    n_cols : int
        d, the number of columns.
    n_parts : int, optional
        Row parts transposed in parallel (default: numba's thread count).
    where : str
        Data source name for error messages.
    row_offset : int
        Index of the block's first row in the data source (0-based), so that
        messages name rows as the user counts them (from 1).

    Returns
    -------
    BlockCSC

    Raises
    ------
    KernelInputError
        On bad pointers or column ids (one line naming the first bad entry).
    """
    n = _check_csr(indptr, indices, data, where)
    d = int(n_cols)
    if n >= 2**31:
        raise KernelInputError(f"{where}: {n} rows in one block; use blocks under 2**31 rows")
    parts = max(1, int(n_parts) if n_parts is not None else int(numba.get_num_threads()))
    parts = min(parts, max(n, 1))
    cuts = _cuts(indptr, parts)
    seg = np.zeros((parts + 1, d), dtype=np.int64)
    with kernel_guard():
        bad = csc_count_kernel(indptr, indices, cuts, seg)
        if bad:
            _raise_bad_entries(indptr, indices, d, where, row_offset)
        nnz = int(csc_scan_kernel(seg))
        rows = np.empty(nnz, dtype=np.int32)
        vals = np.empty(nnz, dtype=data.dtype)
        cursor = np.empty((parts, d), dtype=np.int64)
        csc_scatter_kernel(indptr, indices, data, cuts, seg, cursor, rows, vals)
    return BlockCSC(shape=(n, d), cuts=cuts, seg=seg, rows=rows, vals=vals)


def csc_matmul_dense(T: BlockCSC, B: np.ndarray, out: np.ndarray, *,
                     where: str = "CSR block") -> np.ndarray:
    """``out[:] = X @ B`` for a transposed block.

    Parameters
    ----------
    T : BlockCSC
    B : (d, m) float32 or float64
    out : (n_b, m) float64, overwritten

    Returns
    -------
    out : (n_b, m) float64
    """
    n, d = T.shape
    _check_dense("B", B, d, where)
    B = np.ascontiguousarray(B, dtype=np.float64)
    _check_out(out, (n, B.shape[1]), where)
    if n == 0:
        return out
    with kernel_guard():
        csc_matmul_dense_kernel(T.seg, T.rows, T.vals, T.cuts, B, out)
    return out


def csc_t_matmul_accumulate(T: BlockCSC, D: np.ndarray, out: np.ndarray, *,
                            where: str = "CSR block") -> np.ndarray:
    """``out += X^T @ D`` for a transposed block (deterministic for any thread count).

    Parameters
    ----------
    T : BlockCSC
    D : (n_b, m) float32 or float64
    out : (d, m) float64, accumulated into

    Returns
    -------
    out : (d, m) float64
    """
    n, d = T.shape
    _check_dense("D", D, n, where)
    D = np.ascontiguousarray(D, dtype=np.float64)
    _check_out(out, (d, D.shape[1]), where)
    if n == 0 or D.shape[1] == 0 or T.nnz == 0:
        return out
    threads = max(1, min(int(numba.get_num_threads()), (d + _GROUP - 1) // _GROUP))
    with kernel_guard():
        csc_t_matmul_accumulate_kernel(T.seg, T.rows, T.vals, D, out, threads)
    return out
