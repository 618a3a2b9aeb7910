"""Bounded-memory ingest of sparse matrix files into a store.

Matrix Market entries that arrive in row order stream straight to the store
writer: each parsed chunk's complete rows are sorted by column, duplicates
summed, and appended. The first entry that goes back to an earlier row
switches the ingest to bucketing: the writer is discarded and the file is read
again, each entry going to a scratch file chosen by its row range; then every
bucket is sorted on its own and written as CSR. Triplet files (whose column
count is only known at the end) always take the bucketing route. Memory is
bounded by the chunk size and the bucket size, both derived from the memory
budget, never by the file size. Scratch files live in a hidden directory next
to the output and are removed afterwards; the store itself is written under a
temporary name and renamed only when complete.
"""

from __future__ import annotations

import os
import queue
import shutil
import sys
import threading
import time
from collections.abc import Iterator
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.atomic import temp_sibling
from ranktide.errors import ConfigError, InputError
from ranktide.ingest.mmio import (
    CHUNK_BYTES,
    EntryChunk,
    MatrixHeader,
    iter_entries,
    load_npz_matrix_whole,
    read_header,
)
from ranktide.ingest.targets import TargetSource, WeightSource, open_targets, open_weights
from ranktide.kernels import parse as kp
from ranktide.outputs import check_disk_space, check_output, check_source
from ranktide.passes.budget import parse_memory
from ranktide.store import create_store
from ranktide.store.format import DEFAULT_CODEC

__all__ = ["IngestSummary", "ingest", "DUPLICATES"]

DUPLICATES = ("sum", "error")
#: bytes of working memory per entry while a bucket is sorted (record, key,
#: order, sorted copies); common practice, no source: measured peak / entries.
_SORT_BYTES_PER_ENTRY = 96
_EMPTY_ROWS_PIECE = 1 << 20


@dataclass(frozen=True)
class IngestSummary:
    """What an ingest did.

    Attributes
    ----------
    path : str
        The store written.
    source : str
    format : {"mm", "triplets", "npz"}
    n_rows, n_cols, nnz : int
        Shape and stored entries (after duplicates were summed).
    entries_read : int
        Entries in the source.
    duplicates_summed : int
        Entries merged into an earlier entry of the same (row, column).
    empty_rows : int
    sorted_input : bool
        Whether the entries arrived in row order (no scratch needed).
    buckets : int
        Scratch buckets used (0 when the input streamed straight through).
    target_kind : str or None
    n_outputs : int or None
    seconds : float
    entries_per_s : float
    """

    path: str
    source: str
    format: str
    n_rows: int
    n_cols: int
    nnz: int
    entries_read: int
    duplicates_summed: int
    empty_rows: int
    sorted_input: bool
    buckets: int
    target_kind: str | None
    n_outputs: int | None
    seconds: float
    entries_per_s: float

    def as_dict(self) -> dict[str, Any]:
        """The summary as a JSON-ready dict."""
        return asdict(self)

    def table(self) -> str:
        """An aligned two-column table."""
        rows = [
            ("output", self.path),
            ("source", f"{self.source} ({self.format})"),
            ("rows", f"{self.n_rows:,}"),
            ("columns", f"{self.n_cols:,}"),
            ("entries stored", f"{self.nnz:,}"),
            ("entries read", f"{self.entries_read:,}"),
            ("duplicates summed", f"{self.duplicates_summed:,}"),
            ("empty rows", f"{self.empty_rows:,}"),
            ("row order", "sorted (streamed)" if self.sorted_input else
             f"unsorted ({self.buckets} scratch buckets)"),
            ("targets", f"{self.target_kind or 'none'}"
             + (f" ({self.n_outputs} outputs)" if self.n_outputs is not None else "")),
            ("seconds", f"{self.seconds:.2f}"),
            ("entries/s", f"{self.entries_per_s:,.0f}"),
        ]  # fmt: skip
        w = max(len(k) for k, _ in rows)
        return "\n".join(f"{k:<{w}}  {v}" for k, v in rows)


# --------------------------------------------------------------------------- read-ahead


_END = object()


def _read_ahead(chunks: Iterator[EntryChunk], depth: int = 2) -> Iterator[EntryChunk]:
    """Parse the next chunks in a background thread while this one is written.

    The parser kernel releases the GIL, so parsing overlaps with sorting,
    compression and writing. Chunks are copied out of the parser's reused
    buffers; at most ``depth`` wait in the queue. An error in the parser is
    raised here, in order; leaving the loop early stops the thread.
    """
    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def put(item: Any) -> bool:
        while not stop.is_set():
            try:
                q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def work() -> None:
        try:
            for ch in chunks:
                item = EntryChunk(ch.rows.copy(), ch.cols.copy(), ch.vals.copy(), ch.bytes_done)
                if not put(item):
                    return
            put(_END)
        except BaseException as exc:  # handed to the consumer
            put(exc)
        finally:
            close = getattr(chunks, "close", None)
            if close is not None:
                close()  # the reader's file, when the consumer stopped early

    t = threading.Thread(target=work, name="ranktide-ingest-parse", daemon=True)
    t.start()
    try:
        while True:
            item = q.get()
            if item is _END:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        t.join()


# --------------------------------------------------------------------------- rows -> CSR


class _Unsorted(Exception):
    """Raised inside the streaming route when an entry goes back to an earlier row."""


class _RowSink:
    """Turns row-sorted entry runs into CSR appends; counts duplicates and empty rows."""

    def __init__(self, writer: Any, *, n_cols: int, duplicates: str, hdr: MatrixHeader):
        self.writer = writer
        self.n_cols = n_cols
        self.duplicates = duplicates
        self.hdr = hdr
        self.next_row = 0
        self.dups = 0
        self.nnz = 0
        self.empty = 0

    def empty_rows(self, upto: int) -> None:
        """Append empty rows until ``next_row == upto``."""
        while self.next_row < upto:
            m = min(_EMPTY_ROWS_PIECE, upto - self.next_row)
            self.writer.append(np.zeros(m + 1, np.int64), np.zeros(0, np.int64), np.zeros(0))
            self.next_row += m
            self.empty += m

    def rows(self, r0: int, r1: int, rows: np.ndarray, cols: np.ndarray, vals: np.ndarray):
        """Append rows ``r0:r1`` from their entries (rows within, any order)."""
        self.empty_rows(r0)
        m = r1 - r0
        n = rows.shape[0]
        indptr = np.empty(m + 1, dtype=np.int64)
        out_c = np.empty(n, dtype=np.int64)
        out_v = np.empty(n, dtype=np.float64)
        st = np.zeros(8, dtype=np.int64)
        kp.entries_to_csr(rows, cols, vals, r0, m, indptr, out_c, out_v, st)
        if st[0] != 0:  # not in (row, column) order: counting sort by row, then by column
            kp.unsorted_entries_to_csr(
                rows, cols, vals, r0, m, indptr, np.empty(m, np.int64),
                np.empty(n, np.int64), np.empty(n), out_c, out_v, st,
            )  # fmt: skip
        k, n_dup = int(st[2]), int(st[3])
        if n_dup and self.duplicates == "error":
            self._refuse_duplicate(r0, rows, cols)
        self.writer.append(indptr, out_c[:k], out_v[:k])
        self.dups += n_dup
        self.empty += int(st[4])
        self.nnz += k
        self.next_row = r1

    def _refuse_duplicate(self, r0: int, rows: np.ndarray, cols: np.ndarray) -> None:
        order = np.lexsort((cols, rows))  # only on the way to an error
        r, c = rows[order], cols[order]
        j = int(np.flatnonzero((r[1:] == r[:-1]) & (c[1:] == c[:-1]))[0]) + 1
        raise InputError(  # rows and columns count from 1, as in Matrix Market
            f"{self.hdr.path}: entry (row {int(r[j]) + 1}, column "
            f"{int(c[j]) + 1}) appears more than once; remove the repeat or "
            "pass --duplicates sum to add them"
        )


class _SortedStream:
    """The streaming route: complete rows of each chunk go to the sink at once."""

    def __init__(self, sink: _RowSink):
        self.sink = sink
        self.pend = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0))
        self.last = 0

    def add(self, rows: np.ndarray, cols: np.ndarray, vals: np.ndarray) -> None:
        if rows[0] < self.last or (rows.size > 1 and not (rows[1:] >= rows[:-1]).all()):
            raise _Unsorted
        top = int(rows[-1])
        cut = int(np.searchsorted(rows, top, side="left"))
        pr, pc, pv = self.pend
        if cut > 0 or (pr.size and pr[0] < top):
            r = np.concatenate((pr, rows[:cut]))
            c = np.concatenate((pc, cols[:cut]))
            v = np.concatenate((pv, vals[:cut]))
            if r.size:
                self.sink.rows(int(r[0]), top, r, c, v)
            pr, pc, pv = pr[:0], pc[:0], pv[:0]
        self.pend = (
            np.concatenate((pr, rows[cut:])),
            np.concatenate((pc, cols[cut:])),
            np.concatenate((pv, vals[cut:])),
        )
        self.last = top

    def finish(self, n_rows: int) -> None:
        pr, pc, pv = self.pend
        if pr.size:
            self.sink.rows(int(pr[0]), int(pr[0]) + 1, pr, pc, pv)
        self.sink.empty_rows(n_rows)


# --------------------------------------------------------------------------- buckets


class _Buckets:
    """Scratch files of entries, one set (rows, cols, vals) per range of ``width`` rows."""

    _PARTS = (("r", np.int64), ("c", np.int64), ("v", np.float64))

    def __init__(self, root: Path, width: int):
        self.root = root
        self.width = max(1, int(width))
        self.counts: dict[int, int] = {}
        root.mkdir(parents=True, exist_ok=False)

    def file(self, b: int, part: str) -> Path:
        return self.root / f"bucket-{b:08d}.{part}"

    def add(self, rows: np.ndarray, cols: np.ndarray, vals: np.ndarray) -> None:
        n = rows.shape[0]
        b0 = int(rows.min()) // self.width
        nb = int(rows.max()) // self.width - b0 + 1
        counts = np.empty(nb + 1, dtype=np.int64)
        grouped = (np.empty(n, np.int64), np.empty(n, np.int64), np.empty(n, np.float64))
        kp.bucket_scatter(rows, cols, vals, self.width, b0, counts, np.empty(nb, np.int64),
                          *grouped)
        for j in np.flatnonzero(np.diff(counts)).tolist():  # one write per bucket, not per entry
            s, e = int(counts[j]), int(counts[j + 1])
            bid = b0 + j
            for (part, _dt), arr in zip(self._PARTS, grouped, strict=True):
                with open(self.file(bid, part), "ab") as fh:
                    arr[s:e].tofile(fh)
            self.counts[bid] = self.counts.get(bid, 0) + (e - s)

    def read(self, bid: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The whole bucket; its files are removed."""
        out = []
        for part, dt in self._PARTS:
            out.append(np.fromfile(self.file(bid, part), dtype=dt))
            self.file(bid, part).unlink()
        return out[0], out[1], out[2]

    def read_pieces(self, bid: int, size: int) -> Iterator[tuple[np.ndarray, ...]]:
        """The bucket in pieces of ``size`` entries; its files are removed afterwards."""
        handles = [open(self.file(bid, part), "rb") for part, _dt in self._PARTS]
        try:
            while True:
                got = [np.fromfile(fh, dtype=dt, count=size)
                       for fh, (_p, dt) in zip(handles, self._PARTS, strict=True)]
                if got[0].size == 0:
                    return
                yield tuple(got)
        finally:
            for fh in handles:
                fh.close()
            for part, _dt in self._PARTS:
                self.file(bid, part).unlink()


def _drain(
    bk: _Buckets,
    sink: _RowSink,
    *,
    n_rows: int,
    max_entries: int,
    progress: Any = None,
) -> int:
    """Write the buckets in row order through ``sink``; return buckets processed."""
    used = 0
    for bid in sorted(bk.counts):
        r0 = bid * bk.width
        r1 = min(n_rows, r0 + bk.width)
        if bk.counts[bid] > max_entries * 5 // 4 and bk.width > 1:
            # too big to sort in the budget: re-bucket by a finer row range
            # (at least halving the width, so the recursion ends)
            finer = min(bk.width // 2, -(-bk.width * max_entries // bk.counts[bid]))
            sub = _Buckets(bk.root / f"split-{bid}", max(1, finer))
            for r, c, v in bk.read_pieces(bid, max_entries):
                sub.add(r - r0, c, v)
            used += _drain_shifted(sub, sink, r0=r0, r1=r1, max_entries=max_entries)
            shutil.rmtree(sub.root, ignore_errors=True)
        else:
            r, c, v = bk.read(bid)
            sink.rows(r0, r1, r, c, v)
            used += 1
        if progress is not None:
            progress.update(1)
    sink.empty_rows(n_rows)
    return used


def _drain_shifted(sub: _Buckets, sink: _RowSink, *, r0: int, r1: int, max_entries: int) -> int:
    """Drain sub-buckets whose rows are relative to ``r0``."""
    shifted = _ShiftSink(sink, r0)
    return _drain(sub, shifted, n_rows=r1 - r0, max_entries=max_entries)


class _ShiftSink:
    """A sink view that adds an offset to row numbers."""

    def __init__(self, sink: Any, offset: int):
        self.sink = sink
        self.offset = offset

    def rows(self, r0: int, r1: int, rows: np.ndarray, cols: np.ndarray, vals: np.ndarray):
        self.sink.rows(r0 + self.offset, r1 + self.offset, rows + self.offset, cols, vals)

    def empty_rows(self, upto: int) -> None:
        self.sink.empty_rows(upto + self.offset)


# --------------------------------------------------------------------------- driver


@dataclass(frozen=True)
class _Plan:
    chunk_bytes: int
    bucket_entries: int


def _plan(memory: int) -> _Plan:
    """Chunk size and bucket size from the memory budget (bytes)."""
    chunk = int(min(CHUNK_BYTES, max(1 << 16, memory // 16)))
    bucket = max(1 << 14, memory // 2 // _SORT_BYTES_PER_ENTRY)
    return _Plan(chunk_bytes=chunk, bucket_entries=int(bucket))


def _parse_memory(memory: Any) -> int:
    return int(parse_memory(memory))


class _Progress:
    """A tqdm bar over file bytes with entries/s; silent when disabled."""

    def __init__(self, enabled: bool, total: int, desc: str):
        self.bar = None
        self.t0 = time.perf_counter()
        if enabled and sys.stderr.isatty():
            from tqdm import tqdm

            self.bar = tqdm(total=total, unit="B", unit_scale=True, desc=desc, leave=False)
        self.last = 0

    def __call__(self, done: int, entries: int) -> None:
        if self.bar is None:
            return
        self.bar.update(done - self.last)
        self.last = done
        rate = entries / max(1e-9, time.perf_counter() - self.t0)
        self.bar.set_postfix_str(f"{rate / 1e6:.2f}M entries/s", refresh=False)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _writer(out: Path, hdr: MatrixHeader, n_cols: int, tsrc: TargetSource | None, a: dict):
    return create_store(
        out,
        n_cols=n_cols,
        kind=None if tsrc is None else tsrc.kind,
        n_outputs=None if tsrc is None else tsrc.n_outputs,
        names=None if tsrc is None else tsrc.names,
        backend=a["backend"],
        codec=a["codec"],
        overwrite=a["overwrite"],
        source=str(hdr.path),
    )


def _finish(writer: Any, n_rows: int, tsrc: TargetSource | None, wsrc: WeightSource | None):
    if tsrc is not None:
        tsrc.check_rows(n_rows)
        tsrc.feed(writer)
    if wsrc is not None:
        wsrc.feed(writer, n_rows)
    writer.commit()


def _stream_sorted(hdr, out, tsrc, plan, a, bar) -> tuple[Any, _RowSink, int] | None:
    """The streaming route; None when the file turns out not to be in row order."""
    writer = _writer(out, hdr, hdr.n_cols, tsrc, a)
    sink = _RowSink(writer, n_cols=hdr.n_cols, duplicates=a["duplicates"], hdr=hdr)
    stream = _SortedStream(sink)
    total = 0
    try:
        for ch in _read_ahead(iter_entries(hdr, chunk_bytes=plan.chunk_bytes, on_progress=bar)):
            stream.add(ch.rows, ch.cols, ch.vals)
            total += ch.rows.shape[0]
        stream.finish(hdr.n_rows)
    except _Unsorted:
        writer.abort()
        return None
    except BaseException:
        writer.abort()
        raise
    return writer, sink, total


def _bucket_route(hdr, out, tsrc, plan, a, bar, scratch: Path) -> tuple[Any, _RowSink, int, int]:
    """The bucketing route (unsorted Matrix Market, all triplet files)."""
    n_rows, n_cols = hdr.n_rows, hdr.n_cols
    bk = None
    total = 0
    max_r = max_c = -1
    for ch in _read_ahead(iter_entries(hdr, chunk_bytes=plan.chunk_bytes, on_progress=bar)):
        if bk is None:
            bk = _Buckets(scratch, _bucket_width(hdr, ch, plan))
        bk.add(ch.rows, ch.cols, ch.vals)
        total += ch.rows.shape[0]
        max_r = max(max_r, int(ch.rows.max()))
        max_c = max(max_c, int(ch.cols.max()))
    if n_rows is None:
        n_rows, n_cols = max_r + 1, max_c + 1
        if n_cols < 1:
            raise InputError(f"{hdr.path}: no entries; the file has no data lines")
    if tsrc is not None:
        tsrc.check_rows(n_rows)
    writer = _writer(out, hdr, n_cols, tsrc, a)
    sink = _RowSink(writer, n_cols=n_cols, duplicates=a["duplicates"], hdr=hdr)
    try:
        used = 0
        if bk is not None:
            used = _drain(bk, sink, n_rows=n_rows, max_entries=plan.bucket_entries)
        else:
            sink.empty_rows(n_rows)
    except BaseException:
        writer.abort()
        raise
    return writer, sink, total, used


def _bucket_width(hdr: MatrixHeader, first: Any, plan: _Plan) -> int:
    """Rows per bucket so that a bucket holds about ``plan.bucket_entries`` entries."""
    if hdr.n_rows is not None and hdr.nnz:
        return max(1, -(-hdr.n_rows * plan.bucket_entries // hdr.nnz))
    # triplets: estimate rows and entries from the first chunk
    n = first.rows.shape[0]
    rows_seen = int(first.rows.max()) + 1
    nnz_est = max(n, int(n * hdr.file_bytes / max(1, first.bytes_done)))
    return max(1, -(-rows_seen * plan.bucket_entries // nnz_est))


def _ingest_npz(hdr, out, tsrc, memory, a) -> tuple[Any, _RowSink, int, int]:
    M = load_npz_matrix_whole(hdr.path, memory=memory)
    n_rows, n_cols = M.shape
    bad = ~np.isfinite(M.data)
    if bad.any():
        j = int(np.flatnonzero(bad)[0])
        r = int(np.searchsorted(M.indptr, j, side="right")) - 1
        raise InputError(
            f"{hdr.path}: entry (row {r + 1}, column {int(M.indices[j]) + 1}): value "
            f"{float(M.data[j])} is not finite; remove it or give a finite value"
        )
    if tsrc is not None:
        tsrc.check_rows(n_rows)
    writer = _writer(out, hdr, n_cols, tsrc, a)
    sink = _RowSink(writer, n_cols=n_cols, duplicates=a["duplicates"], hdr=hdr)
    try:
        step = max(1, int(n_rows * 2**20 // max(1, M.nnz)))  # about 1M entries per append
        for r0 in range(0, n_rows, step):
            r1 = min(n_rows, r0 + step)
            lo, hi = int(M.indptr[r0]), int(M.indptr[r1])
            counts = np.diff(M.indptr[r0 : r1 + 1])
            rows = np.repeat(np.arange(r0, r1, dtype=np.int64), counts)
            sink.rows(r0, r1, rows, M.indices[lo:hi].astype(np.int64), M.data[lo:hi])
    except BaseException:
        writer.abort()
        raise
    return writer, sink, int(M.nnz), 0


def declared_store_bytes(hdr: MatrixHeader, tsrc: TargetSource | None,
                         wsrc: WeightSource | None) -> int:
    """Uncompressed bytes of the store a header promises: row pointers, entries, targets.

    Row pointers are int64 (n + 1), each entry a column index (int32, int64 past
    2**31 columns) and a float32 value; class targets int32, value targets
    float32 (n x k), weights float32 (n). Compression usually writes less.
    """
    n, d, nnz = int(hdr.n_rows or 0), int(hdr.n_cols or 0), int(hdr.nnz or 0)
    idx = 4 if d < 2**31 else 8
    need = 8 * (n + 1) + nnz * (idx + 4)
    if tsrc is not None:
        k = int(tsrc.n_outputs or 1)
        need += 4 * n * (k if tsrc.kind == "values" else 1)
    if wsrc is not None:
        need += 4 * n
    return need


def _check_declared(hdr: MatrixHeader, out: Path, tsrc: TargetSource | None,
                    wsrc: WeightSource | None) -> None:
    """Refuse a header that promises a store larger than the free disk space."""
    if hdr.fmt != "mm" or hdr.n_rows is None or hdr.nnz is None:
        return
    need = declared_store_bytes(hdr, tsrc, wsrc)
    check_disk_space(out, need, what=f"the header of {hdr.path.name} declares {hdr.n_rows} "
                     f"rows and {hdr.nnz} entries: the store needs",
                     fix="free space, write the store to another disk, or fix the size line")


def _validate(source, out, duplicates, fmt, overwrite, files) -> tuple[Path, Path]:
    if duplicates not in DUPLICATES:
        raise ConfigError(f"duplicates={duplicates!r} is unknown; use 'sum' or 'error'")
    src = check_source(source, "source")
    for what, path in files.items():
        if path is not None:
            check_source(path, f"{what} file")
    out_p = check_output(out, {"the source": src, **files}, overwrite=overwrite)
    return src, out_p


def ingest(
    source: str | os.PathLike,
    out: str | os.PathLike,
    *,
    labels: str | os.PathLike | None = None,
    values: str | os.PathLike | None = None,
    tags: str | os.PathLike | None = None,
    weights: str | os.PathLike | None = None,
    tag_sep: str | None = None,
    one_based: bool = False,
    fmt: str | None = None,
    duplicates: str = "sum",
    backend: str | None = None,
    codec: str = DEFAULT_CODEC,
    overwrite: bool = False,
    memory: str | int | None = None,
    progress: bool = False,
) -> IngestSummary:
    """Read a sparse matrix file (and its targets and weights) into a store.

    Parameters
    ----------
    source : path
        Matrix Market coordinate file, triplet text file or scipy ``.npz``.
    out : path
        The store to create (zarr directory, or HDF5 file for ``.h5``).
    labels, values, tags : path, optional
        At most one target file (see :mod:`ranktide.ingest.targets`).
    weights : path, optional
        Row weights (text, one per line, or ``.npy``).
    tag_sep : str, optional
        Separator of the tags file (see :mod:`ranktide.ingest.targets`);
        default a comma, refusing tags with white space inside.
    one_based : bool
        Triplet indices start at 1.
    fmt : {"mm", "triplets", "npz"}, optional
        Input format; guessed from the banner and suffix when omitted.
    duplicates : {"sum", "error"}
        What to do with repeated (row, column) entries.
    backend : {"zarr", "hdf5"}, optional
    codec : {"zstd", "lz4", "none"}
    overwrite : bool
        Replace an existing ``out``.
    memory : str or int, optional
        Memory budget (``"4GB"``); bounds the read chunk and the bucket size.
    progress : bool
        Show a progress bar on a terminal.

    Returns
    -------
    IngestSummary

    Raises
    ------
    InputError
        Malformed source, target or weight file (one line naming the file and
        the line or entry); nothing is left under ``out``.
    OutputExistsError
        ``out`` exists and ``overwrite`` is false.
    """
    t0 = time.perf_counter()
    src, out_p = _validate(source, out, duplicates, fmt, overwrite,
                           {"--labels": labels, "--values": values, "--tags": tags,
                            "--weights": weights})
    budget = _parse_memory(memory)
    plan = _plan(budget)
    hdr = read_header(src, fmt=fmt, one_based=one_based)
    tsrc = open_targets(labels=labels, values=values, tags=tags, tag_sep=tag_sep)
    wsrc = open_weights(weights)
    if tsrc is not None and hdr.n_rows is not None:
        tsrc.check_rows(hdr.n_rows)
    _check_declared(hdr, out_p, tsrc, wsrc)
    a = {"backend": backend, "codec": codec, "overwrite": overwrite, "duplicates": duplicates}
    bar = _Progress(progress, hdr.file_bytes, f"ingest {src.name}")
    scratch = temp_sibling(out_p, "scratch")
    writer = None
    try:
        streamed = hdr.fmt == "mm"
        res = _stream_sorted(hdr, out_p, tsrc, plan, a, bar) if streamed else None
        if res is not None:
            writer, sink, total = res
            used = 0
        elif hdr.fmt == "npz":
            writer, sink, total, used = _ingest_npz(hdr, out_p, tsrc, budget, a)
            streamed = False
        else:
            bar.close()
            bar = _Progress(progress, hdr.file_bytes, f"ingest {src.name} (unsorted)")
            writer, sink, total, used = _bucket_route(hdr, out_p, tsrc, plan, a, bar, scratch)
            streamed = False
        n_rows = sink.next_row
        _finish(writer, n_rows, tsrc, wsrc)
        writer = None
    finally:
        bar.close()
        _abort_quiet(writer)
        shutil.rmtree(scratch, ignore_errors=True)
    secs = time.perf_counter() - t0
    return IngestSummary(
        path=str(out_p),
        source=str(src),
        format=hdr.fmt,
        n_rows=int(n_rows),
        n_cols=int(sink.n_cols),
        nnz=int(sink.nnz),
        entries_read=int(total),
        duplicates_summed=int(sink.dups),
        empty_rows=int(sink.empty),
        sorted_input=bool(streamed),
        buckets=int(used),
        target_kind=None if tsrc is None else tsrc.kind,
        n_outputs=None if tsrc is None else tsrc.n_outputs,
        seconds=secs,
        entries_per_s=total / max(secs, 1e-9),
    )


def _abort_quiet(writer: Any) -> None:
    if writer is not None:
        try:
            writer.abort()
        except Exception:  # the original error matters more
            pass

