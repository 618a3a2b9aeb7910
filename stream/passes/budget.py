"""The memory planner: block sizes from a budget, and what fits in memory.

The budget is the whole process's resident memory. The default honours the
memory limit of the process's cgroup (v2 ``memory.max``, v1
``memory.limit_in_bytes``, each ancestor's too, and the container's own root):
see :func:`available_memory`. The planner plans for what is left after the
process floor (interpreter, libraries, compiled kernels, the data source's
handles: the resident set measured before the first pass, :func:`process_floor`),
and the solver re-plans before every pass with the rank, block widths and
arrays it then holds.

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

import ctypes
import math
import os
import re
from dataclasses import dataclass, field
from typing import Any

from ranktide.errors import ConfigError
from ranktide.kernels.csc import worth_transposing
from ranktide.kernels.products import dense_chunk_rows

__all__ = ["parse_memory", "total_memory", "available_memory", "cgroup_limit",
           "process_floor", "peak_resident", "release_freed_memory", "default_budget",
           "plan_blocks", "Plan", "format_bytes", "MAX_BLOCK_CSR_BYTES", "MAX_BLOCK_DENSE_BYTES",
           "FLOOR_QUANTUM"]

#: decoded CSR bytes above which bigger blocks stop paying (common practice, no source)
MAX_BLOCK_CSR_BYTES = 64 * 2**20
#: bytes of a block's ``X [U, Psi]`` and ``R [V, Omega]`` above which bigger blocks stop
#: paying: the sparse kernels update their rows in random order, and past the shared cache
#: every update misses it. Measured (12 M rows, 2^18 features, rank 8, 30 + 14 columns, one
#: pass, 2 cores with 32 MiB of L3): 10,500-row blocks 28.8 s, 39,000-100,000 rows
#: 21.8-22.8 s, 160,000 rows 24.1 s
MAX_BLOCK_DENSE_BYTES = 32 * 2**20
#: the measured floor is rounded up to a multiple of this, so small differences in the
#: resident set between two runs do not change the plan (common practice, no source)
FLOOR_QUANTUM = 8 * 2**20
#: a cgroup limit at or above this means "no limit" (v1 writes 2^63 rounded to pages)
_UNLIMITED = 2**60

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


def _read_limit(path: str) -> int | None:
    try:
        with open(path) as fh:
            text = fh.read().strip()
    except OSError:
        return None
    if not text or text == "max":
        return None
    try:
        value = int(text)
    except ValueError:
        return None
    return value if 0 < value < _UNLIMITED else None


def cgroup_limit(*, root: str = "/sys/fs/cgroup", proc_cgroup: str = "/proc/self/cgroup"
                 ) -> int | None:
    """The tightest memory limit over this process's cgroups, in bytes (None: unlimited).

    Reads ``proc_cgroup``: a v2 line ``0::/path`` gives ``root/path/memory.max``,
    a v1 line ``N:memory:/path`` (or a controller list containing ``memory``)
    gives ``root/memory/path/memory.limit_in_bytes``; every ancestor of the path
    counts (a parent's limit binds its children), and so does the root as this
    process sees it (inside a container, its own limit).
    """
    found: list[int] = []
    candidates: list[str] = [os.path.join(root, "memory.max"),
                             os.path.join(root, "memory", "memory.limit_in_bytes")]
    try:
        with open(proc_cgroup) as fh:
            lines = fh.read().splitlines()
    except OSError:
        lines = []
    for line in lines:
        parts = line.split(":", 2)
        if len(parts) != 3:
            continue
        _, controllers, rel = parts
        rel = rel.strip().lstrip("/")
        chain = [rel]
        while chain[-1]:
            chain.append(os.path.dirname(chain[-1]))
        if controllers == "":
            candidates += [os.path.join(root, c, "memory.max") for c in chain if c]
        elif "memory" in controllers.split(","):
            candidates += [os.path.join(root, "memory", c, "memory.limit_in_bytes")
                           for c in chain if c]
    for path in candidates:
        value = _read_limit(path)
        if value is not None:
            found.append(value)
    return min(found) if found else None


def available_memory() -> int:
    """Physical memory, or the cgroup / container limit when that is lower (bytes)."""
    limit = cgroup_limit()
    total = total_memory()
    return total if limit is None else min(total, limit)


def process_floor() -> int:
    """This process's resident set now (bytes), rounded up to :data:`FLOOR_QUANTUM`.

    Measured by the solver before its first pass: the interpreter, the
    libraries, the compiled kernels and the data source's handles, which the
    budget has to hold before any block is read.
    """
    rss = 0
    try:
        import psutil  # optional dependency (psutil may be missing)

        rss = int(psutil.Process().memory_info().rss)
    except Exception:  # psutil missing: /proc (Linux)
        try:
            with open("/proc/self/statm") as fh:
                rss = int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
        except (OSError, ValueError, IndexError):
            rss = 0
    return -(-rss // FLOOR_QUANTUM) * FLOOR_QUANTUM


def peak_resident() -> int:
    """This process's resident-set high-water mark so far (bytes; Linux ``VmHWM``), or 0
    where ``/proc`` does not give it. Recorded after each pass, so that a peak above the
    budget can be traced to the pass (or refinement) that made it."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return 0


def release_freed_memory() -> None:
    """Hand memory freed since the last call back to the system (glibc ``malloc_trim``).

    glibc keeps freed blocks for reuse, and the resident set (what a memory
    cgroup counts) stays at the high-water mark of the last pass: measured 58 MiB
    kept after a pass with a 56 MiB plan. A no-op where glibc is not the allocator.
    """
    try:
        libc = ctypes.CDLL("libc.so.6")
        libc.malloc_trim(0)
    except (OSError, AttributeError):
        pass


def default_budget() -> int:
    """The default memory budget: a quarter of physical RAM, and at most three quarters
    of a cgroup or container memory limit when one is set (the rest is left to the page
    cache and to other processes in the group; common practice, no source)."""
    limit = cgroup_limit()
    quarter = total_memory() // 4
    return quarter if limit is None else min(quarter, limit * 3 // 4)


def parse_memory(text: str | int | float | None) -> int:
    """Parse a memory size into bytes.

    ``"4GB"`` (powers of 1000: kB, MB, GB, TB), ``"512MiB"`` or ``"512M"``
    (powers of 1024: KiB/K, MiB/M, GiB/G, TiB/T), ``"25%"`` (of the machine's
    RAM, or of the cgroup limit when that is lower: :func:`available_memory`), a plain
    number of bytes, or None for :func:`default_budget`.
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
        return int(available_memory() * value / 100)
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
        The budget (bytes): the whole process's resident set.
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
    floor : int
        The process floor the plan left aside (bytes): ``peak_bytes + floor <=
        budget``.
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
    floor: int = 0

    @property
    def work_bytes(self) -> int:
        """What the budget leaves above the floor (bytes)."""
        return self.budget - self.floor

    def describe(self) -> list[tuple[str, str]]:
        """``(name, value)`` rows for a table."""
        rows = [("budget", format_bytes(self.budget)),
                ("process floor", format_bytes(self.floor)),
                ("block rows", str(self.block_rows)),
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


# n_c x k arrays of one dense row chunk per thread (kernels.products.block_dense): the
# scores turned residual, in the thread's reused buffer (kernels.rowchunks.chunk_buffer)
_CHUNK_ARRAYS = 1


def _target_row_bytes(store: Any, k: int) -> int:
    """Bytes of one row's targets and weight as a block holds them: class ids, ``k``
    float32 values, or tags (CSR; counted as ``k`` int32 ids and values, since the store
    does not say how many a row has)."""
    kind = getattr(store, "target_kind", None)
    if kind == "classes":
        return 8 + 4
    return 8 * max(k, 1) + 4


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
    floor: int = 0,
    extra_bytes: int = 0,
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
    floor : int
        The process floor (:func:`process_floor`): the plan fits in ``budget -
        floor``.
    extra_bytes : int
        Arrays the caller holds beside the model during the pass (e.g. the
        solver's momentum factors or its ``lam_max`` products).

    Returns
    -------
    Plan
    """
    B_total = parse_memory(budget) if not isinstance(budget, int) else int(budget)
    if B_total <= 0:
        raise ConfigError(f"memory budget {budget!r}: must be positive")
    floor = max(0, int(floor))
    if floor >= B_total:
        raise ConfigError(f"memory budget {format_bytes(B_total)}: below the process floor "
                          f"{format_bytes(floor)} (interpreter, libraries, compiled kernels) "
                          "measured before the first pass; raise --memory")
    B = B_total - floor
    n, d = (int(x) for x in store.shape)
    k = int(store.n_outputs or 0)
    nnz = int(store.nnz)
    threads = int(n_threads) if n_threads else max(1, os.cpu_count() or 1)
    r, p, pp = int(rank), int(omega_cols), int(psi_cols)
    q = r + pp
    f8 = 8
    idx = 4 if d < 2**31 else 8

    model = f8 * (2 * d * q + 2 * k * (r + p) + k) + max(0, int(extra_bytes))
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
        raise ConfigError(f"memory budget {format_bytes(B_total)}: {format_bytes(B)} above "
                          f"the process floor is below the {format_bytes(fixed)} the model "
                          "and its accumulators need; raise --memory or lower the rank")

    nnz_row = nnz / n if n else 0.0
    csr_row = nnz_row * (4 + idx) + 8
    # per row of a block in flight: the decoded CSR rows and targets, the read buffers
    # (about as large again), X [U, Psi] and R [V, Omega]; the scores and the residual
    # live in cache-sized row chunks (kernels.products.block_dense), counted below, except
    # with the dense gradient, which keeps the block's residual whole. Measured at 12 M
    # rows, 1 GB: counting two n_b x k arrays per row too (the residual before it was
    # chunked) held the pass to 10,500-row blocks and 765 MiB of a 954 MiB budget.
    per_row = (2 * (csr_row + _target_row_bytes(store, k)) + f8 * (q + r + p)
               + (f8 * k if use_dense else 0))
    # the row chunks: every thread's n_c x k arrays, n_c at most a block's rows
    chunk_rows = dense_chunk_rows(k)
    chunk_row = threads * _CHUNK_ARRAYS * f8 * k
    # the projections fit when they leave room for blocks of 128 rows (smaller blocks
    # cost more per row in overhead than the scratch files would; common practice, no source)
    min_rows = min(n, 128) if n else 1
    proj_fit = (fixed + proj_bytes + inflight * per_row * min_rows
                + chunk_row * min(min_rows, chunk_rows)) <= B
    cache = keep_projections and proj_fit
    room = B - fixed - (proj_bytes if cache else 0)

    # and a block's X [U, Psi] and R [V, Omega] stay within MAX_BLOCK_DENSE_BYTES
    dense_cap = int(MAX_BLOCK_DENSE_BYTES // (f8 * (q + r + p))) if q + r + p else n

    def _rows(per_row: float, room: float) -> int:
        if per_row <= 0:
            rows = n
        else:
            rows = int((room - chunk_row * chunk_rows) // (inflight * per_row))
            if rows < chunk_rows:  # the chunks are as small as the blocks
                rows = int(room // (inflight * per_row + chunk_row))
        rows = min(rows, int(max_block_bytes // csr_row) if csr_row > 0 else n, dense_cap,
                   max(n, 1))
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
    chunks = chunk_row * min(rows, chunk_rows)
    breakdown = {"model": model, "accumulators": accum, "blocks": blocks,
                 "partials": inflight * partial, "chunks": chunks,
                 "dense_gradient": dense_total, "projections": proj_bytes if cache else 0}
    return Plan(
        budget=B_total, floor=floor, block_rows=rows, block_csr_bytes=int(rows * csr_row),
        n_blocks=int(math.ceil(n / rows)) if n else 0, in_flight=inflight,
        peak_bytes=int(sum(breakdown.values())), breakdown=breakdown,
        dense_gradient_fits=dense_fits, dense_gradient=use_dense,
        projections_bytes=proj_bytes, projections_fit=bool(proj_fit),
    )
