"""The pass engine: one read of every row block, partials folded in block order.

A pass maps a module-level ``block_fn(block, state) -> partial`` over the row
blocks of a source and folds the partials with a pure ``combine`` strictly in
block order, so a pass gives the same result on every backend (to rounding of
the kernels themselves; the fold order never changes).

``combine(partials) -> partial`` receives a list of partials in block order
and returns one partial of the same kind: it must be associative, and
``combine([p])`` must equal ``p``. The engine calls it as
``acc = combine([acc, p_i])`` block after block (``acc`` starting from
``init`` when given, else from ``combine([p_0])``), so a pass never holds more
than a few partials, whatever the number of rows. A distributed backend uses
the same function for its tree reduction.

Backends (:func:`register_backend` adds more, e.g. dask.distributed):

* ``"serial"`` — the calling thread computes; a background thread reads and
  decodes block i+1 while block i computes (numba kernels release the GIL).
* ``"threads"`` — one reader thread, several compute threads, several blocks
  in flight; partials are folded in block order.

Block functions time their phases with :func:`phase`::

    with phase("scores"):
        ...

which costs nothing when the pass is not profiled.
"""

from __future__ import annotations

import os
import queue
import sys
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

from ranktide.errors import ConfigError
from ranktide.signals import StopRequested
from ranktide.store.memory_source import as_source

__all__ = [
    "run_pass",
    "PassProfile",
    "BlockRecord",
    "PassJob",
    "phase",
    "register_backend",
    "available_backends",
]

_local = threading.local()


# ---------------------------------------------------------------------------
# phase timing
# ---------------------------------------------------------------------------
class _NullPhase:
    __slots__ = ()

    def __enter__(self) -> None:
        return None

    def __exit__(self, *exc: object) -> None:
        return None


_NULL_PHASE = _NullPhase()


class _Phase:
    __slots__ = ("timer", "name", "t0")

    def __init__(self, timer: PhaseTimer, name: str) -> None:
        self.timer = timer
        self.name = name

    def __enter__(self) -> None:
        self.t0 = time.perf_counter()

    def __exit__(self, *exc: object) -> None:
        dt = time.perf_counter() - self.t0
        ph = self.timer.phases
        ph[self.name] = ph.get(self.name, 0.0) + dt


class PhaseTimer:
    """Seconds per named phase of one block's computation."""

    __slots__ = ("phases",)

    def __init__(self) -> None:
        self.phases: dict[str, float] = {}

    def phase(self, name: str) -> _Phase:
        return _Phase(self, name)


def phase(name: str) -> Any:
    """Context manager timing phase ``name`` of the current block.

    A no-op unless the pass running the block is profiled.
    """
    timer = getattr(_local, "timer", None)
    if timer is None:
        return _NULL_PHASE
    return _Phase(timer, name)


# ---------------------------------------------------------------------------
# profile record
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class BlockRecord:
    """Timings and sizes of one block of one pass (seconds, bytes).

    ``phases`` holds the named phases of the block function, ``fold_phases``
    those of the combine that folded the block in; ``compute_s`` is the block
    function's whole time, ``fold_s`` the combine's whole time and
    ``combine_s`` the part of it outside named phases; ``wait_s`` is how long
    the computing thread waited for the block to be read.
    """

    pass_index: int
    block: int
    first_row: int
    rows: int
    nnz: int
    bytes_disk: int
    bytes_decoded: int
    read_s: float
    decode_s: float
    phases: dict[str, float]
    compute_s: float
    combine_s: float
    wait_s: float
    fold_s: float = 0.0
    fold_phases: dict[str, float] = field(default_factory=dict)

    def all_phases(self) -> dict[str, float]:
        """Block and combine phases together (seconds by name)."""
        out = dict(self.phases)
        for name, sec in self.fold_phases.items():
            out[name] = out.get(name, 0.0) + sec
        return out

    @property
    def io_s(self) -> float:
        """Seconds reading and decoding the block."""
        return self.read_s + self.decode_s

    @property
    def work_s(self) -> float:
        """Seconds computing the block: its function plus its share of the combine."""
        return self.compute_s + self.fold_s


@dataclass
class PassProfile:
    """Per block and phase timings of one or more passes.

    Attributes
    ----------
    records : list of BlockRecord
        One per block per pass, in pass then block order.
    passes : list of dict
        One per pass: ``pass_index``, ``backend``, ``n_threads``, ``n_blocks``,
        ``rows``, ``wall_s``.
    """

    records: list[BlockRecord] = field(default_factory=list)
    passes: list[dict] = field(default_factory=list)

    def phase_names(self) -> list[str]:
        """Kernel phase names in first-seen order."""
        seen: dict[str, None] = {}
        for r in self.records:
            for name in (*r.phases, *r.fold_phases):
                seen.setdefault(name, None)
        return list(seen)

    def totals(self) -> dict[str, float]:
        """Summed seconds and sizes over every record."""
        out: dict[str, float] = {
            "rows": 0,
            "nnz": 0,
            "bytes_disk": 0,
            "bytes_decoded": 0,
            "read_s": 0.0,
            "decode_s": 0.0,
            "compute_s": 0.0,
            "combine_s": 0.0,
            "wait_s": 0.0,
        }
        for r in self.records:
            for key in out:
                out[key] += getattr(r, key)
        for name in self.phase_names():
            out[f"phase:{name}"] = sum(r.all_phases().get(name, 0.0) for r in self.records)
        out["wall_s"] = sum(p["wall_s"] for p in self.passes)
        return out

    def _begin(self, *, backend: str, n_threads: int, n_blocks: int, rows: int) -> int:
        idx = len(self.passes)
        self.passes.append(
            {
                "pass_index": idx,
                "backend": backend,
                "n_threads": n_threads,
                "n_blocks": n_blocks,
                "rows": rows,
                "wall_s": 0.0,
            }
        )
        return idx


# ---------------------------------------------------------------------------
# backends
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class PassJob:
    """Everything a backend needs to run one pass.

    ``ranges`` are the row blocks in order; ``fold`` takes
    ``(index, block, partial, phases, compute_s, wait_s)`` strictly in block
    order (backends that reduce remotely call ``combine`` themselves and hand
    ``fold`` their range partials). ``fold`` raises
    :class:`ranktide.signals.StopRequested` when ``should_stop`` fires; a
    backend that waits on remote work polls ``should_stop`` itself.
    """

    source: Any
    ranges: list[tuple[int, int]]
    block_fn: Callable[[Any, Any], Any]
    combine: Callable[[list], Any]
    state: Any
    n_threads: int
    timed: bool
    fold: Callable[..., None]
    should_stop: Callable[[], bool] | None = None


Backend = Callable[[PassJob], None]
_BACKENDS: dict[str, Backend] = {}


def register_backend(name: str, fn: Backend) -> None:
    """Make ``fn(job: PassJob) -> None`` available as ``run_pass(backend=name)``."""
    _BACKENDS[name] = fn


def available_backends() -> list[str]:
    """Names accepted by ``run_pass(backend=...)``."""
    return sorted(_BACKENDS)


def _compute(job: PassJob, block: Any) -> tuple[Any, dict[str, float] | None, float]:
    if not job.timed:
        return job.block_fn(block, job.state), None, 0.0
    timer = PhaseTimer()
    _local.timer = timer
    t0 = time.perf_counter()
    try:
        partial = job.block_fn(block, job.state)
    finally:
        _local.timer = None
    return partial, timer.phases, time.perf_counter() - t0


class _Reader:
    """Reads blocks in order on a background thread, at most ``slots`` ahead.

    A slot is taken before a block is read and given back (:meth:`release`)
    once the block has been folded, which bounds the blocks held in memory.
    """

    _DONE = object()

    def __init__(self, source: Any, ranges: Sequence[tuple[int, int]], slots: int) -> None:
        self.source = source
        self.ranges = list(ranges)
        self.slots = threading.Semaphore(slots)
        self.out: queue.Queue = queue.Queue()
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, name="ranktide-reader", daemon=True)
        self.thread.start()

    def _run(self) -> None:
        try:
            for i, (a, b) in enumerate(self.ranges):
                while not self.slots.acquire(timeout=0.05):
                    if self.stop.is_set():
                        return
                if self.stop.is_set():
                    return
                self.out.put((i, self.source.read_block(a, b)))
        except BaseException as exc:  # handed to the consumer, which re-raises
            self.out.put((-1, exc))
            return
        self.out.put((len(self.ranges), self._DONE))

    def get(self) -> tuple[int, Any]:
        i, item = self.out.get()
        if isinstance(item, BaseException):
            raise item
        return i, item

    def release(self) -> None:
        self.slots.release()

    def close(self) -> None:
        self.stop.set()
        self.thread.join(timeout=30)


def _serial_backend(job: PassJob) -> None:
    reader = _Reader(job.source, job.ranges, slots=2)
    try:
        for _ in range(len(job.ranges)):
            t0 = time.perf_counter()
            i, block = reader.get()
            wait = time.perf_counter() - t0
            partial, phases, compute_s = _compute(job, block)
            job.fold(i, block, partial, phases, compute_s, wait)
            del block, partial
            reader.release()
    finally:
        reader.close()


def _share_kernel_threads(n_workers: int) -> None:
    """Give this worker thread its share of numba's threads.

    ``numba.set_num_threads`` is thread-local: with several workers each
    running parallel kernels, splitting the threads avoids oversubscribing
    the cores. Done only when the kernels (and their threading-layer guard)
    are already loaded, so the engine never picks a threading layer itself.
    """
    guard = sys.modules.get("ranktide.kernels.threads")
    numba = sys.modules.get("numba")
    if guard is None or numba is None or n_workers <= 1:
        return
    try:
        guard.ensure_threading()
        numba.set_num_threads(max(1, numba.config.NUMBA_NUM_THREADS // n_workers))
    except Exception:  # an exotic numba: keep its default
        return


def _threads_backend(job: PassJob) -> None:
    n_workers = max(1, job.n_threads)
    reader = _Reader(job.source, job.ranges, slots=n_workers + 1)
    results: queue.Queue = queue.Queue()
    stop = threading.Event()

    def work() -> None:
        _share_kernel_threads(n_workers)
        while not stop.is_set():
            t0 = time.perf_counter()
            try:
                i, block = reader.get()
            except BaseException as exc:
                results.put((-1, exc))
                return
            if block is _Reader._DONE:
                reader.out.put((i, block))  # let the other workers see the end
                return
            wait = time.perf_counter() - t0
            try:
                out = _compute(job, block)
            except BaseException as exc:
                results.put((-1, exc))
                return
            results.put((i, (block, out, wait)))

    workers = [
        threading.Thread(target=work, name=f"ranktide-worker-{j}", daemon=True)
        for j in range(n_workers)
    ]
    for w in workers:
        w.start()
    pending: dict[int, Any] = {}
    nxt = 0
    try:
        while nxt < len(job.ranges):
            i, item = results.get()
            if isinstance(item, BaseException):
                raise item
            pending[i] = item
            while nxt in pending:
                block, (partial, phases, compute_s), wait = pending.pop(nxt)
                job.fold(nxt, block, partial, phases, compute_s, wait)
                del block, partial
                reader.release()
                nxt += 1
    finally:
        stop.set()
        reader.close()
        for _ in workers:  # wake workers still waiting for a block
            reader.out.put((len(job.ranges), _Reader._DONE))
        for w in workers:
            w.join(timeout=30)


register_backend("serial", _serial_backend)
register_backend("threads", _threads_backend)


# ---------------------------------------------------------------------------
# folding, profiling and progress
# ---------------------------------------------------------------------------
_EMPTY = object()


class _Folder:
    def __init__(
        self, combine: Callable, init: Any, profile: PassProfile | None, pass_index: int, bar: Any,
        should_stop: Callable[[], bool] | None = None,
    ) -> None:
        self.should_stop = should_stop
        self.combine = combine
        self.acc = _EMPTY if init is None else init
        self.profile = profile
        self.pass_index = pass_index
        self.bar = bar
        self.decoded = 0
        self.t_start = time.perf_counter()

    def __call__(
        self,
        index: int,
        block: Any,
        partial: Any,
        phases: dict | None,
        compute_s: float,
        wait_s: float,
    ) -> None:
        if self.profile is None:
            self.acc = self._fold_in(partial)
        else:
            # phases named inside the combine are recorded with the block's
            # phases; combine_s is the rest of the combine's time
            timer = PhaseTimer()
            _local.timer = timer
            t0 = time.perf_counter()
            try:
                self.acc = self._fold_in(partial)
            finally:
                _local.timer = None
            fold_s = time.perf_counter() - t0
            combine_s = max(fold_s - sum(timer.phases.values()), 0.0)
            self._record(index, block, phases or {}, compute_s, combine_s, wait_s, fold_s,
                         timer.phases)
        if self.bar is not None:
            self._progress(block)
        if self.should_stop is not None and self.should_stop():
            raise StopRequested(f"stop requested after block {index}")

    def _fold_in(self, partial: Any) -> Any:
        # the first partial goes through combine too, so work a combine does per
        # partial (e.g. adding pending terms) is timed with its own block
        if self.acc is _EMPTY:
            return self.combine([partial])
        return self.combine([self.acc, partial])

    def _record(
        self,
        index: int,
        block: Any,
        phases: dict,
        compute_s: float,
        combine_s: float,
        wait_s: float,
        fold_s: float,
        fold_phases: dict,
    ) -> None:
        io = getattr(block, "io", None) or {}
        self.profile.records.append(
            BlockRecord(
                pass_index=self.pass_index,
                block=index,
                first_row=int(block.start),
                rows=int(block.stop - block.start),
                nnz=int(block.X.nnz),
                bytes_disk=int(io.get("bytes_disk", 0)),
                bytes_decoded=int(io.get("bytes_decoded", 0)),
                read_s=float(io.get("read_s", 0.0)),
                decode_s=float(io.get("decode_s", 0.0)),
                phases=dict(phases),
                compute_s=compute_s,
                combine_s=combine_s,
                wait_s=wait_s,
                fold_s=fold_s,
                fold_phases=dict(fold_phases),
            )
        )

    def _progress(self, block: Any) -> None:
        io = getattr(block, "io", None) or {}
        self.decoded += int(io.get("bytes_decoded", 0))
        elapsed = max(time.perf_counter() - self.t_start, 1e-9)
        self.bar.set_postfix_str(f"{self.decoded / elapsed / 1e6:.0f} MB/s decoded", refresh=False)
        self.bar.update(1)


def _progress_bar(enabled: bool, n_blocks: int, desc: str) -> Any:
    if not enabled or n_blocks < 2:
        return None
    stream = sys.stderr
    if not (hasattr(stream, "isatty") and stream.isatty()):
        return None
    from tqdm import tqdm

    # delay: short passes never draw a bar
    return tqdm(
        total=n_blocks,
        unit="block",
        desc=desc,
        file=stream,
        delay=0.5,
        dynamic_ncols=True,
        leave=False,
    )


def _default_threads() -> int:
    return max(1, os.cpu_count() or 1)


def run_pass(
    source: Any,
    block_fn: Callable[[Any, Any], Any],
    combine: Callable[[list], Any],
    *,
    state: Any,
    backend: str = "serial",
    block_rows: int | None = None,
    block_bytes: int | None = None,
    n_threads: int | None = None,
    profile: PassProfile | None = None,
    progress: bool = False,
    init: Any = None,
    desc: str = "pass",
    should_stop: Callable[[], bool] | None = None,
) -> Any:
    """Run one pass over ``source`` and return the folded partials.

    Parameters
    ----------
    source : Store, path, scipy sparse matrix, tuple or source
        Anything :func:`ranktide.store.memory_source.as_source` accepts. A path is opened
        for the pass and closed afterwards.
    block_fn : callable
        Module-level ``block_fn(block, state) -> partial``; ``block`` has
        ``.start``, ``.stop``, ``.X`` (CSR, float32), ``.targets``,
        ``.weights`` and ``.io``. It must not keep references to the source.
    combine : callable
        Pure, associative ``combine(partials_in_block_order) -> partial``.
    state : object
        Passed unchanged to every ``block_fn`` call (the model, the request).
    backend : str
        ``"serial"`` (default) or ``"threads"``, or any registered name.
    block_rows, block_bytes : int, optional
        Block size bounds handed to ``source.block_ranges``.
    n_threads : int, optional
        Compute threads of the ``threads`` backend (default: CPU count).
    profile : PassProfile, optional
        When given, per block and phase timings of this pass are appended to
        it; otherwise nothing is timed.
    progress : bool
        Show a progress bar (blocks/s, decoded MB/s, ETA) when stderr is a
        terminal and the pass lasts more than half a second.
    init : object, optional
        Starting value of the fold (an identity partial, consumed by the
        pass); by default ``combine([first block's partial])``.
    desc : str
        Label of the progress bar.
    should_stop : callable, optional
        Checked after each block is folded in; when it returns True the rest
        of the pass is abandoned and :class:`ranktide.signals.StopRequested` is
        raised (the partial result is dropped).

    Returns
    -------
    object
        The fold of every partial in block order; ``init`` when the source has
        no rows.
    """
    fn = _BACKENDS.get(backend)
    if fn is None:
        raise ConfigError(
            f"backend {backend!r}: unknown; choose one of {', '.join(available_backends())}"
        )
    if n_threads is not None and int(n_threads) < 1:
        raise ConfigError(f"n_threads = {n_threads}: must be at least 1")
    opened = isinstance(source, (str, os.PathLike))
    src = as_source(source)
    try:
        ranges = src.block_ranges(rows=block_rows, block_bytes=block_bytes)
        threads = int(n_threads) if n_threads is not None else _default_threads()
        rows = int(ranges[-1][1] - ranges[0][0]) if ranges else 0
        pass_index = -1
        if profile is not None:
            pass_index = profile._begin(
                backend=backend, n_threads=threads, n_blocks=len(ranges), rows=rows
            )
        bar = _progress_bar(progress, len(ranges), desc)
        folder = _Folder(combine, init, profile, pass_index, bar, should_stop)
        t0 = time.perf_counter()
        try:
            fn(
                PassJob(
                    source=src,
                    ranges=ranges,
                    block_fn=block_fn,
                    combine=combine,
                    state=state,
                    n_threads=threads,
                    timed=profile is not None,
                    fold=folder,
                    should_stop=should_stop,
                )
            )
        finally:
            if bar is not None:
                bar.close()
        if profile is not None:
            profile.passes[pass_index]["wall_s"] = time.perf_counter() - t0
    finally:
        if opened:
            src.close()
    return None if folder.acc is _EMPTY else folder.acc
