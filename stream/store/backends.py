"""The one module that imports both store backends (zarr and HDF5)."""

from __future__ import annotations

from ranktide.store._hdf5 import Hdf5Backend
from ranktide.store._zarr import ZarrBackend
from ranktide.store.format import StoreBackend

__all__ = ["backend_class"]

_CLASSES: dict[str, type[StoreBackend]] = {"zarr": ZarrBackend, "hdf5": Hdf5Backend}


def backend_class(name: str) -> type[StoreBackend]:
    """The backend class for ``name`` (``"zarr"`` or ``"hdf5"``)."""
    return _CLASSES[name]
