"""Streamed evaluation of a model on a labelled store (or in-memory data).

The data are read block by block; each block's scores are computed, fed to
the loss's metric accumulator (:mod:`ranktide.scoring.metrics`) and dropped, so memory
holds one block of scores at a time.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError, InputError, ModelError
from ranktide.losses import TARGET_KIND
from ranktide.model import load_model
from ranktide.passes.dask_backend import map_blocks_ordered
from ranktide.passes.engine import run_pass
from ranktide.scoring.files import open_file_source
from ranktide.scoring.metrics import make_metrics
from ranktide.store import open_store
from ranktide.store.memory_source import (
    infer_kind,
    standard_matrix,
    standard_targets,
    standard_weights,
)

__all__ = [
    "evaluate",
    "DataSource",
    "open_source",
    "as_model",
    "model_dims",
    "model_names",
    "score_block_rows",
]

#: Bytes of dense scores (and their temporaries) one block may hold.
SCORE_BUDGET = 64 * 2**20

#: Store target kind that each loss needs.
KIND_OF_LOSS = TARGET_KIND


@dataclass(frozen=True)
class SourceBlock:
    """One row block of a source: rows ``[start, stop)``."""

    start: int
    stop: int
    X: sp.csr_matrix
    targets: Any
    weights: np.ndarray | None


class DataSource:
    """A store or in-memory CSR data, read as row blocks.

    Parameters
    ----------
    name : str
        What error messages call the data (the store's path or ``"<array>"``).
    n_rows, n_cols : int
        Shape of the feature matrix.
    target_kind : {"classes", "values", "tags"} or None
        Kind of targets available.
    n_outputs : int or None
        Classes, tags or outputs the targets cover.
    """

    def __init__(
        self,
        *,
        name: str,
        n_rows: int,
        n_cols: int,
        target_kind: str | None,
        n_outputs: int | None,
        output_names: list[str] | None = None,
        store: Any = None,
        X: sp.csr_matrix | None = None,
        targets: Any = None,
        weights: np.ndarray | None = None,
    ) -> None:
        self.name = name
        self.n_rows = int(n_rows)
        self.n_cols = int(n_cols)
        self.target_kind = target_kind
        self.n_outputs = n_outputs
        self.output_names = output_names
        self._store = store
        self._X = X
        self._targets = targets
        self._weights = weights

    # the block contract of the pass engine (ranktide.passes.engine.run_pass)
    @property
    def path(self) -> Any:
        return getattr(self._store, "path", None)

    @property
    def backend(self) -> Any:
        return getattr(self._store, "backend", None)

    @property
    def verify(self) -> bool:
        return bool(getattr(self._store, "verify", True))

    def block_ranges(self, *, rows: int | None = None,
                     block_bytes: int | None = None) -> list[tuple[int, int]]:
        """Consecutive row ranges (the store's, or ``rows`` at a time in memory)."""
        if self._store is not None:
            return self._store.block_ranges(rows=rows, block_bytes=block_bytes)
        step = int(rows) if rows else max(1, self.n_rows)
        return [(a, min(a + step, self.n_rows)) for a in range(0, self.n_rows, step)]

    def read_block(self, start: int, stop: int) -> Any:
        """Rows ``start:stop`` (the store's block, with its read figures)."""
        if self._store is not None:
            return self._store.read_block(start, stop)
        t = None if self._targets is None else self._targets[start:stop]
        w = None if self._weights is None else self._weights[start:stop]
        return SourceBlock(start, stop, self._X[start:stop], t, w)

    def blocks(self, rows: int) -> Iterator[SourceBlock]:
        """Yield consecutive row blocks of at most ``rows`` rows."""
        if self._store is not None:
            for b in self._store.blocks(rows=rows):
                yield SourceBlock(b.start, b.stop, b.X, b.targets, b.weights)
            return
        for a in range(0, self.n_rows, rows):  # one step per block, not per row
            z = min(a + rows, self.n_rows)
            t = None if self._targets is None else self._targets[a:z]
            w = None if self._weights is None else self._weights[a:z]
            yield SourceBlock(a, z, self._X[a:z], t, w)

    def map_blocks(
        self, rows: int, fn: Any, state: Any, *, backend: str = "serial"
    ) -> Iterator[tuple[int, int, Any]]:
        """Yield ``(start, stop, fn(block, state))`` for each block, in order.

        ``backend="dask"`` runs ``fn`` on the workers of the current
        dask.distributed client (the data must be a store on a shared path);
        ``fn`` must then be a module-level function.
        """
        if backend == "dask":
            if self._store is None:
                raise ConfigError("--cluster: evaluate and predict on a cluster need a store "
                                  "path, not in-memory arrays")
            ranges = self._store.block_ranges(rows=rows)
            yield from map_blocks_ordered(self._store, ranges, fn, state)
            return
        for blk in self.blocks(rows):
            yield blk.start, blk.stop, fn(blk, state)

    def close(self) -> None:
        if self._store is not None and hasattr(self._store, "close"):
            self._store.close()


def _in_memory(X: Any, targets: Any = None, weights: Any = None) -> DataSource:
    """In-memory input through the one standardizer of :mod:`ranktide.store.memory_source`
    (the same rules as training: dense or sparse X, class ids / values / tags, weights)."""
    X = standard_matrix(X)
    n = X.shape[0]
    kind = infer_kind(targets)
    k = None
    if kind is not None:
        targets, k = standard_targets(targets, kind, n)
    return DataSource(
        name="<array>", n_rows=n, n_cols=X.shape[1], target_kind=kind, n_outputs=k,
        X=X, targets=targets, weights=standard_weights(weights, n),
    )


def open_source(source: Any, *, files: dict | None = None) -> DataSource:
    """Wrap a store path, an open store, a CSR matrix or ``(X, targets[, weights])``.

    A path that is a Matrix Market (``.mtx``) or ``.npz`` file, not a store, is
    read directly (:mod:`ranktide.scoring.files`); ``files`` then holds the
    ingest-style ``labels``, ``values``, ``tags``, ``weights`` and ``memory``.

    Raises
    ------
    StoreError
        When a path is neither a store nor such a file (the message says to
        run ``ranktide ingest`` first).
    InputError
        When in-memory input is malformed.
    """
    files = {k: v for k, v in (files or {}).items() if v is not None}
    if isinstance(source, (str, os.PathLike)):
        p = Path(source)
        if p.is_file() and not _is_hdf5(p):
            return _from_store(open_file_source(p, **files), str(source))
        if files.keys() - {"memory"}:
            raise ConfigError(f"{p}: --labels, --values, --tags and --weights go with a Matrix "
                              "Market or .npz file; a store holds its own targets")
        store = open_store(source)
        return _from_store(store, str(source))
    if hasattr(source, "blocks") and hasattr(source, "shape"):
        return _from_store(source, str(getattr(source, "path", "<store>")))
    if isinstance(source, tuple):
        if not 1 <= len(source) <= 3:
            raise InputError("<array>: pass (X,), (X, targets) or (X, targets, weights)")
        return _in_memory(*source)
    return _in_memory(source)


def _is_hdf5(p: Path) -> bool:
    """An HDF5 file (an HDF5 store) by its signature (HDF5 file format specification)."""
    with open(p, "rb") as fh:
        return fh.read(8) == b"\x89HDF\r\n\x1a\n"


def _from_store(store: Any, name: str) -> DataSource:
    n_rows, n_cols = store.shape
    return DataSource(
        name=name, n_rows=n_rows, n_cols=n_cols, target_kind=store.target_kind,
        n_outputs=store.n_outputs, store=store,
        output_names=None if store.output_names is None else [str(x) for x in store.output_names],
    )


def as_model(model: Any) -> Any:
    """A loaded model: ``model`` itself, or :func:`ranktide.model.load_model` of a path."""
    if isinstance(model, (str, os.PathLike)):
        return load_model(model)
    return model


def model_names(model: Any) -> list[str] | None:
    """The model's output names in column order, or None."""
    names = getattr(model, "output_names", None)
    if names is None:
        names = getattr(model, "names", None)
    return None if names is None else [str(s) for s in names]


def model_dims(model: Any) -> tuple[int, int]:
    """(n_features d, n_outputs k) of a model."""
    d = getattr(model, "n_features", None)
    k = getattr(model, "n_outputs", None)
    if d is None:
        d = np.shape(model.U)[0]
    if k is None:
        k = np.shape(model.b)[0]
    return int(d), int(k)


def score_block_rows(n_outputs: int, block_rows: int | None) -> int:
    """Rows per block: ``block_rows`` if given, else what keeps dense scores in budget."""
    if block_rows is not None:
        if int(block_rows) < 1:
            raise InputError(f"block_rows={block_rows}: must be at least 1")
        return int(block_rows)
    # scores, probabilities and one temporary, float64
    return max(1, SCORE_BUDGET // (3 * 8 * max(1, n_outputs)))


def check_compatible(model: Any, src: DataSource, *, need_targets: bool) -> tuple[int, int]:
    """Check that ``src`` has the model's feature count (and matching targets).

    Raises
    ------
    ModelError
        Feature or output count differ.
    InputError
        Targets are missing or of another kind than the model's loss.
    """
    d, k = model_dims(model)
    if src.n_cols != d:
        raise ModelError(
            f"{src.name}: {src.n_cols} feature columns but the model has {d}; use data hashed "
            "or ingested the same way as the training store"
        )
    if not need_targets:
        return d, k
    want = KIND_OF_LOSS.get(str(model.loss))
    if src.target_kind is None:
        raise InputError(
            f"{src.name}: has no targets; evaluate needs labelled data (use predict for "
            "unlabelled rows)"
        )
    if src.target_kind != want:
        raise InputError(
            f"{src.name}: targets are {src.target_kind} but a {model.loss} model needs {want}; "
            "evaluate with a store of the kind the model was trained on"
        )
    n_out = src.n_outputs
    if n_out is not None and (n_out > k if want == "classes" else n_out != k):
        raise ModelError(
            f"{src.name}: targets cover {n_out} outputs but the model has {k}; use a store with "
            "the model's classes, tags or outputs"
        )
    _check_names(model_names(model), src)
    return d, k


def _check_names(names: list[str] | None, src: DataSource) -> None:
    """Target ids must mean the same outputs in the store and in the model."""
    theirs = src.output_names
    if names is None or theirs is None:
        return
    for j, (a, b) in enumerate(zip(theirs, names, strict=False)):
        if a != b:
            raise ModelError(
                f"{src.name}: output {j} is {a!r} in the store but {b!r} in the model; ingest "
                "the evaluation data with the training data's label set (or split one store)"
            )


def _check_classes(y: np.ndarray, k: int, name: str, start: int) -> None:
    bad = np.flatnonzero((y < 0) | (y >= k))
    if bad.size:
        i = int(bad[0])
        raise InputError(
            f"{name}: row {start + i + 1}: class id {int(y[i])} is outside 0..{k - 1} of the "
            "model; evaluate with the store the model's classes came from"
        )


def progress_bar(total: int, *, enabled: bool, desc: str) -> Any:
    """A tqdm bar over rows, shown only when ``enabled`` and stderr is a terminal."""
    from tqdm.auto import tqdm

    show = bool(enabled) and sys.stderr.isatty()
    # delay: runs shorter than half a second never draw a bar
    return tqdm(total=total, disable=not show, desc=desc, unit="rows", unit_scale=True,
                leave=False, file=sys.stderr, delay=0.5)


def _metrics_of_block(blk: Any, state: tuple) -> Any:
    """The metric sums of one block (a module-level function, so workers can run it)."""
    model, k, top_k, name, kind = state
    if kind == "classes":
        _check_classes(np.asarray(blk.targets), k, name, blk.start)
    acc = make_metrics(str(model.loss), n_outputs=k, top_k=top_k,
                       output_names=model_names(model))
    acc.update(np.asarray(model.scores(blk.X)), blk.targets, blk.weights)
    return acc


def _merge_metrics(parts: list) -> Any:
    """Fold metric sums in block order (the pass's combine)."""
    acc = parts[0]
    for p in parts[1:]:
        acc = acc.merge(p)
    return acc


def _refuse_cluster_on_file(src: DataSource, backend: str) -> None:
    if backend == "dask" and getattr(src._store, "backend", None) == "file":
        raise ConfigError(f"{src.name}: --cluster reads a store the workers can open; run "
                          f"`ranktide ingest {src.name} --out STORE` first")


def evaluate(
    model: Any,
    source: Any,
    *,
    top_k: int = 5,
    block_rows: int | None = None,
    progress: bool = False,
    backend: str = "serial",
    files: dict | None = None,
    profile: Any = None,
) -> dict[str, Any]:
    """Evaluate ``model`` on labelled data, streamed block by block.

    Parameters
    ----------
    model : Model or path
        A loaded :class:`ranktide.model.Model` or its directory.
    source : path, Store, or tuple
        A store (path or open :class:`ranktide.store.Store`) with targets, or
        in-memory ``(X, targets)`` / ``(X, targets, weights)`` with ``X`` of
        shape (n, d) (scipy sparse or dense), targets as class ids (n,),
        values (n, k) or a sparse tag matrix (n, k).
    top_k : int
        The k of top-k accuracy (softmax) and precision@k (multilabel).
    block_rows : int, optional
        Rows per block; default keeps a block's dense scores near 64 MiB.
    progress : bool
        Show a progress bar on a terminal.
    backend : str
        A pass-engine backend (:func:`ranktide.passes.engine.run_pass`):
        ``"serial"`` (reads the next block while one is scored), ``"threads"``,
        or ``"dask"`` (the current dask.distributed client's workers; metric
        sums merged in block order).
    files : dict, optional
        With a Matrix Market or ``.npz`` file as ``source``: ``labels``,
        ``values``, ``tags``, ``weights`` (files, as ``ranktide ingest`` takes
        them) and ``memory`` (the budget a ``.npz`` is loaded within).
    profile : ranktide.passes.engine.PassProfile, optional
        Per block and phase timings of the pass.

    Returns
    -------
    dict
        The metrics of the loss (see :mod:`ranktide.scoring.metrics`): softmax
        ``accuracy``, ``top_k_accuracy``, ``log_loss``, ``macro_f1``,
        ``worst_class_recall``; multilabel ``micro_f1``, ``macro_f1``,
        ``precision_at_k``; squared ``rmse``, ``r2`` and their per-output
        lists. Also ``loss``, ``n_rows``, ``total_weight``, ``mean_loss`` and
        ``source``.

    Raises
    ------
    RanktideError
        Data without targets, of another kind or shape than the model's.
    """
    model = as_model(model)
    close = isinstance(source, (str, os.PathLike))
    src = open_source(source, files=files)
    try:
        if hasattr(src._store, "use_output_names") and model_names(model) is not None:
            src._store.use_output_names(model_names(model))  # a labels file: by name
            src.output_names = src._store.output_names
            src.n_outputs = src._store.n_outputs
        _, k = check_compatible(model, src, need_targets=True)
        _refuse_cluster_on_file(src, backend)
        empty = make_metrics(str(model.loss), n_outputs=k, top_k=top_k,
                             output_names=model_names(model))
        rows = score_block_rows(k, block_rows)
        state = (model, k, top_k, src.name, src.target_kind)
        acc = run_pass(src, _metrics_of_block, _merge_metrics, state=state, backend=backend,
                       block_rows=rows, progress=progress, desc="evaluate", profile=profile)
        acc = empty if acc is None else acc
        if not acc.total_weight > 0:
            raise InputError(
                f"{src.name}: {acc.n_rows} rows and no positive row weight; evaluate on a "
                "non-empty store"
            )
        out = acc.result()
    finally:
        if close:
            src.close()
    out["source"] = src.name if src.name == "<array>" else str(Path(src.name))
    return out
