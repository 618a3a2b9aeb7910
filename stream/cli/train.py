"""``ranktide train``: fit a trace-norm regularized model on a store."""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

from ranktide.cli._cluster_opt import add_cluster_option, cluster_backend
from ranktide.errors import ConfigError
from ranktide.jsondata import json_data
from ranktide.losses import LOSS_NAMES
from ranktide.runs.train import NO_FIT, PATH_EXTEND, PATH_FLOOR, PATH_TOL, VALIDATION_METRIC, train
from ranktide.signals import interrupted_message, stop_on_signals

HELP = "Train a trace-norm regularized model on a store (one lam or a regularization path)"
EXAMPLE = "ranktide train tickets.zarr --loss softmax --lam-scale 0.1 --out run1"

#: exit status of a run that ended before it could fit a model (no model written)
EXIT_NO_FIT = 3

#: per-pass table: (header, record key, width, format)
COLUMNS: tuple[tuple[str, str, int, str], ...] = (
    ("pass", "pass", 5, "d"),
    ("objective", "objective", 14, ".8g"),
    ("gap est.", "gap_estimate", 10, ".3e"),
    ("sigma1/lam", "sigma_ratio", 11, ".6f"),
    ("rank", "rank", 5, "d"),
    ("seconds", "seconds", 9, ".2f"),
    ("MB read", "mb_read", 8, ".3f"),
    ("MB/s", "mb_read_per_s", 8, ".1f"),
)

def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("store", metavar="STORE", help="training store (zarr directory or HDF5)")
    parser.add_argument("--loss", required=True, choices=LOSS_NAMES,
                        help="loss matching the store's targets")
    which = parser.add_mutually_exclusive_group(required=True)
    which.add_argument("--lam", type=float, metavar="X", help="trace-norm penalty")
    which.add_argument("--lam-scale", type=float, metavar="F",
                       help="penalty lam = F x lam_max (lam_max: the smallest lam giving "
                            "W = 0); a run whose passes all go into finding lam_max exits "
                            f"with status {EXIT_NO_FIT} and writes no model")
    which.add_argument("--path-steps", type=int, metavar="N",
                       help="regularization path of N lam values from lam_max down to "
                            "--path-floor x lam_max (needs --valid)")
    parser.add_argument("--valid", metavar="STORE", help="validation store for --path-steps")
    parser.add_argument("--path-floor", type=float, default=PATH_FLOOR, metavar="F",
                        help="smallest requested path value as a share of lam_max "
                             f"(default {PATH_FLOOR})")
    parser.add_argument("--path-extend", type=int, default=PATH_EXTEND, metavar="N",
                        help="when the best lam is the smallest requested, go on down the same "
                             "sequence until validation worsens twice in a row, at most N more "
                             f"values (default {PATH_EXTEND}; 0: never)")
    parser.add_argument("--path-tol", type=float, default=PATH_TOL, metavar="T",
                        help="relative gap to which each path value is solved before the "
                             f"chosen one is finished to --tol (default {PATH_TOL})")
    parser.add_argument("--refit-with-valid", action="store_true",
                        help="after the path has chosen on --valid, fit the chosen model again "
                             "on the training and validation rows together")
    parser.add_argument("--out", required=True, metavar="RUN", help="run directory to create")
    parser.add_argument("--tol", type=float, default=1e-4,
                        help="relative gap estimate at which to stop (default 1e-4)")
    parser.add_argument("--max-passes", type=int, default=100, metavar="N",
                        help="passes allowed per lam (default 100)")
    parser.add_argument("--max-seconds", type=float, default=None, metavar="S",
                        help="wall-clock budget of the run")
    parser.add_argument("--memory", default=None, metavar="SIZE",
                        help="memory budget, e.g. 4GB, 512MiB, 25%% (default a quarter of RAM)")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--block-rows", type=int, default=None, metavar="N",
                        help="rows per block (default from the memory budget)")
    add_cluster_option(parser)
    parser.add_argument("--backend", choices=("serial", "threads"), default="serial",
                        help="pass backend (default serial)")
    parser.add_argument("--class-weight", default=None, metavar="balanced|FILE",
                        help="softmax class weights: 'balanced' or a file of k numbers (.npy "
                             "or text)")
    parser.add_argument("--checkpoint-seconds", type=float, default=60.0, metavar="S",
                        help="seconds of training between checkpoints (default 60)")
    parser.add_argument("--checkpoint-passes", type=int, default=None, metavar="N",
                        help="also checkpoint every N passes (default: by time only; always "
                             "at the end of each path step and of the run)")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing RUN")
    parser.add_argument("--quiet", action="store_true", help="no per-pass table, no progress")
    parser.add_argument("--json", action="store_true",
                        help="print one JSON summary instead of the table")


def _cell(value: Any, width: int, fmt: str) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-".rjust(width)
    try:
        return format(value, fmt).rjust(width)
    except (TypeError, ValueError):
        return str(value).rjust(width)


def header_line() -> str:
    """The per-pass table's header."""
    return "  ".join(h.rjust(w) for h, _, w, _ in COLUMNS)


def pass_line(rec: dict) -> str:
    """One per-pass table row."""
    return "  ".join(_cell(rec.get(key), w, fmt) for _, key, w, fmt in COLUMNS)


def _num(x: Any, spec: str) -> str:
    """``x`` formatted with ``spec``, or ``-`` when the run never computed it."""
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return format(x, spec)


def summary_line(res: Any) -> str:
    """The final line's figures; values a run stopped too early to compute print as ``-``."""
    return (f"{res.status}: objective {_num(res.objective, '.10g')}, gap estimate "
            f"{_num(res.gap, '.3e')}, sigma1/lam {_num(res.sigma_ratio, '.6f')}, rank {res.rank}, "
            f"{res.passes} passes, {_num(res.seconds, '.1f')} s")


def value_line(rec: dict) -> str:
    """One line for a finished path value (a ``kind == "path"`` record)."""
    j, m = int(rec["index"]), int(rec.get("requested") or 0)
    where = f"{j + 1}/{m}" if j < m or not m else f"{j + 1} (+{j + 1 - m})"
    best = "  <- best so far" if rec.get("best_index") == j else ""
    name = str(rec.get("val_metric_name") or "validation")
    return (f"value {where:>8}  lam {_num(rec.get('lam'), '.4g'):>9}  rank "
            f"{_num(rec.get('rank'), 'd'):>4}  passes {_num(rec.get('passes'), 'd'):>4}  "
            f"seconds {_num(rec.get('seconds'), '.2f'):>8}  {name} "
            f"{_num(rec.get('val_metric'), '.4f')}{best}")


def _with_read_figures(rec: dict) -> dict:
    """The pass record plus MB (10^6 bytes) read and decoded and its rate, when any."""
    out = dict(rec)
    nbytes = rec.get("bytes_read")
    secs = rec.get("pass_seconds")
    if isinstance(nbytes, (int, float)) and nbytes > 0:
        out["mb_read"] = nbytes / 1e6
        if isinstance(secs, (int, float)) and secs > 0:
            out["mb_read_per_s"] = nbytes / 1e6 / secs
    elif nbytes == 0:  # nothing decoded: the blocks were still in memory from the last pass
        out["mb_read"] = out["mb_read_per_s"] = "cached"
    return out


def pass_printer(show: bool) -> Any:
    """A display callback: the aligned per-pass table, and one line per finished path value."""
    printed = [False]

    def on_pass(rec: dict) -> None:
        if not show:
            return
        if rec.get("kind") == "path":
            print(value_line(rec), flush=True)
            return
        if not printed[0]:
            print(header_line(), flush=True)
            printed[0] = True
        print(pass_line(_with_read_figures(rec)), flush=True)

    return on_pass


def closing_lines(res: Any) -> list[str]:
    """The closing summary: the chosen model, then the run's totals."""
    model = f"model in {res.run_dir}/model" if res.run_dir else "no run directory"
    if not res.path:
        lam = f"lam {_num(res.lam, '.6g')} (lam_max {_num(res.lam_max, '.6g')})"
        return [f"{summary_line(res)}, {lam}; {res.message}; {model}"]
    pt = res.path[res.best_index]
    m = int(getattr(res.model, "meta", {}).get("path", {}).get("requested") or len(res.path))
    where = f"value {pt.index + 1} of {m}" if pt.index < m else \
        f"value {pt.index + 1}, {pt.index + 1 - m} past the requested {m}"
    name = VALIDATION_NAMES.get(str(getattr(res.model, "loss", "")), "validation")
    chosen = (f"chosen model: lam {_num(pt.lam, '.4g')} ({where}), {name} "
              f"{_num(pt.score, '.4f')}, objective {_num(pt.objective, '.8g')}, rank {pt.rank}, "
              f"{pt.passes} passes in its step ({pt.status}), gap estimate {_num(pt.gap, '.2e')}")
    total = (f"run totals: {len(res.path)} values, {res.passes} passes, "
             f"{_num(res.seconds, '.1f')} s, lam_max {_num(res.lam_max, '.4g')}; "
             f"{res.status}: {res.message}; {model}")
    return [chosen, *model_notes(getattr(res.model, "meta", {})), total]


def model_notes(meta: dict) -> list[str]:
    """Lines about the chosen model: its debiasing refit, and a nearly full rank."""
    out = []
    refit = meta.get("debias") or {}
    tried = refit.get("tried") or []
    if refit.get("skipped"):
        out.append(f"refit on the chosen subspace skipped: {refit['skipped']}")
    elif len(tried) > 1:
        kept = next((t for t in tried if t["factor"] == refit.get("kept_factor")), tried[0])
        out.append(f"refit on the chosen subspace ({len(tried) - 1} smaller penalties tried): "
                   f"kept {refit.get('kept')}, validation {_num(kept['score'], '.4f')} "
                   f"(path's model {_num(tried[0]['score'], '.4f')}), rank {kept['rank']}")
    if meta.get("low_rank_note"):
        out.append(f"note: {meta['low_rank_note']}")
    return out


#: loss -> its validation metric's name, as the per-value lines say it
VALIDATION_NAMES = {loss: f"validation {key}" for loss, (key, _) in VALIDATION_METRIC.items()}


def _summary(res: Any) -> dict:
    out = {
        "status": res.status, "message": res.message, "objective": res.objective,
        "gap_estimate": res.gap, "sigma_ratio": res.sigma_ratio, "rank": res.rank,
        "passes": res.passes, "seconds": res.seconds, "lam": res.lam, "lam_max": res.lam_max,
        "grad_b_norm": res.grad_b_norm, "run_dir": res.run_dir,
    }
    if res.path:
        out["path"] = [{"lam": p.lam, "score": p.score, "rank": p.rank, "passes": p.passes,
                        "status": p.status} for p in res.path]
        out["best_index"] = res.best_index
        pt = res.path[res.best_index]
        out["chosen"] = {"lam": pt.lam, "index": pt.index, "score": pt.score, "rank": pt.rank,
                         "objective": pt.objective, "gap_estimate": pt.gap,
                         "step_passes": pt.passes, "status": pt.status}
        out["totals"] = {"values": len(res.path), "passes": res.passes, "seconds": res.seconds}
    return json_data(out)


def finish(res: Any, *, run_dir: str, as_json: bool, stop: Any) -> int:
    """Print the outcome of a train or resume run; return the exit status."""
    if res.status == "interrupted":
        # a discarded replacement run (--overwrite) has no run directory to resume
        print(interrupted_message(run_dir) if res.run_dir else f"ranktide: {res.message}",
              file=sys.stderr, flush=True)
        return stop.exit_code or 130
    if res.status == NO_FIT:
        print(f"ranktide: {run_dir}: {res.message} (continue with: ranktide resume {run_dir} "
              "--max-passes N)", file=sys.stderr, flush=True)
        return EXIT_NO_FIT
    if as_json:
        print(json.dumps(_summary(res), indent=2, sort_keys=True))
        return 0
    for line in closing_lines(res):
        print(line, flush=True)
    return 0


def run(args: argparse.Namespace) -> int:
    if args.path_steps is not None and args.valid is None:
        raise ConfigError("--path-steps needs --valid STORE (the validation data that picks lam)")
    if args.valid is not None and args.path_steps is None:
        raise ConfigError("--valid is used with --path-steps only; drop it or add --path-steps N")
    show = not (args.quiet or args.json)
    on_pass = pass_printer(show)

    # SIGINT/SIGTERM: checkpoint, then exit 130/143
    with cluster_backend(args) as backend, stop_on_signals() as stop:
        res = train(
            args.store, loss=args.loss, lam=args.lam, lam_scale=args.lam_scale,
            path_steps=args.path_steps, path_floor=args.path_floor, path_extend=args.path_extend,
            path_tol=args.path_tol, refit_with_valid=args.refit_with_valid, valid=args.valid,
            tol=args.tol,
            max_passes=args.max_passes, max_seconds=args.max_seconds, memory=args.memory,
            seed=args.seed, block_rows=args.block_rows, backend=backend,
            class_weight=args.class_weight, progress=show and sys.stderr.isatty(), out=args.out,
            overwrite=args.overwrite, on_pass=on_pass, stop=stop,
            checkpoint_seconds=args.checkpoint_seconds, checkpoint_passes=args.checkpoint_passes,
        )
    return finish(res, run_dir=args.out, as_json=args.json, stop=stop)
