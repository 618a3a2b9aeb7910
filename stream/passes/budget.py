"""The memory planner: block sizes from a budget, and what fits in memory.

A pass holds, at its peak, the model (``U``, ``V``, ``Omega``, ``Psi``, ``b``
and their concatenations), the accumulated partial sums (each d-row sum
compensated: sum, compensation and a block-term buffer, three d-row arrays; see
:mod:`kernels.compensated`), a few partials and
blocks in flight (each block's decoded CSR, its read buffers and its dense
per-row temporaries: projections, scores, residual), the kernels' per-thread
accumulators and, when asked, the dense gradient and the cached projections.
:func:`plan_blocks` sizes the blocks so that this estimate stays within the
budget; nothing but the cached projections grows with the number of rows.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, field
from typing import Any

from ranktide.errors import ConfigError
from ranktide.kernels.csc import worth_transposing

__all__ = ["parse_memory", "total_memory", "default_budget", "plan_blocks", "Plan",
           "format_bytes", "MAX_BLOCK_CSR_BYTES"]

#: decoded CSR bytes above which bigger blocks stop paying (common practice, no source)
MAX_BLOCK_CSR_BYTES = 64 * 2**20

_UNITS = {"": 1, "b": 1, "k": 1024, "m": 1024**2, "g": 1024**3, "t": 1024**4,
          "kb": 1000, "mb": 1000**2, "gb": 1000**3, "tb": 1000**4,
          "kib": 1024, "mib": 1024**2, "gib": 1024**3, "tib": 1024**4}
_MEM_RE = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([a-zA-Z%]*)\s*$")


def total_memory() -> int:
    """Physical memory of the machine in bytes (psutil, else ``os.sysconf``)."""
    try:
        import psutil

        return int(psutil.virtual_memory().total)
    except Exception:  # psutil missing or unsupported platform
        return int(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))


def default_budget() -> int:
    """The default memory budget: a quarter of the machine's RAM."""
    return total_memory() // 4


def parse_memory(text: str | int | float | None) -> int:
    """Parse a memory size into bytes.

    ``"4GB"`` (powers of 1000: kB, MB, GB, TB), ``"512MiB"`` or ``"512M"``
    (powers of 1024: KiB/K, MiB/M, GiB/G, TiB/T), ``"25%"`` (of the machine's
    RAM), a plain number of bytes, or None for :func:`default_budget`.
    """
    if text is None:
        return default_budget()
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        value, unit = float(text), ""
    else:
        m = _MEM_RE.match(str(text))
        if m is None:
            raise ConfigError(f"memory size {text!r}: not understood; write e.g. 4GB, 512MiB "
                              "or 25%")
        value, unit = float(m.group(1)), m.group(2).lower()
    if unit == "%":
        if not 0 < value <= 100:
            raise ConfigError(f"memory size {text!r}: a percentage must be in (0, 100]")
        return int(total_memory() * value / 100)
    if unit not in _UNITS:
        raise ConfigError(f"memory size {text!r}: unknown unit {unit!r}; use B, kB, MB, GB, "
                          "TB, KiB, MiB, GiB, TiB or %")
    out = int(value * _UNITS[unit])
    if out <= 0:
        raise ConfigError(f"memory size {text!r}: must be positive")
    return out


def format_bytes(n: float) -> str:
    """``n`` bytes as a short human-readable string (binary units)."""
    for unit in ("B", "KiB", "MiB", "GiB"):
        if abs(n) < 1024:
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} TiB"


@dataclass(frozen=True)
class Plan:
    """A block size and the estimated memory of a pass.

    Attributes
    ----------
    budget : int
        The budget planned for (bytes).
    block_rows : int
        Rows per block.
    block_csr_bytes : int
        Estimated decoded CSR bytes of one block.
    n_blocks : int
        Number of blocks of ``block_rows`` rows.
    in_flight : int
        Blocks held at once (being read, computed, waiting to be combined).
    peak_bytes : int
        Estimated peak of the pass (sum of ``breakdown``).
    breakdown : dict of str to int
        ``model``, ``accumulators``, ``blocks``,
        ``partials``, ``dense_gradient``, ``projections`` (bytes).
    dense_gradient_fits : bool
        The dense gradient's arrays (``d x k`` float64: its compensated sum,
        compensation and block-term buffer) are at most a third of the budget.
    dense_gradient : bool
        Whether the plan accumulates the dense gradient.
    projections_bytes : int
        ``n x q`` float64 of the cached projections ``X [U, Psi]``.
    projections_fit : bool
        They fit in memory beside everything else; otherwise they go to a
        scratch store.
    """

    budget: int
    block_rows: int
    block_csr_bytes: int
    n_blocks: int
    in_flight: int
    peak_bytes: int
    breakdown: dict[str, int] = field(default_factory=dict)
    dense_gradient_fits: bool = False
    dense_gradient: bool = False
    projections_bytes: int = 0
    projections_fit: bool = False

    def describe(self) -> list[tuple[str, str]]:
        """``(name, value)`` rows for a table."""
        rows = [("budget", format_bytes(self.budget)), ("block rows", str(self.block_rows)),
                ("block CSR", format_bytes(self.block_csr_bytes)),
                ("blocks", str(self.n_blocks)), ("blocks in flight", str(self.in_flight))]
        rows += [(f"peak: {k}", format_bytes(v)) for k, v in self.breakdown.items()]
        rows += [("estimated peak", format_bytes(self.peak_bytes)),
                 ("dense gradient fits", "yes" if self.dense_gradient_fits else "no"),
                 ("projections fit", "yes" if self.projections_fit else "no")]
        return rows


def _accumulator_copies(backend: str, n_threads: int) -> int:
    """d-row arrays per accumulator: sum, compensation and the CSR block-term buffer.

    On dask the client holds its running pair and, at worst, the pairs of all
    other ranges (one per worker, ``n_threads`` standing for the workers).
    """
    return 3 if backend in ("serial", "threads") else max(3, 2 * n_threads)


def _in_flight(backend: str, n_threads: int) -> int:
    # serial: the block being computed and the one read ahead; threads: one per
    # worker plus the one read ahead (see ranktide.passes.engine)
    return 2 if backend == "serial" else n_threads + 1


def plan_blocks(
    store: Any,
    *,
    budget: int | str | None = None,
    rank: int = 16,
    omega_cols: int = 0,
    psi_cols: int = 0,
    keep_projections: bool = False,
    dense_gradient: bool | None = None,
    backend: str = "serial",
    n_threads: int | None = None,
    max_block_bytes: int = MAX_BLOCK_CSR_BYTES,
) -> Plan:
    """Choose block rows for a gradient pass from a memory budget.

    Parameters
    ----------
    store : Store or source
        Gives ``shape``, ``nnz`` and ``n_outputs``.
    budget : int or str, optional
        Bytes, or a size for :func:`parse_memory`; default a quarter of RAM.
    rank, omega_cols, psi_cols : int
        Model rank ``r``, power block columns ``p`` and expansion columns
        ``p'``: ``U`` is d x r, ``Omega`` k x p, ``Psi`` d x p'.
    keep_projections : bool
        The caller wants ``X [U, Psi]`` (n x (r + p')) cached.
    dense_gradient : bool, optional
        Accumulate the dense ``d x k`` gradient: True forces it (an error if
        it does not fit), False refuses it, None takes it when it fits (its
        three ``d x k`` arrays within a third of the budget).
    backend, n_threads
        The pass backend, which sets the blocks in flight.
    max_block_bytes : int
        Upper bound on a block's decoded CSR bytes.

    Returns
    -------
    Plan
    """
    B = parse_memory(budget) if not isinstance(budget, int) else int(budget)
    if B <= 0:
        raise ConfigError(f"memory budget {budget!r}: must be positive")
    n, d = (int(x) for x in store.shape)
    k = int(store.n_outputs or 0)
    nnz = int(store.nnz)
    threads = int(n_threads) if n_threads else max(1, os.cpu_count() or 1)
    r, p, pp = int(rank), int(omega_cols), int(psi_cols)
    q = r + pp
    f8 = 8
    idx = 4 if d < 2**31 else 8

    model = f8 * (2 * d * q + 2 * k * (r + p) + k)
    # each d-row accumulator (G [V, Omega], the dense G) is a compensated sum: its sum,
    # its compensation and the CSR path's block-term buffer (kernels.compensated; the
    # kernels need no per-thread copies); on dask the client also holds the range
    # sums that arrived before their predecessors
    copies = _accumulator_copies(backend, threads)
    accum = f8 * (copies * d * (r + p) + k * (pp + r) + k)
    dense_bytes = f8 * d * k
    dense_fits = copies * dense_bytes <= B / 3
    if dense_gradient is True and not dense_fits:
        raise ConfigError(f"dense gradient: {copies} x {format_bytes(dense_bytes)} (d x k "
                          f"float64: sum, compensation, block buffer) is over a third of the "
                          f"budget {format_bytes(B)}; raise --memory or drop it")
    use_dense = dense_fits if dense_gradient is None else bool(dense_gradient)
    inflight = _in_flight(backend, threads)
    # a block's partial: its small sums; its d-row terms stay factored as
    # (X_b, R_b [V, Omega], R_b), counted with the block's per-row bytes
    partial = f8 * k * (pp + r + 1)
    dense_total = copies * dense_bytes if use_dense else 0  # scaled in place at the end
    proj_bytes = f8 * n * q
    fixed = model + accum + dense_total + inflight * partial
    if fixed >= B:
        raise ConfigError(f"memory budget {format_bytes(B)}: below the "
                          f"{format_bytes(fixed)} the model and its accumulators need; "
                          "raise --memory or lower the rank")

    nnz_row = nnz / n if n else 0.0
    csr_row = nnz_row * (4 + idx) + 8
    # decoded CSR, the read buffers (about as large again), dense temporaries
    per_row = 2 * csr_row + f8 * (q + 2 * k + r + p) + (f8 * k if use_dense else 0)
    # the projections fit when they leave room for blocks of a thousand rows
    min_rows = min(n, 1000) if n else 1
    proj_fit = (fixed + proj_bytes + inflight * per_row * min_rows) <= B
    cache = keep_projections and proj_fit
    room = B - fixed - (proj_bytes if cache else 0)

    def _rows(per_row: float, room: float) -> int:
        rows = int(room // (inflight * per_row)) if per_row > 0 else n
        rows = min(rows, int(max_block_bytes // csr_row) if csr_row > 0 else n, max(n, 1))
        return max(rows, 1)


    rows = _rows(per_row, room)
    transposed = 0
    if worth_transposing(int(rows * nnz_row), d):
        # the block's column-major copy (kernels.csc): int32 rows and float32 values
        # per entry, and (2 P + 1) d offsets with P the kernel threads
        transposed = inflight * f8 * (2 * threads + 1) * d
        if transposed < room:
            per_row += nnz_row * 8
            rows = _rows(per_row, room - transposed)
        else:
            transposed = 0
    blocks = inflight * int(math.ceil(rows * per_row)) + transposed
    breakdown = {"model": model, "accumulators": accum, "blocks": blocks,
                 "partials": inflight * partial,
                 "dense_gradient": dense_total, "projections": proj_bytes if cache else 0}
    return Plan(
        budget=B, block_rows=rows, block_csr_bytes=int(rows * csr_row),
        n_blocks=int(math.ceil(n / rows)) if n else 0, in_flight=inflight,
        peak_bytes=int(sum(breakdown.values())), breakdown=breakdown,
        dense_gradient_fits=dense_fits, dense_gradient=use_dense,
        projections_bytes=proj_bytes, projections_fit=bool(proj_fit),
    )
