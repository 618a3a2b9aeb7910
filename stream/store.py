"""The store: CSR rows, targets and weights on disk, read in row blocks.

A store is a zarr v3 directory (default) or an HDF5 file (``.h5``/``.hdf5``
suffix or ``backend="hdf5"``) with one layout (DESIGN §4):

==========================  ===========  ====================================
name                        dtype        shape / meaning
==========================  ===========  ====================================
``indptr``                  int64        (n+1,) CSR row pointers
``indices``                 int32/int64  (nnz,) column ids, sorted per row
``data``                    float32      (nnz,) values, finite
``targets/classes``         int32        (n,) class ids
``targets/values``          float32      (n, k) regression targets
``targets/tags_indptr``     int64        (n+1,) tag rows
``targets/tags_indices``    int32        (n_tags,) tag ids, sorted per row
``weights``                 float32      (n,) row weights >= 0 (optional)
==========================  ===========  ====================================

Attributes (one JSON object) record the format, shapes, target kind, output
names, codec, per-segment CRC-32 checksums of the decoded bytes, a fingerprint
and a completeness flag written last. Writing goes to a temporary sibling that
is renamed into place by :meth:`StoreWriter.commit`.

Arrays are chunked along their first axis (:data:`CHUNK_ELEMENTS` elements;
one chunk is one checksum segment). Codecs: ``"zstd"`` (blosc zstd + byte
shuffle, level :data:`ZSTD_LEVEL`), ``"lz4"`` (blosc lz4 + byte shuffle),
``"none"``; HDF5 gets them from hdf5plugin (gzip/lzf without it).

Blocks are row ranges chosen at read time from a byte budget; a block never
splits a row. Reads are chunk-aligned and decode straight into one buffer per
array and block; the reader keeps the tail chunk of each array for the next
block, so a sequential pass decodes each chunk once, and checks each chunk's
checksum the first time it is decoded (``open_store(path, verify=False)``
skips that). A :class:`Store` serializes its reads with a lock, so it can be
shared with a prefetch thread.
"""

from __future__ import annotations

import datetime as _dt
import functools
import os
import sys
import threading
import time
from abc import ABC, abstractmethod
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp

from . import __version__
from .atomic import atomic_dir
from .checksums import ALGORITHM, SegmentHasher, fingerprint, n_segments, segment_checksum
from .errors import ConfigError, InputError, OutputExistsError, StoreError

__all__ = [
    "Block",
    "Store",
    "StoreWriter",
    "StoreBackend",
    "open_store",
    "write_store",
    "create_store",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "CHUNK_ELEMENTS",
    "DEFAULT_BLOCK_BYTES",
]

FORMAT_NAME = "ranktide-store"
FORMAT_VERSION = 1
ATTRS_KEY = "ranktide"
#: ``check(chunk_index, decoded_rows)``: verifies one chunk, raises ``StoreError``.
ChunkCheck = Callable[[int, np.ndarray], None]
#: Elements per storage chunk (and per checksum segment) of 1-D arrays.
#: DESIGN §11: ~256K-element chunks (a quarter of a typical block) read best.
CHUNK_ELEMENTS = 262_144
DEFAULT_BLOCK_BYTES = 64 * 1024 * 1024
CODECS = ("zstd", "lz4", "none")
BACKENDS = ("zarr", "hdf5")
KINDS = ("classes", "values", "tags")
_SLAB_CHUNKS = 4
_INDPTR_PIECE = 1 << 20
_INT32_LIMIT = 2**31
_SPARE_BUFFERS = 2
_FREE_REFS = 2


# --------------------------------------------------------------------------- backends


class StoreBackend(ABC):
    """Array read/write primitives that each store backend provides.

    Arrays are named by path (``"indices"``, ``"targets/classes"``), chunked
    along their first axis only, and grow along it with :meth:`resize`.
    """

    name: str = ""
    #: Whether several threads can decode at once (False under h5py's lock).
    parallel_reads: bool = False
    path: Path
    writable: bool

    @classmethod
    @abstractmethod
    def create(cls, path: Path, *, codec: str, level: int | None = None) -> StoreBackend:
        """Create an empty container at ``path`` for writing."""

    @classmethod
    @abstractmethod
    def open(cls, path: Path) -> StoreBackend:
        """Open an existing container read-only (``StoreError`` if it is none)."""

    @abstractmethod
    def codec_impl(self) -> str:
        """Human-readable description of the compression filter in use."""

    @abstractmethod
    def create_array(
        self, name: str, *, dtype: np.dtype, shape: tuple[int, ...], chunk_rows: int
    ) -> None:
        """Create a resizable array chunked by ``chunk_rows`` along axis 0."""

    @abstractmethod
    def has(self, name: str) -> bool:
        """Whether array ``name`` exists."""

    @abstractmethod
    def write(self, name: str, start: int, values: np.ndarray) -> None:
        """Write ``values`` at rows ``start:start+len(values)``."""

    @abstractmethod
    def resize(self, name: str, n_rows: int) -> None:
        """Grow or shrink array ``name`` to ``n_rows`` rows."""

    @abstractmethod
    def read(
        self,
        name: str,
        start: int,
        stop: int,
        *,
        out: np.ndarray | None = None,
        check: ChunkCheck | None = None,
    ) -> np.ndarray:
        """Decoded rows ``start:stop`` of array ``name``.

        Written into ``out`` (C-contiguous, exact shape) when given, else into
        a new array; returns the array holding them. With ``check``, ``start``
        is chunk-aligned and ``stop`` is chunk-aligned or the array's end, and
        ``check(j, rows)`` is called once for each chunk ``j`` read, with its
        decoded rows, possibly from a decoding thread (so a checksum is taken
        while the chunk is still in cache).
        """

    @staticmethod
    def check_chunks(check: ChunkCheck | None, start: int, out: np.ndarray, chunk: int) -> None:
        """Call ``check`` on each chunk of ``out`` (rows from ``start``, chunk-aligned)."""
        if check is None:
            return
        for lo in range(0, out.shape[0], chunk):
            check((start + lo) // chunk, out[lo : lo + chunk])

    @abstractmethod
    def shape(self, name: str) -> tuple[int, ...]:
        """Shape of array ``name``."""

    @abstractmethod
    def dtype(self, name: str) -> np.dtype:
        """Stored dtype of array ``name``."""

    @abstractmethod
    def chunk_rows(self, name: str) -> int:
        """Chunk length of array ``name`` along axis 0."""

    @abstractmethod
    def stored_nbytes(self, name: str) -> int:
        """Bytes array ``name`` takes on disk (compressed)."""

    @abstractmethod
    def get_attrs(self) -> dict[str, Any] | None:
        """The ranktide attribute object, or None when there is none."""

    @abstractmethod
    def set_attrs(self, attrs: dict[str, Any]) -> None:
        """Replace the ranktide attribute object."""

    @abstractmethod
    def close(self) -> None:
        """Release files; the backend is unusable afterwards."""


def _backend_class(name: str) -> type[StoreBackend]:
    if name == "zarr":
        from ._store_zarr import ZarrBackend

        return ZarrBackend
    from ._store_hdf5 import Hdf5Backend

    return Hdf5Backend


def _choose_backend(path: Path, backend: str | None) -> str:
    if backend is None:
        return "hdf5" if path.suffix.lower() in (".h5", ".hdf5") else "zarr"
    if backend not in BACKENDS:
        raise ConfigError(f"backend {backend!r} is unknown; use one of {', '.join(BACKENDS)}")
    return backend


def _check_codec(codec: str) -> None:
    if codec not in CODECS:
        raise ConfigError(f"codec {codec!r} is unknown; use one of {', '.join(CODECS)}")


#: Level of codec "zstd", which is zstd inside a blosc frame with byte shuffle.
#: Chosen with ``tools/bench_store.py --sweep-zstd`` on invented word-count data
#: (numcodecs decode, best of 5, this 2-core machine): plain zstd level 1 packs to
#: 0.43 of the decoded bytes at ~770 MB per CPU-second; blosc zstd level 1 +
#: shuffle to 0.33 at ~710; level 3 gains < 1% of size and writes slower; level
#: -1 decodes ~1.4x faster but packs to 0.57.
ZSTD_LEVEL = 1


# --------------------------------------------------------------------------- writing


class _Appender:
    """One array written in row order through a fixed slab buffer.

    Slabs are whole multiples of the chunk length, so every write is
    chunk-aligned; capacity grows by doubling (over-allocate, then resize to
    the final length), which DESIGN §11 measured ~5x faster than many small
    appends. Checksums are computed segment by segment as slabs go out.
    """

    def __init__(
        self,
        backend: StoreBackend,
        name: str,
        *,
        dtype: np.dtype,
        tail: tuple[int, ...] = (),
        chunk_rows: int,
    ) -> None:
        self.backend = backend
        self.name = name
        self.dtype = np.dtype(dtype)
        self.tail = tail
        self.chunk_rows = int(chunk_rows)
        self._buf = np.empty((self.chunk_rows * _SLAB_CHUNKS,) + tail, dtype=self.dtype)
        self._fill = 0
        self._written = 0
        self._capacity = self._buf.shape[0]
        self._hasher = SegmentHasher(self.chunk_rows)
        backend.create_array(
            name, dtype=self.dtype, shape=(self._capacity,) + tail, chunk_rows=self.chunk_rows
        )

    @property
    def rows(self) -> int:
        """Rows appended so far."""
        return self._written + self._fill

    def append(self, values: np.ndarray) -> None:
        """Append rows ``values`` (shape (m,) + tail, any castable dtype)."""
        m = values.shape[0]
        pos = 0
        size = self._buf.shape[0]
        if self._fill:
            take = min(size - self._fill, m)
            self._buf[self._fill : self._fill + take] = values[:take]
            self._fill += take
            pos = take
            if self._fill == size:
                self._flush()
        if m - pos >= size:
            direct = (m - pos) // size * size
            self._write(np.ascontiguousarray(values[pos : pos + direct], dtype=self.dtype))
            pos += direct
        rest = m - pos
        if rest:
            self._buf[:rest] = values[pos:]
            self._fill = rest

    def _flush(self) -> None:
        if self._fill:
            self._write(self._buf[: self._fill])
            self._fill = 0

    def _write(self, slab: np.ndarray) -> None:
        need = self._written + slab.shape[0]
        if need > self._capacity:
            cap = max(need, 2 * self._capacity)
            cap = -(-cap // self.chunk_rows) * self.chunk_rows
            self.backend.resize(self.name, cap)
            self._capacity = cap
        self.backend.write(self.name, self._written, slab)
        self._hasher.update(slab)
        self._written = need

    def finish(self) -> list[str]:
        """Write what is buffered, trim to the final length, return checksums."""
        self._flush()
        self.backend.resize(self.name, self._written)
        self._capacity = self._written
        self._buf = self._buf[:0]
        return self._hasher.finish()


def _chunk_rows_for(tail: tuple[int, ...]) -> int:
    width = int(np.prod(tail)) if tail else 1
    return max(1, CHUNK_ELEMENTS // max(1, width))


def _as_int_array(x: Any, what: str, where: str) -> np.ndarray:
    a = np.asarray(x)
    if a.ndim != 1 or not (np.issubdtype(a.dtype, np.integer) or a.size == 0):
        raise InputError(f"{where}: {what} must be a 1-D integer array, got {a.dtype} {a.shape}")
    return a


def _check_local_indptr(ip: np.ndarray, nnz: int, what: str, where: str) -> None:
    if ip.size == 0 or ip[0] != 0:
        raise InputError(f"{where}: {what} must start at 0 (local row pointers of this chunk)")
    steps = np.diff(ip)
    if steps.size and steps.min() < 0:
        bad = int(np.flatnonzero(steps < 0)[0])
        raise InputError(f"{where}: {what} decreases at local row {bad}; row pointers must grow")
    if int(ip[-1]) != nnz:
        raise InputError(
            f"{where}: {what} ends at {int(ip[-1])} but {nnz} entries were given; "
            "the last row pointer must equal the number of entries"
        )


def _check_sorted_rows(
    ip: np.ndarray, idx: np.ndarray, first_row: int, what: str, where: str
) -> None:
    """Column (or tag) ids must increase strictly within each row."""
    if idx.size < 2:
        return
    ok = np.diff(idx) > 0
    starts = ip[1:-1] - 1
    starts = starts[(starts >= 0) & (starts < ok.size)]
    ok[starts] = True
    if not ok.all():
        pos = int(np.flatnonzero(~ok)[0]) + 1
        row = int(np.searchsorted(ip, pos, side="right")) - 1 + first_row
        raise InputError(
            f"{where}: row {row}: {what} {int(idx[pos - 1])} then {int(idx[pos])} are not "
            "strictly increasing; sort each row and sum duplicates before storing"
        )


def _aborts_on_error(method: Any) -> Any:
    """Writer methods that abort the writer (removing its temporary) on any error."""

    @functools.wraps(method)
    def wrapper(self: StoreWriter, *args: Any, **kwargs: Any) -> Any:
        self._check_open()
        try:
            return method(self, *args, **kwargs)
        except BaseException:
            self._abort_quietly()
            raise

    return wrapper


class StoreWriter:
    """Streaming writer of a store; made by :func:`create_store`.

    Rows arrive in order through :meth:`append`; targets and weights through
    :meth:`append_targets` and :meth:`append_weights`, also in row order.
    :meth:`commit` checks that the counts agree, writes checksums and the
    attributes (completeness flag last) and renames the temporary sibling to
    the final name. :meth:`abort`, or an exception inside a ``with`` block,
    removes the temporary. A clean exit from a ``with`` block commits.
    Memory is bounded by one fixed slab buffer per array.
    """

    def __init__(
        self,
        path: Path,
        *,
        n_cols: int,
        kind: str | None,
        n_outputs: int | None,
        names: Sequence[str] | None,
        backend: str,
        codec: str,
        overwrite: bool,
        source: str | None = None,
    ) -> None:
        self.path = path
        self.n_cols = int(n_cols)
        self.kind = kind
        self.n_outputs = None if n_outputs is None else int(n_outputs)
        self.names = None if names is None else [str(s) for s in names]
        self.backend_name = backend
        self.codec = codec
        self._where = source or str(path)
        self._ctx = atomic_dir(path, overwrite=overwrite)
        self._tmp = self._ctx.__enter__()
        self._open = True
        try:
            cls = _backend_class(backend)
            level = ZSTD_LEVEL if codec == "zstd" else None
            self._be = cls.create(self._tmp, codec=codec, level=level)
            self._be.set_attrs(self._base_attrs(complete=False))
            idx_dtype = np.int32 if self.n_cols < _INT32_LIMIT else np.int64
            self._a: dict[str, _Appender] = {
                "indptr": _Appender(self._be, "indptr", dtype=np.int64, chunk_rows=CHUNK_ELEMENTS),
                "indices": _Appender(
                    self._be, "indices", dtype=idx_dtype, chunk_rows=CHUNK_ELEMENTS
                ),
                "data": _Appender(self._be, "data", dtype=np.float32, chunk_rows=CHUNK_ELEMENTS),
            }
            self._a["indptr"].append(np.zeros(1, dtype=np.int64))
        except BaseException:
            self._abort_quietly()
            raise
        self._nnz = 0
        self._max_label = -1

    # ----------------------------------------------------------------- helpers
    def _base_attrs(self, *, complete: bool) -> dict[str, Any]:
        return {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "complete": complete}

    def _check_open(self) -> None:
        if not self._open:
            raise ConfigError(f"{self.path}: the store writer is already committed or aborted")

    @property
    def n_rows(self) -> int:
        """Rows appended so far."""
        return self._a["indptr"].rows - 1

    def __enter__(self) -> StoreWriter:
        return self

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> None:
        if exc_type is not None:
            self._abort_quietly()
        elif self._open:
            self.commit()

    def __del__(self) -> None:
        # A writer dropped without commit() must not leave its temporary behind.
        if getattr(self, "_open", False):
            try:
                self._abort_quietly()
            except Exception:  # interpreter shutdown: modules may already be gone
                pass

    # ----------------------------------------------------------------- rows
    @_aborts_on_error
    def append(self, indptr: Any, indices: Any, data: Any) -> None:
        """Append consecutive rows given as a local CSR chunk.

        Bad input raises ``InputError`` and aborts the writer (nothing is
        left behind).

        Parameters
        ----------
        indptr : array of int, shape (m+1,)
            Local row pointers, starting at 0.
        indices : array of int, shape (nnz_chunk,)
            Column ids in ``0..n_cols-1``, strictly increasing within a row.
        data : array of float, shape (nnz_chunk,)
            Finite values (stored as float32).
        """
        self._check_open()
        where = self._where
        ip = _as_int_array(indptr, "indptr", where).astype(np.int64, copy=False)
        idx = _as_int_array(indices, "indices", where)
        val = np.asarray(data)
        if val.ndim != 1 or val.shape[0] != idx.shape[0]:
            raise InputError(
                f"{where}: data has shape {val.shape} but indices has {idx.shape}; "
                "give one value per column id"
            )
        _check_local_indptr(ip, idx.shape[0], "indptr", where)
        first = self.n_rows
        if idx.size:
            bad = (idx < 0) | (idx >= self.n_cols)
            if bad.any():
                pos = int(np.flatnonzero(bad)[0])
                row = int(np.searchsorted(ip, pos, side="right")) - 1 + first
                raise InputError(
                    f"{where}: row {row}: column id {int(idx[pos])} is outside "
                    f"0..{self.n_cols - 1}; fix the id or declare more columns"
                )
        _check_sorted_rows(ip, idx, first, "column ids", where)
        try:
            val32 = val.astype(np.float32, copy=False)
        except (TypeError, ValueError):
            raise InputError(f"{where}: data of dtype {val.dtype} is not numeric") from None
        finite = np.isfinite(val32)
        if not finite.all():
            pos = int(np.flatnonzero(~finite)[0])
            row = int(np.searchsorted(ip, pos, side="right")) - 1 + first
            raise InputError(
                f"{where}: row {row}, column {int(idx[pos])}: value {float(val[pos])!r} is not "
                "finite as float32; remove it or fix the source"
            )
        self._a["indptr"].append(ip[1:] + self._nnz)
        self._a["indices"].append(idx)
        self._a["data"].append(val32)
        self._nnz += int(idx.shape[0])

    # ----------------------------------------------------------------- targets
    def _set_kind(self, kind: str) -> None:
        if self.kind is None:
            self.kind = kind
        elif self.kind != kind:
            raise ConfigError(
                f"{self.path}: targets of kind {kind!r} given to a store of kind {self.kind!r}"
            )

    def _label_limit(self) -> int | None:
        if self.n_outputs is not None:
            return self.n_outputs
        return None if self.names is None else len(self.names)

    def _check_labels(self, lab: np.ndarray, what: str, first_row: int, ip: Any = None) -> None:
        if lab.size == 0:
            return
        limit = self._label_limit()
        bad = lab < 0 if limit is None else (lab < 0) | (lab >= limit)
        if bad.any():
            pos = int(np.flatnonzero(bad)[0])
            row = pos if ip is None else int(np.searchsorted(ip, pos, side="right")) - 1
            hint = "ids must be >= 0" if limit is None else f"ids must be in 0..{limit - 1}"
            raise InputError(
                f"{self._where}: row {row + first_row}: {what} {int(lab[pos])} is invalid; {hint}"
            )
        self._max_label = max(self._max_label, int(lab.max()))

    @_aborts_on_error
    def append_targets(
        self,
        *,
        classes: Any = None,
        values: Any = None,
        tags_indptr: Any = None,
        tags_indices: Any = None,
    ) -> None:
        """Append the targets of the next rows (one kind per store).

        Parameters
        ----------
        classes : array of int, shape (m,), optional
            Class ids ``>= 0``.
        values : array of float, shape (m, k) or (m,), optional
            Finite regression targets.
        tags_indptr, tags_indices : arrays of int, optional
            Local CSR of tag ids (pointers start at 0; ids increase per row).
        """
        self._check_open()
        given = [classes is not None, values is not None, tags_indptr is not None]
        if sum(given) != 1 or (tags_indptr is None) != (tags_indices is None):
            raise ConfigError(
                "append_targets takes exactly one of classes=, values= or "
                "tags_indptr= with tags_indices="
            )
        if classes is not None:
            self._append_classes(classes)
        elif values is not None:
            self._append_values(values)
        else:
            self._append_tags(tags_indptr, tags_indices)

    def _target(self, name: str, dtype: Any, tail: tuple[int, ...] = ()) -> _Appender:
        if name not in self._a:
            self._a[name] = _Appender(
                self._be, name, dtype=dtype, tail=tail, chunk_rows=_chunk_rows_for(tail)
            )
            if name == "targets/tags_indptr":
                self._a[name].append(np.zeros(1, dtype=np.int64))
        return self._a[name]

    def _append_classes(self, classes: Any) -> None:
        self._set_kind("classes")
        lab = np.asarray(classes)
        if lab.ndim != 1 or not (np.issubdtype(lab.dtype, np.integer) or lab.size == 0):
            raise InputError(
                f"{self._where}: class ids must be a 1-D integer array, got {lab.dtype} {lab.shape}"
            )
        app = self._target("targets/classes", np.int32)
        self._check_labels(lab, "class id", app.rows)
        app.append(lab)

    def _append_values(self, values: Any) -> None:
        self._set_kind("values")
        val = np.asarray(values)
        if val.ndim == 1:
            val = val[:, None]
        if val.ndim != 2 or not np.issubdtype(val.dtype, np.number):
            raise InputError(
                f"{self._where}: target values must be a numeric (n, k) array, got "
                f"{val.dtype} {val.shape}"
            )
        k = val.shape[1]
        if self.n_outputs is None:
            self.n_outputs = k
        elif k != self.n_outputs:
            raise InputError(
                f"{self._where}: target values have {k} columns but the store has "
                f"{self.n_outputs} outputs; give the same number of columns in every chunk"
            )
        app = self._target("targets/values", np.float32, (k,))
        val32 = val.astype(np.float32, copy=False)
        finite = np.isfinite(val32)
        if not finite.all():
            r, c = (int(v[0]) for v in np.nonzero(~finite))
            raise InputError(
                f"{self._where}: row {app.rows + r}, output {c}: target value {float(val[r, c])!r} "
                "is not finite as float32; fix the target"
            )
        app.append(val32)

    def _append_tags(self, tags_indptr: Any, tags_indices: Any) -> None:
        self._set_kind("tags")
        where = self._where
        ip = _as_int_array(tags_indptr, "tags_indptr", where).astype(np.int64, copy=False)
        tg = _as_int_array(tags_indices, "tags_indices", where)
        _check_local_indptr(ip, tg.shape[0], "tags_indptr", where)
        rows_app = self._target("targets/tags_indptr", np.int64)
        ids_app = self._target("targets/tags_indices", np.int32)
        first = rows_app.rows - 1
        self._check_labels(tg, "tag id", first, ip)
        _check_sorted_rows(ip, tg, first, "tag ids", where)
        rows_app.append(ip[1:] + ids_app.rows)
        ids_app.append(tg)

    @_aborts_on_error
    def append_weights(self, weights: Any) -> None:
        """Append the row weights (float, finite, ``>= 0``) of the next rows."""
        self._check_open()
        w = np.asarray(weights)
        if w.ndim != 1 or not np.issubdtype(w.dtype, np.number):
            raise InputError(
                f"{self._where}: weights must be a 1-D numeric array, got {w.dtype} {w.shape}"
            )
        app = self._target("weights", np.float32)
        w32 = w.astype(np.float32, copy=False)
        bad = ~np.isfinite(w32) | (w32 < 0)
        if bad.any():
            pos = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"{self._where}: row {app.rows + pos}: weight {float(w[pos])!r} is invalid; "
                "weights must be finite and >= 0"
            )
        app.append(w32)

    # ----------------------------------------------------------------- finishing
    def _target_rows(self) -> tuple[str, int] | None:
        if self.kind == "classes":
            return "targets/classes", self._a["targets/classes"].rows
        if self.kind == "values":
            return "targets/values", self._a["targets/values"].rows
        if self.kind == "tags":
            return "targets/tags_indptr", self._a["targets/tags_indptr"].rows - 1
        return None

    def _ensure_declared_targets(self) -> None:
        """Create empty target arrays for a declared kind that got no rows."""
        if self.kind == "classes":
            self._target("targets/classes", np.int32)
        elif self.kind == "values":
            self._target("targets/values", np.float32, (self.n_outputs or 0,))
            if self.n_outputs is None:
                self.n_outputs = 0
        elif self.kind == "tags":
            self._target("targets/tags_indptr", np.int64)
            self._target("targets/tags_indices", np.int32)

    def _check_counts(self) -> None:
        n = self.n_rows
        self._ensure_declared_targets()
        tr = self._target_rows()
        if tr is not None and tr[1] != n:
            raise InputError(
                f"{self._where}: targets ({tr[0]}) have {tr[1]} rows but the matrix has {n} "
                "rows; give exactly one target per row"
            )
        if "weights" in self._a and self._a["weights"].rows != n:
            raise InputError(
                f"{self._where}: weights have {self._a['weights'].rows} rows but the matrix "
                f"has {n} rows; give exactly one weight per row"
            )

    def _resolve_outputs(self) -> int | None:
        if self.kind is None:
            return self.n_outputs
        if self.kind in ("classes", "tags") and self.n_outputs is None:
            self.n_outputs = len(self.names) if self.names is not None else self._max_label + 1
        if self.names is not None and len(self.names) != self.n_outputs:
            raise InputError(
                f"{self._where}: {len(self.names)} output names for {self.n_outputs} outputs; "
                "give one name per output"
            )
        return self.n_outputs

    def commit(self) -> Path:
        """Finish the store and rename it to its final name.

        Returns
        -------
        Path
            The final path of the store.

        Raises
        ------
        InputError
            When targets or weights do not have one entry per row (the
            temporary is removed).
        """
        self._check_open()
        try:
            self._check_counts()
            n_outputs = self._resolve_outputs()
            sums = {name: app.finish() for name, app in self._a.items()}
            arrays = {
                name: {
                    "dtype": app.dtype.name,
                    "shape": [app.rows, *app.tail],
                    "chunk_rows": app.chunk_rows,
                    "segment_rows": app.chunk_rows,
                    "stored_bytes": self._be.stored_nbytes(name),
                }
                for name, app in self._a.items()
            }
            header = {
                "n_rows": self.n_rows,
                "n_cols": self.n_cols,
                "nnz": self._nnz,
                "target_kind": self.kind,
                "n_outputs": n_outputs,
                "has_weights": "weights" in self._a,
                "arrays": {
                    k: {"dtype": v["dtype"], "shape": v["shape"], "segment_rows": v["segment_rows"]}
                    for k, v in arrays.items()
                },
            }
            attrs = self._base_attrs(complete=False)
            attrs.update(
                {
                    "n_rows": self.n_rows,
                    "n_cols": self.n_cols,
                    "nnz": self._nnz,
                    "target_kind": self.kind,
                    "n_outputs": n_outputs,
                    "output_names": self.names,
                    "has_weights": "weights" in self._a,
                    "codec": self.codec,
                    "codec_impl": self._be.codec_impl(),
                    "backend": self.backend_name,
                    "chunk_elements": CHUNK_ELEMENTS,
                    "arrays": arrays,
                    "checksum_algorithm": ALGORITHM,
                    "checksums": sums,
                    "fingerprint": fingerprint(header, sums),
                    "created_by": f"ranktide {__version__}",
                    "created_at": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                }
            )
            self._be.set_attrs(attrs)
            attrs["complete"] = True
            self._be.set_attrs(attrs)  # the completeness flag goes last
            self._be.close()
            self._open = False
            self._ctx.__exit__(None, None, None)
        except BaseException:
            self._abort_quietly()
            raise
        return self.path

    def abort(self) -> None:
        """Discard everything written; nothing is left under either name."""
        self._abort_quietly()

    def _abort_quietly(self) -> None:
        be = getattr(self, "_be", None)
        if be is not None:
            be.close()
        ctx = getattr(self, "_ctx", None)
        was_open = getattr(self, "_open", False)
        self._open = False
        if ctx is not None and was_open:
            err = _Aborted()
            ctx.__exit__(_Aborted, err, None)


class _Aborted(Exception):
    """Thrown into the atomic-directory context so it removes the temporary."""


def create_store(
    path: str | os.PathLike,
    *,
    n_cols: int,
    kind: str | None = None,
    n_outputs: int | None = None,
    names: Sequence[str] | None = None,
    backend: str | None = None,
    codec: str = "zstd",
    overwrite: bool = False,
    source: str | None = None,
) -> StoreWriter:
    """Start writing a store row block by row block.

    Parameters
    ----------
    path : path
        Final name of the store (a directory for zarr, a file for HDF5).
    n_cols : int
        Number of feature columns (column ids are ``0..n_cols-1``).
    kind : {"classes", "values", "tags"}, optional
        Target kind; inferred from the first :meth:`StoreWriter.append_targets`.
    n_outputs : int, optional
        Classes, outputs or tags; inferred at commit when omitted.
    names : sequence of str, optional
        One name per output.
    backend : {"zarr", "hdf5"}, optional
        Default: HDF5 for a ``.h5``/``.hdf5`` suffix, zarr otherwise.
    codec : {"zstd", "lz4", "none"}
        Compression of every array.
    overwrite : bool
        Replace an existing store at ``path`` on commit.
    source : str, optional
        Name of the input file, used in error messages instead of ``path``.

    Returns
    -------
    StoreWriter
    """
    p = Path(path)
    be = _choose_backend(p, backend)
    _check_codec(codec)
    if kind is not None and kind not in KINDS:
        raise ConfigError(f"target kind {kind!r} is unknown; use one of {', '.join(KINDS)}")
    if int(n_cols) < 1:
        raise ConfigError(f"{p}: n_cols must be >= 1, got {n_cols}")
    if n_outputs is not None and int(n_outputs) < 0:
        raise ConfigError(f"{p}: n_outputs must be >= 0, got {n_outputs}")
    if names is not None and n_outputs is not None and len(names) != int(n_outputs):
        raise ConfigError(f"{p}: {len(names)} names for {n_outputs} outputs; give one per output")
    if p.exists() and not overwrite:
        raise OutputExistsError(f"{p}: already exists; pass --overwrite to replace it")
    return StoreWriter(
        p,
        n_cols=int(n_cols),
        kind=kind,
        n_outputs=n_outputs,
        names=names,
        backend=be,
        codec=codec,
        overwrite=overwrite,
        source=source,
    )


# --------------------------------------------------------------------------- reading


@dataclass(frozen=True)
class Block:
    """Rows ``start:stop`` of a store, decoded.

    Attributes
    ----------
    start, stop : int
        Row range [start, stop).
    X : scipy.sparse.csr_matrix, shape (stop-start, n_cols)
        float32 values, sorted column ids.
    targets : ndarray or csr_matrix or None
        classes: int32 (n_b,); values: float32 (n_b, k); tags: float32 CSR
        (n_b, k) of ones.
    weights : ndarray, shape (n_b,), float32, or None
    io : dict
        ``read_s`` (seconds in the backend's read calls: I/O, decompression
        and, the first time a chunk is read, its checksum, all on the decoding
        threads), ``decode_s`` (seconds assembling: the kept tail chunk, the
        CSR matrix), ``bytes_disk`` (compressed bytes of the chunks read,
        estimated from each array's compression ratio), ``bytes_decoded``
        (decoded bytes of the chunks read).
    """

    start: int
    stop: int
    X: sp.csr_matrix
    targets: Any
    weights: np.ndarray | None
    io: dict[str, float] = field(default_factory=dict)

    @property
    def n_rows(self) -> int:
        """Rows in the block."""
        return self.stop - self.start


class _Reader:
    """Chunk-aligned reads of one array, keeping the tail chunk for the next read.

    Each chunk is one checksum segment; a chunk is verified the first time it
    is decoded (when verification is on).
    """

    def __init__(
        self,
        store_path: Path,
        be: StoreBackend,
        name: str,
        meta: dict[str, Any],
        checksums: Sequence[str],
        *,
        verify: bool,
    ) -> None:
        self.path = store_path
        self.be = be
        self.name = name
        self.n = int(meta["shape"][0])
        self.chunk = int(meta["segment_rows"])
        self.sums = list(checksums)
        self.verify = verify
        self.verified = np.zeros(n_segments(self.n, self.chunk), dtype=bool)
        row_bytes = np.dtype(meta["dtype"]).itemsize * int(np.prod(meta["shape"][1:] or [1]))
        self.row_bytes = row_bytes
        self.dtype = np.dtype(meta["dtype"])
        self.tail_shape = tuple(int(v) for v in meta["shape"][1:])
        decoded = max(1, self.n * row_bytes)
        self.ratio = min(1.5, float(meta.get("stored_bytes", decoded)) / decoded)
        self._tail_idx = -1
        self._spare: list[np.ndarray] = []
        self._tail: np.ndarray | None = None

    def _buffer(self, rows: int) -> np.ndarray:
        """A buffer of ``rows`` rows, recycled from an earlier block when free.

        A block's arrays are views of such a buffer; once the caller drops
        every view, the buffer's only references are this list's, and it is
        reused instead of a fresh allocation (a fresh one costs a page fault
        per 4 KiB on first touch: measured ~3x slower than copying into warm
        memory). At most ``_SPARE_BUFFERS`` are kept per array.
        """
        spare = self._spare
        for i in range(len(spare)):
            # free when its only references are the list and getrefcount's argument
            if sys.getrefcount(spare[i]) == _FREE_REFS and spare[i].shape[0] >= rows:
                spare.append(spare.pop(i))  # most recently used last
                return spare[-1][:rows]
        b = np.empty((rows,) + self.tail_shape, dtype=self.dtype)
        if len(spare) >= _SPARE_BUFFERS:
            free = [i for i in range(len(spare)) if sys.getrefcount(spare[i]) == _FREE_REFS]
            if not free:
                return b
            spare.pop(free[0])
        spare.append(b)
        return b[:rows]
        b = np.empty((rows,) + self.tail_shape, dtype=self.dtype)
        if len(self._spare) >= _SPARE_BUFFERS:
            free = [i for i, x in enumerate(self._spare) if sys.getrefcount(x) == _FREE_REFS]
            if not free:
                return b
            self._spare.pop(free[0])
        self._spare.append(b)
        return b[:rows]

    def fetch(
        self, c0: int, c1: int, out: np.ndarray | None = None, check: ChunkCheck | None = None
    ) -> np.ndarray:
        """Decode chunks ``c0:c1`` (into ``out`` when given); damage raises ``StoreError``."""
        try:
            stop = min(c1 * self.chunk, self.n)
            return self.be.read(self.name, c0 * self.chunk, stop, out=out, check=check)
        except StoreError:
            raise
        except Exception as exc:  # codec and file errors of either backend
            if c1 - c0 > 1:  # find the damaged chunk, so the message names one segment
                for j in range(c0, c1):
                    self.fetch(j, j + 1, check=check)
            msg = " ".join(str(exc).split())[:160]
            raise StoreError(
                f"{self.path}: array {self.name!r} segment {c0} cannot be decoded "
                f"({type(exc).__name__}: {msg}); the store is damaged, re-create it"
            ) from None

    def check_segment(self, j: int, values: np.ndarray) -> None:
        got = segment_checksum(values)
        if got != self.sums[j]:
            lo = j * self.chunk
            hi = min(self.n, lo + self.chunk)
            raise StoreError(
                f"{self.path}: array {self.name!r} segment {j} (rows {lo}..{hi - 1}) fails its "
                f"checksum ({got} != {self.sums[j]}); the store is damaged, re-create it"
            )
        self.verified[j] = True

    def check_once(self, j: int, values: np.ndarray) -> None:
        """Verify chunk ``j`` unless an earlier read already did."""
        if not self.verified[j]:
            self.check_segment(j, values)

    def read(self, lo: int, hi: int, io: dict[str, float]) -> np.ndarray:
        """Rows ``lo:hi`` (a view of a fresh buffer), updating the counters in ``io``.

        The chunks overlapping ``lo:hi`` are decoded straight into one buffer;
        the first comes from the kept tail when a sequential reader left it
        there, and the last is kept for the next call.
        """
        c = self.chunk
        if hi <= lo:
            return np.empty((0,) + self.tail_shape, dtype=self.dtype)
        c0, c1 = lo // c, -(-hi // c)
        base = c0 * c
        buf = self._buffer(min(c1 * c, self.n) - base)
        first = c0
        t = time.perf_counter()
        if self._tail is not None and self._tail_idx == c0:
            buf[: self._tail.shape[0]] = self._tail
            first = c0 + 1
        if first < c1:
            fresh = buf[(first - c0) * c :]
            t0 = time.perf_counter()
            io["decode_s"] += t0 - t
            self.fetch(first, c1, out=fresh, check=self.check_once if self.verify else None)
            t = time.perf_counter()
            io["read_s"] += t - t0
            nbytes = fresh.shape[0] * self.row_bytes
            io["bytes_decoded"] += nbytes
            io["bytes_disk"] += nbytes * self.ratio
        self._tail = buf[(c1 - 1 - c0) * c :].copy()
        self._tail_idx = c1 - 1
        io["decode_s"] += time.perf_counter() - t
        return buf[lo - base : hi - base]

    def verify_all(self, piece_chunks: int = 8) -> None:
        """Read the whole array in bounded pieces and check every segment."""
        step = self.chunk * piece_chunks
        for start in range(0, self.n, step):
            stop = min(self.n, start + step)
            self.fetch(start // self.chunk, -(-stop // self.chunk), check=self.check_segment)


def _new_io() -> dict[str, float]:
    return {"read_s": 0.0, "decode_s": 0.0, "bytes_disk": 0.0, "bytes_decoded": 0.0}


class Store:
    """An open store; made by :func:`open_store`.

    Reads are serialized by an internal lock, so one store may be shared with
    a prefetch thread. See the module docstring for the layout.
    """

    def __init__(self, path: Path, be: StoreBackend, attrs: dict[str, Any], *, verify: bool):
        self.path = path
        self._be = be
        self.attrs = attrs
        self.verify_reads = verify
        self._lock = threading.Lock()
        sums = attrs["checksums"]
        self._readers = {
            name: _Reader(path, be, name, meta, sums[name], verify=verify)
            for name, meta in attrs["arrays"].items()
        }

    # ----------------------------------------------------------------- attributes
    @property
    def backend(self) -> str:
        """``"zarr"`` or ``"hdf5"``."""
        return self._be.name

    @property
    def shape(self) -> tuple[int, int]:
        """(n_rows, n_cols)."""
        return int(self.attrs["n_rows"]), int(self.attrs["n_cols"])

    @property
    def n_rows(self) -> int:
        """Number of rows."""
        return int(self.attrs["n_rows"])

    @property
    def nnz(self) -> int:
        """Number of stored entries."""
        return int(self.attrs["nnz"])

    @property
    def target_kind(self) -> str | None:
        """``"classes"``, ``"values"``, ``"tags"`` or None."""
        return self.attrs.get("target_kind")

    @property
    def n_outputs(self) -> int | None:
        """Number of classes, outputs or tags (None without targets)."""
        v = self.attrs.get("n_outputs")
        return None if v is None else int(v)

    @property
    def output_names(self) -> list[str] | None:
        """One name per output, or None."""
        v = self.attrs.get("output_names")
        return None if v is None else [str(s) for s in v]

    @property
    def fingerprint(self) -> str:
        """Hex digest of the content (independent of backend and codec)."""
        return str(self.attrs["fingerprint"])

    @property
    def codec(self) -> str:
        """``"zstd"``, ``"lz4"`` or ``"none"``."""
        return str(self.attrs["codec"])

    @property
    def has_weights(self) -> bool:
        """Whether the store holds row weights."""
        return bool(self.attrs.get("has_weights"))

    @property
    def parallel_reads(self) -> bool:
        """Whether the backend decodes on several threads at once."""
        return self._be.parallel_reads

    def __repr__(self) -> str:
        n, d = self.shape
        return (
            f"Store({str(self.path)!r}, backend={self.backend!r}, shape=({n}, {d}), "
            f"nnz={self.nnz}, target_kind={self.target_kind!r})"
        )

    # ----------------------------------------------------------------- blocks
    def _check_range(self, start: int, stop: int) -> None:
        n = self.n_rows
        if not (0 <= start <= stop <= n):
            raise ConfigError(
                f"{self.path}: row range [{start}, {stop}) is outside 0..{n}; "
                "give 0 <= start <= stop <= n_rows"
            )

    def indptr_range(self, start: int, stop: int) -> np.ndarray:
        """Global row pointers of rows ``start:stop``, int64 of length ``stop-start+1``."""
        start, stop = int(start), int(stop)
        self._check_range(start, stop)
        with self._lock:
            return self._readers["indptr"].read(start, stop + 1, _new_io()).copy()

    def block_ranges(
        self, *, rows: int | None = None, block_bytes: int | None = None
    ) -> list[tuple[int, int]]:
        """Row ranges [a, b) covering the store in order.

        Parameters
        ----------
        rows : int, optional
            Fixed rows per block (the last may be shorter).
        block_bytes : int, optional
            Budget of decoded CSR bytes per block (indices + data + row
            pointers; default 64 MiB). A row larger than the budget is a
            block of its own; a block never splits a row.

        Returns
        -------
        list of (int, int)
        """
        n = self.n_rows
        if rows is not None and block_bytes is not None:
            raise ConfigError("give rows= or block_bytes=, not both")
        if rows is not None:
            rows = int(rows)
            if rows < 1:
                raise ConfigError(f"rows per block must be >= 1, got {rows}")
            cuts = list(range(0, n, rows)) + [n]
            return [(a, b) for a, b in zip(cuts[:-1], cuts[1:], strict=True) if b > a]
        budget = DEFAULT_BLOCK_BYTES if block_bytes is None else int(block_bytes)
        if budget < 1:
            raise ConfigError(f"block_bytes must be >= 1, got {block_bytes}")
        return self._byte_cuts(budget)

    def _byte_cuts(self, budget: int) -> list[tuple[int, int]]:
        n = self.n_rows
        if n == 0:
            return []
        per_entry = np.dtype(self.attrs["arrays"]["indices"]["dtype"]).itemsize + 4
        cuts = [0]
        a_cost = 0
        for p0 in range(0, n, _INDPTR_PIECE):
            p1 = min(n, p0 + _INDPTR_PIECE)
            ip = self.indptr_range(p0, p1)
            cost = ip * per_entry + 8 * np.arange(p0, p1 + 1, dtype=np.int64)
            while True:
                j = int(np.searchsorted(cost, a_cost + budget, side="right")) - 1
                if j == cost.shape[0] - 1 and p1 < n:
                    break  # the cut lies beyond this piece
                b = max(p0 + j, cuts[-1] + 1)
                cuts.append(b)
                a_cost = int(cost[b - p0])
                if b == n:
                    break
        return list(zip(cuts[:-1], cuts[1:], strict=True))

    def read_block(self, start: int, stop: int) -> Block:
        """Decode rows ``start:stop`` (touches only the chunks they overlap)."""
        start, stop = int(start), int(stop)
        self._check_range(start, stop)
        io = _new_io()
        r = self._readers
        with self._lock:
            ip = r["indptr"].read(start, stop + 1, io)
            lo, hi = int(ip[0]), int(ip[-1])
            indices = r["indices"].read(lo, hi, io)
            data = r["data"].read(lo, hi, io)
            targets = self._read_targets(start, stop, io)
            weights = r["weights"].read(start, stop, io) if "weights" in r else None
        t = time.perf_counter()
        X = sp.csr_matrix((data, indices, ip - lo), shape=(stop - start, self.shape[1]))
        X.has_sorted_indices = True
        io["decode_s"] += time.perf_counter() - t
        return Block(start=start, stop=stop, X=X, targets=targets, weights=weights, io=io)

    def _read_targets(self, start: int, stop: int, io: dict[str, float]) -> Any:
        r = self._readers
        kind = self.target_kind
        if kind == "classes":
            return r["targets/classes"].read(start, stop, io)
        if kind == "values":
            return r["targets/values"].read(start, stop, io)
        if kind == "tags":
            tp = r["targets/tags_indptr"].read(start, stop + 1, io)
            lo, hi = int(tp[0]), int(tp[-1])
            ids = r["targets/tags_indices"].read(lo, hi, io)
            ones = np.ones(hi - lo, dtype=np.float32)
            T = sp.csr_matrix((ones, ids, tp - lo), shape=(stop - start, self.n_outputs or 0))
            T.has_sorted_indices = True
            return T
        return None

    def blocks(self, *, rows: int | None = None, block_bytes: int | None = None) -> Iterator[Block]:
        """Yield the blocks of :meth:`block_ranges` in order."""
        for a, b in self.block_ranges(rows=rows, block_bytes=block_bytes):
            yield self.read_block(a, b)

    def verify(self) -> None:
        """Check every segment of every array against its checksum.

        Streams each array in bounded pieces. Raises ``StoreError`` naming the
        array and segment at the first mismatch, or if the row pointers are
        inconsistent.
        """
        with self._lock:
            for reader in self._readers.values():
                reader.verify_all()
            self._verify_indptr()

    def _verify_indptr(self) -> None:
        r = self._readers["indptr"]
        last = 0
        for p0 in range(0, r.n, _INDPTR_PIECE):
            ip = self._be.read("indptr", p0, min(r.n, p0 + _INDPTR_PIECE))
            if (p0 == 0 and ip[0] != 0) or ip[0] < last or (np.diff(ip) < 0).any():
                raise StoreError(
                    f"{self.path}: indptr decreases near row {p0}; the store is damaged, "
                    "re-create it"
                )
            last = int(ip[-1])
        if last != self.nnz:
            raise StoreError(
                f"{self.path}: indptr ends at {last} but nnz is {self.nnz}; the store is "
                "damaged, re-create it"
            )

    def close(self) -> None:
        """Release the backend's files."""
        self._be.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def _sniff_backend(p: Path) -> str:
    if p.is_dir():
        return "zarr"
    if p.is_file():
        return "hdf5"
    raise StoreError(f"{p}: no such store; check the path or create it with `ranktide ingest`")


def _check_attrs(p: Path, be: StoreBackend, attrs: dict[str, Any] | None) -> dict[str, Any]:
    if attrs is None or attrs.get("format") != FORMAT_NAME:
        raise StoreError(
            f"{p}: not a ranktide store (no {FORMAT_NAME!r} attributes); "
            "create one with `ranktide ingest` or write_store()"
        )
    version = attrs.get("format_version")
    if not isinstance(version, int) or version > FORMAT_VERSION:
        raise StoreError(
            f"{p}: store format version {version} is newer than this ranktide reads "
            f"({FORMAT_VERSION}); upgrade ranktide"
        )
    if attrs.get("complete") is not True:
        raise StoreError(
            f"{p}: incomplete store (writing was interrupted before commit); re-create it"
        )
    for name, meta in attrs.get("arrays", {}).items():
        if not be.has(name) or list(be.shape(name)) != list(meta["shape"]):
            raise StoreError(
                f"{p}: array {name!r} is missing or has the wrong shape; the store is "
                "damaged, re-create it"
            )
        want = n_segments(meta["shape"][0], meta["segment_rows"])
        if len(attrs["checksums"].get(name, [])) != want:
            raise StoreError(
                f"{p}: array {name!r} has the wrong number of checksums; the store is "
                "damaged, re-create it"
            )
    return attrs


def open_store(path: str | os.PathLike, *, verify: bool = True) -> Store:
    """Open a store for reading.

    Parameters
    ----------
    path : path
        A zarr directory or an HDF5 file written by ranktide.
    verify : bool
        Check each chunk's checksum the first time a block decodes it.

    Returns
    -------
    Store

    Raises
    ------
    StoreError
        The path is missing or not a store, is of a newer format version, or
        is incomplete or damaged.
    """
    p = Path(path)
    be = _backend_class(_sniff_backend(p)).open(p)
    try:
        attrs = _check_attrs(p, be, be.get_attrs())
    except BaseException:
        be.close()
        raise
    return Store(p, be, attrs, verify=verify)


# --------------------------------------------------------------------------- in-memory input


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
    codec: str = "zstd",
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
    n = M.shape[0]
    kind = _infer_kind(targets, kind)
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
    if weights is not None and np.shape(weights) != (n,):
        raise InputError(
            f"weights: shape {np.shape(weights)} for a matrix of {n} rows; give one per row"
        )
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
    return open_store(path)


def _row_pieces(indptr: np.ndarray, entries: int = 4 * CHUNK_ELEMENTS * _SLAB_CHUNKS):
    """Row ranges of about ``entries`` entries (and at most 1M rows) each."""
    n = indptr.shape[0] - 1
    if n <= 0:
        return [(0, 0)] if n == 0 else []
    by_nnz = np.searchsorted(indptr, np.arange(entries, int(indptr[-1]), entries))
    by_rows = np.arange(_INDPTR_PIECE, n, _INDPTR_PIECE)
    inner = np.unique(np.concatenate([by_nnz, by_rows]))
    inner = inner[(inner > 0) & (inner < n)]
    cuts = np.concatenate([[0], inner, [n]]).astype(np.int64)
    return list(zip(cuts[:-1].tolist(), cuts[1:].tolist(), strict=True))
