"""``ranktide evaluate``: metrics of a model on a labelled store, streamed."""

from __future__ import annotations

import argparse
import json
import math
from collections.abc import Sequence
from typing import Any

from ranktide.cli._cluster_opt import add_cluster_option, cluster_backend
from ranktide.errors import ConfigError
from ranktide.scoring.evaluate import evaluate

HELP = "Evaluate a model on a labelled store or .mtx/.npz file (streamed): accuracy, F1, RMSE"
EXAMPLE = "ranktide evaluate run/model holdout.zarr --top 5 --json"

#: per-output lists longer than this print only their first entries
SHOW_OUTPUTS = 20


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("model", metavar="MODEL_DIR", help="model directory (RUN/model)")
    parser.add_argument("store", metavar="STORE",
                        help="store with targets of the model's kind, or a Matrix Market "
                             "(.mtx) or .npz file with --labels, --values or --tags")
    parser.add_argument("--labels", metavar="FILE", default=None,
                        help="with a .mtx/.npz: one class label per row (as ingest takes it)")
    parser.add_argument("--values", metavar="FILE.npy", default=None,
                        help="with a .mtx/.npz: target values (n, k)")
    parser.add_argument("--tags", metavar="FILE", default=None,
                        help="with a .mtx/.npz: the tags of each row, one line per row")
    parser.add_argument("--weights", metavar="FILE", default=None,
                        help="with a .mtx/.npz: one row weight per line (or .npy)")
    parser.add_argument("--memory", default=None, metavar="SIZE",
                        help="budget a .npz is loaded within (default a quarter of RAM)")
    parser.add_argument("--top", type=int, default=5, metavar="K",
                        help="k of top-k accuracy / precision@k (default 5)")
    parser.add_argument("--block-rows", type=int, default=None, metavar="N",
                        help="rows per block (default: from a 64 MiB score budget)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    add_cluster_option(parser)


def aligned_table(rows: Sequence[Sequence[Any]], header: Sequence[str] | None = None) -> str:
    """Rows of cells as text columns: numbers right-aligned, text left-aligned."""

    def cell(v: Any) -> str:
        if isinstance(v, float):
            return "nan" if math.isnan(v) else f"{v:.6g}"
        return "" if v is None else str(v)

    body = [[cell(v) for v in r] for r in rows]
    head = [list(header)] if header else []
    allrows = head + body
    if not allrows:
        return ""
    widths = [max(len(r[i]) for r in allrows if i < len(r)) for i in range(len(allrows[0]))]
    numeric = [
        all(isinstance(r[i], (int, float)) and not isinstance(r[i], bool) for r in rows
            if i < len(r))
        for i in range(len(widths))
    ]
    lines = []
    for r in allrows:
        cells = zip(r, widths, numeric, strict=True)
        parts = [c.rjust(w) if num else c.ljust(w) for c, w, num in cells]
        lines.append("  ".join(parts).rstrip())
    if header:
        lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def format_metrics(res: dict[str, Any]) -> str:
    """The metrics of :func:`ranktide.scoring.evaluate.evaluate` as aligned tables."""
    scalars = [(k, v) for k, v in res.items()
               if isinstance(v, (int, float)) and not isinstance(v, bool)]
    parts = [f"{res.get('loss', '')} model on {res.get('source', '')}",
             aligned_table(scalars, ("metric", "value"))]
    worst = res.get("worst_class_recall")
    if worst:
        rows = [(w["class"], w.get("name") or "", w["recall"], w["support"]) for w in worst]
        parts += ["", f"lowest recall ({len(rows)} classes)",
                  aligned_table(rows, ("class", "name", "recall", "support"))]
    if "rmse_per_output" in res:
        names = res.get("output_names") or [str(i) for i in range(len(res["rmse_per_output"]))]
        rows = list(zip(names, res["rmse_per_output"], res["r2_per_output"], strict=True))
        parts += ["", "per output", aligned_table(rows[:SHOW_OUTPUTS], ("output", "rmse", "r2"))]
        if len(rows) > SHOW_OUTPUTS:
            parts.append(f"... {len(rows) - SHOW_OUTPUTS} more outputs (see --json)")
    return "\n".join(parts)


def run(args: argparse.Namespace) -> int:
    if args.top < 1:
        raise ConfigError(f"--top {args.top}: must be at least 1")
    with cluster_backend(args) as backend:
        files = {"labels": args.labels, "values": args.values, "tags": args.tags,
                 "weights": args.weights, "memory": args.memory}
        res = evaluate(args.model, args.store, top_k=args.top, block_rows=args.block_rows,
                       progress=not args.quiet, backend=backend, files=files)
    if args.json:
        print(json.dumps(res, sort_keys=False))
    else:
        print(format_metrics(res))
    return 0
