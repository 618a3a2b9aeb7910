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
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.atomic import temp_sibling
from ranktide.errors import InputError
from ranktide.jsondata import json_data
from ranktide.losses import LOSS_NAMES, check_loss_source, get_loss
from ranktide.model import Model, save_model
from ranktide.passes.engine import run_pass
from ranktide.runs.checkpoint import CheckpointSchedule
from ranktide.runs.checks import check_train_inputs, check_train_output
from ranktide.runs.config import PATH_EXTEND, PATH_FLOOR, PATH_TOL, TrainConfig
from ranktide.runs.rundir import RunDir, RunRecorder
from ranktide.scoring.evaluate import evaluate
from ranktide.solver.config import SolverConfig
from ranktide.solver.debias import debias, debias_summary, near_full_rank, refit_at
from ranktide.solver.greedy import GreedySolver
from ranktide.solver.state import SolverResult
from ranktide.store.concat import ConcatSource
from ranktide.store.memory_source import as_source

__all__ = ["train", "TrainResult", "PathPoint", "resolve_class_weights", "VALIDATION_METRIC",
           "PATH_FLOOR", "PATH_EXTEND", "PATH_TOL", "NO_FIT", "path_lams"]

#: status of a run that stopped before it could fit a model (no model is written)
NO_FIT = "no_fit"

#: validation metric per loss: (key in the metrics dict, True when higher is better)
VALIDATION_METRIC: dict[str, tuple[str, bool]] = {
    name: (get_loss(name).metric, get_loss(name).higher_is_better) for name in LOSS_NAMES
}


@dataclass(frozen=True)
class PathPoint:
    """One value of a regularization path.

    Attributes
    ----------
    index : int
    lam : float
    objective, gap, sigma_ratio : float
        At the end of this value's fit (gap and sigma_ratio are estimates).
    rank, passes : int
        ``passes`` counts the passes spent on this value.
    status : str
    metrics : dict
        Validation metrics (see :mod:`ranktide.scoring.metrics`).
    score : float
        The validation metric that picks the best lam (see :data:`VALIDATION_METRIC`).
    seconds : float
        Seconds spent on this value (NaN in checkpoints written before it was kept).
    """

    index: int
    lam: float
    objective: float
    gap: float
    sigma_ratio: float
    rank: int
    passes: int
    status: str
    metrics: dict
    score: float
    seconds: float = math.nan


@dataclass(frozen=True)
class TrainResult:
    """Outcome of :func:`train`.

    Attributes
    ----------
    model : ranktide.model.Model
        The fitted model (on a path: the best lam's); None when a path was
        interrupted inside its first value.
    objective : float
        ``F(W, b)`` of the model.
    gap : float
        Gap estimate of the model (DESIGN section 2; an estimate, since
        ``sigma_1`` comes from power iteration).
    sigma_ratio : float
        ``sigma_1 / lam`` (<= 1 + tol at convergence).
    rank, passes : int
    seconds : float
    status : str
        One lam: ``converged``, ``max_passes``, ``max_seconds`` or ``callback``.
        A path: ``path_done`` (every requested value fitted), ``path_extended``
        (the best was the last requested value, so the path went on past its
        end), ``path_early_stop`` (validation worsened twice in a row before
        the end), or ``max_seconds`` / ``callback`` inside a value.
        ``no_fit`` (:data:`NO_FIT`): the run ended while estimating lam_max,
        before it could fit anything; ``model`` is None and no model is written.
    message : str
    history : list of dict
        One record per pass (``pass``, ``objective``, ``gap_estimate``,
        ``sigma_ratio``, ``rank``, ``seconds``, ``bytes_read``, ``mb_per_s``,
        ``atoms_added``, ...).
    lam, lam_max : float
    path : list of PathPoint
        Empty without a path.
    best_index : int or None
        Index of the best lam on the path.
    run_dir : str or None
    grad_b_norm : float
        ``||grad_b f||_inf`` beside the gap (the bound assumes it is 0).
    """

    model: Any
    objective: float
    gap: float
    sigma_ratio: float
    rank: int
    passes: int
    seconds: float
    status: str
    message: str
    history: list = field(default_factory=list)
    lam: float = math.nan
    lam_max: float | None = None
    path: list = field(default_factory=list)
    best_index: int | None = None
    run_dir: str | None = None
    grad_b_norm: float = math.nan


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


# ---------------------------------------------------------------- model and metrics


def _model(src: Any, loss: str, fit: SolverResult, meta: dict) -> Any:
    names = getattr(src, "output_names", None)
    return Model(U=fit.U, s=fit.s, V=fit.V, b=fit.b, loss=loss,
                 names=list(names) if names else None, meta=meta)


def _fit_meta(fit: SolverResult, fingerprint: str, grad_b: float) -> dict:
    return json_data({
        "lam": fit.lam, "lam_max": fit.lam_max, "lam_max_settled": fit.lam_max_settled,
        "store_fingerprint": fingerprint,
        "objective": fit.objective, "gap": fit.gap, "gap_is_estimate": True,
        "rel_gap": fit.rel_gap, "sigma_ratio": fit.sigma_ratio, "grad_b_norm": grad_b,
        "passes": fit.passes, "seconds": fit.seconds, "status": fit.status,
    })


def _validation(model: Any, valid: Any, loss: str, block_rows: int | None) -> tuple[dict, float]:
    metrics = evaluate(model, valid, block_rows=block_rows)
    key, _ = VALIDATION_METRIC[loss]
    return metrics, float(metrics[key])


def _refit_chosen(model: Any, src: Any, solver: GreedySolver, valid: Any, loss: str,
                  lam: float, block_rows: int | None) -> tuple[Any, bool]:
    """The path's chosen model after the debiasing refit (kept only when validation
    improves; :mod:`ranktide.solver.debias`), with the refit's figures and, when the
    model is nearly full rank, a note saying so in its metadata (model.json); and
    whether a refit replaced the path's own model."""
    _, higher = VALIDATION_METRIC[loss]
    res = debias(model, src, lam=lam, higher=higher,
                 score=lambda m: _validation(m, valid, loss, block_rows)[1],
                 class_weights=solver.config.class_weights, block_rows=block_rows,
                 max_bytes=int(solver.plan.budget))
    out = res.model
    meta = dict(out.meta, debias=json_data(debias_summary(res)))
    if near_full_rank(out.rank, out.n_features, out.n_outputs):
        meta["low_rank_note"] = (f"rank {out.rank} of at most "
                                 f"{min(out.n_features, out.n_outputs)}: nearly full rank, the "
                                 "low-rank structure did not help on this data")
    return replace(out, meta=meta), res.factor != 1.0


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
            result = _train_path(solver, rec, deadline, fingerprint, src, loss, int(path_steps),
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


def _with(result: TrainResult, **changes: Any) -> TrainResult:
    from dataclasses import replace

    return replace(result, **changes)


def _path_of(source: Any) -> str | None:
    if isinstance(source, (str, os.PathLike)):
        return os.fspath(Path(source).resolve())
    p = getattr(source, "path", None)
    return None if p is None else os.fspath(Path(p).resolve())


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


def _seconds_left(deadline: float | None) -> float | None:
    if deadline is None:
        return None
    return max(1e-3, deadline - time.perf_counter())


def _run_solver(solver: GreedySolver, rec: _Recorder, deadline: float | None) -> SolverResult:
    from dataclasses import replace

    solver.config = replace(solver.config, max_seconds=_seconds_left(deadline))
    fit = solver.run(callback=rec)
    if fit.status == "interrupted" and rec.hook is not None:
        rec.hook()  # the stop flag is set: this writes the checkpoint
    return fit


def _grad_b(history: list) -> float:
    for h in reversed(history):
        if "grad_b_norm" in h:
            return float(h["grad_b_norm"] if h["grad_b_norm"] is not None else math.nan)
    return math.nan


def _no_fit(fit: SolverResult, rec: _Recorder) -> TrainResult:
    """The result of a run that ended while it was still estimating lam_max."""
    why = {"max_passes": "the pass budget (--max-passes)",
           "max_seconds": "the time budget (--max-seconds)"}.get(fit.status, fit.status)
    msg = (f"no model: all {fit.passes} passes went into estimating lam_max and {why} ran "
           "out before any fitting; raise it")
    return TrainResult(model=None, objective=math.nan, gap=math.nan, sigma_ratio=math.nan,
                       rank=0, passes=fit.passes, seconds=fit.seconds, status=NO_FIT,
                       message=msg, history=list(rec.history), lam=math.nan,
                       lam_max=fit.lam_max)


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


def _better(a: float, b: float, higher: bool) -> bool:
    return a > b if higher else a < b


def _point_best(points: list, higher: bool) -> int:
    return max(range(len(points)), key=lambda i: points[i].score if higher else -points[i].score)


def path_lams(lam_max: float, m: int, min_frac: float, count: int) -> list[float]:
    """The first ``count`` path values ``lam_max * min_frac^(j / (m - 1))``.

    Values ``j >= m`` continue the same geometric sequence past the requested
    end (``min_frac * lam_max``), as a path that extends does.
    """
    return [lam_max * min_frac ** (j / (m - 1)) for j in range(count)]


def _path_end(points: list, m: int, extend: int, worse: int, key: str,
              higher: bool) -> tuple[str, str] | None:
    """(status, message) when the path ends after its last finished value, else None."""
    n = len(points)
    past = n - m
    if worse >= 2:
        if past < 0:
            return "path_early_stop", (f"validation {key} worsened twice in a row; stopped at "
                                       f"value {n} of {m}")
        if past == 0:
            return "path_done", f"all {m} requested values fitted"
        return "path_extended", (f"the best lam was the smallest requested, so the path went "
                                 f"on {past} value(s) past it until validation {key} worsened "
                                 "twice in a row")
    if past < 0:
        return None
    best_last = _point_best(points, higher) == n - 1
    if past == 0:
        if best_last and extend > 0:
            return None  # the best is the smallest requested value: go on down
        return "path_done", f"all {m} requested values fitted"
    if past < extend:
        return None
    if best_last:
        return "path_extend_cap", (f"validation {key} still improved at the cap of {extend} "
                                   "value(s) past the requested end; the best lam is the "
                                   "smallest tried (raise --path-extend to go further)")
    return "path_extended", (f"the best lam was the smallest requested, so the path went on "
                             f"{past} value(s) past it (the cap, --path-extend {extend})")


def _finish_chosen(solver, rec, deadline, ctx, pos, points, higher, tol, src, loss, fingerprint,
                   valid, block_rows) -> tuple | None:
    """The path's chosen value solved on to ``tol`` from its own factors.

    Path values are solved to ``path_tol`` only (validation picks among them);
    the chosen one continues here with the solver's full tolerance. Returns
    ``(points, model, status, message)`` with the chosen point updated (status
    None when nothing stopped the run), or None when it already met ``tol``.
    """
    best = _point_best(points, higher)
    pt = points[best]
    if not pos.get("finishing"):
        if not (pt.gap > tol * abs(pt.objective)):
            return None
        if best != len(points) - 1:  # the solver sits at a later value: back to this one
            b = ctx.best
            solver.warm_start(b["U"], b["s"], b["V"], b["b"])
        solver.set_lam(pt.lam, path_index=pt.index)
        pos["finishing"] = True
        pos["finish_passes"], pos["finish_seconds"] = solver.state.passes, solver.state.seconds
    solver.config = replace(solver.config, tol=tol, stall_tol=None)
    fit = _run_solver(solver, rec, deadline)
    if fit.status == "interrupted":  # the checkpoint keeps the finishing position
        return points, None, fit.status, "path interrupted while finishing its chosen value"
    gb = _grad_b(rec.history)
    passes = solver.state.passes - pos["finish_passes"]
    seconds = solver.state.seconds - pos["finish_seconds"]
    model = _model(src, loss, fit, dict(_fit_meta(fit, fingerprint, gb),
                                        step_passes=pt.passes + passes))
    metrics, score = _validation(model, valid, loss, block_rows)
    points = list(points)
    points[best] = replace(pt, objective=fit.objective, gap=fit.gap,
                           sigma_ratio=fit.sigma_ratio, rank=fit.rank, passes=pt.passes + passes,
                           status=fit.status, metrics=json_data(metrics), score=score,
                           seconds=pt.seconds + seconds)
    pos["finished"] = {"index": pt.index, "passes": passes, "seconds": seconds,
                       "rel_gap_before": pt.gap / abs(pt.objective) if pt.objective else None,
                       "rel_gap": fit.rel_gap, "status": fit.status,
                       "score_before": pt.score, "score": score}
    pos["finishing"] = False
    status = message = None
    if fit.status in ("callback", "max_seconds"):
        status, message = fit.status, f"the chosen path value was being finished: {fit.message}"
    return points, model, status, message


def _fit_with_valid(solver, deadline, src, valid, path_model, lam, factor, lam_max, loss, tol,
                    value_tol, block_rows) -> tuple[Any, dict]:
    """The chosen model fitted again on the training and validation rows together.

    Starts from the path's own factors at its ``lam`` (no passes at ``W = 0``);
    when the debiasing refit was kept (``factor < 1``), that refit is made again
    on the joined rows at the same factor (chosen on validation, not again).
    Returns ``(model, figures)``, or ``(None, figures)`` when stopped.
    """
    opened = isinstance(valid, (str, os.PathLike))
    vsrc = as_source(valid)
    t0 = time.perf_counter()
    try:
        both = ConcatSource([src, vsrc], [_path_of(src) or "the training data",
                                           _path_of(valid) or "the validation data"])
        kept = factor < 1.0
        # a kept refit replaces this fit's model: solve it as a path value is solved
        cfg = replace(solver.config, lam=None, lam_scale=None,
                      tol=value_tol if kept else tol,
                      stall_tol=0.1 * value_tol if kept and value_tol > tol else None,
                      max_seconds=_seconds_left(deadline))
        joined = GreedySolver(both, cfg, stop=solver.stop, scratch_dir=solver.scratch_root)
        try:
            joined.fit_from(path_model.U, path_model.s, path_model.V, path_model.b, lam=lam,
                            lam_max=lam_max)
            fit = joined.run()
        finally:
            joined.remove_scratch()
        info = {"rows": int(both.shape[0]), "lam": lam, "factor": factor,
                "passes": fit.passes, "status": fit.status, "rel_gap": fit.rel_gap}
        if fit.status == "interrupted":
            return None, info
        model = _model(both, loss, fit, {**path_model.meta, "objective": fit.objective,
                                         "gap": fit.gap, "rel_gap": fit.rel_gap})
        if kept:
            model = refit_at(model, both, lam=lam, factor=factor,
                             class_weights=solver.config.class_weights, block_rows=block_rows)
        info["seconds"] = time.perf_counter() - t0
        return model, info
    finally:
        if opened:
            vsrc.close()


def _train_path(solver, rec, deadline, fingerprint, src, loss, m, min_frac, extend, valid,
                block_rows, ctx, path_tol=None, with_valid=False) -> TrainResult:
    from dataclasses import asdict

    tol = float(solver.config.tol)
    value_tol = tol if path_tol is None else max(tol, float(path_tol))
    pos = ctx.path
    if pos is None:  # a fresh path (or a resume from inside the lam_max phase)
        first = _run_solver(solver, rec, deadline)  # lam_max phase only (lam is None)
        if first.status in ("callback", "interrupted"):
            return TrainResult(model=None, objective=math.nan, gap=math.nan,
                               sigma_ratio=math.nan, rank=0, passes=first.passes,
                               seconds=first.seconds, status=first.status,
                               message=first.message, history=list(rec.history),
                               lam=math.nan, lam_max=first.lam_max)
        if first.status != "lam_max":
            return _no_fit(first, rec)
        # the path position, in the checkpoints: value index, whether its lam is set,
        # finished points, early-stop count, best point so far
        pos = {"index": 0, "started": False, "points": [], "worse": 0, "best": None,
               "best_meta": None, "status": "path_done", "message": "", "passes_before": 0,
               "done": False}
        ctx.path = pos
    lam_max = float(solver.state.lam_max)
    key, higher = VALIDATION_METRIC[loss]
    points: list[PathPoint] = [PathPoint(**p) for p in pos["points"]]
    best_model = None
    if pos["best"] is not None:  # resumed: the best model so far comes from the checkpoint
        names = getattr(src, "output_names", None)
        b = ctx.best
        best_model = Model(U=b["U"], s=b["s"], V=b["V"], b=b["b"], loss=loss,
                           names=list(names) if names else None, meta=pos["best_meta"])
    status = message = None
    while not pos["done"] and pos["index"] < m + extend:
        j = pos["index"]
        lam_j = path_lams(lam_max, m, min_frac, j + 1)[j]
        where = f"value {j + 1} of {m}" if j < m else f"value {j + 1} (past the requested {m})"
        if not pos["started"]:
            pos["passes_before"] = solver.state.passes
            pos["seconds_before"] = solver.state.seconds
            solver.set_lam(lam_j, path_index=j)
            pos["started"] = True
        # the values are compared, not certified: a stalled objective ends one too
        solver.config = replace(solver.config, tol=value_tol,
                                stall_tol=0.1 * value_tol if value_tol > tol else None)
        fit = _run_solver(solver, rec, deadline)
        if fit.status == "interrupted":  # the checkpoint keeps the position inside this value
            status, message = fit.status, f"path interrupted at {where}"
            break
        gb = _grad_b(rec.history)
        step_passes = solver.state.passes - pos["passes_before"]
        step_seconds = solver.state.seconds - pos.get("seconds_before", math.nan)
        model = _model(src, loss, fit, dict(_fit_meta(fit, fingerprint, gb),
                                            step_passes=step_passes))
        metrics, score = _validation(model, valid, loss, block_rows)
        pt = PathPoint(index=j, lam=lam_j, objective=fit.objective, gap=fit.gap,
                       sigma_ratio=fit.sigma_ratio, rank=fit.rank, passes=step_passes,
                       status=fit.status, metrics=json_data(metrics), score=score,
                       seconds=step_seconds)
        points.append(pt)
        best = _point_best(points, higher)
        if best == len(points) - 1:
            best_model = model
        rec.event({"kind": "path", "index": j, "lam": lam_j, "rank": fit.rank,
                   "objective": fit.objective, "gap_estimate": fit.gap,
                   "sigma_ratio": fit.sigma_ratio, "status": fit.status,
                   "val_metric": score, "val_metric_name": f"validation {key}",
                   "validation": json_data(metrics), "best_lam": points[best].lam,
                   "best_index": best, "passes": pt.passes, "seconds": step_seconds,
                   "run_passes": solver.state.passes, "run_seconds": solver.state.seconds,
                   "requested": m, "extended": j >= m})
        if fit.status in ("callback", "max_seconds"):
            # unfinished value: the checkpoint keeps the position inside it
            status, message = fit.status, f"path stopped at {where}: {fit.message}"
            break
        if best == len(points) - 1:
            pos["best"], pos["best_meta"] = j, model.meta
            ctx.best = {"U": fit.U, "s": fit.s, "V": fit.V, "b": fit.b}
        if len(points) >= 2 and _better(points[-2].score, score, higher):
            pos["worse"] += 1
        else:
            pos["worse"] = 0
        pos["points"] = [asdict(p) for p in points]
        pos["index"], pos["started"] = j + 1, False
        end = _path_end(points, m, extend, pos["worse"], key, higher)
        if end is not None:
            pos["status"], pos["message"] = end
            pos["done"] = True
        if ctx.recorder is not None:  # a checkpoint at the end of each path step
            ctx.recorder.checkpoint(solver.state)
    if not points:  # interrupted inside the first value: nothing to report but the state
        st = solver.state
        return TrainResult(model=None, objective=math.nan, gap=math.nan, sigma_ratio=math.nan,
                           rank=st.rank, passes=st.passes, seconds=st.seconds,
                           status=status or pos["status"], message=message or pos["message"],
                           history=list(rec.history),
                           lam=path_lams(lam_max, m, min_frac, 1)[0], lam_max=lam_max)
    pt = points[_point_best(points, higher)]
    path_model = best_model
    refit, refit_kept = _refit_chosen(best_model, src, solver, valid, loss, pt.lam, block_rows)
    if status is None and not refit_kept:
        # the path's own model is the one shipped: finish it to tol (a kept refit replaces it,
        # so its certificate would be spent work)
        done = _finish_chosen(solver, rec, deadline, ctx, pos, points, higher, tol, src, loss,
                              fingerprint, valid, block_rows)
        if done is not None:
            points, model, status, message = done
            pos["points"] = [asdict(p) for p in points]
            if model is not None:
                path_model = model
                refit = replace(model, meta=dict(model.meta, **{
                    k: refit.meta[k] for k in ("debias", "low_rank_note") if k in refit.meta}))
    best_model = refit
    if with_valid and status is None:
        factor = float(refit.meta.get("debias", {}).get("kept_factor", 1.0))
        pt = points[_point_best(points, higher)]
        joined, info = _fit_with_valid(solver, deadline, src, valid, path_model, pt.lam, factor,
                                       lam_max, loss, tol, value_tol, block_rows)
        if joined is not None:
            keep = {k: refit.meta[k] for k in ("debias", "low_rank_note") if k in refit.meta}
            best_model = replace(joined, meta=dict(joined.meta, **keep,
                                                   refit_with_valid=json_data(info)))
        elif info.get("status") == "interrupted":
            status, message = "interrupted", "interrupted while refitting on the validation rows"
    status = status or pos["status"]
    message = message or pos["message"]
    best = _point_best(points, higher)
    pt = points[best]
    summary = {"requested": m, "fitted": len(points), "extended": max(0, len(points) - m),
               "extend_cap": extend, "floor": min_frac, "status": status, "message": message,
               "chosen_index": best, "chosen_step_passes": pt.passes,
               "validation_metric": f"validation {key}", "validation": pt.score,
               "total_passes": solver.state.passes, "finished": pos.get("finished")}
    best_model = replace(best_model, meta=dict(best_model.meta, path=json_data(summary)))
    return TrainResult(model=best_model, objective=pt.objective, gap=pt.gap,
                       sigma_ratio=pt.sigma_ratio, rank=pt.rank, passes=solver.state.passes,
                       seconds=solver.state.seconds, status=status, message=message,
                       history=list(rec.history), lam=pt.lam, lam_max=lam_max, path=points,
                       best_index=best, grad_b_norm=float(best_model.meta.get("grad_b_norm") or
                                                          math.nan))
