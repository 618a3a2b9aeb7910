"""zarr v3 backend of the store: a directory holding one zarr group.

zarr reads a missing chunk silently as the fill value, so damage is found by
the store's segment checksums, not here. zarr has no chunk cache: the store's
reader asks for chunk-aligned ranges and keeps the tail chunk itself.

Writing and metadata go through zarr. Reading has a direct path for the
arrays this backend writes (regular chunks along axis 0, default chunk keys,
little-endian bytes, then at most one of zstd or blosc): each chunk file is
read and decoded by numcodecs straight into the caller's buffer, on a small
thread pool (the codecs release the GIL). Measured by tools/bench_store.py it
costs about half the CPU of zarr's own pipeline per decoded byte, and an
uncompressed chunk is read with ``readinto`` at page-cache speed. Any other
layout falls back to zarr's reader; tests check both give the same bytes.
"""

from __future__ import annotations

import json
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.errors import StoreError
from ranktide.store.format import ATTRS_KEY, DecodePool, StoreBackend

__all__ = ["ZarrBackend"]

_CONFIG_LOCK = threading.Lock()
_CONFIGURED = False
#: Reads smaller than this decode inline: handing tiny chunks to threads costs more.
_POOL_MIN_BYTES = 1 << 20


def _tune_zarr() -> None:
    """Size zarr's decode pool to this machine, once, before the first read.

    DESIGN §11: zarr decodes on a thread pool configured through its global
    config, which must be set before the pool starts.
    """
    global _CONFIGURED
    with _CONFIG_LOCK:
        if _CONFIGURED:
            return
        import zarr

        workers = max(1, os.cpu_count() or 1)
        zarr.config.set({"threading.max_workers": workers, "async.concurrency": 4 * workers})
        _CONFIGURED = True


_DECODERS = DecodePool("store-decode-zarr")


def _pool() -> ThreadPoolExecutor:
    return _DECODERS.get()


class _DirectChunks:
    """Reads the chunk files of one zarr v3 array without zarr's pipeline.

    Only built for the layout this backend writes (see the module docstring);
    :meth:`maybe` returns None for anything else.
    """

    def __init__(
        self, root: Path, shape: tuple[int, ...], chunk: int, dtype: np.dtype, decoder: Any
    ) -> None:
        self.root = root
        self.shape = shape
        self.chunk = chunk
        self.dtype = dtype
        self.decoder = decoder
        self.suffix = "/0" * (len(shape) - 1)

    @classmethod
    def maybe(cls, root: Path) -> _DirectChunks | None:
        try:
            meta = json.loads((root / "zarr.json").read_text())
            grid = meta["chunk_grid"]
            keys = meta["chunk_key_encoding"]
            shape = tuple(int(v) for v in meta["shape"])
            chunks = tuple(int(v) for v in grid["configuration"]["chunk_shape"])
            codecs = meta["codecs"]
            dtype = np.dtype(meta["data_type"])
        except (OSError, KeyError, TypeError, ValueError):
            return None
        ok = (
            grid.get("name") == "regular"
            and keys.get("name") == "default"
            and keys.get("configuration", {}).get("separator", "/") == "/"
            and chunks[1:] == shape[1:]
            and meta.get("fill_value") in (0, 0.0)
            and not meta.get("storage_transformers")
            and dtype.byteorder in ("=", "<", "|")
            and np.little_endian
            and codecs
            and codecs[0].get("name") == "bytes"
            and codecs[0].get("configuration", {}).get("endian", "little") == "little"
            and len(codecs) <= 2
        )
        if not ok:
            return None
        decoder = None
        if len(codecs) == 2:
            from numcodecs import Blosc, Zstd

            name = codecs[1].get("name")
            if name == "zstd":
                decoder = Zstd()
            elif name == "blosc":
                decoder = Blosc()
            else:
                return None
        return cls(root, shape, chunks[0], dtype, decoder)

    def _chunk(self, j: int, out: np.ndarray, check: Any) -> None:
        """Decode chunk ``j`` into ``out`` (its first ``len(out)`` rows), then check it."""
        self._decode(j, out)
        if check is not None:
            check(j, out)

    def _decode(self, j: int, out: np.ndarray) -> None:
        path = self.root / "c" / f"{j}{self.suffix}"
        flat = out.reshape(-1).view(np.uint8)
        try:
            fh = open(path, "rb", buffering=0)  # noqa: SIM115
        except FileNotFoundError:
            out[...] = 0  # zarr's rule: a missing chunk reads as the fill value
            return
        with fh:
            if self.decoder is None:
                got = fh.readinto(flat)
                if got != flat.shape[0]:
                    raise OSError(
                        f"chunk file {path} is truncated ({got} of {flat.shape[0]} bytes)"
                    )
                return
            raw = fh.read()
        full = self.chunk * int(np.prod(self.shape[1:], dtype=np.int64)) * self.dtype.itemsize
        if flat.shape[0] == full:
            self.decoder.decode(raw, out=flat)
        else:  # the last chunk is stored padded to the full chunk shape
            tmp = np.empty(full, dtype=np.uint8)
            self.decoder.decode(raw, out=tmp)
            flat[...] = tmp[: flat.shape[0]]

    def read(self, start: int, stop: int, out: np.ndarray, check: Any = None) -> None:
        """Rows ``start:stop`` (``start`` chunk-aligned) into ``out``."""
        c = self.chunk
        jobs = []
        for j in range(start // c, -(-stop // c)):
            lo, hi = j * c, min(stop, (j + 1) * c)
            jobs.append((j, out[lo - start : hi - start]))
        if len(jobs) == 1 or out.nbytes < _POOL_MIN_BYTES:
            for j, o in jobs:
                self._chunk(j, o, check)
            return
        for fut in [_pool().submit(self._chunk, j, o, check) for j, o in jobs]:
            fut.result()


def _compressors(codec: str, level: int | None) -> list[Any]:
    from zarr.codecs import BloscCodec

    if codec == "zstd":
        lvl = 1 if level is None else level
        return [BloscCodec(cname="zstd", clevel=lvl, shuffle="shuffle")]
    if codec == "lz4":
        return [BloscCodec(cname="lz4", clevel=5 if level is None else level, shuffle="shuffle")]
    return []


class ZarrBackend(StoreBackend):
    """Arrays of a store kept in a zarr v3 directory group."""

    name = "zarr"
    parallel_reads = True

    def __init__(self, group: Any, path: Path, *, writable: bool) -> None:
        self._group = group
        self.path = path
        self.writable = writable
        self._arrays: dict[str, Any] = {}
        self._direct: dict[str, _DirectChunks | None] = {}
        self._codec: tuple[str, int | None] = ("none", None)

    @classmethod
    def create(cls, path: Path, *, codec: str, level: int | None = None) -> ZarrBackend:
        import zarr

        _tune_zarr()
        group = zarr.open_group(str(path), mode="w-", zarr_format=3)
        self = cls(group, Path(path), writable=True)
        self._codec = (codec, level)
        return self

    @classmethod
    def open(cls, path: Path) -> ZarrBackend:
        import zarr

        _tune_zarr()
        if not (Path(path) / "zarr.json").is_file():
            raise StoreError(
                f"{path}: not a ranktide store (no zarr.json); "
                "create one with `ranktide ingest` or write_store()"
            )
        try:
            group = zarr.open_group(str(path), mode="r")
        except Exception as exc:
            raise StoreError(
                f"{path}: not a readable zarr group ({type(exc).__name__}: {exc}); "
                "re-create the store"
            ) from None
        return cls(group, Path(path), writable=False)

    def codec_impl(self) -> str:
        codec, level = self._codec
        if codec == "zstd":
            return f"zarr blosc zstd level {1 if level is None else level} + shuffle"
        if codec == "lz4":
            return f"zarr blosc lz4 level {5 if level is None else level} + shuffle"
        return "zarr uncompressed"

    def create_array(
        self, name: str, *, dtype: np.dtype, shape: tuple[int, ...], chunk_rows: int
    ) -> None:
        parent, _, leaf = name.rpartition("/")
        grp = self._group.require_group(parent) if parent else self._group
        chunks = (int(chunk_rows),) + tuple(int(s) for s in shape[1:])
        arr = grp.create_array(
            leaf,
            shape=tuple(int(s) for s in shape),
            chunks=chunks,
            dtype=np.dtype(dtype),
            compressors=_compressors(*self._codec),
            filters=None,
            fill_value=0,
        )
        self._arrays[name] = arr

    def _array(self, name: str) -> Any:
        arr = self._arrays.get(name)
        if arr is None:
            try:
                arr = self._group[name]
            except KeyError:
                raise StoreError(
                    f"{self.path}: array {name!r} is missing; the store is damaged, re-create it"
                ) from None
            self._arrays[name] = arr
        return arr

    def has(self, name: str) -> bool:
        return name in self._arrays or name in self._group

    def write(self, name: str, start: int, values: np.ndarray) -> None:
        self._array(name)[start : start + values.shape[0]] = values

    def resize(self, name: str, n_rows: int) -> None:
        arr = self._array(name)
        arr.resize((int(n_rows),) + tuple(arr.shape[1:]))

    def read(
        self,
        name: str,
        start: int,
        stop: int,
        *,
        out: np.ndarray | None = None,
        check: Any = None,
    ) -> np.ndarray:
        if not self.writable and name not in self._direct:
            self._direct[name] = _DirectChunks.maybe(self.path / name)
        direct = self._direct.get(name)
        if direct is not None and start % direct.chunk == 0:
            if out is None:
                out = np.empty((max(0, stop - start),) + direct.shape[1:], dtype=direct.dtype)
            if out.shape[0]:
                direct.read(start, stop, out, check)
            return out
        arr = self._array(name)
        if out is None:
            out = np.asarray(arr[start:stop])
        elif out.shape[0]:
            from zarr.core.buffer import default_buffer_prototype

            nd = default_buffer_prototype().nd_buffer.from_numpy_array(out)
            arr.get_basic_selection(slice(start, stop), out=nd)
        self.check_chunks(check, start, out, int(arr.chunks[0]))
        return out

    def shape(self, name: str) -> tuple[int, ...]:
        return tuple(int(s) for s in self._array(name).shape)

    def dtype(self, name: str) -> np.dtype:
        return np.dtype(self._array(name).dtype)

    def chunk_rows(self, name: str) -> int:
        return int(self._array(name).chunks[0])

    def stored_nbytes(self, name: str) -> int:
        return int(self._array(name).nbytes_stored())

    def get_attrs(self) -> dict[str, Any] | None:
        value = self._group.attrs.get(ATTRS_KEY)
        return dict(value) if isinstance(value, dict) else None

    def set_attrs(self, attrs: dict[str, Any]) -> None:
        self._group.attrs[ATTRS_KEY] = attrs

    def close(self) -> None:
        self._arrays.clear()
