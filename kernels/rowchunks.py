"""Run a block's dense row chunks on a small thread pool, BLAS one thread per chunk.

The dense part of a pass block (scores, loss and residual, ``R^T X Q``,
``R [V, Omega]``) is done in row chunks small enough to stay in cache
(:mod:`kernels.products`). Two things make the chunks faster on a few cores
when they run side by side on threads, each chunk's matmuls on one BLAS
thread, than one after another with a multithreaded BLAS:

* OpenBLAS's worker threads spin for a while after each call (busy-wait).
  The numba kernels that follow a BLAS call then share the cores with the
  spinning threads. Measured on a 2-core machine: a sparse kernel of 40 ms
  took 60-100 ms right after a 2-thread BLAS call, and 40 ms after a 1-thread
  one.
* Chunks run in parallel need no parallel region per small kernel.

The results do not depend on the pool: every chunk is computed by itself in
the same way (one BLAS thread, numba kernels whose sums do not depend on the
thread count), and the caller adds the chunks' sums in chunk order.

While any :func:`map_chunks` call runs, BLAS is limited to one thread for the
whole process (``threadpoolctl``; BLAS thread counts are per process); the
previous limits come back when the last concurrent call ends. Pool threads
run numba kernels on one thread (``numba.set_num_threads`` is per thread).
"""

from __future__ import annotations

import os
import threading
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor, wait
from typing import Any

import numba
import numpy as np
from threadpoolctl import ThreadpoolController

from .threads import ensure_threading

__all__ = ["map_chunks", "chunk_buffer", "default_workers", "chunk_ranges"]

_LOCK = threading.Lock()
_STATE: dict[str, Any] = {"controller": None, "users": 0, "limiter": None}
_POOLS: dict[int, ThreadPoolExecutor] = {}
_LOCAL = threading.local()


def default_workers() -> int:
    """Pool size: numba's configured thread count (the cores the kernels use)."""
    return max(1, min(int(numba.config.NUMBA_NUM_THREADS), os.cpu_count() or 1))


def chunk_ranges(n: int, rows: int) -> list[tuple[int, int]]:
    """``[(0, rows), (rows, 2 rows), ...]`` covering ``n`` rows (depends on n and rows only)."""
    rows = max(1, int(rows))
    return [(a, min(a + rows, n)) for a in range(0, n, rows)]


def chunk_buffer(rows: int, cols: int) -> np.ndarray:
    """A float64 ``(rows, cols)`` work array owned by the calling thread (reused, not zeroed)."""
    need = rows * cols
    buf = getattr(_LOCAL, "buf", None)
    if buf is None or buf.size < need:
        buf = _LOCAL.buf = np.empty(need)
    return buf[:need].reshape(rows, cols)


def _init_worker() -> None:
    ensure_threading()
    numba.set_num_threads(1)


def _pool(workers: int) -> ThreadPoolExecutor:
    """The process's pool of ``workers`` threads (one per size, kept for the process)."""
    with _LOCK:
        pool = _POOLS.get(workers)
        if pool is None:
            pool = _POOLS[workers] = ThreadPoolExecutor(
                max_workers=workers, initializer=_init_worker,
                thread_name_prefix="ranktide-chunk")
        return pool


def _blas_enter() -> None:
    with _LOCK:
        if _STATE["users"] == 0:
            if _STATE["controller"] is None:
                _STATE["controller"] = ThreadpoolController()
            _STATE["limiter"] = _STATE["controller"].limit(limits=1, user_api="blas")
        _STATE["users"] += 1


def _blas_exit() -> None:
    with _LOCK:
        _STATE["users"] -= 1
        if _STATE["users"] == 0 and _STATE["limiter"] is not None:
            _STATE["limiter"].restore_original_limits()
            _STATE["limiter"] = None


def map_chunks(fn: Callable[[tuple[int, int]], Any], chunks: Iterable[tuple[int, int]], *,
               workers: int | None = None) -> Iterator[Any]:
    """``fn(c) for c in chunks``, on ``workers`` pool threads, BLAS on one thread.

    A generator: the results come in chunk order, and at most ``2 * workers``
    chunks are submitted ahead of the one being consumed, so a caller that
    folds the results as they come holds only a few of them at a time.

    Parameters
    ----------
    fn : callable
        ``fn((start, stop)) -> result``; must only write rows ``start:stop`` of
        shared outputs.
    chunks : iterable of (int, int)
    workers : int, optional
        Pool threads (default :func:`default_workers`); 1 runs the chunks in
        the calling thread.

    Yields
    ------
    object
        The results in chunk order (the first exception in chunk order is raised).
    """
    chunks = list(chunks)
    w = default_workers() if workers is None else max(1, int(workers))
    _blas_enter()
    try:
        if w == 1 or len(chunks) < 2:
            for c in chunks:
                yield fn(c)
            return
        pool = _pool(w)
        ahead: deque[Future] = deque()
        nxt = 0
        try:
            while nxt < len(chunks) or ahead:
                while nxt < len(chunks) and len(ahead) < 2 * w:
                    ahead.append(pool.submit(fn, chunks[nxt]))
                    nxt += 1
                yield ahead.popleft().result()
        finally:
            for f in ahead:  # an error or an abandoned fold: drop what is left
                f.cancel()
            wait(ahead)
    finally:
        _blas_exit()
