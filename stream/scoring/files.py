"""Rows of a Matrix Market or ``.npz`` file read for scoring, without writing a store.

``ranktide evaluate`` and ``ranktide predict`` accept such a file in place of a
store. The ingest readers do the parsing (:mod:`ranktide.ingest.mmio`,
:mod:`ranktide.ingest.targets`): a Matrix Market file is streamed chunk by
chunk in row order (entries within a row in any order, duplicates summed, as
ingest does), so memory holds a parsed chunk and one block of rows; a file
whose rows go back to an earlier row needs sorting, which only ingest does.
A scipy ``.npz`` is loaded whole within the memory budget, as ingest loads it.
Target and weight files (``--labels``, ``--values``, ``--tags``,
``--weights``) are read alongside in the same bounded pieces.

The source keeps the store's block contract (``block_ranges`` and
``read_block``) for the pass engine, with one restriction: blocks are read in
order, once each, as the engine's read-ahead thread reads them.
"""

from __future__ import annotations

import os
import queue
import threading
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError, InputError, StoreError
from ranktide.ingest.build import _RowSink, _SortedStream, _Unsorted
from ranktide.ingest.mmio import iter_entries, load_npz_matrix_whole, read_header
from ranktide.ingest.targets import open_targets, open_weights
from ranktide.passes.budget import parse_memory
from ranktide.store.memory_source import split_ranges
from ranktide.store.reader import Block

__all__ = ["FileSource", "open_file_source", "INGEST_FIRST"]

#: the one line for anything that is neither a store nor a file read here
INGEST_FIRST = ("is not a ranktide store, a Matrix Market file (.mtx) or a .npz matrix; run "
                "`ranktide ingest {path} --out STORE` first and give the store")

_DONE = object()


class _Pieces:
    """Rows arriving in pieces (1-D, 2-D arrays or CSR); ``take(n)`` returns the next n."""

    def __init__(self) -> None:
        self.parts: list[Any] = []
        self.rows = 0

    def add(self, part: Any) -> None:
        self.parts.append(part)
        self.rows += part.shape[0]

    def take(self, n: int) -> Any:
        out, got = [], 0
        while got < n:
            part = self.parts[0]
            need = n - got
            if part.shape[0] <= need:
                out.append(self.parts.pop(0))
                got += part.shape[0]
            else:
                out.append(part[:need])
                self.parts[0] = part[need:]
                got = n
        self.rows -= n
        if out and sp.issparse(out[0]):
            return sp.vstack(out, format="csr") if len(out) > 1 else out[0]
        return np.concatenate(out) if len(out) > 1 else out[0]


class _Feeder:
    """Runs an ingest reader's ``feed(writer)`` on a thread; its appends become pieces.

    A bounded queue keeps at most a few pieces ahead of the reader of the
    blocks, so memory does not grow with the file.
    """

    def __init__(self, feed: Any, kind: str, n_outputs: int) -> None:
        self.kind = kind
        self.k = int(n_outputs)
        self.q: queue.Queue = queue.Queue(maxsize=2)
        self.stop = threading.Event()
        self.pieces = _Pieces()
        self.thread = threading.Thread(target=self._run, args=(feed,), daemon=True,
                                       name="ranktide-targets")
        self.thread.start()

    # the StoreWriter methods the ingest readers call
    def append_targets(self, *, classes=None, values=None, tags_indptr=None,
                       tags_indices=None) -> None:
        if classes is not None:
            self._put(np.asarray(classes, dtype=np.int32))
        elif values is not None:
            self._put(np.asarray(values, dtype=np.float32))
        else:
            m = tags_indptr.shape[0] - 1
            ones = np.ones(tags_indices.shape[0], dtype=np.float32)
            self._put(sp.csr_matrix((ones, tags_indices, tags_indptr), shape=(m, self.k)))

    def append_weights(self, w: np.ndarray) -> None:
        self._put(np.asarray(w, dtype=np.float32))

    def _put(self, item: Any) -> None:
        while not self.stop.is_set():
            try:
                self.q.put(item, timeout=0.05)
                return
            except queue.Full:
                continue
        raise _Stopped

    def _run(self, feed: Any) -> None:
        try:
            feed(self)
        except _Stopped:
            return
        except BaseException as exc:  # handed to the reader of the blocks
            self._put_final(exc)
            return
        self._put_final(_DONE)

    def _put_final(self, item: Any) -> None:
        try:
            self._put(item)
        except _Stopped:
            pass

    def take(self, n: int) -> Any:
        while self.pieces.rows < n:
            item = self.q.get()
            if item is _DONE:
                raise InputError("targets ended before the matrix rows (report this as a bug)")
            if isinstance(item, BaseException):
                raise item
            self.pieces.add(item)
        return self.pieces.take(n)

    def close(self) -> None:
        self.stop.set()
        self.thread.join(timeout=10)


class _Stopped(Exception):
    """The reader of the blocks went away: the feeding thread ends."""


class _Rows:
    """The store-writer face ``_RowSink`` appends CSR row runs to."""

    def __init__(self, n_cols: int) -> None:
        self.n_cols = n_cols
        self.pieces = _Pieces()

    def append(self, indptr: np.ndarray, indices: np.ndarray, data: np.ndarray) -> None:
        m = indptr.shape[0] - 1
        self.pieces.add(sp.csr_matrix(
            (data.astype(np.float32), indices.astype(np.int32), indptr.astype(np.int64)),
            shape=(m, self.n_cols)))


class FileSource:
    """A Matrix Market or ``.npz`` file (and its target and weight files) as row blocks.

    Use :func:`open_file_source`. Attributes follow the store's: ``path``,
    ``shape``, ``nnz``, ``target_kind``, ``n_outputs``, ``output_names``,
    ``has_weights``; ``fingerprint`` is None (the file is not a store).
    """

    backend = "file"
    fingerprint = None

    def __init__(self, path: Path, hdr: Any, *, X: sp.csr_matrix | None, tsrc: Any,
                 wsrc: Any) -> None:
        self.path = path
        self._hdr = hdr
        self._X = X
        n_rows = X.shape[0] if X is not None else int(hdr.n_rows)
        n_cols = X.shape[1] if X is not None else int(hdr.n_cols)
        self.shape = (n_rows, n_cols)
        self.nnz = int(X.nnz) if X is not None else int(hdr.nnz or 0)
        self.target_kind = None if tsrc is None else tsrc.kind
        self.n_outputs = None if tsrc is None else tsrc.n_outputs
        self.output_names = None if tsrc is None else tsrc.names
        self.has_weights = wsrc is not None
        self.attrs: dict = {}
        self._tsrc, self._wsrc = tsrc, wsrc
        self._remap: np.ndarray | None = None
        self._next = 0
        self._entries: Any = None
        self._stream: Any = None
        self._rows: _Rows | None = None
        self._targets: _Feeder | None = None
        self._weights: _Feeder | None = None

    # ---------------------------------------------------------------- naming
    def use_output_names(self, names: list[str]) -> None:
        """Renumber class or tag ids to ``names`` (the model's), matching by name."""
        if self.output_names is None or self.target_kind == "values":
            return
        where = {n: i for i, n in enumerate(names)}
        missing = [n for n in self.output_names if n not in where]
        if missing:
            what = "label" if self.target_kind == "classes" else "tag"
            raise InputError(
                f"{self._tsrc.path}: {what} {missing[0]!r} is not one of the model's "
                f"{len(names)} outputs; evaluate with the labels the model was trained on")
        self._remap = np.array([where[n] for n in self.output_names], dtype=np.int32)
        self.output_names = list(names)
        self.n_outputs = len(names)

    # ---------------------------------------------------------------- blocks
    def block_ranges(self, *, rows: int | None = None,
                     block_bytes: int | None = None) -> list[tuple[int, int]]:
        n = self.shape[0]
        if self._X is not None:
            return split_ranges(self._X.indptr, rows=rows, block_bytes=block_bytes)
        if rows is None:  # an average row's bytes from the declared entry count
            per_row = 12 * max(1, self.nnz) / max(1, n) + 8
            rows = max(1, int((block_bytes or 64 * 2**20) // per_row))
        return [(a, min(n, a + int(rows))) for a in range(0, n, int(rows))]

    def read_block(self, start: int, stop: int) -> Any:
        if start != self._next:
            raise ConfigError(f"{self.path}: a file is read in order; block {start}:{stop} came "
                              f"after rows up to {self._next} (use a store for random access)")
        self._next = stop
        if self._X is not None:
            X = self._X[start:stop]
        else:
            X = self._read_rows(stop - start)
        targets = weights = None
        if self._tsrc is not None:
            if self._targets is None:
                self._targets = _Feeder(self._tsrc.feed, self._tsrc.kind, self._tsrc.n_outputs)
            targets = self._targets.take(stop - start)
            if self._remap is not None:
                targets = self._renumber(targets)
        if self._wsrc is not None:
            if self._weights is None:
                self._weights = _Feeder(lambda w: self._wsrc.feed(w, self.shape[0]), "w", 0)
            weights = self._weights.take(stop - start)
        nbytes = int(X.data.nbytes + X.indices.nbytes + X.indptr.nbytes)
        return Block(start=start, stop=stop, X=X, targets=targets, weights=weights,
                     io={"read_s": 0.0, "decode_s": 0.0, "bytes_disk": 0,
                         "bytes_decoded": nbytes})

    def _renumber(self, targets: Any) -> Any:
        if sp.issparse(targets):
            t = targets.tocsr(copy=True)
            t.indices = self._remap[t.indices]
            t = sp.csr_matrix(t, shape=(t.shape[0], self.n_outputs))
            t.sort_indices()
            return t
        return self._remap[targets]

    def _read_rows(self, n: int) -> sp.csr_matrix:
        hdr = self._hdr
        if self._entries is None:
            self._rows = _Rows(int(hdr.n_cols))
            self._stream = _SortedStream(_RowSink(self._rows, n_cols=int(hdr.n_cols),
                                                  duplicates="sum", hdr=hdr))
            self._entries = iter_entries(hdr)
        rows = self._rows
        while rows.pieces.rows < n:
            chunk = next(self._entries, None)
            if chunk is None:
                self._stream.finish(int(hdr.n_rows))
                break
            try:
                self._stream.add(chunk.rows, chunk.cols, chunk.vals)
            except _Unsorted:
                raise InputError(
                    f"{self.path}: entries go back to an earlier row; scoring reads a file in "
                    f"row order, so run `ranktide ingest {self.path} --out STORE` first (ingest "
                    "sorts the rows) and give the store") from None
        return rows.pieces.take(n)

    def close(self) -> None:
        for feeder in (self._targets, self._weights):
            if feeder is not None:
                feeder.close()
        self._entries = None

    def __enter__(self) -> FileSource:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def open_file_source(path: str | os.PathLike, *, labels: Any = None, values: Any = None,
                     tags: Any = None, weights: Any = None,
                     memory: Any = None) -> FileSource:
    """Open a Matrix Market or ``.npz`` file (with optional target and weight files).

    Raises
    ------
    StoreError
        ``path`` is neither (the message says to run ``ranktide ingest`` first).
    InputError
        A malformed file, or target and weight files whose row counts differ
        from the matrix's.
    """
    p = Path(path)
    if not p.is_file():
        raise StoreError(f"{p}: " + INGEST_FIRST.format(path=p))
    hdr = read_header(p)
    if hdr.fmt not in ("mm", "npz"):
        raise StoreError(f"{p}: " + INGEST_FIRST.format(path=p))
    X = None
    if hdr.fmt == "npz":
        X = load_npz_matrix_whole(p, memory=parse_memory(memory))
        X = sp.csr_matrix(X, dtype=np.float32)
        X.sum_duplicates()
        bad = ~np.isfinite(X.data)
        if bad.any():
            j = int(np.flatnonzero(bad)[0])
            r = int(np.searchsorted(X.indptr, j, side="right")) - 1
            raise InputError(f"{p}: entry (row {r + 1}, column {int(X.indices[j]) + 1}) is not "
                             "finite; remove it or give a finite value")
    tsrc = open_targets(labels=labels, values=values, tags=tags)
    wsrc = open_weights(weights)
    n_rows = X.shape[0] if X is not None else int(hdr.n_rows)
    if tsrc is not None:
        tsrc.check_rows(n_rows)
    return FileSource(p, hdr, X=X, tsrc=tsrc, wsrc=wsrc)
