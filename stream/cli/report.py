"""``ranktide report``: PNG plots and an HTML page for a training run."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from ranktide.diagnostics.report import write_report
from ranktide.outputs import check_output, check_source, files_into

HELP = "Plot a run (objective, gap, rank, singular values, path, profile) into PNGs + HTML"
EXAMPLE = "ranktide report run --out run/report"


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("run_dir", metavar="RUN", help="run directory written by train")
    parser.add_argument("--out", default=None, metavar="DIR",
                        help="output directory (default RUN/report)")
    parser.add_argument("--json", action="store_true", help="print the written files as JSON")
    parser.add_argument("--quiet", action="store_true", help="print nothing on success")


def run(args: argparse.Namespace) -> int:
    run = check_source(args.run_dir, "run directory")
    out = run / "report" if args.out is None else Path(args.out)
    parts = {f"the run's {name}": run / name
             for name in ("model", "checkpoints", "config.json", "history.jsonl")}
    # the report may live inside the run (its default), but never over the run's own files
    check_output(out, {"the run": run, **parts}, overwrite=True, kind="dir",
                 may_lie_inside=("the run",))
    with files_into(out) as tmp:
        made = write_report(run, tmp)
        names = sorted(p.name for p in tmp.glob("*.png"))
    page = out / made.name
    figures = [str(out / n) for n in names]
    if args.json:
        print(json.dumps({"report": str(page), "figures": figures}))
    elif not args.quiet:
        print(f"wrote {page} ({len(figures)} figures)")
    return 0
