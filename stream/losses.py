"""Losses over dense scores, loss dispatch, and the best intercept alone.

Each loss (DESIGN §2) is an object from :func:`get_loss` that evaluates, for a
block of dense scores ``Z = X W + b``, the weighted loss sum and the raw
weighted residual ``w * dloss/dz`` (not yet divided by the total weight, so a
pass can sum blocks before it knows the total):

=========== ==================== ========================================
loss        targets (kind)       loss(z; y)
=========== ==================== ========================================
softmax     class ids (classes)  logsumexp(z) - z_y
squared     values (values)      0.5 * sum_j (z_j - y_j)^2
multilabel  tags (tags)          sum_j log(1 + exp(z_j)) - y_j z_j
=========== ==================== ========================================

Class weights ``c`` (k,) apply to softmax only: a row's weight becomes
``w_i c_{y_i}`` and the total weight sums those (as in :mod:`kernels.products`).

:func:`best_intercept` streams over a source once and returns the intercept
that minimizes ``f(0, b)``: log class frequencies (mean-centred), the weighted
mean of the values, or the logit of the tag frequencies.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError, InputError
from ranktide.kernels import losses as kl
from ranktide.passes.engine import run_pass
from ranktide.store.memory_source import as_source

__all__ = ["Loss", "get_loss", "LOSS_NAMES", "TARGET_KIND", "best_intercept",
           "check_loss_source", "row_weights"]

#: target kind each loss needs
TARGET_KIND: dict[str, str] = {"softmax": "classes", "squared": "values", "multilabel": "tags"}
LOSS_NAMES: tuple[str, ...] = tuple(TARGET_KIND)

#: frequencies are clipped to [FREQ_CLIP, 1 - FREQ_CLIP] before log / logit
FREQ_CLIP = 1e-9


def row_weights(n: int, weights: np.ndarray | None) -> np.ndarray:
    """Return the row weights of a block as float64 ``(n,)`` (ones if None)."""
    if weights is None:
        return np.ones(n, dtype=np.float64)
    return np.asarray(weights, dtype=np.float64)


@dataclass(frozen=True)
class Loss:
    """One loss: its name and the target kind it needs.

    Use :meth:`value_residual` on a block of dense scores; the arithmetic is
    the fused kernels of :mod:`kernels.losses`.
    """

    name: str
    target_kind: str

    def value_residual(
        self,
        scores: np.ndarray,
        targets: Any,
        weights: np.ndarray | None = None,
        *,
        class_weights: np.ndarray | None = None,
        out: np.ndarray | None = None,
        where: str = "scores",
    ) -> tuple[float, float, np.ndarray]:
        """Weighted loss sum, weight sum and raw weighted residual of a block.

        Parameters
        ----------
        scores : (n, k) float64 array
            ``X W + b`` for the block's rows.
        targets : (n,) int array, (n, k) float array or (n, k) sparse 0/1
            Class ids, values or tags (by the loss's target kind).
        weights : (n,) array, optional
            Raw row weights (ones when omitted).
        class_weights : (k,) array, optional
            Per-class weights (softmax only).
        out : (n, k) float64 array, optional
            Where to write the residual (may be ``scores`` itself, which is
            then overwritten); a new array by default.
        where : str
            Name of the data for error messages.

        Returns
        -------
        loss_sum : float
            ``sum_i w_i loss(z_i; y_i)`` (softmax: ``w_i c_{y_i}``).
        weight_sum : float
            The matching sum of row weights.
        residual : (n, k) float64 array
            ``w_i * dloss/dz_i`` for each row.
        """
        Z = np.asarray(scores, dtype=np.float64)
        if Z.ndim != 2:
            raise ConfigError(f"{where}: scores must be 2-D (n, k), got shape {Z.shape}")
        n, k = Z.shape
        if out is None:
            R = np.array(Z, dtype=np.float64, order="C", copy=True)
        else:
            R = out
            if R is not Z:
                R[...] = Z
        w = None if weights is None else np.asarray(weights, dtype=np.float64)
        if class_weights is not None:
            if self.name != "softmax":
                raise ConfigError("class weights apply to the softmax loss only; drop them "
                                  f"for loss {self.name!r}")
            y = np.asarray(targets, dtype=np.int32)
            w = kl.fold_class_weights(y, np.asarray(class_weights, dtype=np.float64), w,
                                      where=where)
        loss = np.zeros(1)
        gradb = np.zeros(k)
        if self.name == "softmax":
            kl.softmax_residual(R, np.asarray(targets, dtype=np.int32), w, loss, gradb,
                                where=where)
        elif self.name == "squared":
            kl.squared_residual(R, np.ascontiguousarray(targets, dtype=np.float64), w, loss,
                                gradb, where=where)
        else:
            T = sp.csr_matrix(targets)
            kl.multilabel_residual(R, T.indptr, T.indices, w, loss, gradb, where=where)
        wsum = float(n) if w is None else float(np.sum(w))
        return float(loss[0]), wsum, R


_LOSSES = {name: Loss(name, kind) for name, kind in TARGET_KIND.items()}


def get_loss(name: str) -> Loss:
    """Return the loss called ``name`` (``softmax``, ``squared`` or ``multilabel``)."""
    loss = _LOSSES.get(name)
    if loss is None:
        raise ConfigError(f"loss {name!r}: unknown; choose one of {', '.join(LOSS_NAMES)}")
    return loss


def check_loss_source(loss: str, source: Any) -> Loss:
    """Check that ``source`` carries the targets ``loss`` needs; return the loss."""
    spec = get_loss(loss)
    kind = getattr(source, "target_kind", None)
    where = getattr(source, "path", None) or "in-memory source"
    if kind != spec.target_kind:
        raise InputError(
            f"{where}: holds targets of kind {kind!r} but loss {loss!r} needs "
            f"{spec.target_kind!r}; choose the loss that matches the targets or re-ingest"
        )
    return spec


# ---------------------------------------------------------------------------
# the best intercept alone, streamed
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class _InterceptState:
    loss: str
    k: int
    class_weights: np.ndarray | None


def _intercept_block(block: Any, state: _InterceptState) -> tuple[float, np.ndarray]:
    n = block.stop - block.start
    w = row_weights(n, block.weights)
    if state.loss == "softmax":
        y = np.asarray(block.targets)
        if state.class_weights is not None:
            w = w * state.class_weights[y]
        return float(w.sum()), np.bincount(y, weights=w, minlength=state.k).astype(np.float64)
    if state.loss == "squared":
        Y = np.asarray(block.targets, dtype=np.float64)
        return float(w.sum()), w @ Y
    T = sp.csr_matrix(block.targets)
    return float(w.sum()), np.asarray(T.T @ w, dtype=np.float64).ravel()


def _intercept_combine(parts: list) -> tuple[float, np.ndarray]:
    wsum = parts[0][0]
    sums = parts[0][1].copy()
    for p in parts[1:]:
        wsum += p[0]
        sums += p[1]
    return wsum, sums


def intercept_from_sums(loss: str, weight_total: float, sums: np.ndarray, *,
                        clip: float = FREQ_CLIP) -> np.ndarray:
    """The best intercept alone from weighted target sums (see :func:`best_intercept`)."""
    if not weight_total > 0:
        raise InputError("every row has weight 0; give some rows a positive weight")
    mean = np.asarray(sums, dtype=np.float64) / weight_total
    if loss == "softmax":
        b = np.log(np.clip(mean, clip, None))
        return b - b.mean()
    if loss == "squared":
        return mean
    p = np.clip(mean, clip, 1.0 - clip)
    return np.log(p) - np.log1p(-p)


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
    loss : {"softmax", "squared", "multilabel"}
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
        if loss != "softmax":
            raise ConfigError("class weights apply to the softmax loss only; drop them "
                              f"for loss {loss!r}")
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
