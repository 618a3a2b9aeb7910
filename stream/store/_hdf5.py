"""HDF5 backend of the store: one file, same layout as the zarr group.

All h5py calls serialize on one global lock (DESIGN §11), so decoding through
h5py runs on one core. For chunk-aligned reads of arrays compressed with the
hdf5plugin zstd or blosc filters, this backend instead copies each chunk's
stored bytes out with ``read_direct_chunk`` (under the lock, a plain copy) and
decodes them with numcodecs on a thread pool, outside the lock, straight into
the caller's buffer; anything else goes through h5py. The chunk cache
(``rdcc_nbytes``) is sized above a few chunks.
zstd and lz4 come from the ``hdf5plugin`` filters; without that package the
store falls back to gzip + shuffle (for zstd) or lzf (for lz4) and records the
filter actually used in the attributes.
"""

from __future__ import annotations

import json
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.errors import StoreError
from ranktide.store.format import ATTRS_KEY, DecodePool, StoreBackend

__all__ = ["Hdf5Backend"]

_CACHE_BYTES = 64 * 1024 * 1024
_SIGNATURE = b"\x89HDF\r\n\x1a\n"
_ZSTD_FILTER = 32015  # registered HDF5 filter ids (hdf5plugin)
_BLOSC_FILTER = 32001
#: Reads smaller than this decode inline: handing tiny chunks to threads costs more.
_POOL_MIN_BYTES = 1 << 20


_DECODERS = DecodePool("store-decode-hdf5")


def _pool() -> ThreadPoolExecutor:
    return _DECODERS.get()


def _direct_decoder(ds: Any) -> Any:
    """numcodecs decoder for a dataset whose only filter is zstd or blosc, else None."""
    if ds.chunks is None or ds.dtype.byteorder == ">":
        return None
    dcpl = ds.id.get_create_plist()
    ids = [dcpl.get_filter(i)[0] for i in range(dcpl.get_nfilters())]
    if ids == [_ZSTD_FILTER]:
        from numcodecs import Zstd

        return Zstd()
    if ids == [_BLOSC_FILTER]:
        from numcodecs import Blosc

        return Blosc()
    return None


def _decode_into(
    decoder: Any, raw: bytes, mask: int, out: np.ndarray, full: int, j: int, check: Any
) -> None:
    """Decode stored chunk ``j`` into ``out`` (the first ``out.nbytes`` of ``full``), check it."""
    _decode_raw(decoder, raw, mask, out, full)
    if check is not None:
        check(j, out)


def _decode_raw(decoder: Any, raw: bytes, mask: int, out: np.ndarray, full: int) -> None:
    flat = out.reshape(-1).view(np.uint8)
    if mask & 1:  # the filter was skipped for this chunk: stored as is
        flat[...] = np.frombuffer(raw, dtype=np.uint8, count=flat.shape[0])
    elif flat.shape[0] == full:
        decoder.decode(raw, out=flat)
    else:  # the last chunk is stored padded to the full chunk shape
        tmp = np.empty(full, dtype=np.uint8)
        decoder.decode(raw, out=tmp)
        flat[...] = tmp[: flat.shape[0]]


def _filters(codec: str, level: int | None) -> tuple[dict[str, Any], str]:
    """h5py dataset keywords for ``codec`` and a description of the filter."""
    if codec == "none":
        return {}, "hdf5 uncompressed"
    try:
        import hdf5plugin
    except ImportError:
        hdf5plugin = None
    if codec == "zstd":
        lvl = 1 if level is None else level
        if hdf5plugin is not None:
            kw = dict(hdf5plugin.Blosc(cname="zstd", clevel=lvl, shuffle=hdf5plugin.Blosc.SHUFFLE))
            return kw, f"hdf5 blosc zstd level {lvl} + shuffle (hdf5plugin)"
        return {"compression": "gzip", "compression_opts": 1, "shuffle": True}, (
            "hdf5 gzip level 1 + shuffle (hdf5plugin not installed)"
        )
    lvl = 5 if level is None else level
    if hdf5plugin is not None:
        kw = dict(hdf5plugin.Blosc(cname="lz4", clevel=lvl, shuffle=hdf5plugin.Blosc.SHUFFLE))
        return kw, f"hdf5 blosc lz4 level {lvl} + shuffle (hdf5plugin)"
    return {"compression": "lzf", "shuffle": True}, "hdf5 lzf + shuffle (hdf5plugin not installed)"


def _load_plugins() -> None:
    """Register the hdf5plugin filters for reading, when the package is there."""
    try:
        import hdf5plugin  # noqa: F401
    except ImportError:
        pass


class Hdf5Backend(StoreBackend):
    """Arrays of a store kept in one HDF5 file."""

    name = "hdf5"
    parallel_reads = False

    def __init__(self, fh: Any, path: Path, *, writable: bool) -> None:
        self._fh = fh
        self.path = path
        self.writable = writable
        self._kw: dict[str, Any] = {}
        self._impl = "hdf5 uncompressed"
        self._decoders: dict[str, Any] = {}

    @classmethod
    def create(cls, path: Path, *, codec: str, level: int | None = None) -> Hdf5Backend:
        import h5py

        _load_plugins()
        fh = h5py.File(str(path), "w-", libver="latest")
        self = cls(fh, Path(path), writable=True)
        self._kw, self._impl = _filters(codec, level)
        return self

    @classmethod
    def open(cls, path: Path) -> Hdf5Backend:
        import h5py

        p = Path(path)
        if not p.is_file():
            raise StoreError(
                f"{p}: not a ranktide store (no such HDF5 file); "
                "create one with `ranktide ingest` or write_store()"
            )
        with open(p, "rb") as fh:
            head = fh.read(len(_SIGNATURE))
        if head != _SIGNATURE:
            raise StoreError(f"{p}: not a ranktide store (not an HDF5 file); check the path")
        _load_plugins()
        try:
            fh = h5py.File(str(p), "r", rdcc_nbytes=_CACHE_BYTES, rdcc_nslots=10007)
        except OSError as exc:
            raise StoreError(
                f"{p}: not a readable HDF5 file ({exc}); re-create the store"
            ) from None
        return cls(fh, p, writable=False)

    def codec_impl(self) -> str:
        return self._impl

    def create_array(
        self, name: str, *, dtype: np.dtype, shape: tuple[int, ...], chunk_rows: int
    ) -> None:
        shape = tuple(int(s) for s in shape)
        chunks = (max(1, int(chunk_rows)),) + shape[1:]
        if any(c == 0 for c in chunks):
            chunks = tuple(max(1, c) for c in chunks)
        self._fh.create_dataset(
            name,
            shape=shape,
            maxshape=(None,) + shape[1:],
            chunks=chunks,
            dtype=np.dtype(dtype),
            **self._kw,
        )

    def _ds(self, name: str) -> Any:
        try:
            return self._fh[name]
        except KeyError:
            raise StoreError(
                f"{self.path}: dataset {name!r} is missing; the store is damaged, re-create it"
            ) from None

    def has(self, name: str) -> bool:
        return name in self._fh

    def write(self, name: str, start: int, values: np.ndarray) -> None:
        if values.shape[0]:
            self._ds(name)[start : start + values.shape[0]] = values

    def resize(self, name: str, n_rows: int) -> None:
        self._ds(name).resize(int(n_rows), axis=0)

    def read(
        self,
        name: str,
        start: int,
        stop: int,
        *,
        out: np.ndarray | None = None,
        check: Any = None,
    ) -> np.ndarray:
        ds = self._ds(name)
        if out is None:
            out = np.empty((max(0, stop - start),) + ds.shape[1:], dtype=ds.dtype)
        if not (out.shape[0] and out.size):
            return out
        if not self.writable and name not in self._decoders:
            self._decoders[name] = _direct_decoder(ds)
        decoder = self._decoders.get(name)
        if decoder is not None and start % ds.chunks[0] == 0:
            self._read_chunks(ds, decoder, start, stop, out, check)
        else:
            ds.read_direct(out, np.s_[start:stop])
            self.check_chunks(check, start, out, int(ds.chunks[0]))
        return out

    def _read_chunks(
        self, ds: Any, decoder: Any, start: int, stop: int, out: np.ndarray, check: Any
    ) -> None:
        """Copy stored chunks out (h5py, serial) and decode them on the pool."""
        c = ds.chunks[0]
        full = int(np.prod(ds.chunks)) * ds.dtype.itemsize
        tail = (0,) * (len(ds.shape) - 1)
        inline = out.nbytes < _POOL_MIN_BYTES or stop - start <= c
        futures = []
        for lo in range(start, stop, c):
            mask, raw = ds.id.read_direct_chunk((lo,) + tail)
            piece = out[lo - start : min(stop, lo + c) - start]
            job = (decoder, raw, mask, piece, full, lo // c, check)
            if inline:
                _decode_into(*job)
            else:
                futures.append(_pool().submit(_decode_into, *job))
        for fut in futures:
            fut.result()

    def shape(self, name: str) -> tuple[int, ...]:
        return tuple(int(s) for s in self._ds(name).shape)

    def dtype(self, name: str) -> np.dtype:
        return np.dtype(self._ds(name).dtype)

    def chunk_rows(self, name: str) -> int:
        return int(self._ds(name).chunks[0])

    def stored_nbytes(self, name: str) -> int:
        return int(self._ds(name).id.get_storage_size())

    def get_attrs(self) -> dict[str, Any] | None:
        raw = self._fh.attrs.get(ATTRS_KEY)
        if raw is None:
            return None
        if isinstance(raw, bytes):
            raw = raw.decode()
        try:
            value = json.loads(str(raw))
        except json.JSONDecodeError:
            return None
        return value if isinstance(value, dict) else None

    def set_attrs(self, attrs: dict[str, Any]) -> None:
        self._fh.attrs[ATTRS_KEY] = json.dumps(attrs, sort_keys=True)
        self._fh.flush()

    def close(self) -> None:
        try:
            self._fh.close()
        except Exception:  # closing twice or after a failed write
            pass
