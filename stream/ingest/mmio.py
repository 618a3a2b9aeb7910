"""Streaming readers of sparse matrix text files.

Two text formats are read in fixed-size byte chunks cut at a newline, so
memory stays bounded whatever the file size:

* Matrix Market coordinate files (the NIST exchange format): fields
  ``real``, ``integer`` and ``pattern``, symmetry ``general``, 1-based indices;
* plain triplet lines ``row col value`` (0-based unless ``one_based``), in any
  order, with ``#`` comments.

Each chunk is parsed by :func:`kernels.parse.parse_numeric_lines`; value
tokens off its exact fast path are converted by numpy's correctly rounding
string-to-double conversion. Every malformed line raises
:class:`~ranktide.errors.InputError` naming the file and the line.

A scipy ``.npz`` sparse matrix is loaded whole (:func:`load_npz_matrix_whole`).
"""

from __future__ import annotations

import os
import zipfile
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy.sparse as sp
from ranktide.errors import InputError
from ranktide.kernels import parse as kp

__all__ = [
    "MatrixHeader",
    "EntryChunk",
    "detect_format",
    "read_header",
    "iter_entries",
    "load_npz_matrix_whole",
    "check_readable",
    "CHUNK_BYTES",
    "FORMATS",
]

FORMATS = ("mm", "triplets", "npz")
#: Bytes read per chunk (a chunk is cut at its last newline).
CHUNK_BYTES = 8 * 1024 * 1024
#: Longest line accepted; anything longer is not a matrix text file.
MAX_LINE_BYTES = 1 << 20
_BANNER = "%%matrixmarket"
_SNIFF_BYTES = 65536

_ERRORS = {
    kp.ERR_FEW_FIELDS: ("too few fields", "each line needs {want}"),
    kp.ERR_MANY_FIELDS: ("too many fields", "each line needs {want}"),
    kp.ERR_NOT_NUMBER: ("{field} is not a number", "fix or remove the line"),
    kp.ERR_FRACTIONAL: ("{field} is fractional", "indices must be whole numbers"),
    kp.ERR_NEGATIVE: ("{field} is negative", "indices must be >= {base}"),
    kp.ERR_INDEX_OVERFLOW: ("{field} is too large for a 64-bit integer", "fix the index"),
    kp.ERR_NAN: ("the value is NaN", "remove the entry or give a finite value"),
    kp.ERR_INF: ("the value is infinite", "remove the entry or give a finite value"),
    kp.ERR_BINARY: (
        "binary or control bytes",
        "the file is not plain text; give a Matrix Market, triplet or .npz file",
    ),
    kp.ERR_NOT_INTEGER: (
        "the value is not an integer in an 'integer' file",
        "declare the field 'real' in the banner or fix the value",
    ),
}


@dataclass(frozen=True)
class MatrixHeader:
    """What is known about a matrix file before its entries are read.

    Attributes
    ----------
    path : Path
    fmt : {"mm", "triplets", "npz"}
    field : {"real", "integer", "pattern"}
        Value field (triplets and npz: ``"real"``).
    n_rows, n_cols, nnz : int or None
        Declared sizes (Matrix Market, npz); None for triplets.
    data_offset : int
        Byte offset of the first entry line.
    data_line : int
        1-based line number at ``data_offset``.
    one_based : bool
        Whether indices in the file start at 1.
    file_bytes : int
        Size of the file.
    """

    path: Path
    fmt: str
    field: str
    n_rows: int | None
    n_cols: int | None
    nnz: int | None
    data_offset: int
    data_line: int
    one_based: bool
    file_bytes: int

    @property
    def comment(self) -> int:
        """The byte that starts a comment line."""
        return ord("%") if self.fmt == "mm" else ord("#")


@dataclass(frozen=True)
class EntryChunk:
    """Entries of consecutive data lines, 0-based.

    The arrays are views into reused buffers: they are valid until the
    iterator advances.

    Attributes
    ----------
    rows, cols : int64 arrays (m,)
    vals : float64 arrays (m,)
    bytes_done : int
        File bytes consumed so far (for progress).
    """

    rows: np.ndarray
    cols: np.ndarray
    vals: np.ndarray
    bytes_done: int


def check_readable(path: str | os.PathLike, what: str = "input file") -> Path:
    """Return ``path`` as a Path, or raise InputError if it cannot be read."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: {what} not found; check the path")
    if p.is_dir():
        raise InputError(f"{p}: is a directory, not a {what}; give a file")
    if not os.access(p, os.R_OK):
        raise InputError(f"{p}: {what} is not readable (permission denied); fix its permissions")
    return p


def _sniff(p: Path) -> bytes:
    try:
        with open(p, "rb") as fh:
            return fh.read(_SNIFF_BYTES)
    except OSError as exc:
        raise InputError(f"{p}: cannot read ({exc.strerror}); check the file") from None


def detect_format(path: str | os.PathLike, fmt: str | None = None) -> str:
    """Return ``fmt`` checked, or guess it from the file's first bytes and suffix.

    A Matrix Market banner or a ``.mtx``/``.mm`` suffix means ``"mm"``; a zip
    archive or ``.npz`` suffix means ``"npz"``; anything else ``"triplets"``.
    """
    p = check_readable(path)
    if fmt is not None:
        if fmt not in FORMATS:
            raise InputError(f"{p}: format {fmt!r} is unknown; use one of {', '.join(FORMATS)}")
        return fmt
    head = _sniff(p)
    if head[:4] == b"PK\x03\x04" or p.suffix.lower() == ".npz":
        return "npz"
    if head.lstrip()[: len(_BANNER)].lower() == _BANNER.encode() or p.suffix.lower() in (
        ".mtx",
        ".mm",
    ):
        return "mm"
    return "triplets"


def _refuse_binary(p: Path, head: bytes) -> None:
    if head[:2] == b"\x1f\x8b":
        raise InputError(f"{p}: line 1: gzip-compressed data; decompress the file first")
    if head[:4] == b"PK\x03\x04":
        raise InputError(f"{p}: line 1: a zip archive, not text; use --format npz for a .npz")
    nul = head.find(b"\x00")
    if nul >= 0:
        line = head.count(b"\n", 0, nul) + 1
        raise InputError(
            f"{p}: line {line}: binary data (NUL byte); give a Matrix Market, triplet or .npz file"
        )


def _mm_header(p: Path, size: int) -> MatrixHeader:
    with open(p, "rb") as fh:
        first = fh.readline(MAX_LINE_BYTES)
        offset = len(first)
        words = first.decode("ascii", errors="replace").split()
        if not words or words[0].lower() != _BANNER:
            raise InputError(
                f"{p}: line 1: missing Matrix Market banner "
                "('%%MatrixMarket matrix coordinate real general'); fix the first line "
                "or use --format triplets"
            )
        if len(words) != 5:
            raise InputError(
                f"{p}: line 1: banner has {len(words) - 1} words after %%MatrixMarket, "
                "expected 4 (object format field symmetry)"
            )
        obj, layout, field, sym = (w.lower() for w in words[1:])
        if obj != "matrix":
            raise InputError(f"{p}: line 1: object {words[1]!r} is unsupported; only 'matrix'")
        if layout != "coordinate":
            raise InputError(
                f"{p}: line 1: format {words[2]!r} is unsupported; only sparse 'coordinate' "
                "files are read (convert dense 'array' files to coordinate)"
            )
        if field not in ("real", "integer", "pattern"):
            raise InputError(
                f"{p}: line 1: field {words[3]!r} is unsupported; use real, integer or pattern"
            )
        if sym != "general":
            raise InputError(
                f"{p}: line 1: symmetry {words[4]!r} is unsupported; expand the matrix to "
                "'general' (write every entry) first"
            )
        line_no = 1
        while True:
            raw = fh.readline(MAX_LINE_BYTES)
            line_no += 1
            if not raw:
                raise InputError(
                    f"{p}: line {line_no}: missing size line 'rows cols entries'; add it "
                    "after the comments"
                )
            offset += len(raw)
            text = raw.strip()
            if not text or text.startswith(b"%"):
                continue
            parts = text.split()
            try:
                sizes = [int(x) for x in parts]
            except ValueError:
                sizes = []
            if len(parts) != 3 or len(sizes) != 3:
                raise InputError(
                    f"{p}: line {line_no}: size line must be three integers 'rows cols entries', "
                    f"got {text[:60].decode('ascii', errors='replace')!r}"
                )
            if min(sizes) < 0:
                raise InputError(f"{p}: line {line_no}: negative size in the size line; fix it")
            n_rows, n_cols, nnz = sizes
            if n_cols < 1:
                raise InputError(f"{p}: line {line_no}: the matrix has 0 columns; nothing to learn")
            break
    return MatrixHeader(
        path=p,
        fmt="mm",
        field=field,
        n_rows=n_rows,
        n_cols=n_cols,
        nnz=nnz,
        data_offset=offset,
        data_line=line_no + 1,
        one_based=True,
        file_bytes=size,
    )


def read_header(
    path: str | os.PathLike, *, fmt: str | None = None, one_based: bool = False
) -> MatrixHeader:
    """Check a matrix file and read its header.

    Parameters
    ----------
    path : path
    fmt : {"mm", "triplets", "npz"}, optional
        Guessed by :func:`detect_format` when omitted.
    one_based : bool
        Triplet indices start at 1 (Matrix Market files always do).

    Returns
    -------
    MatrixHeader
    """
    fmt = detect_format(path, fmt)
    p = Path(path)
    size = p.stat().st_size
    if size == 0:
        raise InputError(f"{p}: line 1: empty file; give a file with entries")
    if fmt == "npz":
        return MatrixHeader(p, "npz", "real", None, None, None, 0, 0, False, size)
    head = _sniff(p)
    _refuse_binary(p, head)
    if fmt == "mm":
        return _mm_header(p, size)
    return MatrixHeader(p, "triplets", "real", None, None, None, 0, 1, one_based, size)


class _Chunker:
    """Reads a file into a reused buffer, one run of whole lines at a time."""

    def __init__(self, fh, chunk_bytes: int) -> None:
        self.fh = fh
        self.buf = np.empty(chunk_bytes + 1, dtype=np.uint8)
        self.fill = 0
        self.eof = False

    def next(self) -> int:
        """Refill; return the end of the whole lines in ``buf[:end]`` (0 at the end)."""
        while True:
            if not self.eof and self.fill < self.buf.shape[0] - 1:
                view = memoryview(self.buf)[self.fill : self.buf.shape[0] - 1]
                got = self.fh.readinto(view)
                if not got:
                    self.eof = True
                else:
                    self.fill += got
                    continue
            if self.fill == 0:
                return 0
            data = self.buf[: self.fill]
            nl = np.flatnonzero(data == 10)
            if nl.size:
                return int(nl[-1]) + 1
            if self.eof:
                self.buf[self.fill] = 10  # close the last line
                self.fill += 1
                return self.fill
            if self.buf.shape[0] - 1 >= MAX_LINE_BYTES:
                return -1
            grown = np.empty(2 * self.buf.shape[0], dtype=np.uint8)
            grown[: self.fill] = self.buf[: self.fill]
            self.buf = grown

    def consume(self, end: int) -> None:
        """Drop ``buf[:end]``, keeping the partial line after it."""
        rest = self.fill - end
        if rest:
            self.buf[:rest] = self.buf[end : self.fill]
        self.fill = rest


class _Parser:
    """Per-call output buffers of the numeric line kernel."""

    def __init__(self, cap: int) -> None:
        self.rows = np.empty(cap, dtype=np.int64)
        self.cols = np.empty(cap, dtype=np.int64)
        self.vals = np.empty(cap, dtype=np.float64)
        self.fb_entry = np.empty(cap, dtype=np.int64)
        self.fb_start = np.empty(cap, dtype=np.int64)
        self.fb_len = np.empty(cap, dtype=np.int64)
        self.status = np.zeros(8, dtype=np.int64)


def _convert_fallback(buf: np.ndarray, ps: _Parser, n_fb: int) -> None:
    """Convert the value tokens off the fast path with numpy (correctly rounded)."""
    width = int(ps.fb_len[:n_fb].max())
    packed = np.empty((n_fb, width), dtype=np.uint8)
    kp.gather_tokens(buf, ps.fb_start, ps.fb_len, n_fb, packed)
    ps.vals[ps.fb_entry[:n_fb]] = packed.view(f"S{width}").ravel().astype(np.float64)


class _Context:
    """Where the parser is, for error messages."""

    def __init__(self, hdr: MatrixHeader, n_index: int, has_value: bool) -> None:
        self.hdr = hdr
        self.n_index = n_index
        self.has_value = has_value

    def fields_wanted(self) -> str:
        names = ["row", "column"][: self.n_index] + (["value"] if self.has_value else [])
        return f"{len(names)} fields ({' '.join(names)})"

    def field_name(self, field: int) -> str:
        if field < self.n_index:
            return ["the row index", "the column index"][field] if self.n_index == 2 else "it"
        return "the value"

    def fail(self, line: int, problem: str, fix: str) -> InputError:
        return InputError(f"{self.hdr.path}: line {line}: {problem}; {fix}")


def _raise_status(ctx: _Context, st: np.ndarray, line_base: int, buf: np.ndarray, pos: int):
    code = int(st[kp.ST_CODE])
    line = line_base + int(st[kp.ST_ERR_LINE])
    problem, fix = _ERRORS[code]
    end = pos
    while end < buf.shape[0] and buf[end] != 10 and end - pos < 80:
        end += 1
    text = bytes(buf[pos:end]).decode("ascii", errors="replace").strip()
    base = 1 if ctx.hdr.one_based else 0
    fmt = {"field": ctx.field_name(int(st[kp.ST_FIELD])), "want": ctx.fields_wanted(), "base": base}
    raise ctx.fail(line, f"{problem.format(**fmt)} in {text!r}", fix.format(**fmt))


def iter_entries(
    hdr: MatrixHeader,
    *,
    chunk_bytes: int = CHUNK_BYTES,
    on_progress: Callable[[int, int], None] | None = None,
) -> Iterator[EntryChunk]:
    """Yield the entries of a text matrix file chunk by chunk, 0-based.

    Checks every line (fields, numbers, finiteness), index bases and bounds
    against the declared sizes, and the declared entry count.

    Parameters
    ----------
    hdr : MatrixHeader
        From :func:`read_header` (``fmt`` "mm" or "triplets").
    chunk_bytes : int
        Bytes read at a time.
    on_progress : callable, optional
        Called as ``on_progress(bytes_done, entries_done)`` after each chunk.

    Yields
    ------
    EntryChunk
    """
    n_index = 2
    has_value = hdr.field != "pattern"
    ctx = _Context(hdr, n_index, has_value)
    int_values = hdr.field == "integer"
    comment = hdr.comment
    ps = _Parser(max(16, chunk_bytes // 8))
    line_base = hdr.data_line
    done_bytes = hdr.data_offset
    total = 0
    try:
        fh = open(hdr.path, "rb")
    except OSError as exc:
        raise InputError(f"{hdr.path}: cannot open ({exc.strerror}); check the file") from None
    with fh:
        fh.seek(hdr.data_offset)
        ch = _Chunker(fh, chunk_bytes)
        while True:
            end = ch.next()
            if end < 0:
                raise ctx.fail(
                    line_base,
                    f"a line longer than {MAX_LINE_BYTES} bytes",
                    "the file is not a matrix text file",
                )
            if end == 0:
                break
            buf = ch.buf
            pos = 0
            while pos < end:
                st = ps.status
                kp.parse_numeric_lines(
                    buf, pos, end, n_index, has_value, int_values, comment,
                    ps.rows, ps.cols, ps.vals, ps.fb_entry, ps.fb_start, ps.fb_len, st,
                )  # fmt: skip
                n = int(st[kp.ST_ENTRIES])
                if st[kp.ST_CODE] != kp.ERR_OK:
                    _raise_status(ctx, st, line_base, buf, int(st[kp.ST_POS]))
                n_fb = int(st[kp.ST_FALLBACK])
                if n_fb:
                    _convert_fallback(buf, ps, n_fb)
                rows, cols, vals = ps.rows[:n], ps.cols[:n], ps.vals[:n]
                if not has_value:
                    vals[:] = 1.0
                stop = int(st[kp.ST_POS])
                _check_chunk(ctx, rows, cols, vals, n_fb, total, buf, pos, stop, line_base)
                total += n
                line_base += int(st[kp.ST_LINES])
                done_bytes += stop - pos
                pos = stop
                if n:
                    yield EntryChunk(rows, cols, vals, done_bytes)
                if on_progress is not None:
                    on_progress(done_bytes, total)
            ch.consume(end)
    if hdr.nnz is not None and total < hdr.nnz:
        raise InputError(
            f"{hdr.path}: line {line_base}: file ends after {total} entries but the size line "
            f"declares {hdr.nnz}; the file is truncated or the size line is wrong"
        )


def _entry_line(ctx: _Context, buf, pos: int, stop: int, j: int, line_base: int) -> int:
    return line_base + int(kp.entry_line(buf, pos, stop, ctx.hdr.comment, j))


def _check_chunk(ctx, rows, cols, vals, n_fb, total, buf, pos, stop, line_base) -> None:
    """Shift to 0-based and check bounds, finiteness and the declared count."""
    hdr = ctx.hdr
    n = rows.shape[0]
    if n == 0:
        return
    if hdr.nnz is not None and total + n > hdr.nnz:
        j = hdr.nnz - total
        line = _entry_line(ctx, buf, pos, stop, j, line_base)
        raise ctx.fail(
            line,
            f"more entries than the {hdr.nnz} declared in the size line",
            "fix the size line or remove the extra entries",
        )
    if n_fb:
        bad = ~np.isfinite(vals)
        if bad.any():
            j = int(np.flatnonzero(bad)[0])
            line = _entry_line(ctx, buf, pos, stop, j, line_base)
            raise ctx.fail(
                line, "the value overflows to infinity", "give a finite value within float range"
            )
    if hdr.one_based:
        zero = (rows == 0) | (cols == 0)
        if zero.any():
            j = int(np.flatnonzero(zero)[0])
            line = _entry_line(ctx, buf, pos, stop, j, line_base)
            what = "row" if rows[j] == 0 else "column"
            fix = (
                "Matrix Market indices start at 1"
                if hdr.fmt == "mm"
                else "indices start at 1 with --one-based; drop --one-based for 0-based files"
            )
            raise ctx.fail(line, f"{what} index 0 in a 1-based file", fix)
        rows -= 1
        cols -= 1
    if hdr.n_rows is not None:
        over = (rows >= hdr.n_rows) | (cols >= hdr.n_cols)
        if over.any():
            j = int(np.flatnonzero(over)[0])
            line = _entry_line(ctx, buf, pos, stop, j, line_base)
            if rows[j] >= hdr.n_rows:
                what, got, lim = "row", rows[j] + 1, hdr.n_rows
            else:
                what, got, lim = "column", cols[j] + 1, hdr.n_cols
            raise ctx.fail(
                line,
                f"{what} index {got} is beyond the declared {lim} {what}s",
                "fix the index or the size line",
            )


def _npz_decoded_bytes(p: Path) -> int:
    try:
        with zipfile.ZipFile(p) as zf:
            return sum(info.file_size for info in zf.infolist())
    except (zipfile.BadZipFile, OSError) as exc:
        raise InputError(f"{p}: not a readable .npz file ({exc}); re-create it") from None


def load_npz_matrix_whole(path: str | os.PathLike, *, memory: int) -> sp.csr_matrix:
    """Load a scipy ``.npz`` sparse matrix entirely into memory, as CSR.

    The file is read whole (no streaming); its decoded size times three (room
    for the format conversion) must fit ``memory`` bytes. Loaded with
    ``allow_pickle=False``.

    Returns
    -------
    scipy.sparse.csr_matrix
        With duplicates not yet summed (``has_canonical_format`` tells).
    """
    p = check_readable(path)
    need = 3 * _npz_decoded_bytes(p)
    if need > memory:
        raise InputError(
            f"{p}: loading this .npz whole needs about {need / 2**20:.0f} MiB, more than the "
            f"memory budget of {memory / 2**20:.0f} MiB; raise --memory or convert it to "
            "Matrix Market for streaming"
        )
    try:
        M = sp.load_npz(p)  # scipy loads with allow_pickle=False
    except (ValueError, OSError, KeyError, zipfile.BadZipFile) as exc:
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(
            f"{p}: not a scipy sparse .npz ({msg}); write it with scipy.sparse.save_npz"
        ) from None
    if M.ndim != 2:
        raise InputError(f"{p}: the array is not 2-D; give a sparse matrix")
    if M.shape[1] < 1:
        raise InputError(f"{p}: the matrix has 0 columns; nothing to learn")
    if M.format == "csr":
        out = M
    else:
        out = M.tocsr(copy=False) if M.format != "coo" else _coo_to_csr_keep(M)
    return out


def _coo_to_csr_keep(M) -> sp.csr_matrix:
    """COO to CSR without summing duplicates (so they can be counted or refused)."""
    order = np.lexsort((M.col, M.row))
    r, c, v = M.row[order], M.col[order], M.data[order]
    indptr = np.zeros(M.shape[0] + 1, dtype=np.int64)
    np.cumsum(np.bincount(r, minlength=M.shape[0]), out=indptr[1:])
    out = sp.csr_matrix((v, c, indptr), shape=M.shape)
    out.has_sorted_indices = True
    out.has_canonical_format = False
    return out
