"""The best intercept alone, ``argmin_b f(0, b)``, in one streamed pass.

Each block gives its weight total and weighted target sums (the loss object's
``target_sums``); the sums are folded in block order and the loss's
``intercept_link`` turns their mean into ``b0``.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any

import numpy as np
from ranktide.errors import ConfigError, InputError
from ranktide.losses import FREQ_CLIP, check_loss_source, get_loss, intercept_from_sums, row_weights
from ranktide.passes.engine import run_pass
from ranktide.store.memory_source import as_source

__all__ = ["best_intercept"]


@dataclass(frozen=True)
class _InterceptState:
    loss: str
    k: int
    class_weights: np.ndarray | None


def _intercept_block(block: Any, state: _InterceptState) -> tuple[float, np.ndarray]:
    n = block.stop - block.start
    w = row_weights(n, block.weights)
    if state.class_weights is not None:
        w = w * state.class_weights[np.asarray(block.targets)]
    return float(w.sum()), get_loss(state.loss).target_sums(block.targets, w, state.k)


def _intercept_combine(parts: list) -> tuple[float, np.ndarray]:
    wsum = parts[0][0]
    sums = parts[0][1].copy()
    for p in parts[1:]:
        wsum += p[0]
        sums += p[1]
    return wsum, sums


def best_intercept(
    source: Any,
    *,
    loss: str,
    class_weights: np.ndarray | None = None,
    backend: str = "serial",
    block_rows: int | None = None,
    block_bytes: int | None = None,
    clip: float = FREQ_CLIP,
    progress: bool = False,
) -> np.ndarray:
    """The intercept ``b0`` minimizing ``f(0, b)``, in one pass.

    Parameters
    ----------
    source : Store, path, CSR tuple or source
        The data (see :func:`ranktide.store.memory_source.as_source`).
    loss : str
        A name in :data:`ranktide.losses.LOSS_NAMES`.
    class_weights : (k,) array, optional
        Per-class weights (softmax only).
    clip : float
        Frequencies are clipped to ``[clip, 1 - clip]`` so that an absent
        class or tag gets a finite intercept.

    Returns
    -------
    (k,) float64 array
        softmax: ``log(freq) - mean(log(freq))`` with weighted class
        frequencies ``freq`` (then ``softmax(b0) = freq``, the stationarity
        condition ``grad_b f = 0``); squared: the weighted mean of ``Y``;
        multilabel: ``logit(freq)`` of the weighted tag frequencies.
    """
    opened = isinstance(source, (str, os.PathLike))
    src = as_source(source)
    try:
        return _best_intercept(src, loss=loss, class_weights=class_weights, backend=backend,
                               block_rows=block_rows, block_bytes=block_bytes, clip=clip,
                               progress=progress)
    finally:
        if opened:
            src.close()


def _best_intercept(src: Any, *, loss: str, class_weights: Any, backend: str,
                    block_rows: int | None, block_bytes: int | None, clip: float,
                    progress: bool) -> np.ndarray:
    check_loss_source(loss, src)
    k = int(src.n_outputs)
    cw = None
    if class_weights is not None:
        cw = np.asarray(class_weights, dtype=np.float64)
        get_loss(loss).check_class_weights_allowed()
        if cw.shape != (k,) or not np.all(np.isfinite(cw)) or np.any(cw < 0):
            raise ConfigError(f"class weights: expected {k} finite values >= 0, "
                              f"got shape {cw.shape}")
    state = _InterceptState(loss=loss, k=k, class_weights=cw)
    out = run_pass(src, _intercept_block, _intercept_combine, state=state, backend=backend,
                   block_rows=block_rows, block_bytes=block_bytes, progress=progress,
                   desc="intercept")
    if out is None:
        raise InputError(f"{getattr(src, 'path', None) or 'in-memory source'}: has no rows")
    return intercept_from_sums(loss, out[0], out[1], clip=clip)
