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

# Environment every worker process gets before it starts: one thread each for
# numba, OpenMP and BLAS, so N single-threaded workers never oversubscribe.
WORKER_ENV = {
    "NUMBA_NUM_THREADS": "1",
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
}


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
    OpenMP has run kills the child), one thread each, with :data:`WORKER_ENV`
    set before each worker starts.
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
    env = {f"distributed.nanny.pre-spawn-environ.{k}": v for k, v in WORKER_ENV.items()}
    env["distributed.worker.multiprocessing-method"] = "spawn"
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
    try:
        yield client
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


@functools.lru_cache(maxsize=8)
def open_store_cached(path: str, verify: bool = True) -> Any:
    """Open a store once per worker process (keyed by path and pid-local cache)."""
    from .store import open_store

    return open_store(path, verify=verify)


def worker_pid() -> int:
    """The worker's process id (used by tests that kill a worker)."""
    return os.getpid()
