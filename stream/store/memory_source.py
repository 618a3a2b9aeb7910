"""In-memory sources with the store's block contract.

A :class:`MemorySource` wraps a scipy CSR matrix (plus targets and row
weights) so that every pass, the profiler and the solver accept in-memory data
exactly as they accept a store: ``block_ranges(...)`` then
``read_block(start, stop)``. :func:`as_source` turns whatever a public entry
point was given (a store, a store path, a CSR matrix, a ``(X, targets)`` or
``(X, targets, weights)`` tuple, or a source) into a source.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import ranktide.store.format as _fmt
import scipy.sparse as sp
from ranktide.errors import ConfigError, InputError
from ranktide.store.blocking import cut_ranges
from ranktide.store.reader import Block as _StoreBlock
from ranktide.store.reader import open_store

__all__ = ["MemorySource", "as_source", "split_ranges", "infer_kind", "standard_matrix",
           "standard_targets", "standard_weights"]

_KINDS = ("classes", "values", "tags")

@dataclass(frozen=True)
class _MemBlock:
    """A row block ``[start, stop)`` (same fields as the store's ``Block``)."""

    start: int
    stop: int
    X: sp.csr_matrix
    targets: Any = None
    weights: np.ndarray | None = None
    io: dict = field(default_factory=dict)


Block = _StoreBlock if _StoreBlock is not None else _MemBlock


def split_ranges(
    indptr: np.ndarray,
    *,
    rows: int | None = None,
    block_bytes: int | None = None,
    bytes_per_entry: int = 8,
) -> list[tuple[int, int]]:
    """Split rows ``0..n`` into contiguous ranges bounded by rows and bytes.

    Parameters
    ----------
    indptr : (n + 1,) int64 array
        CSR row pointers.
    rows : int, optional
        At most this many rows per range.
    block_bytes : int, optional
        At most about this many decoded CSR bytes (``bytes_per_entry`` per
        nonzero plus 8 per row pointer) per range; a single row larger than
        the budget forms a range alone. Defaults to
        :data:`ranktide.store.format.DEFAULT_BLOCK_BYTES` when ``rows`` is not given either.
    bytes_per_entry : int
        Decoded bytes per nonzero (4 for float32 data + 4 or 8 for indices).

    Returns
    -------
    list of (start, stop)
        Consecutive, non-empty ranges covering ``0..n``.
    """
    indptr = np.asarray(indptr, dtype=np.int64)
    return cut_ranges([(0, indptr)], indptr.size - 1, rows=rows, block_bytes=block_bytes,
                      bytes_per_entry=bytes_per_entry, default_bytes=_fmt.DEFAULT_BLOCK_BYTES)


def infer_kind(targets: Any, kind: str | None = None) -> str | None:
    """The target kind of in-memory ``targets`` (``kind`` when given, checked).

    A scipy sparse matrix holds tags (its nonzero entries); a 1-D integer array
    holds class ids; any other numeric array, 1-D or 2-D, holds values (a 1-D
    array is one output).
    """
    if targets is None:
        if kind is not None:
            raise ConfigError(f"kind={kind!r} given without targets; pass targets or drop kind")
        return None
    if kind is not None:
        if kind not in _KINDS:
            raise ConfigError(f"target kind {kind!r} is unknown; use one of {', '.join(_KINDS)}")
        return kind
    if sp.issparse(targets):
        return "tags"
    arr = np.asarray(targets)
    if arr.ndim == 1 and np.issubdtype(arr.dtype, np.integer):
        return "classes"
    if arr.ndim in (1, 2) and np.issubdtype(arr.dtype, np.number):
        return "values"
    raise InputError(
        "in-memory targets: expected class ids (1-D integers), values (1-D or 2-D numbers) or "
        f"tags (sparse 2-D), got shape {arr.shape} dtype {arr.dtype}; pass kind= explicitly"
    )


class MemorySource:
    """A scipy CSR matrix with targets and weights, read in row blocks.

    Parameters
    ----------
    X : (n, d) sparse matrix
        Features; converted once to CSR with float32 data and sorted indices.
    targets : array or sparse matrix, optional
        Class ids ``(n,)`` int, values ``(n, k)`` float or tags ``(n, k)``
        sparse 0/1.
    kind : {"classes", "values", "tags"}, optional
        Target kind; inferred from ``targets`` when omitted.
    weights : (n,) array, optional
        Row weights, finite and ``>= 0``.
    n_outputs : int, optional
        Number of classes (defaults to ``max(class id) + 1``) for class ids.
    names : list of str, optional
        Output names.
    """

    backend = "memory"
    path = None
    fingerprint = None
    codec = None

    def __init__(
        self,
        X: Any,
        targets: Any = None,
        *,
        kind: str | None = None,
        weights: Any = None,
        n_outputs: int | None = None,
        names: list[str] | None = None,
    ) -> None:
        self.X = standard_matrix(X)
        n, d = self.X.shape
        self.kind = infer_kind(targets, kind)
        self.targets, self._k = standard_targets(targets, self.kind, n, n_outputs)
        self.weights = standard_weights(weights, n)
        self.output_names = list(names) if names is not None else None
        if self.output_names is not None and len(self.output_names) != self._k:
            raise InputError(
                f"in-memory names: {len(self.output_names)} names for {self._k} outputs; "
                "pass one name per output"
            )

    # -- the store's read-side contract ------------------------------------
    @property
    def shape(self) -> tuple[int, int]:
        return (int(self.X.shape[0]), int(self.X.shape[1]))

    @property
    def nnz(self) -> int:
        return int(self.X.nnz)

    @property
    def target_kind(self) -> str | None:
        return self.kind

    @property
    def n_outputs(self) -> int:
        return int(self._k)

    @property
    def has_weights(self) -> bool:
        return self.weights is not None

    @property
    def attrs(self) -> dict:
        return {
            "n_rows": self.shape[0],
            "n_cols": self.shape[1],
            "nnz": self.nnz,
            "target_kind": self.kind,
            "n_outputs": self.n_outputs,
        }

    def indptr_range(self, a: int, b: int) -> np.ndarray:
        """Return ``indptr[a:b+1]`` (int64)."""
        return self.X.indptr[a : b + 1].astype(np.int64)

    def block_ranges(
        self, *, rows: int | None = None, block_bytes: int | None = None
    ) -> list[tuple[int, int]]:
        """Row ranges of ``rows`` rows or of about ``block_bytes`` decoded CSR bytes.

        Like the store's: give one of the two (default 64 MiB of CSR).
        """
        if rows is not None and block_bytes is not None:
            raise ConfigError("give rows= or block_bytes=, not both")
        per_entry = 4 + self.X.indices.dtype.itemsize
        return split_ranges(
            self.X.indptr, rows=rows, block_bytes=block_bytes, bytes_per_entry=per_entry
        )

    def read_block(self, start: int, stop: int) -> Any:
        """Return rows ``[start, stop)`` as a ``Block`` (X's data and indices are views)."""
        n = self.shape[0]
        if not (0 <= start < stop <= n):
            raise ConfigError(f"in-memory source: block [{start}, {stop}) outside rows 0..{n}")
        t0 = time.perf_counter()
        ip = self.X.indptr
        lo, hi = int(ip[start]), int(ip[stop])
        Xb = sp.csr_matrix((self.X.data[lo:hi], self.X.indices[lo:hi], ip[start:stop + 1] - lo),
                           shape=(stop - start, self.X.shape[1]), copy=False)
        Xb.has_sorted_indices = True
        t = self.targets
        tb = None if t is None else t[start:stop]
        wb = None if self.weights is None else self.weights[start:stop]
        nbytes = int(Xb.data.nbytes + Xb.indices.nbytes + Xb.indptr.nbytes)
        io = {
            "read_s": 0.0,
            "decode_s": time.perf_counter() - t0,
            "bytes_disk": 0,
            "bytes_decoded": nbytes,
        }
        return Block(start=int(start), stop=int(stop), X=Xb, targets=tb, weights=wb, io=io)

    def blocks(self, *, rows: int | None = None, block_bytes: int | None = None):
        """Iterate over the blocks of :meth:`block_ranges`."""
        for a, b in self.block_ranges(rows=rows, block_bytes=block_bytes):
            yield self.read_block(a, b)

    def close(self) -> None:
        """Nothing to release (kept for the store's contract)."""

    def __enter__(self) -> MemorySource:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def standard_matrix(X: Any) -> sp.csr_matrix:
    """In-memory features as canonical CSR (float32 data, sorted, duplicates summed).

    Accepts a scipy sparse matrix or a dense 2-D numeric array (converted to CSR;
    nothing sparse is ever densified). Values must be finite.
    """
    if sp.issparse(X):
        X = sp.csr_matrix(X)
    else:
        a = np.asarray(X)
        if a.ndim != 2 or not np.issubdtype(a.dtype, np.number):
            raise InputError(
                f"in-memory features: expected a 2-D numeric matrix (scipy sparse or dense), "
                f"got {a.dtype} of shape {a.shape}"
            )
        X = sp.csr_matrix(a)
    if X.shape[1] < 1:
        raise InputError(f"in-memory features: {X.shape[1]} columns; at least one is needed")
    if X.data.dtype != np.float32:
        X = X.astype(np.float32)
    if not X.has_canonical_format:
        X = X.copy()
        X.sum_duplicates()
    if not np.all(np.isfinite(X.data)):
        bad = int(np.flatnonzero(~np.isfinite(X.data))[0])
        row = int(np.searchsorted(X.indptr, bad, side="right") - 1)
        raise InputError(
            f"in-memory features: row {row + 1}, column {int(X.indices[bad]) + 1}: value "
            f"{float(X.data[bad])} is not finite; remove or replace NaN/inf entries"
        )
    return X


def standard_targets(targets: Any, kind: str | None, n: int, n_outputs: int | None = None):
    """Targets of ``kind`` for ``n`` rows in the form blocks carry, and the output count.

    Class ids become int32 (n,); values float32 (n, k) (a 1-D array is one
    output column); tags a canonical float32 CSR (n, k) of ones without explicit
    zeros.
    """
    if kind is None or targets is None:
        if targets is not None or kind is not None:
            raise InputError("in-memory targets: kind given without targets; pass both or neither")
        return None, int(n_outputs or 0)
    if kind == "classes":
        y = np.asarray(targets)
        if y.ndim != 1 or y.shape[0] != n or not np.issubdtype(y.dtype, np.integer):
            raise InputError(
                f"in-memory class ids: expected {n} integers, got shape {y.shape} "
                f"dtype {y.dtype}; pass one class id per row"
            )
        k = int(n_outputs) if n_outputs is not None else (int(y.max()) + 1 if n else 0)
        if n and (y.min() < 0 or y.max() >= k):
            row = int(np.flatnonzero((y < 0) | (y >= k))[0])
            raise InputError(
                f"in-memory class ids: row {row + 1} has class {int(y[row])} outside "
                f"0..{k - 1}; fix the id or raise n_outputs"
            )
        return y.astype(np.int32), k
    if kind == "values":
        Y = np.asarray(targets.toarray() if sp.issparse(targets) else targets,
                       dtype=np.float32)
        if Y.ndim == 1:
            Y = Y[:, None]
        if Y.ndim != 2 or Y.shape[0] != n:
            raise InputError(
                f"in-memory values: expected shape ({n}, k), got {Y.shape}; "
                "pass one row of values per row"
            )
        if not np.all(np.isfinite(Y)):
            row = int(np.flatnonzero(~np.isfinite(Y).all(axis=1))[0])
            raise InputError(f"in-memory values: row {row + 1} has a non-finite value; replace it")
        return np.ascontiguousarray(Y), int(Y.shape[1])
    T = sp.csr_matrix(targets, dtype=np.float32)
    if T.shape[0] != n:
        raise InputError(
            f"in-memory tags: expected {n} rows, got {T.shape[0]}; pass one tag row per row"
        )
    if not T.has_canonical_format:
        T = T.copy()
        T.sum_duplicates()
    T.eliminate_zeros()
    T.data[:] = 1.0
    return T, int(T.shape[1])


def standard_weights(weights: Any, n: int) -> np.ndarray | None:
    """Row weights as float32 (n,), finite and >= 0 (None stays None)."""
    if weights is None:
        return None
    w = np.asarray(weights, dtype=np.float32)
    if w.shape != (n,):
        raise InputError(
            f"in-memory weights: expected shape ({n},), got {w.shape}; pass one weight per row"
        )
    bad = ~np.isfinite(w) | (w < 0)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"in-memory weights: row {row + 1} has weight {float(w[row])}; "
            "weights must be finite and >= 0"
        )
    return w


def as_source(
    source: Any,
    *,
    targets: Any = None,
    weights: Any = None,
    kind: str | None = None,
    n_outputs: int | None = None,
) -> Any:
    """Return a block source for ``source``.

    Parameters
    ----------
    source : Store, path, sparse matrix, tuple or source
        A path is opened with :func:`ranktide.store.open_store`; a sparse matrix
        (with ``targets``/``weights`` given here) or a ``(X, targets[,
        weights])`` tuple is wrapped in a :class:`MemorySource`; anything with
        ``block_ranges`` and ``read_block`` is returned unchanged.
    """
    if hasattr(source, "block_ranges") and hasattr(source, "read_block"):
        return source
    if isinstance(source, (str, os.PathLike)):
        return open_store(source)
    if isinstance(source, tuple):
        if not 2 <= len(source) <= 3:
            raise ConfigError("in-memory source: expected (X, targets) or (X, targets, weights)")
        X, t = source[0], source[1]
        w = source[2] if len(source) == 3 else weights
        return MemorySource(X, t, kind=kind, weights=w, n_outputs=n_outputs)
    if sp.issparse(source):
        return MemorySource(source, targets, kind=kind, weights=weights, n_outputs=n_outputs)
    raise ConfigError(
        f"source of type {type(source).__name__}: expected a store, a store path or a scipy "
        "sparse matrix"
    )
