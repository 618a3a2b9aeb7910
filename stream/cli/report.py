"""``ranktide report``: PNG plots and an HTML page for a training run."""

from __future__ import annotations

import argparse
import json

from ranktide.diagnostics.report import write_report

HELP = "Plot a run (objective, gap, rank, singular values, path, profile) into PNGs + HTML"
EXAMPLE = "ranktide report run --out run/report"


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("run_dir", metavar="RUN", help="run directory written by train")
    parser.add_argument("--out", default=None, metavar="DIR",
                        help="output directory (default RUN/report)")
    parser.add_argument("--json", action="store_true", help="print the written files as JSON")
    parser.add_argument("--quiet", action="store_true", help="print nothing on success")


def run(args: argparse.Namespace) -> int:
    page = write_report(args.run_dir, args.out)
    figures = sorted(str(p) for p in page.parent.glob("*.png"))
    if args.json:
        print(json.dumps({"report": str(page), "figures": figures}))
    elif not args.quiet:
        print(f"wrote {page} ({len(figures)} figures)")
    return 0
