"""dask.distributed backend for the pass engine.

Workers open the store by path or URL (once per worker process, cached here
so the opener is importable by the workers), each task reduces one contiguous
range of blocks to a single partial, and the client combines the partials in
block order, so a pass gives the serial backend's result to rounding.

The model state is sent once per pass with ``client.scatter(...,
broadcast=True)``; the tasks receive a future of it, never a copy each.
"""

from __future__ import annotations

import contextlib
import functools
import os
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from .errors import ConfigError

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
    from .store import open_store

    return open_store(path, verify=verify)


def worker_pid() -> int:
    """The worker's process id (used by tests that kill a worker)."""
    return os.getpid()


# ---------------------------------------------------------------------------
# the pass backend
# ---------------------------------------------------------------------------
def split_groups(n_blocks: int, n_groups: int) -> list[tuple[int, int]]:
    """Split block indices ``0..n_blocks`` into ``n_groups`` contiguous ranges.

    Returns non-empty ``(first, stop)`` index ranges in order (fewer than
    ``n_groups`` when there are fewer blocks).
    """
    n_groups = max(1, min(int(n_groups), int(n_blocks)))
    edges = [round(i * n_blocks / n_groups) for i in range(n_groups + 1)]
    return [(edges[i], edges[i + 1]) for i in range(n_groups) if edges[i + 1] > edges[i]]


def _open_remote(source_ref: Any) -> Any:
    """A worker's view of the source: a path opens (cached), anything else is the source."""
    if isinstance(source_ref, tuple) and len(source_ref) == 3 and source_ref[0] == "store":
        return open_store_cached(source_ref[1], source_ref[2])
    return source_ref


def _range_task(
    source_ref: Any,
    ranges: list[tuple[int, int]],
    block_fn: Any,
    combine: Any,
    state: Any,
    timed: bool,
) -> tuple[Any, list[dict]]:
    """Reduce a contiguous range of blocks on a worker to one partial.

    Returns the partial and, when ``timed``, one record per block (first row,
    rows, nnz, io figures, phase seconds, compute seconds).
    """
    import time

    from . import passes

    src = _open_remote(source_ref)
    acc: Any = None
    records: list[dict] = []
    for a, b in ranges:
        t_read = time.perf_counter()
        block = src.read_block(a, b)
        read_wall = time.perf_counter() - t_read
        if timed:
            timer = passes.PhaseTimer()
            passes._local.timer = timer
            t0 = time.perf_counter()
            try:
                partial = block_fn(block, state)
            finally:
                passes._local.timer = None
            compute_s = time.perf_counter() - t0
            io = dict(getattr(block, "io", None) or {})
            records.append(
                {
                    "first_row": int(block.start),
                    "rows": int(block.stop - block.start),
                    "nnz": int(block.X.nnz),
                    "io": io,
                    "phases": dict(timer.phases),
                    "compute_s": compute_s,
                    "read_wall_s": read_wall,
                }
            )
        else:
            partial = block_fn(block, state)
        # combine even a lone partial: it adds pending terms that would otherwise
        # ship block data back to the client
        acc = combine([partial]) if acc is None else combine([acc, partial])
        del block, partial
    return acc, records


def _source_ref(source: Any) -> Any:
    """How workers reach the source: a store by path, an in-memory source as itself."""
    path = getattr(source, "path", None)
    backend = getattr(source, "backend", None)
    if path is not None and backend in ("zarr", "hdf5"):
        verify = bool(getattr(source, "verify", True))
        return ("store", os.fspath(path), verify)
    return source


def dask_backend(job: Any) -> None:
    """Pass backend running contiguous block ranges on a dask.distributed cluster.

    Uses the current default client (:func:`cluster_client` makes one). The
    state is scattered once per pass to every worker; each worker task folds
    its range of blocks with ``job.combine``; the range partials come back in
    block order and are folded on the client. A task lost with a dying worker
    is recomputed by the scheduler on another worker from the same inputs, so
    the pass result does not change.
    """
    from distributed import default_client

    from .passes import BlockRecord

    client = default_client()
    n_workers = max(1, len(client.scheduler_info(n_workers=-1).get("workers", {})))
    groups = split_groups(len(job.ranges), n_workers)
    if not groups:
        return
    ref = _source_ref(job.source)
    if not (isinstance(ref, tuple) and ref and ref[0] == "store"):
        [ref] = client.scatter([ref], broadcast=True, hash=False)
    [state_f] = client.scatter([job.state], broadcast=True, hash=False)
    futures = [
        client.submit(
            _range_task,
            ref,
            job.ranges[g0:g1],
            job.block_fn,
            job.combine,
            state_f,
            job.timed,
            pure=False,
            retries=2,
        )
        for g0, g1 in groups
    ]
    try:
        for (g0, g1), fut in zip(groups, futures, strict=True):
            partial, records = fut.result()
            a, b = job.ranges[g0][0], job.ranges[g1 - 1][1]
            stub = _RangeStub(a, b, sum(r["nnz"] for r in records))
            job.fold(g0, stub, partial, None, 0.0, 0.0)
            profile = getattr(job.fold, "profile", None)
            if job.timed and profile is not None:
                done = profile.records.pop()  # the range-level record; replaced per block
                for j, r in enumerate(records):
                    io = r["io"]
                    profile.records.append(
                        BlockRecord(
                            pass_index=done.pass_index,
                            block=g0 + j,
                            first_row=r["first_row"],
                            rows=r["rows"],
                            nnz=r["nnz"],
                            bytes_disk=int(io.get("bytes_disk", 0)),
                            bytes_decoded=int(io.get("bytes_decoded", 0)),
                            read_s=float(io.get("read_s", r["read_wall_s"])),
                            decode_s=float(io.get("decode_s", 0.0)),
                            phases=r["phases"],
                            compute_s=r["compute_s"],
                            combine_s=done.combine_s if j == len(records) - 1 else 0.0,
                            wait_s=0.0,
                        )
                    )
    finally:
        for fut in futures:
            fut.release()
        state_f.release()


@dataclass(frozen=True)
class _RangeNnz:
    nnz: int


class _RangeStub:
    """Stands in for a block when a whole range's partial is folded at once."""

    __slots__ = ("start", "stop", "X", "io")

    def __init__(self, start: int, stop: int, nnz: int) -> None:
        self.start = start
        self.stop = stop
        self.X = _RangeNnz(nnz)
        self.io: dict = {}


def register() -> None:
    """Make ``backend="dask"`` available to :func:`stream.passes.run_pass`."""
    from .passes import register_backend

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
