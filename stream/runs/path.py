"""The regularization path: values of lam from lam_max down, warm-started, chosen on
validation; the chosen value finished, refitted on its subspace and, when asked, on the
training and validation rows together.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import asdict, replace
from typing import Any

from ranktide.jsondata import json_data
from ranktide.model import Model
from ranktide.runs.fitting import (
    VALIDATION_METRIC,
    PathPoint,
    TrainResult,
    _fit_meta,
    _grad_b,
    _model,
    _no_fit,
    _path_of,
    _refit_chosen,
    _run_solver,
    _seconds_left,
    _validation,
)
from ranktide.solver.debias import refit_at
from ranktide.solver.greedy import GreedySolver
from ranktide.store.concat import ConcatSource
from ranktide.store.memory_source import as_source

__all__ = ["path_lams", "train_path"]


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


def train_path(solver, rec, deadline, fingerprint, src, loss, m, min_frac, extend, valid,
                block_rows, ctx, path_tol=None, with_valid=False) -> TrainResult:
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
