"""ranktide: out-of-core trace-norm regularized multi-output linear models.

The public API is re-exported here lazily, so importing :mod:`stream` stays
cheap and does not compile numba kernels.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

# public name -> module that defines it
_EXPORTS: dict[str, str] = {
    "open_store": "stream.store",
    "write_store": "stream.store",
    "create_store": "stream.store",
    "Store": "stream.store",
    "Block": "stream.store",
    "ingest": "stream.ingest",
    "run_pass": "stream.passes",
    "train": "stream.train",
    "TrainResult": "stream.train",
    "load_model": "stream.model",
    "Model": "stream.model",
    "evaluate": "stream.evaluate",
    "RanktideError": "stream.errors",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    mod = _EXPORTS.get(name)
    if mod is None:
        raise AttributeError(f"module 'stream' has no attribute {name!r}")
    return getattr(importlib.import_module(mod), name)
