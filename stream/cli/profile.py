"""``ranktide profile``: time the phases of solver-style passes over a store."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from ranktide.cli._cluster_opt import add_cluster_option, cluster_backend
from ranktide.diagnostics.profile import format_report, jsonable, profile_store, write_profile
from ranktide.errors import ConfigError, InputError
from ranktide.outputs import check_output, check_source, files_into
from ranktide.passes.budget import parse_memory
from ranktide.runs.checks import check_memory
from ranktide.store.reader import open_store

HELP = "Profile solver-style passes over a store: I/O vs compute per block and phase"
EXAMPLE = "ranktide profile data.zarr --passes 3 --rank 16 --out prof"


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("store", metavar="STORE", help="store directory (zarr) or file (HDF5)")
    parser.add_argument("--model", metavar="MODEL_DIR", default=None,
                        help="model directory (factors.npz + model.json); default: W = 0 with "
                             "the best intercept and random factors of rank --rank")
    parser.add_argument("--passes", type=int, default=3, metavar="N",
                        help="profiled passes (default 3)")
    parser.add_argument("--rank", type=int, default=16, metavar="R",
                        help="rank of the random factors without --model (default 16)")
    parser.add_argument("--out", metavar="DIR", default=None,
                        help="write profile.csv, profile.json and profile.png here")
    parser.add_argument("--memory", metavar="SIZE", default=None,
                        help="memory budget that sizes the blocks, e.g. 4GB (default: a "
                             "quarter of RAM)")
    parser.add_argument("--block-rows", type=int, default=None, metavar="N",
                        help="rows per block (default: planned from --memory)")
    parser.add_argument("--backend", choices=("serial", "threads"), default="serial",
                        help="pass backend (default serial)")
    parser.add_argument("--threads", type=int, default=None, metavar="N",
                        help="compute threads of the threads backend")
    parser.add_argument("--seed", type=int, default=0, help="seed of the random factors")
    add_cluster_option(parser)
    parser.add_argument("--quiet", action="store_true", help="no progress bar, no table")
    parser.add_argument("--json", action="store_true",
                        help="print the summary as JSON instead of the table")


def run(args: argparse.Namespace) -> int:
    if args.block_rows is not None and args.block_rows < 1:
        raise ConfigError(f"--block-rows {args.block_rows}: must be at least 1")
    budget = parse_memory(args.memory) if args.memory is not None else None
    check_source(args.store, "store")
    if args.model is not None:
        check_source(args.model, "--model")
    if args.out:
        check_output(args.out, {"the store": args.store, "--model": args.model},
                     overwrite=True, kind="dir")
    with open_store(args.store) as st:
        if st.target_kind is None:
            raise InputError(f"{args.store}: the store has no targets; profile times "
                             "solver-style passes, which need them: ingest it with --labels, "
                             "--values or --tags")
        check_memory(st, budget, rank=args.rank, backend=args.backend)
    with cluster_backend(args) as backend:
        report = profile_store(
            args.store, model=args.model, passes=args.passes, rank=args.rank,
            backend=backend, block_rows=args.block_rows, memory=budget,
            n_threads=args.threads, seed=args.seed, progress=not args.quiet,
        )
    paths = {}
    if args.out:
        with files_into(args.out) as tmp:
            made = write_profile(report, tmp)
        paths = {k: Path(args.out) / p.name for k, p in made.items()}
    if args.json:
        print(json.dumps(jsonable(report.summary), indent=2, sort_keys=True))
    elif not args.quiet:
        print(format_report(report.summary))
        for p in paths.values():
            print(f"wrote {p}", file=sys.stderr)
    return 0
