"""Segment checksums of stored arrays and the store fingerprint.

Every stored array is cut along its first axis into fixed segments of
``segment_rows`` rows (the storage chunk length, so one segment is one chunk).
Each segment's checksum is the CRC-32 (zlib) of its decoded little-endian
bytes. CRC-32 detects every burst error up to 32 bits and runs at several GB/s
here, so checking on read is cheap next to decoding.

The store fingerprint is a BLAKE2b digest over the shape and kind attributes
and every segment checksum, so two stores with the same content have the same
fingerprint whatever the backend or codec.
"""

from __future__ import annotations

import hashlib
import json
import zlib
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

__all__ = [
    "ALGORITHM",
    "segment_checksum",
    "SegmentHasher",
    "fingerprint",
    "n_segments",
]

ALGORITHM = "crc32"


def _le_bytes(arr: np.ndarray) -> memoryview:
    """Little-endian C-contiguous bytes of ``arr`` (a view when possible)."""
    a = np.ascontiguousarray(arr)
    if a.dtype.byteorder == ">" or (a.dtype.byteorder == "=" and np.little_endian is False):
        a = a.astype(a.dtype.newbyteorder("<"))
    return memoryview(a).cast("B")


def segment_checksum(arr: np.ndarray) -> str:
    """Checksum of one segment's decoded bytes, as 8 hex digits.

    Parameters
    ----------
    arr : ndarray, shape (m, ...)
        The segment's values, in stored dtype.

    Returns
    -------
    str
        CRC-32 of the little-endian bytes, zero-padded hex.
    """
    return f"{zlib.crc32(_le_bytes(arr)) & 0xFFFFFFFF:08x}"


def n_segments(n_rows: int, segment_rows: int) -> int:
    """Number of segments of ``segment_rows`` rows in an array of ``n_rows`` rows."""
    return -(-int(n_rows) // int(segment_rows))


class SegmentHasher:
    """Checksums of an array that arrives in row order, one segment at a time.

    Feed consecutive row slabs with :meth:`update`; a segment's checksum is
    computed as soon as it is complete, so memory stays at one segment plus
    the slab being fed. :meth:`finish` closes the last, partial segment.

    Parameters
    ----------
    segment_rows : int
        Rows per segment (first axis).
    """

    def __init__(self, segment_rows: int) -> None:
        self.segment_rows = int(segment_rows)
        self.checksums: list[str] = []
        self._crc = 0
        self._filled = 0

    def update(self, slab: np.ndarray) -> None:
        """Add the next ``slab`` of rows (shape (m, ...))."""
        pos = 0
        m = slab.shape[0]
        while pos < m:
            take = min(self.segment_rows - self._filled, m - pos)
            self._crc = zlib.crc32(_le_bytes(slab[pos : pos + take]), self._crc)
            self._filled += take
            pos += take
            if self._filled == self.segment_rows:
                self._close()

    def _close(self) -> None:
        self.checksums.append(f"{self._crc & 0xFFFFFFFF:08x}")
        self._crc = 0
        self._filled = 0

    def finish(self) -> list[str]:
        """Close the last partial segment and return every checksum."""
        if self._filled:
            self._close()
        return self.checksums


def fingerprint(header: Mapping[str, Any], checksums: Mapping[str, Sequence[str]]) -> str:
    """Store fingerprint: BLAKE2b-128 of the header and all segment checksums.

    Parameters
    ----------
    header : mapping
        JSON-able shape/kind attributes (n_rows, n_cols, nnz, kind, n_outputs,
        dtypes, segment sizes).
    checksums : mapping of str to list of str
        Segment checksums of each array, by array name.

    Returns
    -------
    str
        32 hex digits.
    """
    h = hashlib.blake2b(digest_size=16)
    h.update(json.dumps(dict(header), sort_keys=True, separators=(",", ":")).encode())
    for name in sorted(checksums):
        h.update(name.encode() + b"\0")
        h.update(",".join(checksums[name]).encode() + b"\n")
    return h.hexdigest()
