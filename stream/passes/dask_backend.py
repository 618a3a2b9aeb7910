"""dask.distributed backend for the pass engine.

Workers open the store by path or URL (once per worker process, cached here
so the opener is importable by the workers); each task reduces one contiguous
range of blocks (ranges balanced by rows) and the client folds the results in
block order, so a pass gives the serial backend's result bit for bit (but for
the vanishing chance stated in :mod:`kernels.compensated`): every
small figure (loss, weights, ``grad_b``, ``G^T U``, ``G^T Psi``) folds
exactly as on the serial backend, and the d-row accumulators, summed per
range first, are compensated sums (:mod:`kernels.compensated`) whose value
does not depend on the grouping. A range result carries each accumulator's
sum and compensation (two d-row arrays); the CSR path's block-term buffer
stays on the worker.

The model state is sent once per pass with ``client.scatter(...,
broadcast=True)``; the tasks receive a future of it, never a copy each.
State and results travel as plain numpy arrays (:func:`to_wire`), not as
pickled objects.

The cached projections ``X [U, Psi]`` of a pass come back with the range
results, not left on the workers: on the benchmark's shapes
(tools/bench_cluster.py: 200 000 rows, q = 20) they add 0.03-0.1 s to the
last range's transfer, while a refinement using them in place would need a
round trip to every worker per proximal step (12-16 ms measured on a loaded
2-core machine, up to 400 steps per refinement).
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import os
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import ranktide.passes.engine as passes
import scipy.sparse as sp
from ranktide.errors import ConfigError
from ranktide.passes.engine import BlockRecord, register_backend
from ranktide.signals import StopRequested
from ranktide.store import open_store

__all__ = ["ClusterSpec", "parse_cluster", "cluster_client", "open_store_cached"]

# One thread each for numba, OpenMP and BLAS, so N single-threaded workers never
# oversubscribe. BLAS and OpenMP read their variables when their libraries load, so
# they are set before the worker process is spawned (the nanny does this by updating
# the parent's environment, which cluster_client restores afterwards). numba's
# variable goes in after spawn: set in the parent it would break numba there, which
# refuses a NUMBA_NUM_THREADS different from the threads it already launched.
WORKER_ENV_PRE_SPAWN = {
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
}
WORKER_ENV = {"NUMBA_NUM_THREADS": "1"}


@dataclass(frozen=True)
class ClusterSpec:
    """Where the passes run: a local cluster of ``n_workers`` or a scheduler address."""

    n_workers: int = 0
    address: str | None = None

    @property
    def is_local(self) -> bool:
        return self.address is None


def parse_cluster(spec: str) -> ClusterSpec:
    """Parse ``local:N`` or ``tcp://HOST:PORT`` (also ``tls://``)."""
    text = spec.strip()
    if text.startswith("local:"):
        try:
            n = int(text.split(":", 1)[1])
        except ValueError:
            n = 0
        if n < 1:
            raise ConfigError(
                f"--cluster {spec!r}: the worker count after 'local:' must be a positive "
                "integer, e.g. local:2"
            )
        return ClusterSpec(n_workers=n)
    if "://" in text and text.split("://", 1)[1]:
        return ClusterSpec(address=text)
    raise ConfigError(
        f"--cluster {spec!r}: expected local:N or a scheduler address such as tcp://HOST:8786"
    )


@contextlib.contextmanager
def cluster_client(spec: ClusterSpec | str, *, timeout: float = 10.0) -> Iterator[Any]:
    """Start (or connect to) a cluster and yield a ``distributed.Client``.

    A local cluster uses worker processes started by spawn (forking after
    OpenMP has run kills the child), one thread each, with
    :data:`WORKER_ENV_PRE_SPAWN` and :data:`WORKER_ENV` set in each worker.
    """
    try:
        import dask.config
        from distributed import Client, LocalCluster
    except ImportError:
        raise ConfigError(
            "--cluster needs dask.distributed: pip install 'ranktide[dask]'"
        ) from None
    if isinstance(spec, str):
        spec = parse_cluster(spec)
    env = {f"distributed.nanny.pre-spawn-environ.{k}": v for k, v in WORKER_ENV_PRE_SPAWN.items()}
    env.update({f"distributed.nanny.environ.{k}": v for k, v in WORKER_ENV.items()})
    env["distributed.worker.multiprocessing-method"] = "spawn"
    saved_env = dict(os.environ)
    with dask.config.set(env):
        if spec.is_local:
            cluster = LocalCluster(
                n_workers=spec.n_workers,
                threads_per_worker=1,
                processes=True,
                dashboard_address=None,
            )
            try:
                client = Client(cluster, timeout=timeout)
            except BaseException:
                cluster.close()
                raise
        else:
            cluster = None
            try:
                client = Client(spec.address, timeout=timeout)
            except (OSError, TimeoutError) as exc:
                raise ConfigError(
                    f"--cluster {spec.address}: cannot reach the scheduler ({exc}); "
                    "check the address and that `dask scheduler` is running there"
                ) from None
    _restore_env(saved_env)
    register()
    try:
        yield client
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
        _restore_env(saved_env)


def _restore_env(saved: dict[str, str]) -> None:
    """Undo what starting worker processes wrote into this process's environment."""
    for key in set(os.environ) - set(saved):
        del os.environ[key]
    for key, value in saved.items():
        if os.environ.get(key) != value:
            os.environ[key] = value


@functools.lru_cache(maxsize=8)
def open_store_cached(path: str, verify: bool = True) -> Any:
    """Open a store once per worker process (keyed by path and pid-local cache)."""
    return open_store(path, verify=verify)


def worker_pid() -> int:
    """The worker's process id (used by tests that kill a worker)."""
    return os.getpid()


# ---------------------------------------------------------------------------
# plain-array wire form
# ---------------------------------------------------------------------------
# dask sends a numpy array as raw frames, but an object holding arrays (a
# dataclass) goes through pickle as one piece: measured on the 2-core machine,
# returning a 42 MB array inside a dataclass took 0.20 s against 0.075 s for the
# bare array. Partials and the pass state therefore travel as a flat list of
# arrays (first, so dask serializes the list element by element) plus a small
# description of how to rebuild the objects around them. Small arrays (a
# block's k-row sums) are packed into one buffer: with one frame each, fetching
# the per-block figures of a 200-block range took 0.09-0.12 s, packed 0.02 s.
_PACK_BELOW = 1 << 16  # bytes
_ALIGN = 16


def _flatten(obj: Any, big: list[np.ndarray], small: list[np.ndarray]) -> Any:
    """Describe ``obj`` with its arrays moved to ``big`` or ``small`` (by size)."""
    if isinstance(obj, np.ndarray):
        if obj.nbytes < _PACK_BELOW and obj.dtype.kind in "biuf":
            small.append(obj)
            return ("s", len(small) - 1)
        big.append(obj)
        return ("a", len(big) - 1)
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        # a field marked metadata={"wire": False} (a reusable scratch buffer) travels as None
        fields = tuple((f.name, _flatten(getattr(obj, f.name), big, small)
                        if f.metadata.get("wire", True) else ("v", None))
                       for f in dataclasses.fields(obj))
        return ("d", type(obj), fields)
    if sp.issparse(obj) and obj.format == "csr":
        parts = tuple(_flatten(a, big, small) for a in (obj.data, obj.indices, obj.indptr))
        return ("c", type(obj), obj.shape, parts)
    if type(obj) in (list, tuple):
        return ("l" if type(obj) is list else "t",
                tuple(_flatten(x, big, small) for x in obj))
    if type(obj) is dict:
        return ("m", tuple((k, _flatten(v, big, small)) for k, v in obj.items()))
    return ("v", obj)


def _pack(small: list[np.ndarray]) -> tuple[np.ndarray, list[tuple[int, str, tuple]]]:
    """One uint8 buffer holding every small array, and where each one sits."""
    sizes = [a.nbytes for a in small]
    starts = np.zeros(len(small) + 1, dtype=np.int64)
    starts[1:] = np.cumsum([-(-n // _ALIGN) * _ALIGN for n in sizes], dtype=np.int64)
    buf = np.empty(int(starts[-1]), dtype=np.uint8)
    where = []
    for a, off, n in zip(small, starts[:-1], sizes, strict=True):
        buf[off:off + n] = np.ascontiguousarray(a).reshape(-1).view(np.uint8)
        where.append((int(off), a.dtype.str, a.shape))
    return buf, where


def _unflatten(desc: Any, big: list[np.ndarray], small: list[np.ndarray]) -> Any:
    """Rebuild what :func:`_flatten` described (no big array is copied)."""
    tag = desc[0]
    if tag == "a":
        return big[desc[1]]
    if tag == "s":
        return small[desc[1]]
    if tag == "d":
        # like pickle: the fields are set without running __init__ / __post_init__
        obj = object.__new__(desc[1])
        for name, sub in desc[2]:
            object.__setattr__(obj, name, _unflatten(sub, big, small))
        return obj
    if tag == "c":
        data, indices, indptr = (_unflatten(x, big, small) for x in desc[3])
        return desc[1]((data, indices, indptr), shape=desc[2])
    if tag in ("l", "t"):
        items = [_unflatten(x, big, small) for x in desc[1]]
        return items if tag == "l" else tuple(items)
    if tag == "m":
        return {k: _unflatten(v, big, small) for k, v in desc[1]}
    return desc[1]


def to_wire(obj: Any) -> tuple[list[np.ndarray], Any]:
    """``(arrays, description)`` of ``obj``; :func:`from_wire` rebuilds it.

    ``arrays`` holds the big arrays themselves (not copied) and, last, one
    buffer packing the small ones.
    """
    big: list[np.ndarray] = []
    small: list[np.ndarray] = []
    desc = _flatten(obj, big, small)
    buf, where = _pack(small)
    return [*big, buf], (desc, where)


def from_wire(wire: tuple[list[np.ndarray], Any]) -> Any:
    """Inverse of :func:`to_wire` (small arrays come back as writable copies)."""
    arrays, (desc, where) = wire
    *big, buf = arrays
    buf = np.array(buf, dtype=np.uint8, copy=True)  # the received frame may be read-only
    small = []
    for off, dtype, shape in where:
        dt = np.dtype(dtype)
        n = int(np.prod(shape, dtype=np.int64)) * dt.itemsize
        small.append(buf[off:off + n].view(dt).reshape(shape))
    return _unflatten(desc, list(big), small)


# ---------------------------------------------------------------------------
# the pass backend
# ---------------------------------------------------------------------------
def split_groups(
    n_blocks: int, n_groups: int, *, sizes: Sequence[float] | None = None
) -> list[tuple[int, int]]:
    """Split block indices ``0..n_blocks`` into ``n_groups`` contiguous ranges.

    Each cut is the block boundary nearest to an equal share of ``sizes``
    (default: one per block), so a worker's share of the rows is balanced even
    when the blocks are not (the last block of a pass is often short).

    Returns
    -------
    list of (first, stop)
        Non-empty index ranges in order (fewer than ``n_groups`` when there
        are fewer blocks).
    """
    n_blocks = int(n_blocks)
    n_groups = max(1, min(int(n_groups), n_blocks))
    if n_blocks == 0:
        return []
    w = np.ones(n_blocks) if sizes is None else np.asarray(sizes, dtype=np.float64)
    cum = np.concatenate([[0.0], np.cumsum(w)])
    targets = cum[-1] * np.arange(1, n_groups) / n_groups
    hi = np.clip(np.searchsorted(cum, targets), 1, n_blocks)
    lo = hi - 1
    cuts = np.where(targets - cum[lo] <= cum[hi] - targets, lo, hi)
    edges = [0, *(int(c) for c in cuts), n_blocks]
    for i in range(1, n_groups):  # every group keeps at least one block
        edges[i] = min(max(edges[i], edges[i - 1] + 1), n_blocks - (n_groups - i))
    return [(edges[i], edges[i + 1]) for i in range(n_groups)]


def _open_remote(source_ref: Any) -> Any:
    """A worker's view of the source: a path opens (cached), anything else is the source."""
    if isinstance(source_ref, tuple) and len(source_ref) == 3 and source_ref[0] == "store":
        return open_store_cached(source_ref[1], source_ref[2])
    return source_ref


def _timed_call(fn: Any, args: tuple, timed: bool) -> tuple[Any, dict[str, float], float]:
    """``fn(*args)`` with its seconds and (when ``timed``) its named phases."""
    timer = passes.PhaseTimer() if timed else None
    passes._local.timer = timer
    t0 = time.perf_counter()
    try:
        out = fn(*args)
    finally:
        passes._local.timer = None
    return out, (dict(timer.phases) if timer is not None else {}), time.perf_counter() - t0


def _range_task(
    source_ref: Any,
    ranges: list[tuple[int, int]],
    block_fn: Any,
    combine: Any,
    state_wire: Any,
    timed: bool,
) -> tuple[list[np.ndarray], Any, dict]:
    """Reduce a contiguous range of blocks on a worker.

    When ``combine`` has the remote-split hooks (see :func:`dask_backend`),
    each block's own small figures are kept apart (``split_remote``) and only
    the rest is folded here; the result is ``("split", [light per block],
    folded rest)``. Otherwise it is ``("whole", folded partial)``.

    Returns
    -------
    (arrays, description, info)
        The result in wire form (:func:`to_wire`) and a dict of timings:
        ``t_start``/``t_end`` (worker wall clock), ``open_s`` and one record
        per block (first row, rows, nnz, io, phases, compute, fold and read
        seconds).
    """
    t_start = time.time()
    t0 = time.perf_counter()
    src = _open_remote(source_ref)
    state = from_wire(state_wire)
    open_s = time.perf_counter() - t0
    split = getattr(combine, "split_remote", None)
    acc: Any = None
    lights: list[Any] = []
    blocks: list[dict] = []
    for a, b in ranges:
        t_read = time.perf_counter()
        block = src.read_block(a, b)
        read_wall = time.perf_counter() - t_read
        partial, phases, compute_s = _timed_call(block_fn, (block, state), timed)
        if split is not None:
            light, partial = split(partial)
            lights.append(light)
        # combine even a lone partial: it adds pending terms that would otherwise
        # ship block data back to the client
        parts = [partial] if acc is None else [acc, partial]
        acc, fold_phases, fold_s = _timed_call(combine, (parts,), timed)
        io = dict(getattr(block, "io", None) or {})
        io.setdefault("read_s", read_wall)
        blocks.append({
            "first_row": int(block.start),
            "rows": int(block.stop - block.start),
            "nnz": int(block.X.nnz),
            "io": io,
            "phases": phases,
            "compute_s": compute_s,
            "fold_phases": fold_phases,
            "fold_s": fold_s,
            "read_wall_s": read_wall,
        })
        del block, partial, parts
    result = ("split", lights, acc) if split is not None else ("whole", acc)
    arrays, desc = to_wire(result)
    info = {"pid": os.getpid(), "t_start": t_start, "t_end": time.time(), "open_s": open_s,
            "blocks": blocks}
    return arrays, desc, info


def _source_ref(source: Any) -> Any:
    """How workers reach the source: a store by path, an in-memory source as itself."""
    path = getattr(source, "path", None)
    backend = getattr(source, "backend", None)
    if path is not None and backend in ("zarr", "hdf5"):
        verify = bool(getattr(source, "verify", True))
        return ("store", os.fspath(path), verify)
    return source


# seconds between checks of a pass's stop flag while it waits for its workers
_POLL_S = 0.005


def dask_backend(job: Any) -> None:
    """Pass backend running contiguous block ranges on a dask.distributed cluster.

    Uses the current default client (:func:`cluster_client` makes one). The
    blocks are cut into one contiguous range per worker with about equal rows;
    the state is scattered once per pass to every worker as plain arrays;
    each task reads its blocks and folds them with ``job.combine``. Range
    results are fetched as they finish (an early range moves while the others
    still compute) and folded strictly in block order.

    A combine may carry two hooks that make the fold of the small figures the
    serial backend's own: ``combine.split_remote(partial) -> (light, rest)``
    takes a block's own small figures out before the worker folds ``rest``;
    ``combine.join_remote(light, rest) -> partial`` attaches a range's folded
    rest to its first block. The client then folds every block's light
    partial in block order, exactly as the serial backend does; the big
    accumulators, summed per range on the workers, are compensated sums that
    the client combines (``combine`` does both), with the serial result.

    A task lost with a dying worker is recomputed by the scheduler on another
    worker from the same inputs, so the pass result does not change. When
    ``job.should_stop`` fires while the pass waits, the outstanding tasks are
    cancelled and :class:`ranktide.signals.StopRequested` is raised.

    Per-pass figures go to ``profile.passes[i]["cluster"]`` when the pass is
    profiled: ``scatter_s`` and, per task, the worker's ``busy_s`` (open +
    read + compute + fold), when it started and ended and when its result
    arrived (seconds since the tasks were submitted, wall clock).
    """
    from distributed import as_completed, default_client

    client = default_client()
    n_workers = max(1, len(client.scheduler_info(n_workers=-1).get("workers", {})))
    groups = split_groups(len(job.ranges), n_workers, sizes=[b - a for a, b in job.ranges])
    if not groups:
        return
    should_stop = getattr(job, "should_stop", None)
    owned: list[Any] = []
    futures: list[Any] = []
    try:
        ref = _source_ref(job.source)
        if not (isinstance(ref, tuple) and ref and ref[0] == "store"):
            [ref] = client.scatter([ref], broadcast=True, hash=False)
            owned.append(ref)
        t0 = time.perf_counter()
        [state_f] = client.scatter([to_wire(job.state)], broadcast=True, hash=False)
        owned.append(state_f)
        scatter_s = time.perf_counter() - t0
        t_submit = time.time()
        futures = [
            client.submit(_range_task, ref, job.ranges[g0:g1], job.block_fn, job.combine,
                          state_f, job.timed, pure=False, retries=2)
            for g0, g1 in groups
        ]
        order = {fut.key: g for g, fut in enumerate(futures)}
        tasks: list[dict] = []
        ready: dict[int, Any] = {}
        done = as_completed(futures, with_results=True, raise_errors=False)
        while len(tasks) < len(groups):
            batch = done.next_batch(block=should_stop is None)
            if not batch:
                if should_stop():
                    raise StopRequested("stop requested while the cluster computed the pass")
                time.sleep(_POLL_S)
                continue
            for fut, result in batch:
                if fut.status != "finished":
                    fut.result()  # raises the task's error
                ready[order[fut.key]] = (result, time.time())
            while len(tasks) in ready:
                g = len(tasks)
                (arrays, desc, info), t_arrived = ready.pop(g)
                t_fold = time.perf_counter()
                _fold_range(job, groups[g][0], from_wire((arrays, desc)), info["blocks"])
                tasks.append(_task_figures(groups[g], info, t_submit, t_arrived,
                                           time.perf_counter() - t_fold))
        _record_cluster(job, scatter_s, tasks)
    finally:
        for fut in futures:
            if not fut.done():
                fut.cancel()
            fut.release()
        for fut in owned:
            fut.release()


def _fold_range(job: Any, first: int, result: tuple, blocks: list[dict]) -> None:
    """Hand one range's result to ``job.fold``: block by block, or as one partial."""
    profile = getattr(job.fold, "profile", None)
    if result[0] == "split":
        _, lights, rest = result
        join = job.combine.join_remote
        for j, (light, rec) in enumerate(zip(lights, blocks, strict=True)):
            partial = join(light, rest) if j == 0 else light
            job.fold(first + j, _BlockStub(rec), partial, rec["phases"], rec["compute_s"], 0.0)
            if profile is not None:
                profile.records[-1] = _with_worker_fold(profile.records[-1], rec)
        return
    stub = _BlockStub(blocks[0], stop=blocks[-1]["first_row"] + blocks[-1]["rows"],
                      nnz=sum(r["nnz"] for r in blocks))
    job.fold(first, stub, result[1], None, 0.0, 0.0)
    if profile is not None:
        done = profile.records.pop()  # the range-level record; replaced per block
        for j, rec in enumerate(blocks):
            profile.records.append(_block_record(done, first + j, rec,
                                                 client_fold_s=done.fold_s if j == 0 else 0.0))


def _with_worker_fold(rec: Any, worker: dict) -> Any:
    """A fold record with the worker's share of the fold (its combine) added."""
    phases = dict(rec.fold_phases)
    for name, sec in worker["fold_phases"].items():
        phases[name] = phases.get(name, 0.0) + sec
    fold_s = rec.fold_s + worker["fold_s"]
    return dataclasses.replace(rec, fold_s=fold_s, fold_phases=phases,
                               combine_s=max(fold_s - sum(phases.values()), 0.0))


def _block_record(done: Any, index: int, rec: dict, *, client_fold_s: float) -> Any:
    io = rec["io"]
    fold_s = rec["fold_s"] + client_fold_s
    return BlockRecord(
        pass_index=done.pass_index,
        block=index,
        first_row=rec["first_row"],
        rows=rec["rows"],
        nnz=rec["nnz"],
        bytes_disk=int(io.get("bytes_disk", 0)),
        bytes_decoded=int(io.get("bytes_decoded", 0)),
        read_s=float(io.get("read_s", rec["read_wall_s"])),
        decode_s=float(io.get("decode_s", 0.0)),
        phases=rec["phases"],
        compute_s=rec["compute_s"],
        combine_s=max(fold_s - sum(rec["fold_phases"].values()), 0.0),
        wait_s=0.0,
        fold_s=fold_s,
        fold_phases=dict(rec["fold_phases"]),
    )


def _task_figures(
    group: tuple[int, int], info: dict, t_submit: float, t_arrived: float, fold_s: float
) -> dict:
    """One task's timings for the pass profile (seconds; times since submission)."""
    blocks = info["blocks"]
    read = sum(r["read_wall_s"] for r in blocks)
    compute = sum(r["compute_s"] for r in blocks)
    combine = sum(r["fold_s"] for r in blocks)
    return {
        "blocks": list(group),
        "rows": sum(r["rows"] for r in blocks),
        "pid": info["pid"],
        "start_s": info["t_start"] - t_submit,
        "end_s": info["t_end"] - t_submit,
        "arrived_s": t_arrived - t_submit,
        "open_s": info["open_s"],
        "read_s": read,
        "compute_s": compute,
        "combine_s": combine,
        "busy_s": info["open_s"] + read + compute + combine,
        "client_fold_s": fold_s,
    }


def _record_cluster(job: Any, scatter_s: float, tasks: list[dict]) -> None:
    profile = getattr(job.fold, "profile", None)
    index = getattr(job.fold, "pass_index", -1)
    if profile is not None and 0 <= index < len(profile.passes):
        profile.passes[index]["cluster"] = {"scatter_s": scatter_s, "tasks": tasks}


class _BlockStub:
    """Stands in for a block (or a range of blocks) that was read on a worker."""

    __slots__ = ("start", "stop", "X", "io")

    def __init__(self, rec: dict, *, stop: int | None = None, nnz: int | None = None) -> None:
        self.start = rec["first_row"]
        self.stop = rec["first_row"] + rec["rows"] if stop is None else stop
        self.X = _RangeNnz(rec["nnz"] if nnz is None else nnz)
        self.io = rec["io"] if stop is None else {}


@dataclass(frozen=True)
class _RangeNnz:
    nnz: int


def register() -> None:
    """Make ``backend="dask"`` available to :func:`ranktide.passes.engine.run_pass`."""
    register_backend("dask", dask_backend)


# ---------------------------------------------------------------------------
# ordered per-block maps (evaluate, predict)
# ---------------------------------------------------------------------------
def _block_task(source_ref: Any, start: int, stop: int, fn: Any, state: Any) -> Any:
    """Read one block on a worker and apply ``fn(block, state)`` to it."""
    return fn(_open_remote(source_ref).read_block(start, stop), state)


def map_blocks_ordered(
    store: Any,
    ranges: list[tuple[int, int]],
    fn: Any,
    state: Any,
    *,
    window: int | None = None,
) -> Iterator[tuple[int, int, Any]]:
    """Apply ``fn(block, state)`` to each block on the cluster; yield results in order.

    At most ``window`` blocks (default: two per worker) are in flight, so the
    client holds a bounded number of results whatever the number of rows.
    ``store`` must be a store opened from a path the workers can reach.

    Yields
    ------
    (start, stop, result)
        One per range, in range order.
    """
    from distributed import default_client

    ref = _source_ref(store)
    if not (isinstance(ref, tuple) and ref and ref[0] == "store"):
        raise ConfigError(
            "--cluster: the data must be a store on a path the workers can read, not "
            "in-memory arrays"
        )
    client = default_client()
    n_workers = max(1, len(client.scheduler_info(n_workers=-1).get("workers", {})))
    window = max(1, int(window or 2 * n_workers))
    [state_f] = client.scatter([state], broadcast=True, hash=False)
    pending: list[tuple[int, int, Any]] = []
    it = iter(ranges)
    try:
        while True:
            while len(pending) < window:
                nxt = next(it, None)
                if nxt is None:
                    break
                a, b = nxt
                pending.append((a, b, client.submit(
                    _block_task, ref, a, b, fn, state_f, pure=False, retries=2)))
            if not pending:
                return
            a, b, fut = pending.pop(0)
            result = fut.result()
            fut.release()
            yield a, b, result
    finally:
        for _, _, fut in pending:
            fut.cancel()
        state_f.release()
