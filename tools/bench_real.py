"""Real-data benchmark: ranktide's default workflow against scikit-learn, side by side.

Data: the Debian package-index data set of ``tools/realdata.py`` (see its docstring for
how to rebuild it offline from this machine's apt lists; fixed split, seed 0).

Systems, each in its own child process (its peak RSS is its own), run in turn and
alternating (``--repeat R`` runs the whole sequence R times; the table gives the median
fit seconds and the scores of the first run, which are the same every time for a fixed
seed):

``ranktide``
    The default workflow and nothing tuned: ``ingest`` the train, validation and test
    ``.mtx`` + labels into stores (ranktide API), ``train(loss="softmax", path_steps=--path,
    valid=<val store>)``, then the chosen model scores the test rows.  ``fit_s`` is the
    whole ``train`` call (lam_max, every path value, the final step), ``ingest_s``
    beside it.
``ranktide_tags``
    The same for the debtags (multilabel loss) on the rows and tag space of the
    one-vs-rest baseline (``bench_real_baselines.tag_space`` / ``tag_matrix``); the
    stores are written with ``write_store`` so that every split has the same tag names.
``lr``, ``sgd``, ``tags``
    The scikit-learn baselines of ``tools/bench_real_baselines.py`` (run as its own
    children): multinomial L2 ``LogisticRegression`` with ``C`` chosen on the same
    validation split, ``SGDClassifier`` through ``partial_fit`` on row chunks, and
    one-vs-rest logistic regression for the tags.  Their ``fit_s`` is the single final
    fit with the chosen penalty, ``select_s`` the fits of the selection grid.

A trivial row (``majority``: the training class prior for every row; for tags the
training tag frequencies as a fixed ranking) is computed in the parent.

Measured per system: test accuracy, macro-F1, rare-class recall (mean recall of the
bottom quartile of classes by training count), log-loss, fit seconds, peak RSS
(``ru_maxrss`` of the child, data loading included), model bytes (ranktide: the model
directory on disk; scikit-learn: an uncompressed ``.npz`` of ``coef_`` and
``intercept_``); for the tags micro-F1 and precision@1/@5.  The goals of issue 16
(accuracy, macro-F1 and rare recall at least those of ``lr``, a model at least 2x
smaller, fit time at most ``lr``'s single final fit) are checked at the end.

Usage::

    NUMBA_CACHE_DIR=/tmp/numba-bench .venv/bin/python tools/bench_real.py \\
        --data /tmp/realdata --out bench-out/real --work /tmp/bench_real_work

Writes ``<out>/<system>-<run>.json`` per child, ``<out>/results.json`` (meta, every run,
the table rows, the goal checks) and prints the table.  No pickle anywhere.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import subprocess
import sys
import time
from pathlib import Path

import bench_real_baselines as base
import numpy as np
import scipy.io
import scipy.sparse as sp
from ranktide.ingest.build import ingest
from ranktide.model import load_model, save_model
from ranktide.runs.train import train
from ranktide.store import write_store
from sklearn.metrics import f1_score

OURS = ("ranktide", "ranktide_refit", "ranktide_tags")
SYSTEMS = ("ranktide", "ranktide_refit", "lr", "lr_train", "sgd", "ranktide_tags", "tags")
COLUMNS = (("accuracy", ".4f"), ("macro_f1", ".4f"), ("rare_recall", ".4f"),
           ("log_loss", ".4f"), ("micro_f1", ".4f"), ("p_at_1", ".4f"), ("p_at_5", ".4f"),
           ("fit_s", ".1f"), ("select_s", ".1f"), ("peak_rss_mib", ".0f"),
           ("model_bytes", ",d"), ("rank", "d"))  # fmt: skip


# --------------------------------------------------------------------------- helpers


def dir_bytes(path: Path) -> int:
    """Total size of the regular files under ``path``."""
    return sum(p.stat().st_size for p in Path(path).rglob("*") if p.is_file())


def read_split(data: Path, split: str, classes: list[str]) -> tuple[sp.csr_matrix, np.ndarray]:
    """``X_{split}.mtx`` as CSR float64 (n, d) and its class ids (n,) in ``classes`` order."""
    X = sp.csr_matrix(scipy.io.mmread(data / f"X_{split}.mtx"), dtype=np.float64)
    y = np.searchsorted(classes, base.read_lines(data / f"labels_{split}.txt")).astype(np.int64)
    return X, y


def path_points(res) -> list[dict]:
    """The path's values as JSON rows (lam, rank, passes, seconds, validation score)."""
    return [{"lam": p.lam, "rank": p.rank, "passes": p.passes,
             "seconds": getattr(p, "seconds", None), "score": p.score, "status": p.status}
            for p in res.path]


def model_facts(res, model_dir: Path, k: int) -> dict:
    """Shape, size and path figures of a ranktide fit."""
    model = res.model
    d = model.n_features
    return {"rank": int(model.rank), "min_d_k": int(min(d, k)), "lam": res.lam,
            "lam_max": res.lam_max, "status": res.status, "passes": res.passes,
            "best_index": res.best_index, "path": path_points(res),
            "model_bytes": dir_bytes(model_dir), "debias": model.meta.get("debias"),
            "path_finished": (model.meta.get("path") or {}).get("finished"),
            "used_columns": int(np.count_nonzero(np.any(model.U != 0, axis=1))),
            "low_rank_note": model.meta.get("low_rank_note")}


def train_ranktide(args: argparse.Namespace, loss: str, stores: dict, run: Path,
                   refit: bool = False) -> tuple:
    """The default workflow's training call (with ``refit``: ``--refit-with-valid``, the
    choice fitted again on train + val as the logistic-regression baseline is); returns
    (TrainResult, seconds)."""
    t0 = time.perf_counter()
    res = train(str(stores["train"]), loss=loss, path_steps=args.path, valid=str(stores["val"]),
                out=str(run), overwrite=True, seed=args.seed, memory=args.memory,
                checkpoint_seconds=None, refit_with_valid=refit)
    return res, time.perf_counter() - t0


# --------------------------------------------------------------------------- children


def run_ranktide(args: argparse.Namespace, refit: bool = False) -> dict:
    """Ingest, train along the path with validation (``refit``: then on train + val),
    score the test rows."""
    classes = base.read_lines(args.data / "classes.txt")
    k = len(classes)
    work = args.work / "classes"
    work.mkdir(parents=True, exist_ok=True)
    stores, t0 = {}, time.perf_counter()
    for s in base.SPLITS:
        stores[s] = work / f"{s}.zarr"
        ingest(args.data / f"X_{s}.mtx", stores[s], labels=args.data / f"labels_{s}.txt",
               overwrite=True, memory=args.memory)
    ingest_s = time.perf_counter() - t0
    base.log(f"ranktide: ingested in {ingest_s:.1f} s")
    res, fit_s = train_ranktide(args, "softmax", stores, work / "run", refit=refit)
    model = load_model(work / "run" / "model")  # what a user gets back from disk
    if model.names != classes:
        raise SystemExit(f"class order differs: {model.names[:3]} vs {classes[:3]}")
    base.log(f"ranktide: fitted in {fit_s:.1f} s, rank {model.rank}, status {res.status}")
    X, y = read_split(args.data, "test", classes)
    y_train = read_split(args.data, "train", classes)[1]
    proba = model.predict_proba(X)
    scores = base.class_scores(y, proba, base.rare_classes(y_train, k), k)
    flag = " --refit-with-valid" if refit else ""
    return {"system": f"ranktide train --path {args.path} --valid{flag}", "fit_s": fit_s,
            "refit_with_valid": model.meta.get("refit_with_valid"),
            "ingest_s": ingest_s, **model_facts(res, work / "run" / "model", k), **scores,
            **float32_copy(model, proba, X, work / "model_f32")}


def float32_copy(model, proba: np.ndarray, X: sp.csr_matrix, where: Path) -> dict:
    """The model re-saved with float32 factors: its size and how its test predictions
    differ from the float64 model's (top-1 agreement, max |delta probability|)."""
    save_model(where, model, factor_dtype="float32", overwrite=True)
    p32 = load_model(where).predict_proba(X)
    return {"model_bytes_float32": dir_bytes(where),
            "float32_top1_agreement": float(np.mean(p32.argmax(1) == proba.argmax(1))),
            "float32_max_abs_dproba": float(np.max(np.abs(p32 - proba)))}


def tag_scores(Y: np.ndarray, scores: np.ndarray) -> dict:
    """Micro/macro-F1 at probability 0.5 (score 0) and precision@1/@5, shapes (m, T)."""
    pred = (scores >= 0).astype(np.int8)
    return {"micro_f1": float(f1_score(Y, pred, average="micro", zero_division=0)),
            "macro_f1": float(f1_score(Y, pred, average="macro", zero_division=0)),
            "p_at_1": base.precision_at(Y, scores, 1), "p_at_5": base.precision_at(Y, scores, 5)}


def run_ranktide_tags(args: argparse.Namespace) -> dict:
    """The debtags as a multilabel store per split; train along the path; score test."""
    X, _, tags, _ = base.load_data(args.data)
    space = base.tag_space(tags["train"], args.tag_min_count)
    D = {s: base.tag_matrix(X[s], tags[s], space) for s in base.SPLITS}
    work = args.work / "tags"
    work.mkdir(parents=True, exist_ok=True)
    stores, t0 = {}, time.perf_counter()
    for s in base.SPLITS:
        stores[s] = work / f"{s}.zarr"
        write_store(stores[s], D[s][0], sp.csr_matrix(D[s][1]), kind="tags", names=space,
                    overwrite=True).close()
    ingest_s = time.perf_counter() - t0
    res, fit_s = train_ranktide(args, "multilabel", stores, work / "run")
    model = load_model(work / "run" / "model")
    base.log(f"ranktide_tags: fitted in {fit_s:.1f} s, rank {model.rank}, status {res.status}")
    Xt, Yt = D["test"]
    return {"system": f"ranktide multilabel --path {args.path} on {len(space)} tags",
            "fit_s": fit_s, "ingest_s": ingest_s,
            **model_facts(res, work / "run" / "model", len(space)),
            **tag_scores(Yt, model.scores(Xt))}


def run_child(args: argparse.Namespace) -> None:
    """Run one of our systems in this process and write its JSON."""
    res = run_ranktide_tags(args) if args.child == "ranktide_tags" else \
        run_ranktide(args, refit=args.child == "ranktide_refit")
    res["peak_rss_mib"] = base.peak_rss_mib()
    args.child_out.write_text(json.dumps(res, indent=1) + "\n")


# --------------------------------------------------------------------------- parent


def majority_rows(data: Path, tag_min_count: int) -> list[dict]:
    """The trivial baselines: the training class prior, the training tag frequencies."""
    classes = base.read_lines(data / "classes.txt")
    k = len(classes)
    y = {s: np.searchsorted(classes, base.read_lines(data / f"labels_{s}.txt"))
         for s in ("train", "test")}
    prior = np.bincount(y["train"], minlength=k) / y["train"].size
    proba = np.tile(np.maximum(prior, 1e-15), (y["test"].size, 1))
    rows = [{"system": "majority class (training prior)", "fit_s": 0.0,
             **base.class_scores(y["test"], proba, base.rare_classes(y["train"], k), k)}]
    tags = {s: [r.split(base.TAG_SEP) if r else [] for r in
                base.read_lines(data / f"tags_{s}.txt")] for s in ("train", "test")}
    space = base.tag_space(tags["train"], tag_min_count)
    empty = sp.csr_matrix((len(tags["test"]), 1))
    _, Yt = base.tag_matrix(empty, tags["test"], space)
    freq = np.zeros(len(space))
    index = {t: j for j, t in enumerate(space)}
    for row in tags["train"]:
        for t in row:
            if t in index:
                freq[index[t]] += 1
    fixed = np.tile(np.log(freq / len(tags["train"])), (Yt.shape[0], 1))
    rows.append({"system": "most frequent tags (training counts)", "fit_s": 0.0,
                 "p_at_1": base.precision_at(Yt, fixed, 1),
                 "p_at_5": base.precision_at(Yt, fixed, 5)})
    return rows


def baseline_args(args: argparse.Namespace, out: Path) -> argparse.Namespace:
    """The baselines script's own arguments for one child run."""
    return base.parse_args([
        "--data", str(args.data), "--out", str(out), "--seed", str(args.seed),
        "--lr-grid", ",".join(map(str, args.lr_grid)), "--lr-max-iter", str(args.lr_max_iter),
        "--sgd-alphas", ",".join(map(str, args.sgd_alphas)),
        "--sgd-epochs", str(args.sgd_epochs), "--chunk-rows", str(args.chunk_rows),
        "--tag-grid", ",".join(map(str, args.tag_grid)),
        "--tag-min-count", str(args.tag_min_count)])  # fmt: skip


def run_one(args: argparse.Namespace, system: str, rep: int) -> dict:
    """Run one system in a child process; return its JSON with the wall seconds."""
    out = args.out / f"{system}-{rep}.json"
    env = dict(os.environ)
    t0 = time.perf_counter()
    if system in OURS:
        argv = [sys.executable, str(Path(__file__).resolve()), "--child", system,
                "--child-out", str(out), *args.passthrough]
        subprocess.run(argv, check=True, env=env)
    else:
        scratch = args.out / f"sk-{system}-{rep}"
        scratch.mkdir(parents=True, exist_ok=True)
        subprocess.run(base.child_argv(baseline_args(args, scratch), system), check=True, env=env)
        shutil.move(scratch / f"{system}.json", out)
        shutil.rmtree(scratch)
    res = json.loads(out.read_text())
    res.update(run=rep, key=system, wall_s=time.perf_counter() - t0,
               loadavg_after=list(os.getloadavg()))
    return res


def summarize(runs: list[dict]) -> list[dict]:
    """One row per system: scores of its first run, the median fit seconds of all runs."""
    rows = []
    for system in dict.fromkeys(r["key"] for r in runs):
        mine = [r for r in runs if r["key"] == system]
        row = dict(mine[0])
        row["fit_s_runs"] = [r["fit_s"] for r in mine]
        row["fit_s"] = float(np.median(row["fit_s_runs"]))
        rows.append(row)
    return rows


def goals(rows: list[dict], against: str = "lr", ours_key: str = "ranktide") -> dict:
    """Issue 16's goals, ranktide against L2 logistic regression (``lr``: refit on train +
    val; ``lr_train``: fitted on the training rows ranktide was fitted on); empty when one
    of the two is missing."""
    by = {r.get("key"): r for r in rows}
    ours, lr = by.get(ours_key), by.get(against)
    if ours is None or lr is None:
        return {}
    return {
        "accuracy": [ours["accuracy"], lr["accuracy"], ours["accuracy"] >= lr["accuracy"]],
        "macro_f1": [ours["macro_f1"], lr["macro_f1"], ours["macro_f1"] >= lr["macro_f1"]],
        "rare_recall": [ours["rare_recall"], lr["rare_recall"],
                        ours["rare_recall"] >= lr["rare_recall"]],
        "model_2x_smaller": [ours["model_bytes"], lr["model_bytes"],
                             2 * ours["model_bytes"] <= lr["model_bytes"]],
        "fit_s_le_lr_single_fit": [ours["fit_s"], lr["fit_s"], ours["fit_s"] <= lr["fit_s"]],
    }


def table(rows: list[dict]) -> str:
    """Plain-text table (``|``-separated, pastes as Markdown)."""
    lines = ["| " + " | ".join(["system"] + [c for c, _ in COLUMNS]) + " |",
             "|" + "---|" * (len(COLUMNS) + 1)]
    for r in rows:
        cells = [r["system"]] + [base.fmt(r.get(c), s) for c, s in COLUMNS]
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def run_parent(args: argparse.Namespace) -> dict:
    """Every system in turn (``--repeat`` times), then the table, the goals and the JSON."""
    args.out.mkdir(parents=True, exist_ok=True)
    load_start = list(os.getloadavg())
    runs = []
    for rep in range(args.repeat):
        for system in args.systems:
            base.log(f"run {rep}: {system}")
            runs.append(run_one(args, system, rep))
    rows = majority_rows(args.data, args.tag_min_count) + summarize(runs)
    # like for like: the default workflow against LR fitted on the same training rows, and
    # --refit-with-valid against LR refitted on train + val
    checks = {"ranktide vs lr": goals(rows), "ranktide vs lr_train": goals(rows, "lr_train"),
              "ranktide_refit vs lr": goals(rows, "lr", "ranktide_refit")}
    meta = {"command": " ".join(sys.argv), "data": str(args.data),
            "data_options": json.loads((args.data / "summary.json").read_text())["options"],
            "python": platform.python_version(), "numpy": np.__version__,
            "cpus": os.cpu_count(), "loadavg_start": load_start,
            "loadavg_end": list(os.getloadavg())}
    doc = {"meta": meta, "rows": rows, "runs": runs, "goals": checks}
    (args.out / "results.json").write_text(json.dumps(doc, indent=1) + "\n")
    print(table(rows))
    for against, found in checks.items():
        for name, (ours, theirs, ok) in found.items():
            verdict = "met" if ok else "NOT met"
            print(f"goal {name} ({against}): {ours:.6g} vs {theirs:.6g} -> {verdict}")
    print(f"load average start {load_start}, end {meta['loadavg_end']}")
    return doc


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    """Parse the command line; ``passthrough`` rebuilds it for our children."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--data", type=Path, default=Path("/tmp/realdata"))
    ap.add_argument("--out", type=Path, default=Path("bench-out/real"))
    ap.add_argument("--work", type=Path, default=None,
                    help="stores and run directories (default <out>/work)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--systems", type=lambda s: s.split(","), default=list(SYSTEMS))
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--path", type=int, default=8, help="ranktide --path values")
    ap.add_argument("--memory", default=None, help="ranktide memory budget")
    ap.add_argument("--lr-grid", type=base.floats, default=[1.0, 10.0, 100.0])
    ap.add_argument("--lr-max-iter", type=int, default=500)
    ap.add_argument("--sgd-alphas", type=base.floats, default=[1e-4, 1e-5, 1e-6])
    ap.add_argument("--sgd-epochs", type=int, default=10)
    ap.add_argument("--chunk-rows", type=int, default=4096)
    ap.add_argument("--tag-grid", type=base.floats, default=[1.0, 10.0])
    ap.add_argument("--tag-min-count", type=int, default=20)
    ap.add_argument("--child", choices=OURS, help=argparse.SUPPRESS)
    ap.add_argument("--child-out", type=Path, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    args.work = args.work or args.out / "work"
    args.passthrough = ["--data", str(args.data), "--out", str(args.out), "--work",
                        str(args.work), "--seed", str(args.seed), "--path", str(args.path),
                        "--tag-min-count", str(args.tag_min_count)]
    if args.memory is not None:
        args.passthrough += ["--memory", str(args.memory)]
    unknown = set(args.systems) - set(SYSTEMS)
    if unknown:
        ap.error(f"unknown systems {sorted(unknown)}; choose from {', '.join(SYSTEMS)}")
    return args


def main(argv: list[str] | None = None) -> dict | None:
    """Command-line entry point."""
    args = parse_args(argv)
    if args.child:
        run_child(args)
        return None
    return run_parent(args)


if __name__ == "__main__":
    main()
