"""``ranktide predict``: predictions of a model for every row of a store, streamed."""

from __future__ import annotations

import argparse
import json

from ranktide.cli._cluster_opt import add_cluster_option, cluster_backend
from ranktide.errors import ConfigError
from ranktide.outputs import check_output, check_source
from ranktide.scoring.predict import predict_to_file

HELP = "Predict every row of a store (streamed) into CSV, .npy or zarr"
EXAMPLE = "ranktide predict run/model holdout.zarr --out predictions.csv --top 5 --proba"


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL_DIR", help="model directory (RUN/model)")
    parser.add_argument("store", metavar="STORE",
                        help="store of rows to predict, or a Matrix Market (.mtx) or .npz file")
    parser.add_argument("--memory", default=None, metavar="SIZE",
                        help="budget a .npz is loaded within (default a quarter of RAM)")
    parser.add_argument("--out", required=True, metavar="FILE",
                        help="output: *.csv (top-K per row), *.npy (full score matrix) or "
                             "*.zarr (top-K arrays)")
    parser.add_argument("--top", type=int, default=5, metavar="K",
                        help="labels per row in CSV/zarr output (default 5)")
    parser.add_argument("--proba", action="store_true",
                        help="probabilities (softmax / sigmoid) instead of raw scores")
    parser.add_argument("--block-rows", type=int, default=None, metavar="N",
                        help="rows per block (default: from a 64 MiB score budget)")
    parser.add_argument("--overwrite", action="store_true", help="replace an existing output")
    parser.add_argument("--json", action="store_true", help="print a JSON summary")
    parser.add_argument("--quiet", action="store_true", help="no progress bar, no summary line")
    add_cluster_option(parser)


def run(args: argparse.Namespace) -> int:
    if args.top < 1:
        raise ConfigError(f"--top {args.top}: must be at least 1")
    if args.block_rows is not None and args.block_rows < 1:
        raise ConfigError(f"--block-rows {args.block_rows}: must be at least 1")
    check_source(args.model, "model")
    check_source(args.store, "store")
    kind = "dir" if str(args.out).endswith(".zarr") else "file"
    check_output(args.out, {"the model": args.model, "the store": args.store},
                 overwrite=args.overwrite, kind=kind)
    with cluster_backend(args) as backend:
        info = predict_to_file(args.model, args.store, args.out, top_k=args.top,
                               proba=args.proba, block_rows=args.block_rows,
                               progress=not args.quiet, overwrite=args.overwrite,
                               backend=backend, memory=args.memory)
    if args.json:
        print(json.dumps(info))
    elif not args.quiet:
        what = f"top {info['top_k']} {info['values']}" if info["top_k"] else info["values"]
        print(f"wrote {info['n_rows']} rows ({what}) to {info['path']}")
    return 0
