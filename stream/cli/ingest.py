"""``ranktide ingest``: read a sparse matrix file (plus targets) into a store."""

from __future__ import annotations

import argparse
import json
import sys

from ranktide.ingest.build import ingest
from ranktide.ingest.targets import DEFAULT_TAG_SEP, TAG_SEPARATORS
from ranktide.store.format import DEFAULT_CODEC

HELP = "Read a Matrix Market, triplet or .npz sparse matrix (and targets) into a store"
EXAMPLE = (
    "ranktide ingest reviews.mtx --out reviews.zarr --labels reviews.labels "
    "--weights reviews.weights --memory 4GB"
)


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("source", metavar="SOURCE", help="matrix file (.mtx, triplets, .npz)")
    parser.add_argument("--out", required=True, metavar="STORE",
                        help="store to create (zarr directory; .h5 for HDF5)")
    tg = parser.add_mutually_exclusive_group()
    tg.add_argument("--labels", metavar="FILE", help="one class label per line")
    tg.add_argument("--values", metavar="FILE.npy", help="n x k float target matrix (.npy)")
    tg.add_argument("--tags", metavar="FILE",
                    help="one line per row, tags separated by --tag-sep")
    parser.add_argument("--tag-sep", choices=tuple(TAG_SEPARATORS), default=None,
                        help=f"separator of --tags (default {DEFAULT_TAG_SEP}; space: runs of "
                             "spaces and tabs); without it a tag with white space inside is "
                             "refused as ambiguous")
    parser.add_argument("--weights", metavar="FILE",
                        help="row weights: one non-negative number per line, or .npy")
    parser.add_argument("--one-based", action="store_true",
                        help="triplet indices start at 1 (Matrix Market always does)")
    parser.add_argument("--format", dest="fmt", choices=("mm", "triplets", "npz"),
                        help="input format (default: from the banner and suffix)")
    parser.add_argument("--duplicates", choices=("sum", "error"), default="sum",
                        help="repeated (row, column) entries: add them (default) or refuse")
    parser.add_argument("--backend", choices=("zarr", "hdf5"),
                        help="store backend (default: hdf5 for .h5/.hdf5, else zarr)")
    parser.add_argument("--codec", choices=("zstd", "lz4", "none"), default=None,
                        help=f"compression (default {DEFAULT_CODEC}, chosen by measured read "
                             "speed; see tools/bench_store.py)")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing store")
    parser.add_argument("--memory", metavar="SIZE",
                        help="memory budget, e.g. 4GB or 25%% (default: a quarter of RAM)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar, no table")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")


def run(args: argparse.Namespace) -> int:
    summary = ingest(
        args.source,
        args.out,
        labels=args.labels,
        values=args.values,
        tags=args.tags,
        weights=args.weights,
        tag_sep=args.tag_sep,
        one_based=args.one_based,
        fmt=args.fmt,
        duplicates=args.duplicates,
        backend=args.backend,
        codec=args.codec or DEFAULT_CODEC,
        overwrite=args.overwrite,
        memory=args.memory,
        progress=not args.quiet,
    )
    if args.json:
        json.dump(summary.as_dict(), sys.stdout, indent=2)
        sys.stdout.write("\n")
    elif not args.quiet:
        print(summary.table())
    return 0
