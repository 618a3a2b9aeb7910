"""Threading-layer safety for the parallel kernels.

numba's ``workqueue`` layer aborts the whole process when two Python threads
launch parallel kernels at the same time, while the OpenMP and TBB layers are
safe for concurrent calls. Before the first parallel kernel runs we ask numba
for a thread-safe layer (TBB or OpenMP) unless the user chose one through
``NUMBA_THREADING_LAYER``; if only ``workqueue`` is available, every kernel
call made through the Python wrappers in this package is serialized with one
module lock.

The environment is read at call time (on first use), never at import time.
Forking a process after OpenMP started its threads kills the child: start
worker processes with the ``spawn`` method.
"""

from __future__ import annotations

import contextlib
import os
import threading
from typing import Any

import numba
import numpy as np
from numba import njit, prange

_LOCK = threading.RLock()
_NULL = contextlib.nullcontext()
_STATE: dict[str, Any] = {"checked": False, "serialized": False, "layer": None}


@njit(nogil=True, cache=True, parallel=True)
def _probe_kernel(out):  # pragma: no cover - compiled
    for i in prange(out.shape[0]):
        out[i] = i


def _request_safe_layer() -> None:
    """Ask for a thread-safe layer when nothing was launched or requested yet."""
    if os.environ.get("NUMBA_THREADING_LAYER"):
        return  # the user's explicit choice stands; we serialize if it is unsafe
    try:
        from numba.np.ufunc import parallel as _par
    except ImportError:  # pragma: no cover - very old/new numba layout
        return
    if getattr(_par, "_is_initialized", True):
        return
    launch = getattr(_par, "_launch_threads", None)
    if launch is None:  # pragma: no cover
        return
    old = numba.config.THREADING_LAYER
    if old != "default":
        return  # chosen in-process through numba.config: respected likewise
    numba.config.THREADING_LAYER = "threadsafe"
    try:
        launch()
    except ValueError:
        # neither TBB nor OpenMP can be loaded: fall back to numba's default
        numba.config.THREADING_LAYER = old


def ensure_threading() -> None:
    """Select/inspect the threading layer once (thread-safe, idempotent)."""
    if _STATE["checked"]:
        return
    with _LOCK:
        if _STATE["checked"]:
            return
        _request_safe_layer()
        _probe_kernel(np.empty(4, dtype=np.int64))
        layer = numba.threading_layer()
        _STATE["layer"] = layer
        _STATE["serialized"] = layer == "workqueue"
        _STATE["checked"] = True


def kernel_guard() -> contextlib.AbstractContextManager:
    """Context manager to hold around a parallel kernel call.

    A no-op under a thread-safe layer; the module lock under ``workqueue``.
    """
    ensure_threading()
    return _LOCK if _STATE["serialized"] else _NULL


def threading_info() -> dict[str, Any]:
    """Describe the kernels' threading set-up (for a verbose start-up line).

    Returns
    -------
    dict
        ``layer`` (str: ``"omp"``, ``"tbb"`` or ``"workqueue"``), ``threads``
        (int, numba's current thread count), ``serialized`` (bool: kernel
        calls are serialized by a lock because the layer is unsafe for
        concurrent calls) and ``cache_dir`` (str, numba's cache directory).
    """
    ensure_threading()
    return {
        "layer": str(_STATE["layer"]),
        "threads": int(numba.get_num_threads()),
        "serialized": bool(_STATE["serialized"]),
        "cache_dir": str(numba.config.CACHE_DIR or os.environ.get("NUMBA_CACHE_DIR", "")),
    }
