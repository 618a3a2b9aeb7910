"""How many directions a pass may carry when the memory budget binds.

A pass at rank ``r`` carries ``Psi`` = rotation directions + ``expand`` new
directions + one block per momentum factor. When the model, its accumulators
and the pass's blocks do not fit beside them, :func:`shrink_widths` leaves out
momentum factors one at a time, then halves the rotations, until they do. The
refinement after the pass works in what the pass's blocks leave free, so the
budget must also hold its d-row arrays beside what stays (:func:`tail_bytes`).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

from ranktide.errors import ConfigError
from ranktide.passes.budget import Plan

__all__ = ["MIN_BLOCK_ROWS", "min_block_rows", "shrink_widths", "tail_bytes"]

#: Fewest rows a pass's blocks may have when the budget also holds the widths: below it,
#: fewer directions and more rows per block (common practice, no source)
MIN_BLOCK_ROWS = 2048


def min_block_rows(n: int) -> int:
    """Fewest block rows for ``n`` data rows (a small data set may have small blocks)."""
    return min(MIN_BLOCK_ROWS, max(1, int(n) // 8))


def tail_bytes(d: int, rank: int, psi: int, momentum: int) -> int:
    """The refinement's d-row arrays after a pass: the new factor (at most ``rank + psi``
    wide) and its rotated copy, and the next momentum factors (``rank + momentum``)."""
    return 8 * int(d) * (2 * (rank + psi) + rank + momentum)


def _freed(plan: Plan) -> int:
    """Bytes of a pass's plan that are free when the refinement runs: the blocks, the
    cached projections (cleared before the d-row work) and the accumulators'
    compensation and block buffers (two of their three copies)."""
    br = plan.breakdown
    return int(br["blocks"] + br["projections"] + 2 * br["accumulators"] // 3)


def shrink_widths(plan_at: Callable[[int, int], Plan], *, d: int, n: int, rank: int,
                  rotations: int, expand: int, momentum_cols: Sequence[int], depth: int,
                  keep: bool) -> tuple[int, int, Plan | None]:
    """The widest pass that fits: ``(rotations, depth, plan)``.

    Parameters
    ----------
    plan_at : callable
        ``plan_at(psi, depth)`` plans a pass with ``psi`` columns in ``Psi`` and
        ``depth`` momentum factors held; raises ConfigError when the fixed
        costs alone do not fit.
    d, n, rank : int
        Features, rows, rank of the model.
    rotations, expand : int
        The configured rotation and new directions.
    momentum_cols : sequence of int
        Widths of the momentum factors, newest first.
    depth : int
        The configured momentum factors (at most ``len(momentum_cols)``).
    keep : bool
        The pass keeps projections for a refinement (whose d-row work must fit).

    Returns
    -------
    rotations, depth : int
        What fits (each at most the configured one).
    plan : Plan or None
        None when even no rotation and no momentum factor fits.
    """
    rot, dep = int(rotations), int(depth)
    rows = min_block_rows(n)
    while True:
        mom = int(sum(momentum_cols[:dep]))
        psi = rot + int(expand) + mom
        try:
            plan = plan_at(psi, dep)
            after = plan.peak_bytes - _freed(plan) + tail_bytes(d, rank, psi, mom)
            if plan.block_rows >= rows and (not keep or after <= plan.work_bytes):
                return rot, dep, plan
        except ConfigError:
            pass
        if dep > 0:
            dep -= 1
        elif rot > 0:
            rot //= 2
        else:
            return rot, dep, None
