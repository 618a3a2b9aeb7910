"""Resume: load a run's latest valid checkpoint, check it may continue, and train on.

A resumed run ends with the same model as an uninterrupted one with the same
settings: everything the next pass depends on is in the checkpoint.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.errors import CheckpointError, ModelError
from ranktide.model import load_model
from ranktide.runs.config import TrainConfig
from ranktide.runs.rundir import RESUME_MUTABLE, RunDir, RunRecorder, check_resume_compatible
from ranktide.runs.train import TrainResult, train
from ranktide.signals import StopFlag
from ranktide.solver.state import SolverState
from ranktide.store import open_store


@dataclass
class ResumePoint:
    """A run restored from its latest valid checkpoint, ready for :func:`ranktide.runs.train.train`.

    Attributes
    ----------
    run : RunDir
    state : ranktide.solver.state.SolverState
    context : dict
        The trainer's checkpoint context (planner decisions, path position).
    context_arrays : dict of str to ndarray
        The trainer's arrays (the best model so far on a path).
    checkpoint : Path
        The checkpoint directory it came from.
    """

    run: RunDir
    state: Any
    context: dict[str, Any]
    context_arrays: dict[str, np.ndarray]
    checkpoint: Path

    def solver_config(self, cfg: Any) -> Any:
        """``cfg`` with the planner's saved decisions (block rows, dense gradient) forced.

        A resumed run must read the same blocks as the uninterrupted one (sums in
        the same order): older checkpoints saved one block size, forced here; newer
        ones (``per_pass``) re-plan every pass from the solver state's rank, widths
        and floor, which the checkpoint holds.
        """
        plan = self.context.get("plan") or {}
        changes: dict[str, Any] = {}
        if cfg.block_rows is None and cfg.block_bytes is None and plan.get("block_rows"):
            changes["block_rows"] = int(plan["block_rows"])
        if cfg.dense_gradient is None and plan.get("dense_gradient") is not None:
            changes["dense_gradient"] = bool(plan["dense_gradient"])
        return replace(cfg, **changes) if changes else cfg


def load_resume_point(
    run_dir: str | os.PathLike,
    *,
    fingerprint: str,
    changes: Mapping[str, Any],
) -> ResumePoint:
    """Load the latest valid checkpoint of a run and check that it may continue.

    Parameters
    ----------
    run_dir : path
    fingerprint : str
        The fingerprint of the store the resumed run reads.
    changes : mapping
        New values of resume-mutable settings (budgets, tolerance, cadence).

    Raises
    ------
    CheckpointError
        No valid checkpoint, a newer format, another store, changed settings
        (each key named), or a ``config.json`` edited since the checkpoint.
    """
    run = RunDir.open(run_dir)
    bad = sorted(set(changes) - RESUME_MUTABLE)
    if bad:
        raise CheckpointError(
            f"{run.path}: {', '.join(bad)} cannot change on resume; only "
            f"{', '.join(sorted(RESUME_MUTABLE))} may (start a new run otherwise)"
        )
    arrays, meta, path = run.checkpoints.load_latest()
    # config.json must still say what the checkpoint was written under
    at_checkpoint = dict(run.config, settings=meta.get("settings") or {})
    check_resume_compatible(at_checkpoint, run.settings, run.fingerprint or "", run=run.path)
    new_settings = dict(run.settings, **dict(changes))
    check_resume_compatible(run.config, new_settings, fingerprint, run=run.path)
    solver_arrays, ctx_arrays = RunRecorder.split(arrays)
    state = SolverState.from_checkpoint(solver_arrays, meta.get("solver") or {})
    old_tol, new_tol = run.settings.get("tol"), changes.get("tol")
    if state.phase == "done" and new_tol is not None and old_tol is not None and new_tol < old_tol:
        # a converged fit continues when the tolerance is tightened
        state.phase, state.status, state.cert_passes = "fit", "running", 0
    run.truncate_history(int(meta.get("history_len", 0)))
    if changes:
        run.update_settings(changes)
    return ResumePoint(
        run=run,
        state=state,
        context=dict(meta.get("context") or {}),
        context_arrays=ctx_arrays,
        checkpoint=path,
    )


def _num(meta: Mapping[str, Any], key: str) -> float:
    v = meta.get(key)
    return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else float("nan")


def finished_result(point: ResumePoint) -> TrainResult | None:
    """The result of a run that already converged, from its model; None otherwise.

    A finished run whose solver state is ``done`` (and that a tightened
    tolerance did not reopen) has nothing left to do: its model, with the
    gap certificate it was written with, is kept as it is.
    """
    if not point.context.get("finished") or getattr(point.state, "phase", None) != "done":
        return None
    try:
        model = load_model(point.run.model_dir)
    except ModelError:
        return None  # killed between the last checkpoint and the model: train on
    meta = dict(model.meta)
    rel = meta.get("rel_gap")
    tol = point.run.settings.get("tol")
    how = f"relative gap estimate {rel:.2e} <= tol {tol}" if isinstance(rel, float) else \
        "converged"
    passes = meta.get("passes")
    return TrainResult(
        model=model, objective=_num(meta, "objective"), gap=_num(meta, "gap"),
        sigma_ratio=_num(meta, "sigma_ratio"), rank=int(len(model.s)),
        passes=int(passes) if isinstance(passes, int) else int(point.state.passes),
        seconds=_num(meta, "seconds"), status=str(meta.get("status") or "converged"),
        message=f"already finished ({how}); nothing to resume, model kept",
        history=[h for h in point.run.read_history() if h.get("kind") == "pass"],
        lam=_num(meta, "lam"), lam_max=meta.get("lam_max"), run_dir=str(point.run.path),
        grad_b_norm=_num(meta, "grad_b_norm"),
    )


def _resume_backend(saved: str) -> str:
    """The saved backend, or ``"serial"`` for one that needs a cluster session."""
    return "serial" if saved == "dask" else saved


def resume(
    run_dir: str | os.PathLike,
    *,
    store: str | os.PathLike | None = None,
    max_passes: int | None = None,
    max_seconds: float | None = None,
    tol: float | None = None,
    checkpoint_seconds: float | None = None,
    checkpoint_passes: int | None = None,
    backend: str | None = None,
    stop: StopFlag | None = None,
    callback: Callable[[dict], Any] | None = None,
    on_pass: Callable[[dict], None] | None = None,
    progress: bool = False,
) -> Any:
    """Continue an interrupted (or finished) run from its latest valid checkpoint.

    The run ends with the same model as an uninterrupted run with the same
    settings: everything the next pass depends on is in the checkpoint.

    Parameters
    ----------
    run_dir : path
        The run directory written by ``train(..., out=run_dir)``.
    store : path, optional
        The training store, when it has moved (its fingerprint must match).
    max_passes, max_seconds, tol, checkpoint_seconds, checkpoint_passes : optional
        New budgets, tolerance and checkpoint cadence (the saved ones otherwise).
    backend : str, optional
        Pass backend for the rest of the run (results agree across backends to
        rounding); by default the saved one, except that a run trained on a
        cluster resumes on ``"serial"`` unless a backend is given.
    stop, callback, on_pass, progress
        As in :func:`ranktide.runs.train.train`.

    Returns
    -------
    ranktide.runs.train.TrainResult
    """
    run = RunDir.open(run_dir)
    where = store if store is not None else run.store_path
    if where is None:
        raise CheckpointError(
            f"{run.path}: the run was trained on in-memory data; pass the store to resume on"
        )
    given = {
        "max_passes": max_passes,
        "max_seconds": max_seconds,
        "tol": tol,
        "checkpoint_seconds": checkpoint_seconds,
        "checkpoint_passes": checkpoint_passes,
    }
    changes = {k: v for k, v in given.items() if v is not None}
    # the saved configuration with the allowed changes, validated before the run is touched
    config = TrainConfig.from_settings(run.settings).with_changes(changes, run=str(run.path))
    with open_store(where) as src:
        point = load_resume_point(run.path, fingerprint=src.fingerprint, changes=changes)
        done = finished_result(point)
        if done is not None:  # converged and not reopened: keep its model and certificate
            return done
        kw = config.train_kwargs()
        kw["backend"] = backend or _resume_backend(kw["backend"])
        return train(src, **kw, callback=callback, progress=progress, on_pass=on_pass,
                     stop=stop, resume_point=point)
