"""The one block planner: row ranges cut from CSR row pointers by a row cap and a byte budget.

Both the store (row pointers read piece by piece from disk) and in-memory
sources (one piece) cut their blocks here, so the same data gives the same
blocks wherever it lives.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np
from ranktide.errors import ConfigError

__all__ = ["cut_ranges"]


def _check(rows: int | None, block_bytes: int | None) -> None:
    if rows is not None and int(rows) < 1:
        raise ConfigError(f"block rows = {rows}: must be at least 1; pass a positive --block-rows")
    if block_bytes is not None and int(block_bytes) < 1:
        raise ConfigError(f"block bytes = {block_bytes}: must be positive; pass a larger budget")


def cut_ranges(
    pieces: Iterable[tuple[int, np.ndarray]],
    n: int,
    *,
    rows: int | None = None,
    block_bytes: int | None = None,
    bytes_per_entry: int = 8,
    default_bytes: int,
) -> list[tuple[int, int]]:
    """Consecutive row ranges ``[a, b)`` covering rows ``0..n``.

    Parameters
    ----------
    pieces : iterable of (p0, indptr piece)
        The row pointers in order, as pieces ``indptr[p0 : p1 + 1]`` (int64) that
        together cover ``indptr[0 : n + 1]``; one piece for in-memory data.
    n : int
        Number of rows.
    rows : int, optional
        At most this many rows per range.
    block_bytes : int, optional
        At most about this many decoded CSR bytes per range (``bytes_per_entry``
        per nonzero plus 8 per row pointer); a row larger than the budget forms a
        range alone, and a range never splits a row.
    bytes_per_entry : int
        Decoded bytes per nonzero (4 for float32 data + 4 or 8 for indices).
    default_bytes : int
        The budget used when neither ``rows`` nor ``block_bytes`` is given.

    Returns
    -------
    list of (int, int)
        Non-empty ranges in order (empty for ``n == 0``).
    """
    _check(rows, block_bytes)
    if n <= 0:
        return []
    if rows is None and block_bytes is None:
        block_bytes = default_bytes
    cap = int(rows) if rows is not None else n
    if block_bytes is None:
        cuts = list(range(0, n, cap)) + [n]
        return list(zip(cuts[:-1], cuts[1:], strict=True))
    budget = int(block_bytes)
    cuts = [0]
    a_cost = 0
    for p0, ip in pieces:
        ip = np.asarray(ip, dtype=np.int64)
        p1 = p0 + ip.shape[0] - 1
        cost = ip * int(bytes_per_entry) + 8 * np.arange(p0, p1 + 1, dtype=np.int64)
        while cuts[-1] < n:
            # the last row boundary within the budget, found by searchsorted (no loop over rows)
            j = int(np.searchsorted(cost, a_cost + budget, side="right")) - 1
            if j == cost.shape[0] - 1 and p1 < n and p0 + j - cuts[-1] < cap:
                break  # the cut lies beyond this piece
            b = min(max(p0 + j, cuts[-1] + 1), cuts[-1] + cap, n)
            if b > p1:
                break  # the cut (a row larger than the budget) lies beyond this piece
            cuts.append(b)
            a_cost = int(cost[b - p0])
        if cuts[-1] >= n:
            break
    return list(zip(cuts[:-1], cuts[1:], strict=True))
