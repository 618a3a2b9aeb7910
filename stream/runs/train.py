"""``train()``: fit a trace-norm regularized model, one lam or a regularization path.

The Python face of ``ranktide train``. It validates the settings, builds a
:class:`ranktide.solver.greedy.GreedySolver`, runs it for one ``lam`` (given, or a
fraction of ``lam_max``) or along a path ``lam_j = lam_max * ratio^(j/(m-1))``
with warm starts and validation metrics at each value, and writes the run
directory (``config.json``, ``history.jsonl``, ``model/``) when asked.
"""

from __future__ import annotations

import hashlib
import math
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.atomic import temp_sibling
from ranktide.errors import InputError
from ranktide.jsondata import json_data
from ranktide.losses import check_loss_source
from ranktide.model import save_model
from ranktide.passes.engine import run_pass
from ranktide.runs.checkpoint import CheckpointSchedule
from ranktide.runs.checks import check_train_inputs, check_train_output
from ranktide.runs.config import PATH_EXTEND, PATH_FLOOR, PATH_TOL, TrainConfig
from ranktide.runs.fitting import (
    NO_FIT,
    VALIDATION_METRIC,
    PathPoint,
    TrainResult,
    _fit_meta,
    _grad_b,
    _model,
    _no_fit,
    _path_of,
    _run_solver,
    _with,
)
from ranktide.runs.path import path_lams, train_path
from ranktide.runs.rundir import RunDir, RunRecorder
from ranktide.solver.config import SolverConfig
from ranktide.solver.greedy import GreedySolver
from ranktide.store.memory_source import as_source

__all__ = ["train", "TrainResult", "PathPoint", "resolve_class_weights", "VALIDATION_METRIC",
           "PATH_FLOOR", "PATH_EXTEND", "PATH_TOL", "NO_FIT", "path_lams"]

#: status of a run that stopped before it could fit a model (no model is written)


# ---------------------------------------------------------------- inputs


def _count_block(block: Any, k: int) -> np.ndarray:
    return np.bincount(np.asarray(block.targets, dtype=np.int64), minlength=k).astype(np.float64)


def _sum_combine(parts: list) -> np.ndarray:
    acc = parts[0]
    for p in parts[1:]:
        acc = acc + p
    return acc


def resolve_class_weights(class_weight: Any, src: Any, *, backend: str = "serial",
                          block_rows: int | None = None) -> np.ndarray | None:
    """Class weights (k,) from ``"balanced"``, a file (.npy or text) or an array.

    ``"balanced"`` gives ``n / (k * count_c)`` (counted in one pass over the
    targets; a class with no rows gets weight 0).
    """
    if class_weight is None:
        return None
    k = int(src.n_outputs)
    where = "class weights"
    if isinstance(class_weight, str) and class_weight == "balanced":
        counts = run_pass(src, _count_block, _sum_combine, state=k, block_rows=block_rows,
                          backend=backend, desc="class counts")
        n = float(counts.sum())
        cw = np.zeros(k)
        seen = counts > 0
        cw[seen] = n / (k * counts[seen])
        return cw
    if isinstance(class_weight, (str, os.PathLike)):
        p = Path(class_weight)
        where = str(p)
        if not p.is_file():
            raise InputError(f"{p}: class weight file not found; give 'balanced' or a file "
                             f"with {k} numbers")
        try:
            if p.suffix == ".npy":
                cw = np.load(p, allow_pickle=False)
            else:
                cw = np.loadtxt(p, dtype=np.float64, ndmin=1)
        except (ValueError, OSError) as exc:
            raise InputError(f"{p}: not readable as {k} class weights ({exc}); write one "
                             "number per class") from None
    else:
        cw = class_weight
    cw = np.asarray(cw, dtype=np.float64).reshape(-1)
    if cw.shape != (k,):
        raise InputError(f"{where}: {cw.size} class weights for {k} classes; give one per class")
    bad = np.flatnonzero(~np.isfinite(cw) | (cw < 0))
    if bad.size:
        raise InputError(f"{where}: entry {int(bad[0]) + 1} is {float(cw[bad[0]])}; class "
                         "weights must be finite and >= 0")
    if not np.any(cw > 0):
        raise InputError(f"{where}: every class weight is 0; give some class a positive weight")
    return cw


def _fingerprint(src: Any) -> str:
    fp = getattr(src, "fingerprint", None)
    if fp:
        return str(fp)
    # in-memory data: a digest of its block contents (small enough to be in memory)
    h = hashlib.sha256()
    for a, b in src.block_ranges():
        blk = src.read_block(a, b)
        for arr in (blk.X.indptr, blk.X.indices, blk.X.data):
            h.update(np.ascontiguousarray(arr).tobytes())
        t = blk.targets
        if t is not None:
            parts = (t.indptr, t.indices) if hasattr(t, "indptr") else (np.asarray(t),)
            for arr in parts:
                h.update(np.ascontiguousarray(arr).tobytes())
        if blk.weights is not None:
            h.update(np.ascontiguousarray(blk.weights).tobytes())
    return "mem-" + h.hexdigest()[:32]



# ---------------------------------------------------------------- the run


class _Recorder:
    """Per-pass hook: keeps the history, appends it to the run dir, calls the user callback."""

    def __init__(self, run: Any, callback: Callable | None, printer: Callable | None,
                 hook: Callable[[], bool] | None = None) -> None:
        self.run = run
        self.callback = callback
        self.printer = printer
        self.hook = hook  # checkpoint cadence / stop flag (ranktide.runs.rundir.RunRecorder)
        self.history: list[dict] = []

    def record(self, rec: dict) -> None:
        line = json_data(dict(rec, kind="pass"))
        self.history.append(line)
        if self.run is not None:
            self.run.append_history(line)

    def __call__(self, rec: dict) -> Any:
        self.record(rec)
        if self.printer is not None:
            self.printer(rec)
        if self.hook is not None and self.hook():
            return True
        if self.callback is not None:
            return self.callback(rec)
        return None

    def event(self, rec: dict) -> None:
        """A path value finished: into the run's history and, as ``kind="path"``, the printer."""
        if self.run is not None:
            self.run.append_history(json_data(rec))
        if self.printer is not None:
            self.printer(dict(rec))


def train(
    source: Any,
    *,
    loss: str,
    lam: float | None = None,
    lam_scale: float | None = None,
    path_steps: int | None = None,
    path_floor: float = PATH_FLOOR,
    path_extend: int = PATH_EXTEND,
    path_tol: float | None = PATH_TOL,
    refit_with_valid: bool = False,
    valid: Any = None,
    tol: float = 1e-4,
    max_passes: int = 100,
    max_seconds: float | None = None,
    memory: int | str | None = None,
    seed: int = 0,
    block_rows: int | None = None,
    backend: str = "serial",
    class_weight: Any = None,
    callback: Callable[[dict], Any] | None = None,
    progress: bool = False,
    out: str | os.PathLike | None = None,
    overwrite: bool = False,
    targets: Any = None,
    weights: Any = None,
    dense_gradient: bool | None = None,
    power_size: int = 6,
    expand_size: int = 6,
    on_pass: Callable[[dict], None] | None = None,
    checkpoint_seconds: float | None = 60.0,
    checkpoint_passes: int | None = None,
    stop: Any = None,
    resume_point: Any = None,
) -> TrainResult:
    """Fit ``min f(W, b) + lam ||W||_*`` on ``source`` with the greedy low-rank solver.

    Parameters
    ----------
    source : store path, Store, ``(X, targets[, weights])`` or scipy CSR
        With a bare CSR matrix give ``targets=`` (and optionally ``weights=``).
    loss : {"softmax", "squared", "multilabel"}
    lam, lam_scale, path_steps : exactly one
        A penalty, a fraction of ``lam_max``, or the number ``m`` of path values
        ``lam_j = lam_max * path_floor^(j / (m - 1))``, j = 0..m-1.
    path_floor : float
        Smallest requested path value as a share of ``lam_max`` (default
        :data:`PATH_FLOOR`).
    path_extend : int
        When the best value is the last requested one, the path goes on down
        the same geometric sequence, at most this many more values (default
        :data:`PATH_EXTEND`; 0: never), until validation has worsened twice
        in a row.
    path_tol : float or None
        Relative gap to which each path value is solved (default
        :data:`PATH_TOL`, never below ``tol``); the chosen value is then
        finished to ``tol`` from its own factors before the debiasing refit.
        None solves every value to ``tol``.
    refit_with_valid : bool
        After the path has chosen (``lam`` and the debiasing factor, on the
        validation rows), fit the chosen model again on the training and
        validation rows together, from its own factors; the validation
        figures in ``model.json`` stay those of the path. Default False.
    valid : store path, Store or tuple
        Validation data (required with ``path_steps``): softmax accuracy, squared
        RMSE, multilabel micro-F1 pick the best lam; the path stops early
        when validation worsens twice in a row.
    tol : float
        Relative gap estimate at which a fit stops (default 1e-4).
    max_passes : int
        Passes allowed per value of lam (default 100).
    max_seconds : float, optional
        Wall-clock budget of the whole run.
    memory : int or str, optional
        Memory budget (``"4GB"``); default a quarter of RAM.
    seed : int
        Seed of the solver's random starting blocks.
    block_rows : int, optional
        Rows per pass block (default from the memory planner).
    backend : {"serial", "threads"}
    class_weight : "balanced", path or array (k,), optional
        Softmax only.
    callback : callable, optional
        Called with each pass's record; True or ``"stop"`` stops the run.
    progress : bool
        Progress bars on passes.
    out : path, optional
        Run directory: ``config.json``, ``history.jsonl`` (one line per pass,
        appended and flushed), ``model/``.
    overwrite : bool
        Replace an existing run directory.
    targets, weights : optional
        With a bare CSR ``source``.
    dense_gradient : bool, optional
        Force (True) or forbid (False) the dense-gradient path; default by budget.
    power_size, expand_size : int
        Block sizes ``p`` and ``p'`` of the solver (see :class:`SolverConfig`).
    on_pass : callable, optional
        Called with each pass's record for display (never stops the run); on
        a path also with each finished value's record (``kind == "path"``:
        ``index``, ``lam``, ``rank``, ``passes``, ``seconds``, ``val_metric``,
        ``val_metric_name``, ``best_index``, ``requested``, ``extended``).
    checkpoint_seconds, checkpoint_passes : optional
        With ``out``: a checkpoint every ``checkpoint_seconds`` of training
        (default 60) or every ``checkpoint_passes`` passes, whichever comes
        first, at the end of each path step and at the end.
    stop : ranktide.signals.StopFlag, optional
        Checked after every block and refinement step; when set, the
        unfinished outer iteration is abandoned, a checkpoint of the state
        before it is written and the run ends with status ``"interrupted"``
        (no model is written).
    resume_point : ranktide.runs.resume.ResumePoint, optional
        Continue a run from a checkpoint (see :func:`ranktide.runs.resume.resume`).

    Returns
    -------
    TrainResult
    """
    TrainConfig(loss=loss, lam=lam, lam_scale=lam_scale, path_steps=path_steps,
                path_floor=path_floor, path_extend=path_extend, path_tol=path_tol,
                refit_with_valid=refit_with_valid,
                valid=_path_of(valid),
                has_valid=valid is not None,
                tol=tol, max_passes=max_passes, max_seconds=max_seconds, memory=memory,
                seed=seed, block_rows=block_rows, backend=backend, class_weight=class_weight,
                dense_gradient=dense_gradient, power_size=power_size, expand_size=expand_size,
                checkpoint_seconds=checkpoint_seconds,
                checkpoint_passes=checkpoint_passes)  # the one validator of the settings
    if resume_point is not None:  # runs written before the path could extend: no extension
        path_extend = int(resume_point.run.settings.get("path_extend") or 0)
        path_tol = resume_point.run.settings.get("path_tol")  # absent: every value to tol

    if out is not None:  # before anything is read or made (ranktide.outputs)
        check_train_output(out, source, valid, class_weight, overwrite=overwrite)
    opened = isinstance(source, (str, os.PathLike))
    src = as_source(source, targets=targets, weights=weights)
    solver = run = None
    try:
        check_loss_source(loss, src)
        check_train_inputs(src, loss, valid, memory=memory, power_size=power_size,
                           expand_size=expand_size, dense_gradient=dense_gradient,
                           backend=backend, block_rows=block_rows)
        cw = resolve_class_weights(class_weight, src, backend=backend, block_rows=block_rows)
        cfg = SolverConfig(loss=loss, lam=lam, lam_scale=lam_scale, tol=tol,
                           max_passes=int(max_passes), seed=int(seed), memory=memory,
                           block_rows=block_rows, backend=backend, class_weights=cw,
                           dense_gradient=dense_gradient, power_size=power_size,
                           expand_size=expand_size,
                           # a dask worker reads the store itself, by path: full columns there
                           used_columns=backend != "dask")
        if resume_point is not None:
            cfg = resume_point.solver_config(cfg)
        scratch = None
        if out is not None:
            scratch = temp_sibling(out, "scratch")  # the run has no name yet
        elif resume_point is not None:
            scratch = Path(resume_point.run.path) / "scratch"
        solver = GreedySolver(src, cfg, progress=progress,
                              state=None if resume_point is None else resume_point.state,
                              stop=stop, scratch_dir=scratch)
        fingerprint = _fingerprint(src)
        run = None if resume_point is None else resume_point.run
        if out is not None and run is None:
            run = _create_run(out, src, cfg, fingerprint, overwrite=overwrite,
                              extra={"path_steps": path_steps, "path_floor": path_floor,
                                     "path_extend": path_extend if path_steps else None,
                                     "path_tol": path_tol if path_steps else None,
                                     "refit_with_valid": bool(refit_with_valid),
                                     "class_weight": class_weight if isinstance(
                                         class_weight, str) else None,
                                     "max_seconds": max_seconds,
                                     "valid": _path_of(valid),
                                     "checkpoint_seconds": checkpoint_seconds,
                                     "checkpoint_passes": checkpoint_passes})
        ctx, ckpt = _checkpointing(run, solver, resume_point, checkpoint_seconds,
                                   checkpoint_passes, stop)
        hook = stop if ckpt is None else (lambda: ckpt.after_pass(solver.state))
        if ckpt is not None:  # keep the checkpoint schedule during a long refinement
            solver.refine_progress = lambda _p: ckpt.during_step(solver.state_before_step())
        rec = _Recorder(run, callback, on_pass, hook=hook)
        if resume_point is not None:
            rec.history = [h for h in run.read_history() if h.get("kind") == "pass"]
        t0 = time.perf_counter()
        deadline = None if max_seconds is None else t0 + float(max_seconds)
        if path_steps is None:
            result = _train_single(solver, rec, deadline, fingerprint, src, loss)
        else:
            result = train_path(solver, rec, deadline, fingerprint, src, loss, int(path_steps),
                                 float(path_floor), int(path_extend), valid, block_rows, ctx,
                                 path_tol, bool(refit_with_valid))
        if stop is not None and stop:
            if run is not None and not run.published:  # it would replace an older run
                run.discard()
                return _with(result, status="interrupted", run_dir=None,
                             message=f"interrupted by {stop.signal_name}; {out} is unchanged")
            return _with(result, status="interrupted",
                         run_dir=None if run is None else str(run.path),
                         message=f"interrupted by {stop.signal_name}; checkpoint written"
                         if run is not None else f"interrupted by {stop.signal_name}")
        if ckpt is not None:
            ctx.finished = True
            ckpt.checkpoint(solver.state)
        if run is not None:
            if result.model is not None:  # a run that could not fit writes no model
                save_model(run.model_dir, result.model, overwrite=True)
            run.complete()  # the run gets its name (replacing an older one) only now
            result = _with(result, run_dir=str(run.path))
        return result
    finally:
        if run is not None:
            run.discard()  # a run that never got its name (failed): nothing is left
        if solver is not None:
            solver.remove_scratch()
        if opened:
            src.close()


class _RunContext:
    """What a checkpoint holds beside the solver state (``ctx`` in ranktide.runs.rundir).

    The planner's decisions (block rows, dense gradient), so a resumed run
    reads the same blocks; on a path, the position (``path``: index, whether
    its lam is set, points so far, the early-stop count) and the best model
    so far (``best``: arrays U, s, V, b).
    """

    def __init__(self, solver: GreedySolver, saved: dict | None = None,
                 best: dict | None = None) -> None:
        saved = saved or {}
        rows = solver.config.block_rows
        # without fixed rows the solver re-plans before every pass from its state (rank,
        # widths, the floor it keeps), so a resumed run reads the same blocks: "per_pass";
        # an older checkpoint's single block_rows is still forced on resume
        self.plan = saved.get("plan") or {"block_rows": None if rows is None else int(rows),
                                          "dense_gradient": bool(solver.dense),
                                          "per_pass": rows is None}
        self.path: dict | None = saved.get("path")
        self.best: dict | None = best or None
        self.finished = False
        self.recorder: Any = None  # the RunRecorder, for the path-step checkpoints

    def __call__(self) -> tuple[dict, dict]:
        arrays = dict(self.best) if self.best else {}
        return arrays, {"plan": self.plan, "path": self.path, "finished": self.finished}


def _checkpointing(run, solver, resume_point, seconds, passes, stop):
    """The run context and the checkpoint hook (None without a run directory)."""
    if resume_point is not None:
        ctx = _RunContext(solver, resume_point.context, resume_point.context_arrays)
    else:
        ctx = _RunContext(solver)
    if run is None:
        return ctx, None

    sched = CheckpointSchedule(seconds=seconds, passes=passes)
    ctx.recorder = RunRecorder(run, schedule=sched, stop=stop, context=ctx)
    return ctx, ctx.recorder


def _create_run(out, src, cfg: SolverConfig, fingerprint: str, *, overwrite: bool,
                extra: dict) -> Any:
    settings = {
        "loss": cfg.loss, "lam": cfg.lam, "lam_scale": cfg.lam_scale, "tol": cfg.tol,
        "max_passes": cfg.max_passes, "seed": cfg.seed,
        "memory": cfg.memory if not isinstance(cfg.memory, float) else int(cfg.memory),
        "block_rows": cfg.block_rows, "backend": cfg.backend,
        "class_weights": None if cfg.class_weights is None else cfg.class_weights.tolist(),
        "power_size": cfg.power_size, "expand_size": cfg.expand_size,
        "dense_gradient": cfg.dense_gradient, **extra,
    }
    store_path = getattr(src, "path", None)
    return RunDir.create(out, settings=json_data(settings), store_path=store_path,
                         fingerprint=fingerprint, overwrite=overwrite)


def _train_single(solver, rec, deadline, fingerprint, src, loss) -> TrainResult:
    fit = _run_solver(solver, rec, deadline)
    lam = math.nan if fit.lam is None else float(fit.lam)
    if not math.isfinite(lam) and fit.status in ("max_passes", "max_seconds"):
        return _no_fit(fit, rec)
    gb = _grad_b(rec.history)
    model = _model(src, loss, fit, _fit_meta(fit, fingerprint, gb))
    return TrainResult(model=model, objective=fit.objective, gap=fit.gap,
                       sigma_ratio=fit.sigma_ratio, rank=fit.rank, passes=fit.passes,
                       seconds=fit.seconds, status=fit.status, message=fit.message,
                       history=list(rec.history), lam=fit.lam, lam_max=fit.lam_max,
                       grad_b_norm=gb)
