"""Streamed predictions written to a file (CSV, ``.npy`` or zarr).

Scores are computed one row block at a time and appended to the output, so
memory holds one block of scores; the output is built under a temporary
sibling name and renamed into place when complete.

Formats (chosen by the output's suffix):

``.csv``
    One line per input row. Softmax and multilabel models:
    ``row,label_1,score_1,...,label_K,score_K`` with the K best labels in
    decreasing order (``prob_i`` instead of ``score_i`` with ``proba``);
    labels are the model's output names, or ids when it has none. Squared
    models: ``row`` and one column of predicted values per output.
``.npy``
    The full (n, k) float32 matrix of scores (probabilities with ``proba``;
    values for squared models), written through a memory map.
``.zarr``
    A zarr group with ``labels`` (n, K) int32 and ``scores`` (n, K) float32
    (top-K; ``values`` (n, k) for squared models) and the output names in its
    attributes.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.atomic import atomic_dir
from ranktide.errors import ConfigError, OutputExistsError
from ranktide.losses import get_loss
from ranktide.passes.engine import run_pass
from ranktide.scoring.evaluate import (
    _refuse_cluster_on_file,
    as_model,
    check_compatible,
    model_names,
    open_source,
    progress_bar,
    score_block_rows,
)

__all__ = ["predict_to_file", "top_k_of", "FORMATS"]

FORMATS = (".csv", ".npy", ".zarr")


def top_k_of(values: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Column ids and values of the ``k`` largest entries of each row, decreasing.

    Ties go to the lower column id (as :meth:`ranktide.model.Model.top_k`).

    Parameters
    ----------
    values : ndarray, shape (n, m)
    k : int
        At most ``m``.

    Returns
    -------
    labels : ndarray of int32, shape (n, k)
    top : ndarray, shape (n, k)
    """
    n, m = values.shape
    k = min(int(k), m)
    if k < m:
        idx = np.sort(np.argpartition(-values, k - 1, axis=1)[:, :k], axis=1)
    else:
        idx = np.broadcast_to(np.arange(m), (n, m))
    part = np.take_along_axis(values, idx, axis=1)
    order = np.argsort(-part, axis=1, kind="stable")
    labels = np.take_along_axis(idx, order, axis=1).astype(np.int32)
    return labels, np.take_along_axis(part, order, axis=1)


def _csv_field(text: str) -> str:
    if any(c in text for c in ',"\n\r'):
        return '"' + text.replace('"', '""') + '"'
    return text


def _join_columns(columns: list[np.ndarray]) -> str:
    """Comma-join string columns (each shape (n,)) into CSV lines, column by column."""
    line = columns[0]
    for col in columns[1:]:
        line = np.char.add(np.char.add(line, ","), col)
    return "\n".join(line.tolist()) + "\n" if line.size else ""


class _CsvWriter:
    def __init__(self, tmp: Path, *, header: list[str], names: np.ndarray, top: bool) -> None:
        self.fh = open(tmp, "w", encoding="utf-8", newline="")
        self.fh.write(",".join(_csv_field(h) for h in header) + "\n")
        self.names = names
        self.top = top

    def write(self, start: int, labels: np.ndarray | None, vals: np.ndarray) -> None:
        n = vals.shape[0]
        cols = [np.char.mod("%d", np.arange(start, start + n))]
        for j in range(vals.shape[1]):  # one step per output column, not per row
            if self.top:
                cols.append(self.names[labels[:, j]])
            cols.append(np.char.mod("%.9g", vals[:, j]))
        self.fh.write(_join_columns(cols))

    def finish(self) -> None:
        self.fh.flush()
        os.fsync(self.fh.fileno())
        self.fh.close()

    def abort(self) -> None:
        self.fh.close()


class _NpyWriter:
    def __init__(self, tmp: Path, *, n: int, k: int) -> None:
        self.mm = np.lib.format.open_memmap(tmp, mode="w+", dtype=np.float32, shape=(n, k))

    def write(self, start: int, labels: np.ndarray | None, vals: np.ndarray) -> None:
        self.mm[start : start + vals.shape[0]] = vals

    def finish(self) -> None:
        self.mm.flush()
        del self.mm

    def abort(self) -> None:
        del self.mm


class _ZarrWriter:
    def __init__(self, tmp: Path, *, n: int, width: int, top: bool, attrs: dict) -> None:
        import zarr

        self.group = zarr.open_group(str(tmp), mode="w")
        chunk = (max(1, min(n, (1 << 20) // max(1, width))), width)
        if top:
            self.labels = self.group.create_array(
                "labels", shape=(n, width), dtype="int32", chunks=chunk
            )
        self.vals = self.group.create_array(
            "scores" if top else "values", shape=(n, width), dtype="float32", chunks=chunk
        )
        self.top = top
        self.attrs = attrs

    def write(self, start: int, labels: np.ndarray | None, vals: np.ndarray) -> None:
        stop = start + vals.shape[0]
        if self.top:
            self.labels[start:stop] = labels
        self.vals[start:stop] = vals.astype(np.float32)

    def finish(self) -> None:
        self.group.attrs.update(self.attrs)  # last: a complete group has its attributes

    def abort(self) -> None:
        pass


def _format_of(out: Path) -> str:
    suffix = out.suffix.lower()
    if suffix not in FORMATS:
        raise ConfigError(
            f"{out}: unknown output format {suffix or '(no suffix)'!r}; name the file *.csv, "
            "*.npy or *.zarr"
        )
    return suffix


def predict_to_file(
    model: Any,
    source: Any,
    out: str | os.PathLike,
    *,
    top_k: int = 5,
    proba: bool = False,
    block_rows: int | None = None,
    progress: bool = False,
    overwrite: bool = False,
    backend: str = "serial",
    memory: Any = None,
) -> dict[str, Any]:
    """Predict every row of ``source`` and write the predictions to ``out``.

    Parameters
    ----------
    model : Model or path
        A loaded :class:`ranktide.model.Model` or its directory.
    source : path, Store, or scipy sparse matrix
        The rows to predict: a store (targets are ignored), a Matrix Market
        (``.mtx``) or ``.npz`` file read directly (:mod:`ranktide.scoring.files`),
        or an in-memory (n, d) matrix.
    out : path
        Output file; its suffix picks the format (see the module docstring).
    top_k : int
        Labels per row for CSV and zarr outputs (softmax, multilabel).
    proba : bool
        Write probabilities (softmax or sigmoid) instead of raw scores.
    block_rows : int, optional
        Rows per block; default keeps a block's dense scores near 64 MiB.
    progress : bool
        Show a progress bar on a terminal.
    overwrite : bool
        Replace an existing ``out``.
    backend : str
        A pass-engine backend: ``"serial"`` (reads the next block while one is
        scored), ``"threads"``, or ``"dask"`` (the current dask.distributed
        client's workers, a few blocks in flight, written here in row order).
    memory : int or str, optional
        Budget within which a ``.npz`` source is loaded (default a quarter of RAM).

    Returns
    -------
    dict
        ``path``, ``format``, ``n_rows``, ``top_k`` (None for full matrices)
        and ``values`` (``"scores"``, ``"probabilities"`` or ``"values"``).

    Raises
    ------
    ConfigError
        Unknown suffix, ``top_k < 1``, or ``proba`` with a squared model.
    OutputExistsError
        ``out`` exists and ``overwrite`` is false.
    """
    out = Path(out)
    fmt = _format_of(out)
    if int(top_k) < 1:
        raise ConfigError(f"top_k={top_k}: must be at least 1")
    if out.exists() and not overwrite:
        raise OutputExistsError(f"{out}: already exists; pass --overwrite to replace it")
    model = as_model(model)
    values = not get_loss(model.loss).has_probabilities
    if proba and values:
        raise ConfigError("--proba: a squared-loss model predicts values, not probabilities")
    close = isinstance(source, (str, os.PathLike))
    src = open_source(source, files={"memory": memory})
    try:
        _, k = check_compatible(model, src, need_targets=False)
        _refuse_cluster_on_file(src, backend)
        return _write(model, src, out, fmt, k=k, top_k=min(int(top_k), k), proba=proba,
                      values=values, block_rows=block_rows, progress=progress,
                      overwrite=overwrite, backend=backend)
    finally:
        if close:
            src.close()


def _write(model: Any, src: Any, out: Path, fmt: str, *, k: int, top_k: int, proba: bool,
           values: bool, block_rows: int | None, progress: bool, overwrite: bool,
           backend: str = "serial") -> dict:
    names_list = model_names(model) or [str(i) for i in range(k)]
    top = not values and fmt != ".npy"
    kind = "values" if values else ("probabilities" if proba else "scores")
    with atomic_dir(out, overwrite=overwrite) as tmp:
        if fmt == ".csv":
            header = ["row"]
            if top:
                word = "prob" if proba else "score"
                for j in range(1, top_k + 1):
                    header += [f"label_{j}", f"{word}_{j}"]
            else:
                header += names_list
            names = np.array([_csv_field(s) for s in names_list])
            writer: Any = _CsvWriter(tmp, header=header, names=names, top=top)
        elif fmt == ".npy":
            writer = _NpyWriter(tmp, n=src.n_rows, k=k)
        else:
            attrs = {"format": "ranktide-predictions", "values": kind, "n_rows": src.n_rows,
                     "output_names": names_list, "top_k": top_k if top else None}
            writer = _ZarrWriter(tmp, n=src.n_rows, width=top_k if top else k, top=top,
                                 attrs=attrs)
        try:
            _fill(writer, model, src, k=k, top_k=top_k, proba=proba, top=top,
                  block_rows=block_rows, progress=progress, backend=backend)
            writer.finish()
        except BaseException:
            writer.abort()
            raise
    return {"path": str(out), "format": fmt.lstrip("."), "n_rows": src.n_rows,
            "top_k": top_k if top else None, "values": kind}


class _WriteInOrder:
    """The pass's combine for predictions: each block's rows go to the output in block order.

    The engine folds partials strictly in block order on this process, so
    ``combine([acc, block])`` writes the block and keeps only a count: memory
    holds the blocks in flight, never the predictions.
    """

    def __init__(self, writer: Any) -> None:
        self.writer = writer

    def __call__(self, parts: list) -> int:
        done = 0
        for part in parts:
            if isinstance(part, int):
                done += part
                continue
            start, labels, vals = part
            self.writer.write(start, labels, vals)
            done += vals.shape[0]
        return done


def _fill(writer: Any, model: Any, src: Any, *, k: int, top_k: int, proba: bool, top: bool,
          block_rows: int | None, progress: bool, backend: str = "serial") -> None:
    rows = score_block_rows(k, block_rows)
    state = (model, top_k, proba, top)
    if backend == "dask":
        # a worker's range would come back whole; the cluster map keeps a few blocks in flight
        with progress_bar(src.n_rows, enabled=progress, desc="predict") as bar:
            for a, z, (labels, vals) in src.map_blocks(rows, _predict_block, state,
                                                       backend=backend):
                writer.write(a, labels, vals)
                bar.update(z - a)
        return
    run_pass(src, _predict_rows, _WriteInOrder(writer), state=state, backend=backend,
             block_rows=rows, progress=progress, desc="predict")


def _predict_rows(blk: Any, state: tuple) -> tuple[int, np.ndarray | None, np.ndarray]:
    """One block's first row, top labels and values (a module-level block function)."""
    labels, vals = _predict_block(blk, state)
    return int(blk.start), labels, vals


def _predict_block(blk: Any, state: tuple) -> tuple[np.ndarray | None, np.ndarray]:
    """Top labels and their values (or all values) of one block (module-level for workers)."""
    model, top_k, proba, top = state
    if not top:
        return None, np.asarray(model.predict_proba(blk.X) if proba else model.scores(blk.X))
    Z = np.asarray(model.scores(blk.X), dtype=np.float64)
    labels, vals = top_k_of(Z, top_k)
    if proba:
        vals = _probabilities(vals, Z, str(model.loss))
    return labels, vals


def _probabilities(top: np.ndarray, Z: np.ndarray, loss: str) -> np.ndarray:
    """Probabilities of the top scores ``top`` (n, K) given all scores ``Z`` (n, k)."""
    return get_loss(loss).probabilities(Z, top)

