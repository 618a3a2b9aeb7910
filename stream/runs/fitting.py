"""What one fit and a regularization path share: results, model building, validation.

:func:`ranktide.runs.train.train` runs one ``lam``; :mod:`ranktide.runs.path`
runs a path. Both turn a :class:`ranktide.solver.state.SolverResult` into a
model with the same metadata, score it with the same validation metric, and
run the solver against the same deadline.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from ranktide.jsondata import json_data
from ranktide.losses import LOSS_NAMES, get_loss
from ranktide.model import Model
from ranktide.scoring.evaluate import evaluate
from ranktide.solver.debias import debias, debias_summary, near_full_rank
from ranktide.solver.greedy import GreedySolver
from ranktide.solver.state import SolverResult

__all__ = ["NO_FIT", "VALIDATION_METRIC", "PathPoint", "TrainResult"]

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


def _with(result: TrainResult, **changes: Any) -> TrainResult:
    from dataclasses import replace

    return replace(result, **changes)


def _path_of(source: Any) -> str | None:
    if isinstance(source, (str, os.PathLike)):
        return os.fspath(Path(source).resolve())
    p = getattr(source, "path", None)
    return None if p is None else os.fspath(Path(p).resolve())


def _seconds_left(deadline: float | None) -> float | None:
    if deadline is None:
        return None
    return max(1e-3, deadline - time.perf_counter())


def _run_solver(solver: GreedySolver, rec: Any, deadline: float | None) -> SolverResult:
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


def _no_fit(fit: SolverResult, rec: Any) -> TrainResult:
    """The result of a run that ended while it was still estimating lam_max."""
    why = {"max_passes": "the pass budget (--max-passes)",
           "max_seconds": "the time budget (--max-seconds)"}.get(fit.status, fit.status)
    msg = (f"no model: all {fit.passes} passes went into estimating lam_max and {why} ran "
           "out before any fitting; raise it")
    return TrainResult(model=None, objective=math.nan, gap=math.nan, sigma_ratio=math.nan,
                       rank=0, passes=fit.passes, seconds=fit.seconds, status=NO_FIT,
                       message=msg, history=list(rec.history), lam=math.nan,
                       lam_max=fit.lam_max)
