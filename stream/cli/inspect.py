"""``ranktide inspect``: summarize a store (shape, sizes, row lengths, targets)."""

from __future__ import annotations

import argparse
import json
import sys

from ranktide.passes.budget import parse_memory
from ranktide.store.inspect import format_inspection, inspect_store

HELP = "Summarize a store: shape, density, sizes, row lengths, empty rows/columns, targets"
EXAMPLE = "ranktide inspect reviews.zarr --json"


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("store", metavar="STORE", help="store to summarize")
    parser.add_argument("--memory", metavar="SIZE", default=None,
                        help="memory budget, e.g. 4GB or 25%% (default: a quarter of RAM); "
                             "refused up front when the per-column counts need more")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--quiet", action="store_true",
                        help="print nothing; exit status 0 when the store opens and reads cleanly")


def run(args: argparse.Namespace) -> int:
    info = inspect_store(args.store, memory=parse_memory(args.memory))
    if args.quiet and not args.json:
        return 0
    if args.json:
        json.dump(info, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print(format_inspection(info))
    return 0
