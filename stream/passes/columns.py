"""The columns of a source that hold at least one entry, counted in one pass."""

from __future__ import annotations

from typing import Any

import numpy as np
from ranktide.passes.engine import run_pass

__all__ = ["used_columns"]


def _mark_block(block: Any, d: int) -> np.ndarray:
    seen = np.zeros(d, dtype=bool)
    seen[block.X.indices] = True
    return seen


def _or_combine(parts: list) -> np.ndarray:
    acc = parts[0]
    for p in parts[1:]:
        acc |= p
    return acc


def used_columns(source: Any, *, backend: str = "serial", block_rows: int | None = None,
                 should_stop: Any = None) -> np.ndarray:
    """Sorted ids (m,) int64 of the columns of ``source`` with at least one stored entry.

    One read of the column ids (no arithmetic); an explicit zero stored in the
    source counts as an entry.
    """
    d = int(source.shape[1])
    seen = run_pass(source, _mark_block, _or_combine, state=d, backend=backend,
                    block_rows=block_rows, desc="used columns", should_stop=should_stop,
                    init=np.zeros(d, dtype=bool))
    return np.flatnonzero(seen).astype(np.int64)
