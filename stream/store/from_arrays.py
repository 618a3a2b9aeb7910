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
from ranktide.errors import ConfigError, InputError
from ranktide.store.format import _SLAB_CHUNKS, CHUNK_ELEMENTS, DEFAULT_CODEC, KINDS
from ranktide.store.reader import Store, open_store
from ranktide.store.writer import StoreWriter, create_store

__all__ = ["write_store"]


def _validate_matrix(X: Any) -> sp.csr_matrix:
    if sp.issparse(X):
        M = sp.csr_matrix(X)
    else:
        a = np.asarray(X)
        if a.ndim != 2 or not np.issubdtype(a.dtype, np.number):
            raise InputError(f"X: expected a 2-D numeric matrix, got {a.dtype} {a.shape}")
        M = sp.csr_matrix(a)
    if M.shape[1] < 1:
        raise InputError(f"X: has {M.shape[1]} columns; a store needs at least one column")
    if not M.has_canonical_format:
        M = M.copy()
        M.sum_duplicates()
    return M


def _infer_kind(targets: Any, kind: str | None) -> str | None:
    if targets is None:
        if kind is not None:
            raise ConfigError(f"kind={kind!r} given without targets; pass targets or drop kind")
        return None
    if kind is not None:
        if kind not in KINDS:
            raise ConfigError(f"target kind {kind!r} is unknown; use one of {', '.join(KINDS)}")
        return kind
    if sp.issparse(targets):
        return "tags"
    t = np.asarray(targets)
    if t.ndim == 1 and np.issubdtype(t.dtype, np.integer):
        return "classes"
    if np.issubdtype(t.dtype, np.number) and t.ndim in (1, 2):
        return "values"
    raise InputError(
        f"targets: cannot tell the kind of a {t.dtype} array of shape {t.shape}; pass kind="
    )


def _tag_matrix(targets: Any) -> sp.csr_matrix:
    T = sp.csr_matrix(targets)
    if not T.has_canonical_format:
        T = T.copy()
        T.sum_duplicates()
    T.eliminate_zeros()
    return T


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
    M = _validate_matrix(X)
    kind = _infer_kind(targets, kind)
    targets, n_outputs = _standardize_targets(targets, kind, M.shape[0])
    _check_weights(weights, M.shape[0])
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


def _standardize_targets(targets: Any, kind: str | None, n: int) -> tuple[Any, int | None]:
    """Targets in the form the writer takes, and the tag count for kind "tags".

    Tags become a canonical CSR without explicit zeros; classes and values a
    dense array ((n,) or (n, k)); 1-D values become one output column.
    """
    n_outputs = None
    if kind == "tags":
        targets = _tag_matrix(targets)
        n_outputs = targets.shape[1]
    elif kind is not None:
        targets = np.asarray(targets.toarray() if sp.issparse(targets) else targets)
        if kind == "values" and targets.ndim == 1:
            targets = targets[:, None]
    if kind is not None and targets.shape[0] != n:
        raise InputError(
            f"targets: {targets.shape[0]} rows for a matrix of {n} rows; give one per row"
        )
    return targets, n_outputs


def _check_weights(weights: Any, n: int) -> None:
    if weights is not None and np.shape(weights) != (n,):
        raise InputError(
            f"weights: shape {np.shape(weights)} for a matrix of {n} rows; give one per row"
        )


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


def _row_pieces(indptr: np.ndarray, entries: int = 4 * CHUNK_ELEMENTS * _SLAB_CHUNKS):
    """Row ranges of about ``entries`` entries (and at most 1M rows) each."""
    n = indptr.shape[0] - 1
    if n <= 0:
        return [(0, 0)] if n == 0 else []
    by_nnz = np.searchsorted(indptr, np.arange(entries, int(indptr[-1]), entries))
    by_rows = np.arange(_fmt._INDPTR_PIECE, n, _fmt._INDPTR_PIECE)
    inner = np.unique(np.concatenate([by_nnz, by_rows]))
    inner = inner[(inner > 0) & (inner < n)]
    cuts = np.concatenate([[0], inner, [n]]).astype(np.int64)
    return list(zip(cuts[:-1].tolist(), cuts[1:].tolist(), strict=True))
