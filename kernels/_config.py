"""Numba start-up configuration (cache directory)."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def _writable(path: Path) -> bool:
    try:
        path.mkdir(parents=True, exist_ok=True)
        probe = path / f".probe-{os.getpid()}"
        probe.write_bytes(b"")
        probe.unlink()
        return True
    except OSError:
        return False


def ensure_passive_wait() -> None:
    """Let idle OpenMP threads sleep instead of spinning (unless the user chose otherwise).

    The parallel kernels alternate with numpy's BLAS calls in every block; spinning
    OpenMP threads then compete with BLAS for the two cores. Measured with
    tools/bench_pass.py (21 M nonzeros, k = 200): in-memory pass 3.32 s -> 3.12 s.
    Must run before the OpenMP runtime starts (the first parallel kernel call).
    """
    os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")


def ensure_cache_dir() -> str:
    """Point numba's cache at a writable directory and return it.

    Honors an existing ``NUMBA_CACHE_DIR``; otherwise uses
    ``$XDG_CACHE_HOME/ranktide/numba`` (or ``~/.cache/...``), falling back to
    the system temporary directory. Must run before numba compiles anything.
    """
    current = os.environ.get("NUMBA_CACHE_DIR")
    if current and _writable(Path(current)):
        return current
    base = Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache"))
    for cand in (base / "ranktide" / "numba", Path(tempfile.gettempdir()) / "ranktide-numba"):
        if _writable(cand):
            os.environ["NUMBA_CACHE_DIR"] = str(cand)
            try:
                from numba.core import config as _nb_config

                _nb_config.CACHE_DIR = str(cand)
            except Exception:  # numba not imported yet: the env var is enough
                pass
            return str(cand)
    return ""
