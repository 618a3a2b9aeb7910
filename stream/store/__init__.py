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

This module is the public face of the store; the code lives in

* :mod:`ranktide.store.format` — names, constants, tunables, the abstract
  :class:`StoreBackend` contract and backend selection;
* :mod:`ranktide.store.writer` — :func:`create_store`, :class:`StoreWriter`;
* :mod:`ranktide.store.reader` — :func:`open_store`, :class:`Store`,
  :class:`Block` and block planning;
* :mod:`ranktide.store.from_arrays` — :func:`write_store` (in-memory input);

and ``ranktide.store._zarr`` / ``ranktide.store._hdf5`` implement the backends.
The public names are re-exported here. The tunables (``CHUNK_ELEMENTS``,
``DEFAULT_BLOCK_BYTES``, ``ZSTD_LEVEL`` and the private piece and buffer
sizes, see :data:`ranktide.store.format.TUNABLES`) live in
:mod:`ranktide.store.format` only, where the writer and reader read them at call
time: assign them there (``mock.patch.object(ranktide.store.format,
"CHUNK_ELEMENTS", n)``). They are not re-exported, so that an assignment here
cannot silently change nothing.
"""

from __future__ import annotations

from ranktide.store.format import (
    BACKENDS,
    CODECS,
    FORMAT_NAME,
    FORMAT_VERSION,
    KINDS,
    StoreBackend,
)
from ranktide.store.from_arrays import write_store
from ranktide.store.reader import Block, Store, open_store
from ranktide.store.writer import StoreWriter, create_store

__all__ = [
    "Block",
    "Store",
    "StoreWriter",
    "StoreBackend",
    "open_store",
    "write_store",
    "create_store",
    "BACKENDS",
    "CODECS",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "KINDS",
]
