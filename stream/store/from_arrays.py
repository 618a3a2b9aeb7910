"""Writing an in-memory matrix as a store: :func:`write_store`.

Validates and standardizes an in-memory matrix, its targets and weights
(canonical CSR, target kind inferred), then streams them through
:func:`ranktide.store.writer.create_store` in row pieces of bounded size and
opens the result with :func:`ranktide.store.reader.open_store`.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import Any

import numpy as np
import ranktide.store.format as _fmt
import scipy.sparse as sp
from ranktide.store.format import DEFAULT_CODEC
from ranktide.store.memory_source import (
    infer_kind,
    standard_matrix,
    standard_targets,
    standard_weights,
)
from ranktide.store.reader import Store, open_store
from ranktide.store.writer import StoreWriter, create_store

__all__ = ["write_store"]


def write_store(
    path: str | os.PathLike,
    X: Any,
    targets: Any = None,
    *,
    kind: str | None = None,
    weights: Any = None,
    names: Sequence[str] | None = None,
    backend: str | None = None,
    codec: str = DEFAULT_CODEC,
    overwrite: bool = False,
) -> Store:
    """Write an in-memory matrix (and targets, weights) as a store.

    Parameters
    ----------
    path : path
        Final name of the store.
    X : scipy sparse matrix or ndarray, shape (n, d)
        Duplicate entries are summed and rows sorted; values must be finite.
    targets : ndarray or sparse matrix, optional
        1-D integer → classes; numeric (n, k) or (n,) float → values; sparse
        (n, k) → tags (nonzero entries are the tags).
    kind : {"classes", "values", "tags"}, optional
        Overrides the inference above.
    weights : ndarray, shape (n,), optional
        Row weights, finite and ``>= 0``.
    names : sequence of str, optional
        One name per output.
    backend, codec, overwrite
        As for :func:`create_store`.

    Returns
    -------
    Store
        The new store, opened for reading.
    """
    M = standard_matrix(X)
    kind = infer_kind(targets, kind)
    targets, k = standard_targets(targets, kind, M.shape[0])
    weights = standard_weights(weights, M.shape[0])
    n_outputs = k if kind == "tags" else None
    writer = create_store(
        path,
        n_cols=M.shape[1],
        kind=kind,
        n_outputs=n_outputs,
        names=names,
        backend=backend,
        codec=codec,
        overwrite=overwrite,
        source="X",
    )
    with writer:
        _stream_rows(writer, M, targets, kind, weights)
    return open_store(path)


def _stream_rows(
    writer: StoreWriter, M: sp.csr_matrix, targets: Any, kind: str | None, weights: Any
) -> None:
    """Append ``M`` (n, d), its targets and weights to ``writer`` piece by piece."""
    for a, b in _row_pieces(M.indptr):
        lo, hi = int(M.indptr[a]), int(M.indptr[b])
        writer.append(M.indptr[a : b + 1] - lo, M.indices[lo:hi], M.data[lo:hi])
        if kind == "tags":
            T = targets[a:b]
            writer.append_targets(tags_indptr=T.indptr, tags_indices=T.indices)
        elif kind == "classes":
            writer.append_targets(classes=np.asarray(targets)[a:b])
        elif kind == "values":
            writer.append_targets(values=np.asarray(targets)[a:b])
        if weights is not None:
            writer.append_weights(np.asarray(weights)[a:b])


def _row_pieces(indptr: np.ndarray, entries: int | None = None):
    """Row ranges of about ``entries`` entries (and at most 1M rows) each.

    ``entries`` defaults to four slabs of chunks, read from :mod:`ranktide.store.format`
    at call time (the tunables there take effect for the next store written).
    """
    if entries is None:
        entries = 4 * _fmt.CHUNK_ELEMENTS * _fmt._SLAB_CHUNKS
    n = indptr.shape[0] - 1
    if n <= 0:
        return [(0, 0)] if n == 0 else []
    by_nnz = np.searchsorted(indptr, np.arange(entries, int(indptr[-1]), entries))
    by_rows = np.arange(_fmt._INDPTR_PIECE, n, _fmt._INDPTR_PIECE)
    inner = np.unique(np.concatenate([by_nnz, by_rows]))
    inner = inner[(inner > 0) & (inner < n)]
    cuts = np.concatenate([[0], inner, [n]]).astype(np.int64)
    return list(zip(cuts[:-1].tolist(), cuts[1:].tolist(), strict=True))
