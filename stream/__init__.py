"""ranktide: out-of-core trace-norm regularized multi-output linear models.

The public API mirrors the command line. Names are loaded on first use, so
``import ranktide`` stays cheap and compiles no numba kernels.

==================  ==========================================================
name                what it does
==================  ==========================================================
``open_store``      open a store (zarr directory or HDF5 file) for reading
``write_store``     write in-memory arrays (CSR, targets, weights) as a store
``create_store``    the streaming store writer
``ingest_file``     turn Matrix Market / triplet / npz files into a store
``inspect_store``   a summary of a store
``split_store``     a stratified holdout split of a store
``train``           fit one penalty value or a regularization path
``resume``          continue a run directory
``load_model``      read a model directory
``evaluate``        streamed metrics of a model on a store or CSR matrix
``predict_to_file`` streamed predictions written to CSV / npy / zarr
``profile_store``   where a pass's time goes
``write_report``    the HTML report of a run
==================  ==========================================================
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

# public name -> module that defines it
_EXPORTS: dict[str, str] = {
    "open_store": "ranktide.store",
    "write_store": "ranktide.store",
    "create_store": "ranktide.store",
    "Store": "ranktide.store",
    "Block": "ranktide.store",
    "ingest_file": "ranktide.ingest",
    "inspect_store": "ranktide.store.inspect",
    "split_store": "ranktide.store.split",
    "run_pass": "ranktide.passes.engine",
    "train": "ranktide.runs.train",
    "TrainResult": "ranktide.runs.train",
    "resume": "ranktide.runs.resume",
    "load_model": "ranktide.model",
    "Model": "ranktide.model",
    "evaluate": "ranktide.scoring.evaluate",
    "predict_to_file": "ranktide.scoring.predict",
    "profile_store": "ranktide.diagnostics.profile",
    "write_report": "ranktide.diagnostics.report",
    "RanktideError": "ranktide.errors",
}

__all__ = sorted([*_EXPORTS, "__version__"])


def __getattr__(name: str) -> Any:
    mod = _EXPORTS.get(name)
    if mod is None:
        raise AttributeError(f"module 'ranktide' has no attribute {name!r}")
    return getattr(importlib.import_module(mod), name)


def __dir__() -> list[str]:
    return __all__
