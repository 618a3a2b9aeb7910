"""A read-only view of a source restricted to the columns that hold entries.

Hashed feature spaces are usually wider than the vocabulary that reaches them
(2^18 buckets, 80k of them used by 40k short documents). Every dense object of
the solver has one row per feature (the factor ``U``, the gradient blocks
``G [V, Omega]``, the projections' basis), so their cost follows the width of
the feature space, not the data. A column that holds no entry contributes
nothing to the loss, and the trace norm of ``W`` does not change when its zero
rows are dropped, so the problem restricted to the used columns has the same
optimum (with zero rows elsewhere). :class:`ColumnView` renumbers the used
columns ``0..m-1`` block by block; :func:`expand_rows` puts a factor back on
the full feature space.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
import scipy.sparse as sp

__all__ = ["ColumnView", "expand_rows"]


class ColumnView:
    """``source`` with its columns restricted to ``columns`` and renumbered.

    Parameters
    ----------
    source : block source
        A store or in-memory source (``shape``, ``block_ranges``, ``read_block``).
    columns : ndarray (m,) of int
        Sorted, distinct column ids of ``source``; every entry of the source must
        lie in one of them (the view drops nothing).

    Notes
    -----
    Everything but the column space is the source's own (rows, targets,
    weights, block ranges, names); ``read_block`` maps the block's column ids
    through a lookup table of ``d`` int32 entries (one gather per entry).
    """

    def __init__(self, source: Any, columns: np.ndarray) -> None:
        self.source = source
        self.columns = np.asarray(columns, dtype=np.int64)
        d = int(source.shape[1])
        self._lookup = np.full(d, -1, dtype=np.int32)
        self._lookup[self.columns] = np.arange(self.columns.size, dtype=np.int32)

    @property
    def shape(self) -> tuple[int, int]:
        return (int(self.source.shape[0]), int(self.columns.size))

    @property
    def n_features_full(self) -> int:
        """Columns of the underlying source."""
        return int(self.source.shape[1])

    def __getattr__(self, name: str) -> Any:
        # the rest of the read-side contract (nnz, targets, names, block ranges) is the
        # source's; only called for names this class does not define
        if name in ("source", "columns", "_lookup"):
            raise AttributeError(name)
        return getattr(self.source, name)

    def block_ranges(self, **kw: Any) -> list[tuple[int, int]]:
        return self.source.block_ranges(**kw)

    def read_block(self, start: int, stop: int) -> Any:
        """Rows ``[start, stop)`` of the source with renumbered column ids."""
        block = self.source.read_block(start, stop)
        X = block.X
        idx = self._lookup[X.indices]
        Xc = sp.csr_matrix((X.data, idx, X.indptr), shape=(X.shape[0], self.columns.size),
                           copy=False)
        Xc.has_sorted_indices = True  # the lookup is increasing: the order is kept
        return replace(block, X=Xc)

    def blocks(self, *, rows: int | None = None, block_bytes: int | None = None):
        for a, b in self.block_ranges(rows=rows, block_bytes=block_bytes):
            yield self.read_block(a, b)

    def close(self) -> None:
        """The source belongs to the caller: nothing to release."""


def expand_rows(M: np.ndarray, columns: np.ndarray | None, d: int) -> np.ndarray:
    """``M`` (m, r) on the used columns as a (d, r) array with zero rows elsewhere."""
    if columns is None:
        return M
    out = np.zeros((d, M.shape[1]), dtype=M.dtype)
    out[columns] = M
    return out
