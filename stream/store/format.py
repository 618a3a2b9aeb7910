"""Store format: names, shared constants, and the abstract backend contract.

The layout these constants describe is documented in :mod:`ranktide.store`.
Everything here is imported by the writer (:mod:`ranktide.store.writer`), the
reader (:mod:`ranktide.store.reader`) and both backends; nothing here imports
them back; :mod:`ranktide.store.backends` is the one module that imports both backends.

The tunables (:data:`CHUNK_ELEMENTS`, :data:`DEFAULT_BLOCK_BYTES`,
:data:`ZSTD_LEVEL` and the private piece and buffer sizes) are read from this
module at call time, so setting one here takes effect for the next store written
or read. They live here only (:mod:`ranktide.store` does not re-export them).
"""

from __future__ import annotations

import os
from abc import ABC, abstractmethod
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.errors import ConfigError

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
#: The codec new stores get unless told otherwise, chosen from tools/bench_store.py on
#: 2 cores (20 M nonzeros, later passes, % of the raw .npy page-cache floor): none 88%,
#: lz4 40%, zstd 21%. Only "none" meets the 50% read target; zstd packs 3x smaller
#: and costs little when passes are compute-bound (pick it with --codec zstd).
DEFAULT_CODEC = "none"
BACKENDS = ("zarr", "hdf5")
KINDS = ("classes", "values", "tags")
_SLAB_CHUNKS = 4
_INDPTR_PIECE = 1 << 20
_INT32_LIMIT = 2**31
_SPARE_BUFFERS = 2
_FREE_REFS = 2

#: Names that :mod:`ranktide.store` forwards here when they are set on it.
TUNABLES = (
    "CHUNK_ELEMENTS",
    "DEFAULT_BLOCK_BYTES",
    "ZSTD_LEVEL",
    "_SLAB_CHUNKS",
    "_INDPTR_PIECE",
    "_INT32_LIMIT",
    "_SPARE_BUFFERS",
    "_FREE_REFS",
)


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


class DecodePool:
    """A process-wide thread pool for decoding chunks, started on first use.

    A forked child has none of the parent's threads, so the pool is forgotten
    there and started anew on the child's first use.
    """

    def __init__(self, prefix: str) -> None:
        import threading

        self._prefix = prefix
        self._lock = threading.Lock()
        self._pool: Any = None
        if hasattr(os, "register_at_fork"):
            os.register_at_fork(after_in_child=self._forget)

    def _forget(self) -> None:
        import threading

        self._pool = None
        self._lock = threading.Lock()

    def get(self) -> Any:
        """The pool (``concurrent.futures.ThreadPoolExecutor``), one thread per core."""
        from concurrent.futures import ThreadPoolExecutor

        with self._lock:
            if self._pool is None:
                self._pool = ThreadPoolExecutor(max_workers=max(1, os.cpu_count() or 1),
                                                thread_name_prefix=self._prefix)
            return self._pool
