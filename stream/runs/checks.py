"""Checks a training run makes before it reads data or makes its run directory.

:func:`check_train_output` refuses an output that is, contains or lies inside
an input (:mod:`ranktide.outputs`); :func:`check_train_inputs` checks the
training store's shape, the validation store and the memory the solver's
fixed arrays need (from the shapes, with the planner of
:mod:`ranktide.passes.budget`) before anything is allocated, so a run that
cannot go ahead fails at once with one line and leaves nothing behind.
"""

from __future__ import annotations

import os
from typing import Any

from ranktide.errors import ConfigError, InputError
from ranktide.losses import check_loss_source
from ranktide.outputs import check_output, check_source, format_size
from ranktide.passes.budget import parse_memory, plan_blocks
from ranktide.store.reader import open_store

__all__ = ["check_train_output", "check_train_inputs", "check_memory", "fixed_memory"]

#: a budget no machine has, to read the planner's fixed figures without a refusal
_UNBOUNDED = 2**62


def _where(source: Any) -> Any:
    if isinstance(source, (str, os.PathLike)):
        return source
    return getattr(source, "path", None)


def check_train_output(out: str | os.PathLike, source: Any, valid: Any, class_weight: Any, *,
                       overwrite: bool) -> None:
    """Refuse a run directory that would replace or sit inside an input.

    Parameters
    ----------
    out : path
        The run directory.
    source, valid : store path, Store or in-memory data
    class_weight : "balanced", path, array or None
    overwrite : bool

    Raises
    ------
    ConfigError, OutputExistsError, InputError
    """
    inputs = {"the training store": _where(source), "--valid": _where(valid)}
    if isinstance(class_weight, (str, os.PathLike)) and class_weight != "balanced":
        inputs["--class-weight"] = class_weight
    for what, path in inputs.items():
        if path is not None:
            check_source(path, what)
    check_output(out, inputs, overwrite=overwrite, kind="dir", replace_empty_dir=True,
                 exists_hint=f", or continue it with ranktide resume {out}")


def fixed_memory(src: Any, *, power_size: int, expand_size: int, backend: str = "serial",
                 dense_gradient: bool | None = None, rank: int = 1) -> tuple[int, dict[str, int]]:
    """Bytes a pass holds whatever the block size (model, accumulators, partials).

    Computed by the memory planner from the shapes at rank ``rank`` (the
    smallest, 1, for a fit that starts from zero) and without the dense
    gradient unless it is forced. Returns the total and its parts.
    """
    plan = plan_blocks(src, budget=_UNBOUNDED, rank=int(rank), omega_cols=int(power_size),
                       psi_cols=int(expand_size), keep_projections=False,
                       dense_gradient=bool(dense_gradient), backend=backend)
    parts = {k: v for k, v in plan.breakdown.items()
             if k not in ("blocks", "chunks", "projections")}  # these shrink with the blocks
    return int(sum(parts.values())), parts


def check_train_inputs(src: Any, loss: str, valid: Any, *, memory: Any, power_size: int,
                       expand_size: int, dense_gradient: bool | None, backend: str,
                       block_rows: int | None) -> None:
    """Check everything a run needs that can be known before its first pass.

    Raises
    ------
    InputError
        An empty training store, or a validation store that does not match
        it (columns, targets, outputs).
    ConfigError
        ``block_rows`` below 1, or a memory budget below what the solver's
        fixed arrays need (the need, the budget and what to change).
    """
    where = _where(src) or "in-memory data"
    n, d = (int(x) for x in src.shape)
    if block_rows is not None and (isinstance(block_rows, bool) or int(block_rows) < 1):
        raise ConfigError(f"--block-rows {block_rows}: must be at least 1")
    if n == 0:
        raise InputError(f"{where}: the store has no rows; there is nothing to train on")
    if int(getattr(src, "nnz", 1)) == 0:
        raise InputError(f"{where}: the store has no entries (every row is empty); there is "
                         "nothing to learn from: re-ingest the data")
    if valid is not None:
        _check_valid(valid, src, loss, d)
    check_memory(src, memory, power_size=power_size, expand_size=expand_size,
                 backend=backend, dense_gradient=dense_gradient)


def check_memory(src: Any, memory: Any, *, power_size: int = 6, expand_size: int = 6,
                 backend: str = "serial", dense_gradient: bool | None = None,
                 rank: int = 1) -> None:
    """Refuse at once when the fixed arrays of a pass exceed the memory budget.

    Raises
    ------
    ConfigError
        Naming the shapes, the need (and its largest part), the budget and
        what to change.
    """
    where = _where(src) or "in-memory data"
    n, d = (int(x) for x in src.shape)
    budget = parse_memory(memory)
    need, parts = fixed_memory(src, power_size=power_size, expand_size=expand_size,
                               backend=backend, dense_gradient=dense_gradient, rank=rank)
    if need >= budget:
        k = int(src.n_outputs or 0)
        biggest = max(parts, key=parts.get)
        fix = "raise --memory, or use fewer columns (hash the features into fewer)"
        if dense_gradient:
            fix = "turn the dense gradient off, " + fix
        elif rank > 1:
            fix = "lower --rank, " + fix
        raise ConfigError(
            f"{where}: {n} rows x {d} columns with {k} outputs need at least "
            f"{format_size(need)} before any block is read (mostly {biggest}: "
            f"{format_size(parts[biggest])}); the memory budget is {format_size(budget)}: {fix}"
        )


def _check_valid(valid: Any, src: Any, loss: str, d: int) -> None:
    opened = isinstance(valid, (str, os.PathLike))
    if opened:
        check_source(valid, "--valid store")
        v = open_store(valid)
    elif isinstance(valid, tuple) or not hasattr(valid, "shape"):
        return  # in-memory validation data is checked when it is evaluated
    else:
        v = valid
    try:
        where = _where(valid)
        try:
            check_loss_source(loss, v)
        except InputError as exc:
            raise InputError(f"--valid {exc}") from None
        if int(v.shape[1]) != d:
            raise InputError(f"--valid {where}: has {int(v.shape[1])} columns but the training "
                             f"store has {d}; give a validation store made like the training one")
        k, kv = int(src.n_outputs or 0), int(v.n_outputs or 0)
        if kv != k:
            raise InputError(f"--valid {where}: has {kv} outputs but the training store has "
                             f"{k}; split both from one store (ranktide split)")
        if int(v.shape[0]) == 0:
            raise InputError(f"--valid {where}: the store has no rows")
    finally:
        if opened:
            v.close()
