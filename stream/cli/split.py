"""``ranktide split``: streamed train / holdout split of a store (stratified by class)."""

from __future__ import annotations

import argparse
import json
import sys

from ranktide.store.split import split_store

HELP = "Split a store's rows into train and holdout stores (stratified for class targets)"
EXAMPLE = (
    "ranktide split reviews.zarr --holdout 0.2 --seed 7 --out train.zarr "
    "--out-holdout holdout.zarr"
)


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("store", metavar="STORE", help="store to split")
    parser.add_argument("--holdout", type=float, default=0.2, metavar="F",
                        help="fraction of rows (of each class) held out (default 0.2)")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--out", required=True, metavar="TRAIN", help="train store to create")
    parser.add_argument("--out-holdout", required=True, metavar="HOLD",
                        help="holdout store to create")
    parser.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    parser.add_argument("--quiet", action="store_true", help="no summary")


def run(args: argparse.Namespace) -> int:
    res = split_store(
        args.store, args.out, args.out_holdout,
        holdout=args.holdout, seed=args.seed, overwrite=args.overwrite,
    )  # fmt: skip
    if args.json:
        json.dump(res, sys.stdout, indent=2)
        sys.stdout.write("\n")
    elif not args.quiet:
        rows = [("train", f"{res['train']} ({res['train_rows']:,} rows)"),
                ("holdout", f"{res['holdout']} ({res['holdout_rows']:,} rows)"),
                ("seed", str(res["seed"])),
                ("stratified", "by class" if res["stratified"] else "no (not class targets)")]
        w = max(len(k) for k, _ in rows)
        print("\n".join(f"{k:<{w}}  {v}" for k, v in rows))
    return 0
