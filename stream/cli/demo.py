"""``ranktide demo``: the whole workflow on invented data."""

from __future__ import annotations

import argparse
import json

from ranktide.cli.demo_workflow import run_demo
from ranktide.outputs import check_output

HELP = "Run the whole workflow on invented data: ingest, split, train a path, evaluate, report"
EXAMPLE = "ranktide demo --size small --out demo-out"


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--size", choices=("small", "medium"), default="small",
                        help="small: 2000 rows, 60 sections (about a minute); "
                             "medium: 40000 rows, 300 sections")
    parser.add_argument("--out", default="demo-out", metavar="DIR",
                        help="output directory (default demo-out): missing, empty, or an "
                             "earlier demo, which is replaced once the new one is complete; "
                             "any other directory is refused")
    parser.add_argument("--seed", type=int, default=0, help="seed of the invented data and fit")
    parser.add_argument("--json", action="store_true", help="print what was made as JSON")
    parser.add_argument("--quiet", action="store_true", help="no progress, no step lines")


def run(args: argparse.Namespace) -> int:
    # the demo decides itself what it may replace (an earlier demo); here: a writable place
    check_output(args.out, overwrite=True, kind="dir")
    made = run_demo(args.out, size=args.size, seed=args.seed, quiet=args.quiet or args.json)
    if args.json:
        print(json.dumps(made))
    return 0
