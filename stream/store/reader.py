"""The store reader: :func:`open_store`, :class:`Store` and :class:`Block`.

Blocks are row ranges chosen at read time from a byte budget; a block never
splits a row. Reads are chunk-aligned and decode straight into one buffer per
array and block; the reader keeps the tail chunk of each array for the next
block, so a sequential pass decodes each chunk once, and checks each chunk's
checksum the first time it is decoded (``open_store(path, verify=False)``
skips that). A :class:`Store` serializes its reads with a lock, so it can be
shared with a prefetch thread. The layout is documented in :mod:`ranktide.store`.
"""

from __future__ import annotations

import errno
import os
import sys
import threading
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import ranktide.store.format as _fmt
import scipy.sparse as sp
from ranktide.errors import ConfigError, StoreError
from ranktide.store.backends import backend_class
from ranktide.store.blocking import cut_ranges
from ranktide.store.checksums import n_segments, segment_checksum
from ranktide.store.format import (
    FORMAT_NAME,
    FORMAT_VERSION,
    ChunkCheck,
    StoreBackend,
)

__all__ = ["Block", "Store", "open_store"]


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
            if sys.getrefcount(spare[i]) == _fmt._FREE_REFS and spare[i].shape[0] >= rows:
                spare.append(spare.pop(i))  # most recently used last
                return spare[-1][:rows]
        b = np.empty((rows,) + self.tail_shape, dtype=self.dtype)
        if len(spare) >= _fmt._SPARE_BUFFERS:
            free = [i for i in range(len(spare)) if sys.getrefcount(spare[i]) == _fmt._FREE_REFS]
            if not free:
                return b
            spare.pop(free[0])
        spare.append(b)
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
            raise StoreError(  # elements counted from 1; the segment keeps its chunk's number
                f"{self.path}: array {self.name!r} segment {j} (elements {lo + 1}..{hi}) fails "
                f"its checksum ({got} != {self.sums[j]}); the store is damaged, re-create it"
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
            raise ConfigError(  # Python's row indices (0-based, stop excluded), not row numbers
                f"{self.path}: row range [{start}, {stop}) is outside 0..{n}; "
                "give 0 <= start <= stop <= n_rows (0-based indices, stop excluded)"
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
        if rows is not None and block_bytes is not None:
            raise ConfigError("give rows= or block_bytes=, not both")
        n = self.n_rows
        per_entry = np.dtype(self.attrs["arrays"]["indices"]["dtype"]).itemsize + 4
        return cut_ranges(self._indptr_pieces(), n, rows=rows, block_bytes=block_bytes,
                          bytes_per_entry=per_entry, default_bytes=_fmt.DEFAULT_BLOCK_BYTES)

    def _indptr_pieces(self) -> Iterator[tuple[int, np.ndarray]]:
        """The row pointers in pieces of :data:`ranktide.store.format._INDPTR_PIECE` rows."""
        n = self.n_rows
        for p0 in range(0, n, _fmt._INDPTR_PIECE):
            yield p0, self.indptr_range(p0, min(n, p0 + _fmt._INDPTR_PIECE))

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
        for p0 in range(0, r.n, _fmt._INDPTR_PIECE):
            ip = self._be.read("indptr", p0, min(r.n, p0 + _fmt._INDPTR_PIECE))
            if p0 == 0 and ip[0] != 0:
                raise StoreError(f"{self.path}: indptr starts at {int(ip[0])}, not 0; the store "
                                 "is damaged, re-create it")
            # row i (0-based) ends before it starts when indptr[i + 1] < indptr[i]
            steps = np.diff(np.concatenate([[last], ip])) if p0 else np.diff(ip)
            down = np.flatnonzero(steps < 0)
            if down.size:
                row = (p0 - 1 if p0 else 0) + int(down[0]) + 1  # counted from 1
                raise StoreError(
                    f"{self.path}: indptr decreases at row {row} (it ends before it starts); "
                    "the store is damaged, re-create it"
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
    if p.is_symlink():
        try:
            os.stat(p)
        except OSError as exc:
            why = "a symbolic-link loop" if exc.errno == errno.ELOOP else "a broken symbolic link"
            raise StoreError(f"{p}: the store path is {why}; point it at a store") from None
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


def _peek_attrs(path: Path) -> dict[str, Any] | None:
    """The attributes of the store at ``path``; None when there is none to read."""
    try:
        be = backend_class(_sniff_backend(path)).open(path)
    except Exception:  # missing, not a store, unreadable: not this store's business
        return None
    try:
        attrs = be.get_attrs()
    except Exception:
        attrs = None
    finally:
        be.close()
    return attrs if isinstance(attrs, dict) else None


def _check_split_partner(p: Path, attrs: dict[str, Any]) -> None:
    """Refuse a part of a split whose partner names it back under another split id.

    Both parts of a split carry ``split`` = {id, part, partner} (the partner
    relative to this store's directory). A kill between the two renames that
    put a new pair in place leaves one new part next to an old one: each then
    names the other with a different id. A partner that is gone, moved, or
    now belongs to another split (or to none) is not checked.
    """
    mine = attrs.get("split")
    if not isinstance(mine, dict) or not isinstance(mine.get("partner"), str):
        return
    home = Path(os.path.realpath(p)).parent
    partner = home / mine["partner"]
    other = (_peek_attrs(partner) or {}).get("split")
    if not isinstance(other, dict) or not isinstance(other.get("partner"), str):
        return
    back = os.path.realpath(Path(os.path.realpath(partner)).parent / other["partner"])
    if back != os.path.realpath(p) or other.get("id") == mine.get("id"):
        return
    raise StoreError(
        f"{p}: this {mine.get('part', 'part')} store and its {other.get('part', 'partner')} "
        f"store {os.path.relpath(partner)} come from different runs of `ranktide split` (one "
        "was interrupted between replacing the two); run the split again with --overwrite"
    )


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
        The path is missing or not a store, is of a newer format version, is
        incomplete or damaged, or is a part of a split whose other part comes
        from another run of the split.
    """
    p = Path(path)
    be = backend_class(_sniff_backend(p)).open(p)
    try:
        attrs = _check_attrs(p, be, be.get_attrs())
        _check_split_partner(p, attrs)
    except BaseException:
        be.close()
        raise
    return Store(p, be, attrs, verify=verify)
