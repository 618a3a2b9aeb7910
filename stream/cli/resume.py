"""``ranktide resume``: continue a run from its latest valid checkpoint."""

from __future__ import annotations

import argparse
import sys
import warnings

from ranktide.cli._cluster_opt import add_cluster_option, cluster_backend
from ranktide.cli.train import finish, pass_printer
from ranktide.runs.checkpoint import CheckpointWarning
from ranktide.runs.resume import resume
from ranktide.signals import stop_on_signals

HELP = "Continue an interrupted run from its latest valid checkpoint"
EXAMPLE = "ranktide resume run1 --max-passes 200"


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("run_dir", metavar="RUN", help="run directory written by ranktide train")
    parser.add_argument("--store", default=None, metavar="STORE",
                        help="the training store, if it has moved (its fingerprint must match)")
    parser.add_argument("--max-passes", type=int, default=None, metavar="N",
                        help="passes allowed per lam (default: the run's)")
    parser.add_argument("--max-seconds", type=float, default=None, metavar="S",
                        help="wall-clock budget of this session (default: the run's)")
    parser.add_argument("--tol", type=float, default=None, metavar="T",
                        help="relative gap estimate at which to stop (default: the run's)")
    parser.add_argument("--checkpoint-seconds", type=float, default=None, metavar="S",
                        help="seconds of training between checkpoints (default: the run's)")
    parser.add_argument("--checkpoint-passes", type=int, default=None, metavar="N",
                        help="passes between checkpoints (default: the run's)")
    parser.add_argument("--quiet", action="store_true", help="no per-pass table, no progress")
    add_cluster_option(parser)
    parser.add_argument("--json", action="store_true",
                        help="print one JSON summary instead of the table")


def _warn_lines(caught: list) -> None:
    for w in caught:
        print(f"ranktide resume: warning: {w.message}", file=sys.stderr, flush=True)


def run(args: argparse.Namespace) -> int:
    show = not (args.quiet or args.json)
    on_pass = pass_printer(show)

    with (cluster_backend(args, default="") as backend, stop_on_signals() as stop,
          warnings.catch_warnings(record=True) as caught):
        warnings.simplefilter("always", CheckpointWarning)
        try:
            res = resume(
                args.run_dir, store=args.store, max_passes=args.max_passes,
                max_seconds=args.max_seconds, tol=args.tol,
                checkpoint_seconds=args.checkpoint_seconds,
                checkpoint_passes=args.checkpoint_passes, stop=stop, on_pass=on_pass,
                progress=show and sys.stderr.isatty(), backend=backend,
            )
        finally:
            _warn_lines([w for w in caught if issubclass(w.category, CheckpointWarning)])
    return finish(res, run_dir=args.run_dir, as_json=args.json, stop=stop)
