"""Numba kernels: pure functions over arrays, no I/O, no Python objects.

Importing this package makes sure numba has a writable cache directory (the
package directory may be read-only) before any kernel module is compiled.
"""

from __future__ import annotations

from ._config import ensure_cache_dir

ensure_cache_dir()
