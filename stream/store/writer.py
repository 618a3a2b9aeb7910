"""The streaming store writer: :func:`create_store` and :class:`StoreWriter`.

Rows, targets and weights arrive in row order and go out through one fixed
slab buffer per array (:class:`_Appender`), with per-segment checksums taken
as slabs are written. Everything is written into a temporary sibling that
:meth:`StoreWriter.commit` renames into place; an error or :meth:`abort`
removes it. Stores that belong together (a split's two parts) are finished
aside first (:meth:`StoreWriter.finish_aside`) and put in place one right
after the other (:func:`place_together`). The layout is documented in
:mod:`ranktide.store`.
"""

from __future__ import annotations

import datetime as _dt
import functools
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import ranktide.store.format as _fmt
from ranktide import __version__
from ranktide.atomic import (
    clean_stale_siblings,
    fsync_tree,
    remove_path,
    replace_together,
    temp_sibling,
)
from ranktide.errors import ConfigError, InputError, OutputExistsError
from ranktide.store.backends import backend_class
from ranktide.store.checksums import ALGORITHM, SegmentHasher, fingerprint
from ranktide.store.format import (
    DEFAULT_CODEC,
    FORMAT_NAME,
    FORMAT_VERSION,
    KINDS,
    StoreBackend,
    _check_codec,
    _choose_backend,
)

__all__ = ["StoreWriter", "create_store", "place_together"]


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
        self._buf = np.empty((self.chunk_rows * _fmt._SLAB_CHUNKS,) + tail, dtype=self.dtype)
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
    return max(1, _fmt.CHUNK_ELEMENTS // max(1, width))


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
        raise InputError(f"{where}: {what} decreases at local row {bad + 1}; row pointers must "
                         "grow")
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
            f"{where}: row {row + 1}: {what} {int(idx[pos - 1])} then {int(idx[pos])} are not "
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
        attrs: Mapping[str, Any] | None = None,
    ) -> None:
        self.path = path
        self.n_cols = int(n_cols)
        self.kind = kind
        self.n_outputs = None if n_outputs is None else int(n_outputs)
        self.names = None if names is None else [str(s) for s in names]
        self.backend_name = backend
        self.codec = codec
        self._where = source or str(path)
        self._extra_attrs = dict(attrs or {})
        clean_stale_siblings(path)
        if path.exists() and not overwrite:
            raise OutputExistsError(f"{path}: already exists; pass --overwrite to replace it")
        self._tmp = temp_sibling(path)
        self._aside = False  # finished under the temporary name, not yet placed
        self._open = True
        try:
            self._create_backend()
            self._a: dict[str, _Appender] = self._matrix_appenders()
        except BaseException:
            self._abort_quietly()
            raise
        self._nnz = 0
        self._max_label = -1

    def _create_backend(self) -> None:
        """Create the backend container in the temporary, marked incomplete.

        ``self._be`` is set before the first attribute write, so an abort
        closes it whatever fails.
        """
        cls = backend_class(self.backend_name)
        level = _fmt.ZSTD_LEVEL if self.codec == "zstd" else None
        self._be: StoreBackend = cls.create(self._tmp, codec=self.codec, level=level)
        self._be.set_attrs(self._base_attrs(complete=False))

    def _matrix_appenders(self) -> dict[str, _Appender]:
        """Appenders of the CSR arrays, with the leading zero row pointer written."""
        chunk = _fmt.CHUNK_ELEMENTS
        idx_dtype = np.int32 if self.n_cols < _fmt._INT32_LIMIT else np.int64
        appenders = {
            "indptr": _Appender(self._be, "indptr", dtype=np.int64, chunk_rows=chunk),
            "indices": _Appender(self._be, "indices", dtype=idx_dtype, chunk_rows=chunk),
            "data": _Appender(self._be, "data", dtype=np.float32, chunk_rows=chunk),
        }
        appenders["indptr"].append(np.zeros(1, dtype=np.int64))
        return appenders

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
        if getattr(self, "_open", False) or getattr(self, "_aside", False):
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
        self._check_column_ids(ip, idx, first)
        _check_sorted_rows(ip, idx, first, "column ids", where)
        val32 = self._finite_float32(ip, idx, val, first)
        self._a["indptr"].append(ip[1:] + self._nnz)
        self._a["indices"].append(idx)
        self._a["data"].append(val32)
        self._nnz += int(idx.shape[0])

    def _check_column_ids(self, ip: np.ndarray, idx: np.ndarray, first: int) -> None:
        """Column ids ``idx`` (nnz_chunk,) must lie in ``0..n_cols-1``."""
        if idx.size:
            bad = (idx < 0) | (idx >= self.n_cols)
            if bad.any():
                pos = int(np.flatnonzero(bad)[0])
                row = int(np.searchsorted(ip, pos, side="right")) - 1 + first
                raise InputError(
                    f"{self._where}: row {row + 1}: column id {int(idx[pos])} is outside "
                    f"0..{self.n_cols - 1} (column {int(idx[pos]) + 1} of {self.n_cols}); fix "
                    "the id or declare more columns"
                )

    def _finite_float32(
        self, ip: np.ndarray, idx: np.ndarray, val: np.ndarray, first: int
    ) -> np.ndarray:
        """``val`` (nnz_chunk,) as float32, every value finite after the cast."""
        where = self._where
        try:
            val32 = val.astype(np.float32, copy=False)
        except (TypeError, ValueError):
            raise InputError(f"{where}: data of dtype {val.dtype} is not numeric") from None
        finite = np.isfinite(val32)
        if not finite.all():
            pos = int(np.flatnonzero(~finite)[0])
            row = int(np.searchsorted(ip, pos, side="right")) - 1 + first
            raise InputError(
                f"{where}: row {row + 1}, column {int(idx[pos]) + 1}: value {float(val[pos])} is "
                "not finite as float32; remove it or fix the source"
            )
        return val32

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
                f"{self._where}: row {row + first_row + 1}: {what} {int(lab[pos])} is invalid; "
                f"{hint}"
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
                f"{self._where}: row {app.rows + r + 1}, output {c + 1}: target value "
                f"{float(val[r, c])} is not finite as float32; fix the target"
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
                f"{self._where}: row {app.rows + pos + 1}: weight {float(w[pos])} is invalid; "
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

    def _array_meta(self) -> dict[str, dict[str, Any]]:
        """Per-array attributes (dtype, shape, chunking, bytes on disk), after finishing."""
        return {
            name: {
                "dtype": app.dtype.name,
                "shape": [app.rows, *app.tail],
                "chunk_rows": app.chunk_rows,
                "segment_rows": app.chunk_rows,
                "stored_bytes": self._be.stored_nbytes(name),
            }
            for name, app in self._a.items()
        }

    def _final_attrs(
        self,
        n_outputs: int | None,
        sums: dict[str, list[str]],
        arrays: dict[str, dict[str, Any]],
    ) -> dict[str, Any]:
        """The full attribute object, still marked incomplete, with its fingerprint.

        The fingerprint covers the header (counts, target kind, array dtypes
        and shapes) and the segment checksums, not the backend or codec.
        """
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
                "chunk_elements": _fmt.CHUNK_ELEMENTS,
                "arrays": arrays,
                "checksum_algorithm": ALGORITHM,
                "checksums": sums,
                "fingerprint": fingerprint(header, sums),
                "created_by": f"ranktide {__version__}",
                "created_at": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            }
        )
        attrs.update(self._extra_attrs)
        return attrs

    def finish_aside(self) -> Path:
        """Finish the store under its temporary name, fsynced, without placing it.

        :func:`place_together` then gives it its name (with the stores that
        belong with it); until then an :meth:`abort` still removes it.

        Returns
        -------
        Path
            The temporary sibling holding the complete store.

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
            attrs = self._final_attrs(n_outputs, sums, self._array_meta())
            self._be.set_attrs(attrs)
            attrs["complete"] = True
            self._be.set_attrs(attrs)  # the completeness flag goes last
            self._be.close()
            fsync_tree(self._tmp)
        except BaseException:
            self._abort_quietly()
            raise
        self._open = False
        self._aside = True
        return self._tmp

    def commit(self) -> Path:
        """Finish the store and rename it to its final name.

        An existing store at the final name stays whole until the new one
        has its name (:func:`ranktide.atomic.replace_together`).

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
        self.finish_aside()
        place_together([self])
        return self.path

    def abort(self) -> None:
        """Discard everything written; nothing is left under either name."""
        self._abort_quietly()

    def _abort_quietly(self) -> None:
        be = getattr(self, "_be", None)
        if be is not None:
            be.close()
        pending = getattr(self, "_open", False) or getattr(self, "_aside", False)
        self._open = self._aside = False
        if pending and getattr(self, "_tmp", None) is not None:
            remove_path(self._tmp)


def place_together(writers: Sequence[StoreWriter]) -> None:
    """Give stores finished aside (:meth:`StoreWriter.finish_aside`) their names.

    One rename (or exchange) after another with nothing else between; every
    old store is kept until all are placed, and an error on the way puts the
    old ones back (:func:`ranktide.atomic.replace_together`) and removes the
    new ones. A kill between the renames leaves some new and some old: stores
    that must agree carry a shared id their readers check.
    """
    for w in writers:
        if not w._aside:
            raise ConfigError(f"{w.path}: the store is not finished aside; call finish_aside()")
    try:
        replace_together([(w._tmp, w.path) for w in writers])
    except BaseException:
        for w in writers:
            w._abort_quietly()
        raise
    for w in writers:
        w._aside = False


def _check_create_args(
    p: Path,
    *,
    n_cols: int,
    kind: str | None,
    n_outputs: int | None,
    names: Sequence[str] | None,
    backend: str | None,
    codec: str,
    overwrite: bool,
) -> str:
    """Validate the arguments of :func:`create_store`; return the backend name."""
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
    return be


def create_store(
    path: str | os.PathLike,
    *,
    n_cols: int,
    kind: str | None = None,
    n_outputs: int | None = None,
    names: Sequence[str] | None = None,
    backend: str | None = None,
    codec: str = DEFAULT_CODEC,
    overwrite: bool = False,
    source: str | None = None,
    attrs: Mapping[str, Any] | None = None,
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
    attrs : mapping, optional
        More attributes (JSON data) stored with the store's own, outside its
        fingerprint (e.g. ``split``: the split the store is a part of).

    Returns
    -------
    StoreWriter
    """
    p = Path(path)
    be = _check_create_args(
        p,
        n_cols=n_cols,
        kind=kind,
        n_outputs=n_outputs,
        names=names,
        backend=backend,
        codec=codec,
        overwrite=overwrite,
    )
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
        attrs=attrs,
    )
