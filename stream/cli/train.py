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
from ranktide.runs.train import train
from ranktide.signals import interrupted_message, stop_on_signals

HELP = "Train a trace-norm regularized model on a store (one lam or a regularization path)"
EXAMPLE = "ranktide train tickets.zarr --loss softmax --lam-frac 0.1 --out run1"

#: per-pass table: (header, record key, width, format)
COLUMNS: tuple[tuple[str, str, int, str], ...] = (
    ("pass", "pass", 5, "d"),
    ("objective", "objective", 14, ".8g"),
    ("gap est.", "gap_estimate", 10, ".3e"),
    ("sigma1/lam", "sigma_ratio", 11, ".6f"),
    ("rank", "rank", 5, "d"),
    ("seconds", "seconds", 9, ".2f"),
    ("MB/s", "mb_per_s", 9, ".1f"),
)


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("store", metavar="STORE", help="training store (zarr directory or HDF5)")
    parser.add_argument("--loss", required=True, choices=LOSS_NAMES,
                        help="loss matching the store's targets")
    which = parser.add_mutually_exclusive_group(required=True)
    which.add_argument("--lam", type=float, metavar="X", help="trace-norm penalty")
    which.add_argument("--lam-frac", type=float, metavar="F",
                       help="penalty as a fraction of lam_max (the smallest lam giving W = 0)")
    which.add_argument("--path", type=int, metavar="M",
                       help="regularization path of M values from lam_max down (needs --valid)")
    parser.add_argument("--valid", metavar="STORE", help="validation store for --path")
    parser.add_argument("--path-min-frac", type=float, default=0.01, metavar="F",
                        help="smallest path value as a fraction of lam_max (default 0.01)")
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


def pass_printer(show: bool) -> Any:
    """A per-pass callback printing the aligned table (header before the first row)."""
    printed = [False]

    def on_pass(rec: dict) -> None:
        if not show:
            return
        if not printed[0]:
            print(header_line(), flush=True)
            printed[0] = True
        print(pass_line(rec), flush=True)

    return on_pass


def _num(x: Any, spec: str) -> str:
    """``x`` formatted with ``spec``, or ``-`` when the run never computed it."""
    return "-" if x is None else format(x, spec)


def summary_line(res: Any) -> str:
    """The final line's figures; values a run stopped too early to compute print as ``-``."""
    return (f"{res.status}: objective {_num(res.objective, '.10g')}, gap estimate "
            f"{_num(res.gap, '.3e')}, sigma1/lam {_num(res.sigma_ratio, '.6f')}, rank {res.rank}, "
            f"{res.passes} passes, {_num(res.seconds, '.1f')} s")


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

    return json_data(out)


def run(args: argparse.Namespace) -> int:
    if args.path is not None and args.valid is None:
        raise ConfigError("--path needs --valid STORE (the validation data that picks lam)")
    if args.valid is not None and args.path is None:
        raise ConfigError("--valid is used with --path only; drop it or add --path M")
    show = not (args.quiet or args.json)
    on_pass = pass_printer(show)

    # SIGINT/SIGTERM: checkpoint, then exit 130/143
    with cluster_backend(args) as backend, stop_on_signals() as stop:
        res = train(
            args.store, loss=args.loss, lam=args.lam, lam_frac=args.lam_frac, path=args.path,
            path_min_frac=args.path_min_frac, valid=args.valid, tol=args.tol,
            max_passes=args.max_passes, max_seconds=args.max_seconds, memory=args.memory,
            seed=args.seed, block_rows=args.block_rows, backend=backend,
            class_weight=args.class_weight, progress=show and sys.stderr.isatty(), out=args.out,
            overwrite=args.overwrite, on_pass=on_pass, stop=stop,
            checkpoint_seconds=args.checkpoint_seconds, checkpoint_passes=args.checkpoint_passes,
        )
    if res.status == "interrupted":
        # a discarded replacement run (--overwrite) has no run directory to resume
        print(interrupted_message(args.out) if res.run_dir else f"ranktide: {res.message}",
              file=sys.stderr, flush=True)
        return stop.exit_code or 130
    if args.json:
        print(json.dumps(_summary(res), indent=2, sort_keys=True))
        return 0
    lam = f"lam {_num(res.lam, '.6g')} (lam_max {_num(res.lam_max, '.6g')}); "
    print(f"{summary_line(res)}, {lam}{res.message}; model in {res.run_dir}/model")
    return 0
