"""Byte-level parsers for numeric text lines and label/tag tokens.

The kernels scan a ``uint8`` buffer that holds whole lines, validate every
token and write the results into caller-owned arrays. Value tokens are
converted to the correctly rounded double in three tiers:

1. mantissa <= 2**53 and |decimal exponent| <= 22 (after moving powers of
   ten into the mantissa): Clinger's fast path, ``m * 10**e`` or
   ``m / 10**-e`` with exact operands and a single rounding;
2. up to 18 significant digits, |exponent| <= 22: the candidate is checked
   with error-free products (Dekker) and moved to its neighbour when the
   exact remainder says so; inputs too close to a half-way point are left
   to tier 3;
3. everything else is reported back (entry, start, length) for the caller to
   convert with numpy's correctly rounding string conversion
   (:func:`gather_tokens` packs the tokens for it).

The file also holds the kernels that turn parsed entries into CSR rows
(:func:`entries_to_csr`, :func:`unsorted_entries_to_csr`) and group them by
row range for the ingest's scratch buckets (:func:`bucket_scatter`).

References
----------
W. D. Clinger, "How to read floating point numbers accurately", PLDI 1990.
T. J. Dekker, "A floating-point technique for extending the available
precision", Numerische Mathematik 18, 1971.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = [
    "ERR_OK",
    "ERR_FEW_FIELDS",
    "ERR_MANY_FIELDS",
    "ERR_NOT_NUMBER",
    "ERR_FRACTIONAL",
    "ERR_NEGATIVE",
    "ERR_INDEX_OVERFLOW",
    "ERR_NAN",
    "ERR_INF",
    "ERR_BINARY",
    "ERR_NOT_INTEGER",
    "ST_CODE",
    "ST_POS",
    "ST_LINES",
    "ST_ENTRIES",
    "ST_FALLBACK",
    "ST_FIELD",
    "ST_ERR_LINE",
    "parse_numeric_lines",
    "entry_line",
    "gather_tokens",
    "split_tokens",
    "entries_to_csr",
    "unsorted_entries_to_csr",
    "bucket_scatter",
]

ERR_OK = 0
ERR_FEW_FIELDS = 1
ERR_MANY_FIELDS = 2
ERR_NOT_NUMBER = 3
ERR_FRACTIONAL = 4
ERR_NEGATIVE = 5
ERR_INDEX_OVERFLOW = 6
ERR_NAN = 7
ERR_INF = 8
ERR_BINARY = 9
ERR_NOT_INTEGER = 10

# slots of the int64 ``status`` array shared by the kernels
ST_CODE = 0  # error code (ERR_*)
ST_POS = 1  # byte offset after the last complete line consumed
ST_LINES = 2  # lines consumed (data, blank and comment lines)
ST_ENTRIES = 3  # entries written to the output arrays
ST_FALLBACK = 4  # value tokens left for the caller to convert
ST_FIELD = 5  # 0-based field of the error
ST_ERR_LINE = 6  # 0-based line (relative to ``start``) of the error

_POW10 = np.array([10.0**i for i in range(23)], dtype=np.float64)
_TWO53 = 9007199254740992
_INT64_MAX = 9223372036854775807

_NL = 10
_CR = 13
_SP = 32
_TAB = 9
_COMMA = 44


@njit(nogil=True, cache=True, inline="always")
def _is_space(c):
    return c == _SP or c == _TAB or c == _CR


@njit(nogil=True, cache=True, inline="always")
def _is_end(c, comment):
    return c == _SP or c == _TAB or c == _CR or c == _NL or c == comment


@njit(nogil=True, cache=True, inline="always")
def _is_digit(c):
    return 48 <= c <= 57


@njit(nogil=True, cache=True)
def _word_kind(buf, p, stop, comment):
    """Classify a letter token at ``p``: 1 = nan, 2 = inf/infinity, 0 = other."""
    q = p
    if q < stop and (buf[q] == 43 or buf[q] == 45):
        q += 1
    e = q
    while e < stop and not _is_end(buf[e], comment):
        e += 1
    n = e - q
    if n == 3:
        a, b, c = buf[q] | 32, buf[q + 1] | 32, buf[q + 2] | 32
        if a == 110 and b == 97 and c == 110:
            return 1
        if a == 105 and b == 110 and c == 102:
            return 2
    if n == 8:
        word = (105, 110, 102, 105, 110, 105, 116, 121)  # "infinity"
        for i in range(8):
            if (buf[q + i] | 32) != word[i]:
                return 0
        return 2
    return 0


@njit(nogil=True, cache=True, inline="always")
def _scan_float(buf, p, stop, comment):
    """Validate a decimal float token at ``p``.

    Returns (end, code, mantissa, exp10, flags) with flags bit 0 = needs
    fallback, bit 1 = negative, bit 2 = integer syntax.
    """
    q = p
    neg = False
    if buf[q] == 43 or buf[q] == 45:
        neg = buf[q] == 45
        q += 1
    mant = 0
    sig = 0
    drop = 0  # digits beyond the 18 kept, before the point
    exp10 = 0
    ndig = 0
    while q < stop and _is_digit(buf[q]):
        d = buf[q] - 48
        ndig += 1
        if sig < 18:
            if mant != 0 or d != 0:
                mant = mant * 10 + d
                sig += 1
        else:
            drop += 1
        q += 1
    integer = True
    if q < stop and buf[q] == 46:
        integer = False
        q += 1
        while q < stop and _is_digit(buf[q]):
            d = buf[q] - 48
            ndig += 1
            if sig < 18:
                if mant != 0 or d != 0:
                    mant = mant * 10 + d
                    sig += 1
                exp10 -= 1
            else:
                drop += 1  # marks precision lost; exponent unaffected
            q += 1
    if ndig == 0:
        return q, ERR_NOT_NUMBER, 0, 0, 0
    if q < stop and (buf[q] == 101 or buf[q] == 69):
        integer = False
        q += 1
        eneg = False
        if q < stop and (buf[q] == 43 or buf[q] == 45):
            eneg = buf[q] == 45
            q += 1
        if q >= stop or not _is_digit(buf[q]):
            return q, ERR_NOT_NUMBER, 0, 0, 0
        ev = 0
        while q < stop and _is_digit(buf[q]):
            if ev < 100000:
                ev = ev * 10 + (buf[q] - 48)
            q += 1
        exp10 += -ev if eneg else ev
    if q < stop and not _is_end(buf[q], comment):
        return q, ERR_NOT_NUMBER, 0, 0, 0
    flags = 0
    if drop > 0:
        # digits beyond 18 scale the kept mantissa
        flags |= 1
    if neg:
        flags |= 2
    if integer:
        flags |= 4
    return q, ERR_OK, mant, exp10, flags


@njit(nogil=True, cache=True, inline="always")
def _fast_value(mant, exp10, neg):
    """Clinger's exact fast path; returns (ok, value)."""
    if mant == 0:
        return True, -0.0 if neg else 0.0
    if mant > _TWO53:
        return False, 0.0
    m = mant
    e = exp10
    if e > 22:
        # move powers of ten into the mantissa while it stays exact
        while e > 22 and m <= _TWO53 // 10:
            m *= 10
            e -= 1
        if e > 22:
            return False, 0.0
    if e < -22:
        return False, 0.0
    v = float(m)
    if e >= 0:
        v = v * _POW10[e]
    else:
        v = v / _POW10[-e]
    return True, -v if neg else v


_SPLIT = 134217729.0  # 2**27 + 1, Veltkamp's splitter for doubles
_MARGIN = 2.0**-30


@njit(nogil=True, cache=True, inline="always")
def _two_prod(x, y):
    """x * y = p + e exactly (Dekker 1971), without a fused multiply-add."""
    p = x * y
    c = _SPLIT * x
    xh = c - (c - x)
    xl = x - xh
    c = _SPLIT * y
    yh = c - (c - y)
    yl = y - yh
    e = ((xh * yh - p) + xh * yl + xl * yh) + xl * yl
    return p, e


@njit(nogil=True, cache=True)
def _certified_value(mant, exp10, neg):
    """Correctly rounded ``mant * 10**exp10`` for 2**53 < mant < 2**63, |exp10| <= 22.

    The candidate q = fl(fl(mant) * 10**e) (or the quotient) is off by at
    most about one unit in the last place. The exact remainder X - q is
    recovered with error-free products (Dekker 1971) and decides between q
    and its neighbour; when it lies too close to a half-way point to be sure
    (or q is a power of two), returns ok = False and the caller converts the
    token another way. Returns (ok, value).
    """
    if exp10 > 22 or exp10 < -22:
        return False, 0.0
    a = float(mant)
    b = float(mant - np.int64(a))  # exact: |b| <= 2**(63-53)
    big = _POW10[exp10] if exp10 >= 0 else _POW10[-exp10]
    if exp10 >= 0:
        q = a * big
        h, lo = _two_prod(a, big)  # h == q
        hb, lb = _two_prod(b, big)
        d = (lo + hb) + lb  # X - q, up to rounding far below half an ulp
        scale = 1.0
    else:
        q = a / big
        h, lo = _two_prod(q, big)
        d = ((a - h) - lo) + b  # (X - q) * big; a - h is exact (Sterbenz)
        scale = big
    f, ex = math.frexp(q)
    if f == 0.5:
        return False, 0.0  # the gap below q is half the gap above: leave it
    ulp = math.ldexp(1.0, ex - 53)
    half = 0.5 * ulp * scale
    ad = abs(d)
    if ad < half * (1.0 - _MARGIN):
        v = q
    elif half * (1.0 + _MARGIN) < ad < 2.0 * half * (1.0 - _MARGIN):
        v = q + ulp if d > 0 else q - ulp
    else:
        return False, 0.0
    return True, -v if neg else v


@njit(nogil=True, cache=True, inline="always")
def _scan_index(buf, p, stop, comment):
    """Parse a non-negative integer index token at ``p``.

    Returns (end, value, code).
    """
    c = buf[p]
    q = p
    if c == 43:
        q += 1
    elif c == 45:
        f = _scan_float(buf, p, stop, comment)
        return f[0], 0, ERR_NEGATIVE if f[1] == ERR_OK else ERR_NOT_NUMBER
    v = 0
    nd = 0
    over = False
    while q < stop and _is_digit(buf[q]):
        d = buf[q] - 48
        if nd < 18:  # up to 18 digits cannot overflow: skip the division
            v = v * 10 + d
        elif v > (_INT64_MAX - d) // 10:
            over = True
        else:
            v = v * 10 + d
        nd += 1
        q += 1
    if nd > 0 and (q >= stop or _is_end(buf[q], comment)):
        return q, v, ERR_INDEX_OVERFLOW if over else ERR_OK
    # not a plain integer: tell a fractional number from garbage
    f = _scan_float(buf, p, stop, comment)
    return f[0], 0, ERR_FRACTIONAL if f[1] == ERR_OK else ERR_NOT_NUMBER


@njit(nogil=True, cache=True, inline="always")
def _skip_line(buf, p, stop):
    while p < stop and buf[p] != _NL:
        p += 1
    return p


@njit(nogil=True, cache=True)
def parse_numeric_lines(
    buf,
    start,
    stop,
    n_index,
    has_value,
    int_values,
    comment,
    rows,
    cols,
    vals,
    fb_entry,
    fb_start,
    fb_len,
    status,
):
    """Parse whitespace-separated numeric lines into index and value arrays.

    Each non-blank, non-comment line must hold ``n_index`` non-negative
    integer fields followed by one value field if ``has_value``. Parsing stops
    at ``stop``, at the first error, or when the output arrays are full, always
    at a line boundary (``buf[stop - 1]`` must be a newline).

    Parameters
    ----------
    buf : uint8 array (n_bytes,)
        Text; only ``buf[start:stop]`` is read.
    start, stop : int
        Byte range to parse.
    n_index : int
        Integer fields per line (0, 1 or 2).
    has_value : bool
        Whether a value field follows the indices.
    int_values : bool
        Values must be written as integers (Matrix Market ``integer`` field).
    comment : int
        Byte that starts a comment running to the end of the line.
    rows, cols : int64 arrays (cap,)
        Out: first and second index of each entry (as written, not shifted).
    vals : float64 array (cap,)
        Out: values (0 for the entries listed in ``fb_entry``).
    fb_entry, fb_start, fb_len : int64 arrays (cap,)
        Out: entries whose value token the caller must convert, with the
        token's byte offset and length in ``buf``.
    status : int64 array (8,)
        Out: see the ``ST_*`` slots.
    """
    cap = rows.shape[0]
    for i in range(status.shape[0]):
        status[i] = 0
    n_fields = n_index + (1 if has_value else 0)
    p = start
    lines = 0
    ne = 0
    nfb = 0
    while p < stop:
        if ne >= cap:
            break
        line_start = p
        while p < stop and _is_space(buf[p]):
            p += 1
        if p >= stop:
            p = stop
            break
        c = buf[p]
        if c == _NL or c == comment:
            p = _skip_line(buf, p, stop) + 1
            lines += 1
            continue
        field = 0
        r = 0
        k = 0
        code = ERR_OK
        while True:
            while p < stop and _is_space(buf[p]):
                p += 1
            c = buf[p] if p < stop else _NL
            if c == _NL or c == comment:
                if field < n_fields:
                    code = ERR_FEW_FIELDS
                break
            if c == 0 or c >= 128 or (c < 32 and c != _TAB):
                code = ERR_BINARY
                break
            if field >= n_fields:
                code = ERR_MANY_FIELDS
                break
            if field < n_index:
                q, v, icode = _scan_index(buf, p, stop, comment)
                if icode != ERR_OK:
                    code = icode
                    break
                if field == 0:
                    r = v
                else:
                    k = v
                p = q
            else:
                fend, fcode, fmant, fexp, fflags = _scan_float(buf, p, stop, comment)
                if fcode != ERR_OK:
                    w = _word_kind(buf, p, stop, comment)
                    code = ERR_NAN if w == 1 else (ERR_INF if w == 2 else ERR_NOT_NUMBER)
                    break
                if int_values and (fflags & 4) == 0:
                    code = ERR_NOT_INTEGER
                    break
                ok = False
                v = 0.0
                if (fflags & 1) == 0:
                    ok, v = _fast_value(fmant, fexp, (fflags & 2) != 0)
                    if not ok and fmant > _TWO53:
                        ok, v = _certified_value(fmant, fexp, (fflags & 2) != 0)
                if ok:
                    vals[ne] = v
                else:
                    vals[ne] = 0.0
                    fb_entry[nfb] = ne
                    fb_start[nfb] = p
                    fb_len[nfb] = fend - p
                    nfb += 1
                p = fend
            field += 1
        if code != ERR_OK:
            status[ST_CODE] = code
            status[ST_FIELD] = field
            status[ST_ERR_LINE] = lines
            status[ST_POS] = line_start
            status[ST_LINES] = lines
            status[ST_ENTRIES] = ne
            status[ST_FALLBACK] = nfb
            return
        rows[ne] = r
        cols[ne] = k
        ne += 1
        p = _skip_line(buf, p, stop) + 1
        lines += 1
    status[ST_POS] = min(p, stop)
    status[ST_LINES] = lines
    status[ST_ENTRIES] = ne
    status[ST_FALLBACK] = nfb


@njit(nogil=True, cache=True)
def entry_line(buf, start, stop, comment, entry):
    """Return the 0-based line (relative to ``start``) of data entry ``entry``.

    Blank lines and comment lines are counted as lines but not as entries,
    matching :func:`parse_numeric_lines`. Returns -1 if there are fewer entries.
    """
    p = start
    lines = 0
    ne = 0
    while p < stop:
        q = p
        while q < stop and _is_space(buf[q]):
            q += 1
        data = q < stop and buf[q] != _NL and buf[q] != comment
        if data:
            if ne == entry:
                return lines
            ne += 1
        p = _skip_line(buf, q, stop) + 1
        lines += 1
    return -1


@njit(nogil=True, cache=True)
def gather_tokens(buf, tok_start, tok_len, n, out):
    """Copy ``n`` tokens into the zero-padded rows of ``out`` (n_cap, width) uint8."""
    width = out.shape[1]
    for i in range(n):
        s = tok_start[i]
        m = min(tok_len[i], width)
        for j in range(m):
            out[i, j] = buf[s + j]
        for j in range(m, width):
            out[i, j] = 0


@njit(nogil=True, cache=True)
def split_tokens(buf, start, stop, split, tok_start, tok_len, line_ntok, status, sep=-1):
    """Cut lines into tokens: the whole stripped line, or words.

    Parameters
    ----------
    buf : uint8 array (n_bytes,)
        Text with whole lines in ``buf[start:stop]``.
    split : bool
        False: one token per line (the line without surrounding white space,
        possibly empty). True: tokens cut at ``sep``.
    sep : int
        The separator byte when splitting: -1 spaces, tabs or commas; 32 runs
        of spaces and tabs; any other byte (``,``, ``;``, ``|``, tab) cuts at
        each occurrence, each token stripped of surrounding white space and
        empty tokens dropped.
    tok_start, tok_len : int64 arrays (tok_cap,)
        Out: byte offset and length of each token.
    line_ntok : int64 array (line_cap,)
        Out: number of tokens on each line.
    status : int64 array (8,)
        Out: ``ST_POS``, ``ST_LINES`` (lines written), ``ST_ENTRIES`` (tokens
        written), ``ST_CODE`` = ``ERR_BINARY`` with ``ST_ERR_LINE`` for a NUL
        or control byte.
    """
    for i in range(status.shape[0]):
        status[i] = 0
    tcap = tok_start.shape[0]
    lcap = line_ntok.shape[0]
    p = start
    nl = 0
    nt = 0
    while p < stop and nl < lcap:
        e = p
        bad = False
        while e < stop and buf[e] != _NL:
            c = buf[e]
            if c == 0 or (c < 32 and c != _TAB and c != _CR):
                bad = True
            e += 1
        if bad:
            status[ST_CODE] = ERR_BINARY
            status[ST_ERR_LINE] = nl
            status[ST_POS] = p
            status[ST_LINES] = nl
            status[ST_ENTRIES] = nt
            return
        # worst case this line adds (e - p + 1) // 2 + 1 tokens
        if nt + (e - p) // 2 + 1 > tcap and nl > 0:
            break
        if not split:
            a = p
            b = e
            while a < b and _is_space(buf[a]):
                a += 1
            while b > a and _is_space(buf[b - 1]):
                b -= 1
            tok_start[nt] = a
            tok_len[nt] = b - a
            nt += 1
            line_ntok[nl] = 1
        elif sep < 0 or sep == _SP:
            cnt = 0
            q = p
            comma = sep < 0
            while q < e:
                while q < e and (_is_space(buf[q]) or (comma and buf[q] == _COMMA)):
                    q += 1
                if q >= e:
                    break
                a = q
                while q < e and not (_is_space(buf[q]) or (comma and buf[q] == _COMMA)):
                    q += 1
                if nt < tcap:
                    tok_start[nt] = a
                    tok_len[nt] = q - a
                    nt += 1
                    cnt += 1
            line_ntok[nl] = cnt
        else:
            cnt = 0
            q = p
            while q < e:
                a = q
                while q < e and buf[q] != sep:
                    q += 1
                b = q
                q += 1  # past the separator
                while a < b and _is_space(buf[a]) and buf[a] != sep:
                    a += 1
                while b > a and _is_space(buf[b - 1]) and buf[b - 1] != sep:
                    b -= 1
                if b > a and nt < tcap:
                    tok_start[nt] = a
                    tok_len[nt] = b - a
                    nt += 1
                    cnt += 1
            line_ntok[nl] = cnt
        nl += 1
        p = e + 1
    status[ST_POS] = min(p, stop)
    status[ST_LINES] = nl
    status[ST_ENTRIES] = nt


@njit(nogil=True, cache=True)
def entries_to_csr(rows, cols, vals, r0, m, indptr, out_cols, out_vals, status):
    """Gather row-sorted entries into CSR, summing repeated (row, column) pairs.

    Parameters
    ----------
    rows, cols : int64 arrays (n,)
        Entries sorted by row; within a row, columns should increase.
    vals : float64 array (n,)
    r0, m : int
        The rows covered are ``r0 .. r0+m-1`` (every ``rows[i]`` is in range).
    indptr : int64 array (m+1,)
        Out: local row pointers.
    out_cols : int64 array (n,)
        Out: column ids, strictly increasing within each row.
    out_vals : float64 array (n,)
        Out: values, repeats summed in input order.
    status : int64 array (8,)
        Out: ``[0]`` = 0 done, 1 = a row's columns go down at entry ``[1]``
        (sort the entries by (row, column) and call again), 2 = rows go down
        at entry ``[1]``; ``[2]`` = entries written; ``[3]`` = repeats summed;
        ``[4]`` = empty rows.
    """
    for i in range(status.shape[0]):
        status[i] = 0
    n = rows.shape[0]
    k = -1
    prev_r = -1
    prev_c = -1
    dups = 0
    for i in range(m + 1):
        indptr[i] = 0
    for i in range(n):
        r = rows[i] - r0
        c = cols[i]
        if r == prev_r:
            if c == prev_c:
                out_vals[k] += vals[i]
                dups += 1
                continue
            if c < prev_c:
                status[0] = 1
                status[1] = i
                return
        elif r < prev_r:
            status[0] = 2
            status[1] = i
            return
        k += 1
        out_cols[k] = c
        out_vals[k] = vals[i]
        indptr[r + 1] += 1
        prev_r = r
        prev_c = c
    empty = 0
    for i in range(m):
        if indptr[i + 1] == 0:
            empty += 1
        indptr[i + 1] += indptr[i]
    status[2] = k + 1
    status[3] = dups
    status[4] = empty


@njit(nogil=True, cache=True)
def _sort_segment(cols, vals, a, b):
    """Sort ``cols[a:b]`` (carrying ``vals``) stably: insertion sort, merge sort if long."""
    n = b - a
    if n <= 32:
        for i in range(a + 1, b):
            c = cols[i]
            v = vals[i]
            j = i - 1
            while j >= a and cols[j] > c:
                cols[j + 1] = cols[j]
                vals[j + 1] = vals[j]
                j -= 1
            cols[j + 1] = c
            vals[j + 1] = v
        return
    order = np.argsort(cols[a:b], kind="mergesort")
    sc = cols[a:b][order]
    sv = vals[a:b][order]
    cols[a:b] = sc
    vals[a:b] = sv


@njit(nogil=True, cache=True)
def unsorted_entries_to_csr(
    rows, cols, vals, r0, m, indptr, cursor, tmp_cols, tmp_vals, out_cols, out_vals, status
):
    """Gather entries in any order into CSR in O(n + m), summing repeats.

    A counting sort by row (stable), then a stable sort of each row by
    column, then repeated (row, column) pairs are summed in input order.

    Parameters
    ----------
    rows, cols : int64 arrays (n,)
        Rows in ``r0 .. r0+m-1``, any order.
    vals : float64 array (n,)
    r0, m : int
    indptr : int64 array (m+1,)
        Out: local row pointers.
    cursor : int64 array (m,)
        Work space.
    tmp_cols : int64 array (n,), tmp_vals : float64 array (n,)
        Work space.
    out_cols : int64 array (n,), out_vals : float64 array (n,)
        Out: the first ``status[2]`` entries.
    status : int64 array (8,)
        Out: ``[2]`` entries written, ``[3]`` repeats summed, ``[4]`` empty rows.
    """
    for i in range(status.shape[0]):
        status[i] = 0
    n = rows.shape[0]
    for i in range(m + 1):
        indptr[i] = 0
    for i in range(n):
        indptr[rows[i] - r0 + 1] += 1
    for i in range(m):
        indptr[i + 1] += indptr[i]
        cursor[i] = indptr[i]
    for i in range(n):
        r = rows[i] - r0
        k = cursor[r]
        tmp_cols[k] = cols[i]
        tmp_vals[k] = vals[i]
        cursor[r] = k + 1
    k = 0
    dups = 0
    empty = 0
    start = 0
    for r in range(m):
        a = start
        b = indptr[r + 1]
        start = b
        if b == a:
            empty += 1
        _sort_segment(tmp_cols, tmp_vals, a, b)
        first = k
        for i in range(a, b):
            if k > first and tmp_cols[i] == out_cols[k - 1]:
                out_vals[k - 1] += tmp_vals[i]
                dups += 1
            else:
                out_cols[k] = tmp_cols[i]
                out_vals[k] = tmp_vals[i]
                k += 1
        indptr[r + 1] = k
    status[2] = k
    status[3] = dups
    status[4] = empty


@njit(nogil=True, cache=True)
def bucket_scatter(rows, cols, vals, width, b0, counts, cursor, out_rows, out_cols, out_vals):
    """Group entries by row bucket ``rows // width - b0``, keeping their order within a bucket.

    Parameters
    ----------
    rows, cols : int64 arrays (n,)
    vals : float64 array (n,)
    width : int
        Rows per bucket.
    b0 : int
        Lowest bucket id present.
    counts : int64 array (nb + 1,)
        Out: ``counts[j+1] - counts[j]`` entries of bucket ``b0 + j`` start at
        ``counts[j]`` (cumulative).
    cursor : int64 array (nb,)
        Work space.
    out_rows, out_cols, out_vals : arrays (n,)
        Out: the entries grouped by bucket.
    """
    nb = cursor.shape[0]
    for j in range(nb + 1):
        counts[j] = 0
    n = rows.shape[0]
    for i in range(n):
        counts[rows[i] // width - b0 + 1] += 1
    for j in range(nb):
        counts[j + 1] += counts[j]
        cursor[j] = counts[j]
    for i in range(n):
        j = rows[i] // width - b0
        k = cursor[j]
        out_rows[k] = rows[i]
        out_cols[k] = cols[i]
        out_vals[k] = vals[i]
        cursor[j] = k + 1
