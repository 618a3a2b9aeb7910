"""A run's report: PNG plots and one HTML page with a summary table.

Reads what the trainer left in the run directory — ``config.json``,
``history.jsonl`` (one JSON object per pass; a path run adds per-lam records),
the final model and, when the run was profiled, its profile — and writes

* ``convergence.png``: objective and gap estimate against passes and seconds;
* ``rank.png``: the model's rank against passes;
* ``singular_values.png``: the final model's singular values;
* ``path.png`` (path runs): the validation metric and the rank against lam;
* ``profile.png`` (profiled runs): time per phase;
* ``report.html``: the figures and a summary table.

Missing keys are tolerated: a plot whose data is absent is left out and the
page says so. Figures are drawn on :class:`matplotlib.figure.Figure` objects
with the Agg canvas (no pyplot, no global state) and every file is written
atomically.
"""

from __future__ import annotations

import html
import io
import json
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from ranktide.atomic import atomic_write_bytes, load_npz
from ranktide.errors import CheckpointError, InputError
from ranktide.model import load_model
from ranktide.runs.rundir import read_history_file

__all__ = ["write_report", "read_history", "split_history"]

PATH_KINDS = frozenset({"path", "lam", "path_step", "lam_done", "step"})


# --------------------------------------------------------------------- reading
def read_history(run_dir: str | os.PathLike) -> list[dict[str, Any]]:
    """Every complete record of ``RUN/history.jsonl`` (a torn last line is skipped)."""
    return read_history_file(Path(run_dir) / "history.jsonl")


def _is_path_record(rec: Mapping[str, Any]) -> bool:
    kind = rec.get("kind", rec.get("type", rec.get("event")))
    if isinstance(kind, str):
        return kind in PATH_KINDS
    return "val_metric" in rec or "validation" in rec


def split_history(
    records: Iterable[Mapping[str, Any]],
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Split history records into per-pass and per-lam (path) records."""
    passes, path = [], []
    for rec in records:
        (path if _is_path_record(rec) else passes).append(dict(rec))
    return passes, path


def _num(value: Any) -> float:
    """A finite float, or NaN for anything else (missing, null, text, inf)."""
    if isinstance(value, bool):
        return math.nan
    try:
        x = float(value)
    except (TypeError, ValueError):
        return math.nan
    return x if math.isfinite(x) else math.nan


def _column(records: Sequence[Mapping[str, Any]], *keys: str) -> np.ndarray:
    """The first present key of ``keys`` from each record, as floats (NaN if absent)."""
    out = np.full(len(records), np.nan)
    for i, rec in enumerate(records):  # one entry per pass or per lam, not per data row
        for key in keys:
            if key in rec:
                out[i] = _num(rec[key])
                break
    return out


def _validation(rec: Mapping[str, Any]) -> tuple[float, str]:
    """The validation metric of a per-lam record and its name."""
    for key in ("val_metric", "validation_metric", "val_score"):
        if key in rec:
            name = rec.get("val_metric_name", rec.get("metric", "validation metric"))
            return _num(rec[key]), str(name)
    val = rec.get("validation", rec.get("val"))
    if isinstance(val, Mapping):
        for key in ("accuracy", "micro_f1", "r2", "log_loss", "mean_loss"):
            if key in val:
                return _num(val[key]), f"validation {key}"
        for key, value in val.items():
            if not math.isnan(_num(value)):
                return _num(value), f"validation {key}"
    elif val is not None:
        return _num(val), "validation metric"
    return math.nan, "validation metric"


def _read_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def _singular_values(run_dir: Path) -> np.ndarray | None:
    """The final model's singular values (descending), or None when there is no model."""
    model_dir = run_dir / "model"
    if not model_dir.is_dir():
        return None
    try:
        model = load_model(model_dir)
        s = getattr(model, "s", None)
        if s is not None:
            return np.sort(np.asarray(s, dtype=np.float64).ravel())[::-1]
    except Exception:  # an unreadable model leaves that plot out; the page says so
        pass

    for f in sorted(model_dir.glob("*.npz")):
        try:
            arrays = load_npz(f)
        except Exception:
            continue
        if "s" in arrays:
            return np.sort(np.asarray(arrays["s"], dtype=np.float64).ravel())[::-1]
    return None


def _profile(run_dir: Path) -> dict[str, float] | None:
    """Seconds per phase from the run's profile, if any.

    Looks for ``RUN/profile.json`` or ``RUN/profile/profile.json`` (what
    ``ranktide profile ... --out RUN/profile`` writes).
    """
    for name in ("profile.json", "profile/profile.json"):
        doc = _read_json(run_dir / name)
        if isinstance(doc, Mapping):
            break
    else:
        return None
    out: dict[str, float] = {}
    totals = doc.get("totals")
    if isinstance(doc.get("seconds_by_phase"), Mapping):
        # written by ranktide.diagnostics.profile: kernel phases, plus reading and decoding
        # from the totals
        phases = dict(doc["seconds_by_phase"])
        if isinstance(totals, Mapping):
            for key in ("read_s", "decode_s", "wait_s"):
                if key in totals:
                    phases[key.removesuffix("_s")] = totals[key]
    else:
        phases = doc.get("phases", doc.get("seconds", totals))
    if not isinstance(phases, Mapping):
        phases = doc
    for key, value in phases.items():
        if isinstance(value, Mapping):
            value = value.get("seconds", value.get("total_s", value.get("total")))
        x = _num(value)
        if not math.isnan(x) and x >= 0:
            out[str(key)] = x
    return out or None


# ----------------------------------------------------------------------- plots
def _figure(n_axes: int, *, width: float = 6.4):
    # matplotlib is imported here: only the report needs it
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width * min(n_axes, 2) / 1.4, 3.6 * math.ceil(n_axes / 2)), dpi=100)
    cols = min(n_axes, 2)
    rows = math.ceil(n_axes / 2)
    axes = [fig.add_subplot(rows, cols, i + 1) for i in range(n_axes)]
    return fig, axes


def _save(fig: Any, path: Path) -> Path:
    buf = io.BytesIO()
    fig.tight_layout()
    fig.savefig(buf, format="png")
    atomic_write_bytes(path, buf.getvalue())
    return path


def _integer_axis(axis: Any) -> None:
    """Ticks only at whole numbers (passes, rank, index)."""
    from matplotlib.ticker import MaxNLocator

    axis.set_major_locator(MaxNLocator(integer=True, nbins="auto"))


def _tick_text(v: float) -> str:
    text = f"{v:.2g}"
    if "e" in text:
        mant, exp = text.split("e")
        text = f"{mant}e{int(exp)}"
    return text


def _log_axis(axis: Any, values: np.ndarray, *, at_values: bool = False, most: int = 7) -> None:
    """A log axis with a few short, non-overlapping labels and no minor labels.

    ``at_values``: ticks at (a thinned subset of) ``values`` themselves, as on
    a path whose values are evenly spaced in log scale; otherwise ticks at
    1, 2, 5 x 10^j (or whole decades when the data span more than ``most``).
    """
    from matplotlib.ticker import FixedLocator, FuncFormatter, LogLocator, NullFormatter

    v = np.asarray(values, dtype=np.float64)
    v = np.unique(v[np.isfinite(v) & (v > 0)])
    if v.size == 0:
        return
    if at_values:
        step = max(1, math.ceil(v.size / most))
        ticks = v[::-1][::step][::-1]  # keep the smallest value
        axis.set_major_locator(FixedLocator(ticks))
    else:
        decades = math.log10(v[-1] / v[0]) if v[0] > 0 else 0.0
        subs = (1.0,) if decades > 2 else (1.0, 2.0, 5.0)
        axis.set_major_locator(LogLocator(base=10, subs=subs, numticks=most + 1))
    axis.set_major_formatter(FuncFormatter(lambda x, _pos: _tick_text(x)))
    axis.set_minor_formatter(NullFormatter())


def _plot_line(ax: Any, x: np.ndarray, y: np.ndarray, *, log: bool = False, **kw: Any) -> bool:
    ok = np.isfinite(x) & np.isfinite(y)
    if log:
        ok &= y > 0
    if not ok.any():
        ax.text(0.5, 0.5, "not recorded", ha="center", va="center", transform=ax.transAxes)
        return False
    ax.plot(x[ok], y[ok], marker="." if ok.sum() < 60 else None, **kw)
    if log:
        ax.set_yscale("log")
        _log_axis(ax.yaxis, y[ok])
    ax.grid(True, alpha=0.3)
    return True


def _pass_axis(passes: Sequence[Mapping[str, Any]]) -> np.ndarray:
    x = _column(passes, "pass", "passes", "iteration")
    return np.where(np.isfinite(x), x, np.arange(1, len(passes) + 1))


def _lam_changes(passes: Sequence[Mapping[str, Any]]) -> list[int]:
    """Indices of the passes that started a new lam (a path's next value)."""
    lam = _column(passes, "lam")
    both = np.isfinite(lam[:-1]) & np.isfinite(lam[1:])
    return [int(i) + 1 for i in np.flatnonzero(both & (lam[1:] != lam[:-1]))]


def _plot_convergence(passes: Sequence[Mapping[str, Any]], out: Path,
                      tol: float | None) -> Path | None:
    if not passes:
        return None
    obj = _column(passes, "objective", "F")
    gap = _column(passes, "gap_estimate", "gap", "rel_gap")
    if not (np.isfinite(obj).any() or np.isfinite(gap).any()):
        return None
    xp = _pass_axis(passes)
    xs = _column(passes, "seconds", "elapsed", "time_s")
    fig, (a, b, c, d) = _figure(4)
    _plot_line(a, xp, obj, color="C0")
    a.set(xlabel="pass", ylabel="objective F")
    rel = _column(passes, "rel_gap")
    for ax, x in ((b, xp), (d, xs)):
        _plot_line(ax, x, gap, log=True, color="C3", label="gap estimate")
        if np.isfinite(rel).any():
            _plot_line(ax, x, rel, log=True, color="C1", ls="--", label="relative gap")
            if tol is not None and tol > 0:
                ax.axhline(tol, color="C1", lw=1, ls=":", label=f"tolerance {tol:g}")
                _log_axis(ax.yaxis, np.concatenate([gap, rel, [tol]]))
    b.set(xlabel="pass", ylabel="gap (power-iteration estimate)")
    _plot_line(c, xs, obj, color="C0")
    c.set(xlabel="seconds", ylabel="objective F")
    d.set(xlabel="seconds", ylabel="gap (power-iteration estimate)")
    for ax in (a, b):
        _integer_axis(ax.xaxis)
    for n, i in enumerate(_lam_changes(passes)):  # where a path moved to its next lam
        for ax, x in ((a, xp), (b, xp), (c, xs), (d, xs)):
            if np.isfinite(x[i]):
                ax.axvline(x[i], color="0.5", lw=0.8, ls=":",
                           label="next lam" if n == 0 else None)
    for ax in (a, b, c, d):
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize="small", loc="best")
    fig.suptitle("objective and gap estimate per pass and over time")
    return _save(fig, out / "convergence.png")


def _plot_rank(passes: Sequence[Mapping[str, Any]], out: Path) -> Path | None:
    rank = _column(passes, "rank", "r")
    if not np.isfinite(rank).any():
        return None
    fig, (a,) = _figure(1)
    xp = _pass_axis(passes)
    _plot_line(a, xp, rank, drawstyle="steps-post", color="C2")
    for n, i in enumerate(_lam_changes(passes)):
        a.axvline(xp[i], color="0.5", lw=0.8, ls=":", label="next lam" if n == 0 else None)
    if _lam_changes(passes):
        a.legend(fontsize="small", loc="lower right")
    a.set(xlabel="pass", ylabel="rank", title="rank of the model after each pass")
    _integer_axis(a.xaxis)
    _integer_axis(a.yaxis)
    return _save(fig, out / "rank.png")


def _plot_singular_values(s: np.ndarray | None, out: Path) -> Path | None:
    if s is None or s.size == 0:
        return None
    fig, (a,) = _figure(1)
    a.bar(np.arange(1, s.size + 1), s, color="C1")
    if s.min() > 0 and s.max() / s.min() > 100:
        a.set_yscale("log")
        _log_axis(a.yaxis, s)
    a.set(xlabel="index (largest first)", ylabel="singular value",
          title=f"chosen model: {s.size} singular values")
    _integer_axis(a.xaxis)
    a.grid(True, alpha=0.3, axis="y")
    return _save(fig, out / "singular_values.png")


def _plot_path(path: Sequence[Mapping[str, Any]], out: Path,
               chosen: float | None) -> Path | None:
    lam = _column(path, "lam", "lambda")
    if not np.isfinite(lam).any():
        return None
    vals = [_validation(r) for r in path]
    val = np.array([v for v, _ in vals])
    name = next((n for v, n in vals if np.isfinite(v)), "validation metric")
    rank = _column(path, "rank", "r")
    fig, (a, b) = _figure(2)
    _plot_line(a, lam, val, color="C4")
    a.set(xlabel="lam (log scale)", ylabel=name, title="validation along the path")
    _plot_line(b, lam, rank, color="C2")
    b.set(xlabel="lam (log scale)", ylabel="rank", title="rank along the path")
    _integer_axis(b.yaxis)
    requested = next((r.get("requested") for r in path if r.get("requested")), None)
    past = [_num(r.get("lam")) for r in path if r.get("extended")]
    for ax in (a, b):
        if np.nanmin(lam) > 0:
            ax.set_xscale("log")
            _log_axis(ax.xaxis, lam, at_values=True)
            for label in ax.get_xticklabels():
                label.set_rotation(30)
        if past and requested:
            ax.axvspan(min(past) / 1.2, max(past) * 1.2, color="0.9",
                       label=f"past the {requested} requested values")
        if chosen is not None and math.isfinite(chosen):
            ax.axvline(chosen, color="C3", lw=1, ls="--", label=f"chosen lam {chosen:.3g}")
        ax.legend(fontsize="small")
    return _save(fig, out / "path.png")


def _plot_profile(profile: Mapping[str, float] | None, out: Path) -> Path | None:
    if not profile:
        return None
    names = list(profile)
    secs = np.array([profile[n] for n in names])
    fig, (a,) = _figure(1)
    a.barh(np.arange(len(names)), secs, color="C5")
    a.set_yticks(np.arange(len(names)), names)
    a.invert_yaxis()
    a.set(xlabel="seconds", title="time per phase (profile)")
    return _save(fig, out / "profile.png")


#: what each figure shows (the page's captions)
CAPTIONS = {
    "convergence": "Objective F and its gap estimate after each pass (left) and against "
                   "wall-clock seconds (right). The dotted vertical lines mark where a path "
                   "moved to its next lam; the dotted horizontal line is the tolerance at "
                   "which a fit stops (relative gap).",
    "rank": "Rank of the model (number of singular values kept) after each pass; dotted lines "
            "mark a move to the next lam.",
    "singular values": "Singular values of the chosen model, largest first: how much each "
                       "rank-one direction contributes.",
    "path": "Validation metric and rank at each lam of the regularization path (log scale, "
            "larger lam to the right); the dashed line marks the chosen lam, the shaded band "
            "the values tried past the requested end.",
    "profile": "Seconds spent in each phase of the profiled passes (reading, decoding, kernels).",
}


# ------------------------------------------------------------------------ html
def _fmt(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, (dict, list)):
        text = json.dumps(value, sort_keys=True)
        return text if len(text) <= 120 else text[:117] + "..."
    return str(value)


def _model_meta(run_dir: Path) -> Mapping[str, Any]:
    doc = _read_json(run_dir / "model" / "model.json")
    return doc if isinstance(doc, Mapping) else {}


def _summary(
    run_dir: Path,
    config: Any,
    passes: Sequence[Mapping[str, Any]],
    path: Sequence[Mapping[str, Any]],
    s: np.ndarray | None,
) -> list[tuple[str, Any]]:
    meta = _model_meta(run_dir)
    info = meta.get("path") if isinstance(meta.get("path"), Mapping) else {}
    rows: list[tuple[str, Any]] = []
    if meta:
        rows.append(("chosen model: lam", meta.get("lam")))
        if info:
            rows.append((f"chosen model: {info.get('validation_metric', 'validation')}",
                         info.get("validation")))
            rows.append(("chosen model: value on the path",
                         f"{int(info.get('chosen_index', 0)) + 1} of {info.get('fitted')}"))
        rows.append(("chosen model: rank", meta.get("rank", None if s is None else int(s.size))))
        rows.append(("chosen model: objective", meta.get("objective")))
        rows.append(("chosen model: gap estimate", meta.get("gap")))
        rows.append(("chosen model: passes in its step", meta.get("step_passes",
                                                                   info.get("chosen_step_passes"))))
        rows.append(("chosen model: status", meta.get("status")))
        if s is not None and s.size:
            rows.append(("chosen model: trace norm ||W||_*", float(s.sum())))
    else:
        rows.append(("model", "none written (the run has not fitted one)"))
    rows.append(("lam_max", meta.get("lam_max")))
    last_pass = np.nanmax(_pass_axis(passes)) if passes else 0
    rows.append(("run: passes", int(last_pass)))
    if passes:
        rows.append(("run: seconds", passes[-1].get("seconds")))
    if path:
        rows.append(("run: path values fitted", len(path)))
        req = info.get("requested") or next((r.get("requested") for r in path
                                             if r.get("requested")), None)
        if req:
            rows.append(("run: path values requested", req))
        if info:
            rows.append(("run: path end", f"{info.get('status')}: {info.get('message')}"))
    rows.append(("run", str(run_dir)))
    if isinstance(config, Mapping):
        store = config.get("store") or {}
        if isinstance(store, Mapping):
            rows += [("store", store.get("path")), ("store fingerprint", store.get("fingerprint"))]
        rows.append(("created", config.get("created")))
        settings = config.get("settings") or {}
        if isinstance(settings, Mapping):
            rows += [(f"setting: {k}", v) for k, v in sorted(settings.items())]
    return [(k, v) for k, v in rows if v is not None]


def _html(title: str, rows: Sequence[tuple[str, Any]], figures: Sequence[tuple[Path, str]],
          missing: Sequence[str]) -> str:
    esc = html.escape
    table = "\n".join(
        f"<tr><th>{esc(str(k))}</th><td>{esc(_fmt(v))}</td></tr>" for k, v in rows
    )
    imgs = "\n".join(
        f'<figure><img src="{esc(f.name)}" alt="{esc(caption)}"><figcaption>{esc(caption)}'
        "</figcaption></figure>"
        for f, caption in figures
    )
    notes = "".join(f"<li>{esc(m)}</li>" for m in missing)
    notes = f"<h2>Not shown</h2><ul>{notes}</ul>" if notes else ""
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{esc(title)}</title>
<style>
body {{ font-family: sans-serif; max-width: 70em; margin: 2em auto; color: #222; }}
table {{ border-collapse: collapse; margin-bottom: 2em; }}
th, td {{ border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: left; font-size: 90%; }}
th {{ background: #f4f4f4; font-weight: normal; }}
figure {{ display: inline-block; margin: 0 1em 1em 0; max-width: 100%; }}
figcaption {{ max-width: 40em; font-size: 90%; color: #444; }}
img {{ max-width: 100%; border: 1px solid #ddd; }}
</style></head><body>
<h1>{esc(title)}</h1>
<p>Gap estimates use sigma_1 from power iteration, a lower bound: they hold at the
power iteration's tolerance.</p>
<h2>Summary</h2>
<table>
{table}
</table>
<h2>Figures</h2>
{imgs}
{notes}
</body></html>
"""


def write_report(run_dir: str | os.PathLike, out_dir: str | os.PathLike | None = None) -> Path:
    """Write the PNG plots and ``report.html`` of a run.

    Parameters
    ----------
    run_dir : path
        A run directory written by ``ranktide train`` (needs ``config.json``
        or ``history.jsonl``).
    out_dir : path, optional
        Where to write; default ``RUN/report``. Created when missing; only the
        report's own files in it are replaced.

    Returns
    -------
    Path
        The path of ``report.html``.

    Raises
    ------
    CheckpointError
        When ``run_dir`` is not a run directory.
    InputError
        When the run has recorded no pass yet (nothing to plot).
    """
    run = Path(run_dir)
    if not run.is_dir():
        raise CheckpointError(f"{run}: not a directory; give the run directory written by train")
    config = _read_json(run / "config.json")
    if config is None and not (run / "history.jsonl").is_file():
        raise CheckpointError(
            f"{run}: neither config.json nor history.jsonl found; give a run directory written "
            "by ranktide train"
        )
    passes, path = split_history(read_history(run))
    if not passes:
        raise InputError(f"{run}: no passes recorded in history.jsonl, so there is nothing to "
                         "report yet; train (or resume) the run first")
    out = run / "report" if out_dir is None else Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    s = _singular_values(run)
    settings = (config or {}).get("settings") if isinstance(config, Mapping) else None
    tol = _num((settings or {}).get("tol")) if isinstance(settings, Mapping) else math.nan
    chosen = _num(_model_meta(run).get("lam"))
    made = {
        "convergence": _plot_convergence(passes, out, None if math.isnan(tol) else tol),
        "rank": _plot_rank(passes, out),
        "singular values": _plot_singular_values(s, out),
        "path": _plot_path(path, out, None if math.isnan(chosen) else chosen),
        "profile": _plot_profile(_profile(run), out),
    }
    reasons = {
        "convergence": "no objective or gap in history.jsonl",
        "rank": "no rank in history.jsonl",
        "singular values": "no model in RUN/model" if s is None else
                           "the chosen model has rank 0 (W = 0)",
        "path": "not a path run (no per-lam records)",
        "profile": "the run was not profiled",
    }
    figures = [(p, CAPTIONS[name]) for name, p in made.items() if p is not None]
    missing = [f"{name}: {reasons[name]}" for name, p in made.items() if p is None]
    page = _html(f"ranktide run report: {run.name}", _summary(run, config, passes, path, s),
                 figures, missing)
    target = out / "report.html"
    atomic_write_bytes(target, page.encode("utf-8"))
    return target
