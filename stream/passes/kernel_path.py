"""Which sparse kernels a block uses: CSR, or the block transposed once.

Both paths give bit-identical results on blocks whose column ids are sorted
within rows (:mod:`kernels.csc`), so the choice is a matter of speed only, and
the speed depends on the data: the transposed path wins when the rows of the
d-row operands that a block touches do not fit in cache (measured 1.5-2x on
spread-out columns), and loses when a few frequent columns take most entries
(measured 0.4-0.7x on a steep power law) or when a block holds fewer entries
than about half the columns (its ``O(d)`` column walk then dominates).

:class:`PathChooser` therefore measures: per kind of pass (operand shape), the
first eligible blocks alternate between the two paths, and once each has two
timings (the first of each may include loading the kernels, so the faster of
the two counts) every later block takes the path with the lower time per
entry. Blocks with unsorted column ids always take the CSR path, so a pass's
result never depends on the measured times.
"""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Hashable, Iterator

from ranktide.kernels.csc import worth_transposing

__all__ = ["PathChooser", "CHOOSER"]

_PROBES = 2  # timings per path before choosing


class PathChooser:
    """Per-process choice between the CSR and transposed-block kernels.

    Thread-safe; one instance (:data:`CHOOSER`) serves every pass of a process.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._times: dict[Hashable, dict[str, list[float]]] = {}
        self._forced: str | None = None

    def pick(self, key: Hashable, nnz: int, n_cols: int, *, sorted_ids: bool) -> str:
        """``"csc"`` or ``"csr"`` for a block of ``nnz`` entries over ``n_cols`` columns.

        Parameters
        ----------
        key : hashable
            The kind of pass (e.g. operand widths); timings are kept per key.
        nnz, n_cols : int
        sorted_ids : bool
            Column ids are sorted within rows (needed for identical results).
        """
        if not sorted_ids or nnz <= 0:
            return "csr"
        if self._forced is not None:
            return self._forced
        if not worth_transposing(nnz, n_cols):
            return "csr"
        with self._lock:
            rec = self._times.setdefault(key, {"csr": [], "csc": []})
            n_csr, n_csc = len(rec["csr"]), len(rec["csc"])
            if n_csr < _PROBES or n_csc < _PROBES:
                return "csr" if n_csr <= n_csc else "csc"
            return "csc" if min(rec["csc"]) < min(rec["csr"]) else "csr"

    def record(self, key: Hashable, path: str, seconds: float, nnz: int) -> None:
        """Add a measured block time (sparse work only) for ``path``."""
        if nnz <= 0:
            return
        with self._lock:
            rec = self._times.setdefault(key, {"csr": [], "csc": []})
            if len(rec[path]) < _PROBES:
                rec[path].append(float(seconds) / nnz)

    @contextlib.contextmanager
    def forced(self, path: str) -> Iterator[None]:
        """Every eligible block takes ``path`` (``"csr"`` or ``"csc"``) inside the block."""
        if path not in ("csr", "csc"):
            raise ValueError(f"path {path!r}: use 'csr' or 'csc'")
        old, self._forced = self._forced, path
        try:
            yield
        finally:
            self._forced = old

    def reset(self) -> None:
        """Forget every timing (tests; or after the machine's load changed)."""
        with self._lock:
            self._times.clear()


CHOOSER = PathChooser()
