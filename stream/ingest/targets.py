"""Readers of target and weight files, streamed in bounded memory.

* ``--labels``: one class label per line. When every label is a whole
  number ``>= 0`` the numbers are the class ids (class ``j`` is named
  ``str(j)``); otherwise labels are names and class ids follow the **sorted**
  order of the names (byte order of their UTF-8 spelling), so the id of a
  class does not depend on row order. The names become the store's output
  names.
* ``--tags``: one line per row, tags separated by ``--tag-sep`` (default a
  comma; ``space`` cuts at runs of spaces and tabs; also ``tab``, ``semicolon``,
  ``pipe``); white space around a tag is dropped, an empty line is a row
  without tags. With the default separator a tag containing white space
  (``hand tools``) is refused as ambiguous: say ``--tag-sep comma`` to keep it
  whole or ``--tag-sep space`` to split it. Ids are assigned like labels.

Text files may start with a UTF-8 byte-order mark (dropped) and end with
blank lines (ignored; beyond the matrix's rows for tags); a blank line inside
a labels file is refused with its line number. Rows and lines count from 1.
* ``--values``: a ``.npy`` float matrix (n, k) (or (n,) for k = 1), read
  through a memory map.
* ``--weights``: one non-negative number per line, or a ``.npy`` vector.

Text files are read twice in fixed-size chunks: a first pass collects the
distinct names and counts the lines, a second assigns ids and feeds the store
writer. Memory is bounded by the chunk size and the number of distinct names.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.errors import InputError
from ranktide.ingest.mmio import (
    CHUNK_BYTES,
    MAX_LINE_BYTES,
    MatrixHeader,
    _Chunker,
    _convert_fallback,
    _Parser,
    check_readable,
)
from ranktide.kernels import parse as kp

__all__ = ["TargetSource", "WeightSource", "open_targets", "open_weights", "TAG_SEPARATORS",
           "DEFAULT_TAG_SEP"]

#: tag separators by name (the byte cut at; space: runs of spaces and tabs)
TAG_SEPARATORS: dict[str, int] = {"comma": 44, "space": 32, "tab": 9, "semicolon": 59,
                                  "pipe": 124}
DEFAULT_TAG_SEP = "comma"
_BOM = b"\xef\xbb\xbf"

_ROWS_PER_FEED = 1 << 16


def _line_chunks(p: Path, chunk_bytes: int) -> Iterator[tuple[np.ndarray, int, int]]:
    """Yield (buf, end, first_line) for runs of whole lines of ``p``."""
    try:
        fh = open(p, "rb")
    except OSError as exc:
        raise InputError(f"{p}: cannot open ({exc.strerror}); check the file") from None
    line = 1
    with fh:
        ch = _Chunker(fh, chunk_bytes)
        first = True
        while True:
            end = ch.next()
            if first and end > 0 and ch.buf[:3].tobytes() == _BOM:
                ch.consume(3)  # a UTF-8 byte-order mark is not part of the first name
                end = ch.next()
            first = False
            if end < 0:
                raise InputError(
                    f"{p}: line {line}: a line longer than {MAX_LINE_BYTES} bytes; "
                    "give one entry per line"
                )
            if end == 0:
                return
            yield ch.buf, end, line
            line += int(np.count_nonzero(ch.buf[:end] == 10))
            ch.consume(end)


class _Tokens:
    """Token buffers of :func:`kernels.parse.split_tokens`, sized for one chunk."""

    def __init__(self, chunk_bytes: int) -> None:
        cap = chunk_bytes + 2
        self.start = np.empty(cap // 2 + 2, dtype=np.int64)
        self.len = np.empty(cap // 2 + 2, dtype=np.int64)
        self.ntok = np.empty(cap, dtype=np.int64)
        self.status = np.zeros(8, dtype=np.int64)


def _iter_tokens(
    p: Path, split: bool, chunk_bytes: int, sep: int = -1
) -> Iterator[tuple[np.ndarray, np.ndarray, int]]:
    """Yield (names as an S array, tokens per line, first line number) per chunk."""
    tk = _Tokens(chunk_bytes)
    for buf, end, first in _line_chunks(p, chunk_bytes):
        pos = 0
        line = first
        while pos < end:
            st = tk.status
            kp.split_tokens(buf, pos, end, split, tk.start, tk.len, tk.ntok, st, sep)
            if st[kp.ST_CODE] != kp.ERR_OK:
                bad = line + int(st[kp.ST_ERR_LINE])
                raise InputError(
                    f"{p}: line {bad}: binary or control bytes; give a plain text file"
                )
            nl, nt = int(st[kp.ST_LINES]), int(st[kp.ST_ENTRIES])
            width = max(1, int(tk.len[:nt].max())) if nt else 1
            packed = np.empty((nt, width), dtype=np.uint8)
            kp.gather_tokens(buf, tk.start, tk.len, nt, packed)
            yield packed.view(f"S{width}").ravel(), tk.ntok[:nl], line
            line += nl
            pos = int(st[kp.ST_POS])


def _is_whole(name: bytes) -> bool:
    return name.isdigit()


@dataclass
class TargetSource:
    """A target file checked by a first pass, ready to feed a store writer.

    Attributes
    ----------
    path : Path
    kind : {"classes", "values", "tags"}
    n_rows : int
        Rows (lines, or array rows) in the file.
    n_outputs : int
        Classes, tags or value columns.
    names : list of str or None
        Output names (class or tag names); None for values.
    """

    path: Path
    kind: str
    n_rows: int
    n_outputs: int
    names: list[str] | None
    _sorted: np.ndarray | None = field(default=None, repr=False)
    _integers: bool = field(default=False, repr=False)
    _array: Any = field(default=None, repr=False)
    _chunk_bytes: int = field(default=CHUNK_BYTES, repr=False)
    _sep: int = field(default=-1, repr=False)
    _trailing_blank: int = field(default=0, repr=False)

    def check_rows(self, n_rows: int) -> None:
        """Raise InputError unless the file has one target per matrix row.

        Blank lines at the end of a tags file beyond the matrix's rows are
        not rows (trailing blank lines of a labels file are never counted).
        """
        if self.kind == "tags" and n_rows <= self.n_rows <= n_rows + self._trailing_blank:
            self.n_rows = n_rows
        if self.n_rows != n_rows:
            unit = "lines" if self._array is None else "rows"
            raise InputError(
                f"{self.path}: has {self.n_rows} {unit} of targets but the matrix has "
                f"{n_rows} rows; give exactly one target per row"
            )

    def _ids(self, names: np.ndarray) -> np.ndarray:
        if self._integers:
            return names.astype(np.int64)
        return np.searchsorted(self._sorted, names).astype(np.int64)

    def feed(self, writer: Any) -> None:
        """Append every target, in row order, to ``writer`` (a StoreWriter)."""
        if self.kind == "values":
            self._feed_values(writer)
        elif self.kind == "classes":
            fed = 0
            for names, _ntok, _line in _iter_tokens(self.path, False, self._chunk_bytes):
                names = names[: max(0, self.n_rows - fed)]  # trailing blank lines: not rows
                fed += names.shape[0]
                if names.shape[0]:
                    writer.append_targets(classes=self._ids(names).astype(np.int32))
        else:
            self._feed_tags(writer)

    def _feed_tags(self, writer: Any) -> None:
        k = max(1, self.n_outputs)
        fed = 0
        for names, ntok, _line in _iter_tokens(self.path, True, self._chunk_bytes, self._sep):
            ntok = ntok[: max(0, self.n_rows - fed)]  # trailing blank lines beyond the rows
            names = names[: int(ntok.sum())]
            n_lines = ntok.shape[0]
            fed += n_lines
            if n_lines == 0:
                continue
            row = np.repeat(np.arange(n_lines, dtype=np.int64), ntok)
            key = np.unique(row * k + self._ids(names))  # sorted ids, repeats dropped
            counts = np.bincount(key // k, minlength=n_lines)
            indptr = np.zeros(n_lines + 1, dtype=np.int64)
            np.cumsum(counts, out=indptr[1:])
            writer.append_targets(tags_indptr=indptr, tags_indices=(key % k).astype(np.int32))

    def _feed_values(self, writer: Any) -> None:
        arr = self._array
        for a in range(0, self.n_rows, _ROWS_PER_FEED):
            piece = np.asarray(arr[a : a + _ROWS_PER_FEED], dtype=np.float64)
            if piece.ndim == 1:
                piece = piece[:, None]
            bad = ~np.isfinite(piece.astype(np.float32))
            if bad.any():
                r, c = (int(v[0]) for v in np.nonzero(bad))
                raise InputError(
                    f"{self.path}: row {a + r + 1}, column {c + 1}: target value "
                    f"{float(piece[r, c])!r} is not finite (as float32); fix the value"
                )
            writer.append_targets(values=piece.astype(np.float32))


@dataclass
class _Scan:
    names: set[bytes]
    lines: int  # without trailing blank lines (labels) / with them (tags)
    trailing_blank: int
    spaced: bytes | None  # a tag with white space inside (the first seen)
    spaced_line: int


def _scan_names(p: Path, split: bool, chunk_bytes: int, sep: int = -1) -> _Scan:
    """First pass: the distinct names, the number of lines, blank lines at the end."""
    names: set[bytes] = set()
    lines = 0
    blank_run = 0  # blank lines since the last non-blank one
    first_blank = 0  # the line number of the first of them
    spaced, spaced_line = None, 0
    for toks, ntok, first in _iter_tokens(p, split, chunk_bytes, sep):
        blank = (toks == b"") if not split else (ntok == 0)
        nonblank = np.flatnonzero(~blank)
        if not split and nonblank.size and blank_run:
            raise InputError(f"{p}: line {first_blank}: blank line inside the labels; give "
                             "one label per row (blank lines may only end the file)")
        if not split and nonblank.size:
            gaps = np.flatnonzero(blank[: int(nonblank[-1])])
            if gaps.size:
                raise InputError(f"{p}: line {first + int(gaps[0])}: blank line inside the "
                                 "labels; give one label per row (blank lines may only end "
                                 "the file)")
        n = int(blank.shape[0])
        if nonblank.size:
            tail = n - 1 - int(nonblank[-1])
            blank_run, first_blank = tail, first + int(nonblank[-1]) + 1
        else:
            if blank_run == 0:
                first_blank = first
            blank_run += n
        if split and spaced is None and toks.size:
            inside = (np.char.find(toks, b" ") >= 0) | (np.char.find(toks, b"\t") >= 0)
            if inside.any():
                j = int(np.flatnonzero(inside)[0])
                spaced = bytes(toks[j])
                spaced_line = first + int(np.searchsorted(np.cumsum(ntok), j, side="right"))
        names.update(np.unique(toks).tolist())
        lines += n
    names.discard(b"")
    if not split:
        lines -= blank_run
    return _Scan(names, lines, blank_run, spaced, spaced_line)


def _name_table(p: Path, names: set[bytes], what: str) -> tuple[bool, np.ndarray, list[str]]:
    """Integers (ids as written) or sorted names; returns (integers, table, output names)."""
    if names and all(_is_whole(n) for n in names):
        top = max(int(n) for n in names)
        if top >= 2**31 - 1:
            raise InputError(f"{p}: {what} id {top} is too large; ids must be below 2**31 - 1")
        return True, np.array([], dtype="S1"), [str(j) for j in range(top + 1)]
    table = np.array(sorted(names), dtype=bytes)
    try:
        out = [n.decode("utf-8") for n in table.tolist()]
    except UnicodeDecodeError:
        raise InputError(f"{p}: a {what} name is not valid UTF-8; re-encode the file") from None
    return False, table, out


def _open_npy(p: Path, what: str, other: str) -> np.ndarray:
    with open(p, "rb") as fh:
        magic = fh.read(6)
    if magic != b"\x93NUMPY":  # numpy's .npy magic string (numpy.lib.format)
        looks = "a text file" if magic and all(32 <= c < 127 or c in (9, 10, 13)
                                               for c in magic) else "not a .npy file"
        raise InputError(f"{p}: is {looks}, not a .npy array; save the {what} with "
                         f"numpy.save, or {other}")
    try:
        arr = np.load(p, mmap_mode="r", allow_pickle=False)
    except ValueError as exc:
        raise InputError(
            f"{p}: not a numeric .npy array ({str(exc).splitlines()[0]}); save it with numpy.save"
        ) from None
    except OSError as exc:
        raise InputError(f"{p}: cannot read the .npy file ({exc}); re-create it") from None
    if not isinstance(arr, np.ndarray):
        raise InputError(f"{p}: holds several arrays; give a single .npy array of {what}")
    if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)):
        raise InputError(f"{p}: dtype {arr.dtype} is not numeric; give float {what}")
    return arr


def open_targets(
    *,
    labels: str | os.PathLike | None = None,
    values: str | os.PathLike | None = None,
    tags: str | os.PathLike | None = None,
    tag_sep: str | None = None,
    chunk_bytes: int = CHUNK_BYTES,
) -> TargetSource | None:
    """Check the one given target file and return it ready to feed, or None.

    ``tag_sep`` names the tags separator (:data:`TAG_SEPARATORS`); None is
    the default (:data:`DEFAULT_TAG_SEP`) with the ambiguity check: a tag
    with white space inside is then refused.
    """
    if tag_sep is not None and tag_sep not in TAG_SEPARATORS:
        raise InputError(f"--tag-sep {tag_sep!r}: unknown; use one of "
                         f"{', '.join(TAG_SEPARATORS)}")
    given = [(k, v) for k, v in (("labels", labels), ("values", values), ("tags", tags)) if v]
    if not given:
        return None
    if len(given) > 1:
        raise InputError(
            f"{given[1][1]}: give one of --labels, --values or --tags, not "
            f"{' and '.join('--' + k for k, _ in given)}"
        )
    what, path = given[0]
    p = check_readable(path, f"{what} file")
    if what == "values":
        arr = _open_npy(p, "target values", "give a text file of class labels with --labels")
        if arr.ndim not in (1, 2):
            raise InputError(f"{p}: values must be a (n, k) or (n,) array, got shape {arr.shape}")
        k = 1 if arr.ndim == 1 else int(arr.shape[1])
        return TargetSource(p, "values", int(arr.shape[0]), k, None, _array=arr)
    split = what == "tags"
    sep = TAG_SEPARATORS[tag_sep or DEFAULT_TAG_SEP] if split else -1
    scan = _scan_names(p, split, chunk_bytes, sep)
    if not scan.names and not split:
        raise InputError(f"{p}: line 1: empty labels file; give one label per row")
    if split and tag_sep is None and scan.spaced is not None:
        shown = scan.spaced.decode("utf-8", "replace")
        raise InputError(
            f"{p}: line {scan.spaced_line}: the tag {shown!r} contains white space and the "
            f"separator was not given; pass --tag-sep comma to keep it one tag, or --tag-sep "
            "space to split it"
        )
    integers, table, out_names = _name_table(p, scan.names, "class" if not split else "tag")
    kind = "tags" if split else "classes"
    return TargetSource(
        p, kind, scan.lines, len(out_names), out_names,
        _sorted=table, _integers=integers, _chunk_bytes=chunk_bytes, _sep=sep,
        _trailing_blank=scan.trailing_blank if split else 0,
    )  # fmt: skip


@dataclass
class WeightSource:
    """A weights file (text or ``.npy``) ready to feed a store writer."""

    path: Path
    _array: Any = None
    _chunk_bytes: int = CHUNK_BYTES

    def feed(self, writer: Any, n_rows: int) -> None:
        """Append every weight to ``writer``; check there is one per row."""
        count = self._feed_npy(writer) if self._array is not None else self._feed_text(writer)
        if count != n_rows:
            raise InputError(
                f"{self.path}: has {count} weights but the matrix has {n_rows} rows; "
                "give exactly one weight per row"
            )

    def _feed_npy(self, writer: Any) -> int:
        arr = self._array
        n = int(arr.shape[0])
        for a in range(0, n, _ROWS_PER_FEED):
            w = np.asarray(arr[a : a + _ROWS_PER_FEED], dtype=np.float64)
            _check_weights(self.path, w, a, "row")
            writer.append_weights(w.astype(np.float32))
        return n

    def _feed_text(self, writer: Any) -> int:
        hdr = MatrixHeader(self.path, "triplets", "real", None, None, None, 0, 1, False, 0)
        ps = _Parser(max(16, self._chunk_bytes // 2))
        count = 0
        comment = hdr.comment
        for buf, end, first in _line_chunks(self.path, self._chunk_bytes):
            pos, line = 0, first
            while pos < end:
                st = ps.status
                kp.parse_numeric_lines(
                    buf, pos, end, 0, True, False, comment,
                    ps.rows, ps.cols, ps.vals, ps.fb_entry, ps.fb_start, ps.fb_len, st,
                )  # fmt: skip
                if st[kp.ST_CODE] != kp.ERR_OK:
                    self._fail(st, line, buf)
                n, n_fb = int(st[kp.ST_ENTRIES]), int(st[kp.ST_FALLBACK])
                if n_fb:
                    _convert_fallback(buf, ps, n_fb)
                w = ps.vals[:n]
                stop = int(st[kp.ST_POS])
                bad = ~np.isfinite(w) | (w < 0)
                if bad.any():
                    j = int(np.flatnonzero(bad)[0])
                    at = line + int(kp.entry_line(buf, pos, stop, comment, j))
                    raise InputError(
                        f"{self.path}: line {at}: weight {float(w[j])!r} is invalid; "
                        "weights must be finite and >= 0"
                    )
                writer.append_weights(w.astype(np.float32))
                count += n
                line += int(st[kp.ST_LINES])
                pos = stop
        return count

    def _fail(self, st: np.ndarray, line: int, buf: np.ndarray) -> None:
        code = int(st[kp.ST_CODE])
        at = line + int(st[kp.ST_ERR_LINE])
        problem = {
            kp.ERR_MANY_FIELDS: "more than one number on the line",
            kp.ERR_NAN: "the weight is NaN",
            kp.ERR_INF: "the weight is infinite",
            kp.ERR_BINARY: "binary or control bytes",
        }.get(code, "the weight is not a number")
        raise InputError(
            f"{self.path}: line {at}: {problem}; give one non-negative number per line"
        )


def _check_weights(p: Path, w: np.ndarray, first: int, unit: str) -> None:
    """Weights ``w`` of the file's rows ``first, first + 1, ...`` (0-based) must be >= 0."""
    if w.ndim != 1:
        raise InputError(f"{p}: weights must be a 1-D array, got shape {w.shape}")
    bad = ~np.isfinite(w) | (w < 0)
    if bad.any():
        j = int(np.flatnonzero(bad)[0])
        raise InputError(  # counted from 1, as the other ingest messages count rows
            f"{p}: {unit} {first + j + 1}: weight {float(w[j])!r} is invalid; "
            "weights must be finite and >= 0"
        )


def open_weights(
    path: str | os.PathLike | None, *, chunk_bytes: int = CHUNK_BYTES
) -> WeightSource | None:
    """Check a weights file (``.npy`` or text) and return it ready to feed, or None."""
    if path is None:
        return None
    p = check_readable(path, "weights file")
    if p.suffix.lower() == ".npy":
        arr = _open_npy(p, "weights", "give one weight per line in a file not named .npy")
        if arr.ndim != 1:
            raise InputError(f"{p}: weights must be a 1-D array, got shape {arr.shape}")
        return WeightSource(p, arr, chunk_bytes)
    if p.stat().st_size == 0:
        raise InputError(f"{p}: line 1: empty weights file; give one weight per row")
    return WeightSource(p, None, chunk_bytes)
