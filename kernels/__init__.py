"""Numba kernels: pure functions over arrays, no I/O, no Python objects.

Importing this package makes sure numba has a writable cache directory (the
package directory may be read-only) before any kernel module is compiled.
:func:`threading_info` (loaded on first access) reports the threading layer.
"""

from __future__ import annotations

import importlib
from typing import Any

from ._config import ensure_cache_dir, ensure_passive_wait

ensure_cache_dir()
ensure_passive_wait()


def __getattr__(name: str) -> Any:
    if name == "threading_info":
        return importlib.import_module(".threads", __name__).threading_info
    raise AttributeError(f"module 'kernels' has no attribute {name!r}")
