"""scikit-learn baselines on the Debian package-index data set built by ``tools/realdata.py``.

Systems (each runs in its own child process so that its peak RSS is its own):

``lr``
    ``LogisticRegression`` (lbfgs; multinomial softmax for more than two classes, L2
    penalty, the only kind in scikit-learn >= 1.8 when ``l1_ratio=0``).  ``C`` is chosen on
    the validation split by accuracy from ``--lr-grid``, fitting on ``train`` (a one-value
    grid skips the selection fits: for a ``C`` already chosen by an earlier run); the chosen
    ``C`` is then refit on ``train + val`` (the whole 80 % training part), and that single
    fit is the one timed as ``fit_s`` and scored on ``test``.
``sgd``
    ``SGDClassifier(loss="log_loss")`` (one-vs-rest, probabilities normalised by
    scikit-learn) trained only through ``partial_fit`` on row chunks of ``--chunk-rows``
    rows, as an out-of-core learner would.  The training rows are permuted once (as a
    shuffled on-disk store would be written), then each of ``--sgd-epochs`` epochs visits
    the chunks in a fresh random order.  ``alpha`` is chosen from ``--sgd-alphas`` on the
    validation split by accuracy and refit on ``train + val``.
``tags``
    One-vs-rest for the debtags: one binary ``LogisticRegression(solver="liblinear")``
    per tag, fitted in a plain loop (coefficients stacked into a (T, d) matrix).  Only tagged
    rows are used (an untagged package is unlabelled, not negative).  The label space is
    the tags with at least ``--tag-min-count`` positives in ``train``; tags outside it are
    ignored in the scores, and rows left with no tag in that space are dropped.  ``C`` is
    chosen on validation micro-F1 from ``--tag-grid`` and refit on ``train + val``.
    Scores: micro-F1 and macro-F1 at probability 0.5, precision@1 and precision@5 of the
    ranked decision scores.

Reported per system: test accuracy, macro-F1, rare-class recall (mean recall over the
bottom quartile, ``ceil(n_classes / 4)`` classes, of classes ranked by training-row count,
ties by class index), log-loss, wall and CPU (user + system, all threads) seconds of the
final fit, the total wall seconds of the selection fits, peak RSS of the child process
(``ru_maxrss``, data loading included) and the RSS right after loading, and model bytes:
the length of an uncompressed ``numpy.savez`` of ``coef_`` and ``intercept_``.

Usage::

    /work/main/.venv/bin/python tools/realdata.py --out /tmp/realdata_tfidf --tfidf --unit-norm
    /work/main/.venv/bin/python tools/bench_real_baselines.py --data /tmp/realdata_tfidf \\
        --out /tmp/bench_real

Writes ``<out>/<system>.json`` per system and ``<out>/results.json``, prints a table.
``--collect DIR [DIR ...]`` runs nothing: it gathers ``<system>.json`` files already
written to those directories (systems run separately) into ``<out>/results.json``.
No pickle is used anywhere (the children report through JSON files).
"""

from __future__ import annotations

import argparse
import io
import json
import math
import os
import platform
import resource
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import psutil
import scipy.io
import scipy.sparse as sp
import sklearn
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression, SGDClassifier
from sklearn.metrics import accuracy_score, f1_score, log_loss, recall_score

SPLITS = ("train", "val", "test")
SYSTEMS = ("lr", "lr_train", "sgd", "tags")
TAG_SEP = " "


# --------------------------------------------------------------------------- data


def read_lines(path: Path) -> list[str]:
    """Read one item per line (the format written by ``realdata.py``)."""
    return path.read_text(encoding="utf-8").split("\n")[:-1]


def load_data(
    data: Path,
) -> tuple[dict[str, sp.csr_matrix], dict[str, np.ndarray], dict[str, list[list[str]]], list]:
    """Load the splits written by ``realdata.py``.

    Parameters
    ----------
    data : Path
        Directory given to ``realdata.py --out``.

    Returns
    -------
    X : dict of str to csr_matrix
        ``X[split]`` of shape (n_split, n_features), float64.
    y : dict of str to ndarray of int64
        Class indices, shape (n_split,).
    tags : dict of str to list of list of str
        Tag rows, ``n_split`` entries.
    classes : list of str
        Class names, shape (n_classes,).
    """
    classes = read_lines(data / "classes.txt")
    X = {s: sp.csr_matrix(scipy.io.mmread(data / f"X_{s}.mtx"), dtype=np.float64) for s in SPLITS}
    y = {
        s: np.searchsorted(classes, read_lines(data / f"labels_{s}.txt")).astype(np.int64)
        for s in SPLITS
    }
    tags = {
        s: [r.split(TAG_SEP) if r else [] for r in read_lines(data / f"tags_{s}.txt")]
        for s in SPLITS
    }
    return X, y, tags, classes


def train_full(X: dict, y: dict) -> tuple[sp.csr_matrix, np.ndarray]:
    """Stack ``train`` and ``val``: the whole training part, shapes (n, d) and (n,)."""
    return sp.vstack([X["train"], X["val"]], format="csr"), np.concatenate([y["train"], y["val"]])


# --------------------------------------------------------------------------- measures


def model_bytes(coef: np.ndarray, intercept: np.ndarray) -> int:
    """Length of an uncompressed ``.npz`` holding ``coef`` (k, d) and ``intercept`` (k,)."""
    buf = io.BytesIO()
    np.savez(buf, coef=np.asarray(coef), intercept=np.asarray(intercept))
    return buf.getbuffer().nbytes


def peak_rss_mib() -> float:
    """Peak resident set size of this process so far, MiB (Linux ``ru_maxrss`` is KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def rss_mib() -> float:
    """Current resident set size of this process, MiB."""
    return psutil.Process().memory_info().rss / 2**20


def rare_classes(y_train: np.ndarray, n_classes: int) -> np.ndarray:
    """Indices of the bottom quartile (``ceil(n_classes / 4)``) of classes by train count."""
    counts = np.bincount(y_train, minlength=n_classes)
    order = np.argsort(counts, kind="stable")
    return np.sort(order[: math.ceil(n_classes / 4)])


def class_scores(
    y_true: np.ndarray, proba: np.ndarray, rare: np.ndarray, n_classes: int
) -> dict[str, float]:
    """Multi-class test scores.

    Parameters
    ----------
    y_true : ndarray of int
        Shape (n,).
    proba : ndarray of float
        Class probabilities, shape (n, n_classes).
    rare : ndarray of int
        Rare class indices.
    n_classes : int
        Number of classes.

    Returns
    -------
    dict
        ``accuracy``, ``macro_f1``, ``rare_recall``, ``log_loss``.
    """
    labels = np.arange(n_classes)
    pred = proba.argmax(axis=1)
    recalls = recall_score(y_true, pred, labels=rare, average=None, zero_division=0)
    present = np.isin(rare, y_true)
    return {
        "accuracy": float(accuracy_score(y_true, pred)),
        "macro_f1": float(f1_score(y_true, pred, labels=labels, average="macro", zero_division=0)),
        "rare_recall": float(np.mean(recalls[present])),
        "log_loss": float(log_loss(y_true, proba, labels=labels)),
    }


def full_proba(model, X: sp.csr_matrix, n_classes: int) -> np.ndarray:
    """``predict_proba`` widened to all classes, shape (n, n_classes)."""
    out = np.zeros((X.shape[0], n_classes))
    out[:, model.classes_] = model.predict_proba(X)
    return out


def timed(fn, *args):
    """Call ``fn(*args)``; return ``(result, wall_seconds, cpu_seconds)``.

    CPU seconds are this process's user + system time (all its threads), a figure that a
    loaded, shared machine inflates less than wall time.
    """
    t0, c0 = time.perf_counter(), time.process_time()
    result = fn(*args)
    return result, time.perf_counter() - t0, time.process_time() - c0


def log(msg: str) -> None:
    """Progress line on stderr, flushed (the children are polled through a log file)."""
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


# --------------------------------------------------------------------------- systems


def fit_lr(X: sp.csr_matrix, y: np.ndarray, C: float, max_iter: int) -> LogisticRegression:
    """Multinomial L2 logistic regression on (n, d) ``X`` and (n,) ``y``."""
    return LogisticRegression(C=C, solver="lbfgs", max_iter=max_iter, tol=1e-4).fit(X, y)


def run_lr(args: argparse.Namespace, X: dict, y: dict, n_classes: int,
           *, refit_rows: str = "train+val") -> dict:
    """Select ``C`` on validation, refit on train + val (or, with ``refit_rows="train"``,
    on the training rows alone: the rows a model selected with ``--valid`` was fitted
    on), score on test."""
    grid = []
    for C in args.lr_grid if len(args.lr_grid) > 1 else []:
        model, secs, cpu = timed(fit_lr, X["train"], y["train"], C, args.lr_max_iter)
        val_acc = float(accuracy_score(y["val"], model.predict(X["val"])))
        grid.append(
            {
                "C": C,
                "val_accuracy": val_acc,
                "fit_s": secs,
                "fit_cpu_s": cpu,
                "n_iter": int(model.n_iter_[0]),
            }
        )
        log(
            f"lr C={C:g} val_acc={val_acc:.4f} fit_s={secs:.1f} cpu_s={cpu:.1f} "
            f"n_iter={grid[-1]['n_iter']}"
        )
    best = max(grid, key=lambda g: g["val_accuracy"]) if grid else {"C": args.lr_grid[0]}
    Xf, yf = train_full(X, y) if refit_rows == "train+val" else (X["train"], y["train"])
    model, secs, cpu = timed(fit_lr, Xf, yf, best["C"], args.lr_max_iter)
    log(f"lr refit C={best['C']:g} fit_s={secs:.1f} cpu_s={cpu:.1f}")
    scores = class_scores(
        y["test"],
        full_proba(model, X["test"], n_classes),
        rare_classes(y["train"], n_classes),
        n_classes,
    )
    return {
        "system": f"LogisticRegression(C={best['C']:g})"
                  + (", training rows only" if refit_rows == "train" else ""),
        "refit_rows": refit_rows,
        "params": {
            "C": best["C"],
            "max_iter": args.lr_max_iter,
            "n_iter": int(model.n_iter_[0]),
            "converged": bool(model.n_iter_[0] < args.lr_max_iter),
        },
        "grid": grid,
        "select_s": sum(g["fit_s"] for g in grid),
        "fit_s": secs,
        "fit_cpu_s": cpu,
        "model_bytes": model_bytes(model.coef_, model.intercept_),
        **scores,
    }


def chunk_order(n_rows: int, chunk: int, rng: np.random.Generator) -> list[np.ndarray]:
    """Row chunks of a once-shuffled row order, each of at most ``chunk`` rows."""
    rows = rng.permutation(n_rows)
    return [rows[i : i + chunk] for i in range(0, n_rows, chunk)]


def fit_sgd(
    X: sp.csr_matrix, y: np.ndarray, alpha: float, args: argparse.Namespace, n_classes: int
) -> SGDClassifier:
    """SGD logistic regression through ``partial_fit`` on row chunks only."""
    rng = np.random.default_rng(args.seed)
    chunks = chunk_order(X.shape[0], args.chunk_rows, rng)
    model = SGDClassifier(loss="log_loss", alpha=alpha, random_state=int(rng.integers(2**31)))
    classes = np.arange(n_classes)
    for _ in range(args.sgd_epochs):
        for k in rng.permutation(len(chunks)):
            rows = np.sort(chunks[k])
            model.partial_fit(X[rows], y[rows], classes=classes)
    return model


def run_sgd(args: argparse.Namespace, X: dict, y: dict, n_classes: int) -> dict:
    """Select ``alpha`` on validation, refit on train + val, score on test."""
    grid = []
    for alpha in args.sgd_alphas:
        model, secs, cpu = timed(fit_sgd, X["train"], y["train"], alpha, args, n_classes)
        val_acc = float(accuracy_score(y["val"], model.predict(X["val"])))
        grid.append({"alpha": alpha, "val_accuracy": val_acc, "fit_s": secs, "fit_cpu_s": cpu})
        log(f"sgd alpha={alpha:g} val_acc={val_acc:.4f} fit_s={secs:.1f} cpu_s={cpu:.1f}")
    best = max(grid, key=lambda g: g["val_accuracy"])
    Xf, yf = train_full(X, y)
    model, secs, cpu = timed(fit_sgd, Xf, yf, best["alpha"], args, n_classes)
    log(f"sgd refit alpha={best['alpha']:g} fit_s={secs:.1f} cpu_s={cpu:.1f}")
    scores = class_scores(
        y["test"],
        full_proba(model, X["test"], n_classes),
        rare_classes(y["train"], n_classes),
        n_classes,
    )
    return {
        "system": f"SGDClassifier(log_loss, alpha={best['alpha']:g})",
        "params": {
            "alpha": best["alpha"],
            "epochs": args.sgd_epochs,
            "chunk_rows": args.chunk_rows,
        },
        "grid": grid,
        "select_s": sum(g["fit_s"] for g in grid),
        "fit_s": secs,
        "fit_cpu_s": cpu,
        "model_bytes": model_bytes(model.coef_, model.intercept_),
        **scores,
    }


def tag_space(tags_train: list[list[str]], min_count: int) -> list[str]:
    """Sorted tags with at least ``min_count`` positives among the training rows."""
    counts: dict[str, int] = {}
    for row in tags_train:
        for t in row:
            counts[t] = counts.get(t, 0) + 1
    return sorted(t for t, n in counts.items() if n >= min_count)


def tag_matrix(
    X: sp.csr_matrix, rows: list[list[str]], space: list[str]
) -> tuple[sp.csr_matrix, np.ndarray]:
    """Keep rows with a tag in ``space``.

    Parameters
    ----------
    X : csr_matrix
        Shape (n, d).
    rows : list of list of str
        Tags of each of the n rows.
    space : list of str
        Sorted label space, length T.

    Returns
    -------
    X_kept : csr_matrix
        Shape (m, d).
    Y : ndarray of int8
        Indicator matrix, shape (m, T).
    """
    index = {t: j for j, t in enumerate(space)}
    Y = np.zeros((len(rows), len(space)), dtype=np.int8)
    for i, row in enumerate(rows):
        for t in row:
            if t in index:
                Y[i, index[t]] = 1
    keep = np.flatnonzero(Y.any(axis=1))
    return X[keep], Y[keep]


def precision_at(Y: np.ndarray, scores: np.ndarray, k: int) -> float:
    """Mean over rows of (true tags among the top ``k`` scores) / ``k``; shapes (m, T)."""
    top = np.argsort(-scores, axis=1, kind="stable")[:, :k]
    return float(np.take_along_axis(Y, top, axis=1).sum(axis=1).mean() / k)


def fit_tags(X: sp.csr_matrix, Y: np.ndarray, C: float) -> tuple[np.ndarray, np.ndarray]:
    """One-vs-rest: one binary liblinear logistic regression per tag.

    Parameters
    ----------
    X : csr_matrix
        Shape (m, d).
    Y : ndarray of int8
        Indicator matrix, shape (m, T); every column has positives and negatives.
    C : float
        Inverse L2 strength of every binary problem.

    Returns
    -------
    coef : ndarray
        Shape (T, d).
    intercept : ndarray
        Shape (T,).
    """
    coef = np.empty((Y.shape[1], X.shape[1]))
    intercept = np.empty(Y.shape[1])
    for j in range(Y.shape[1]):
        model = LogisticRegression(C=C, solver="liblinear").fit(X, Y[:, j])
        coef[j], intercept[j] = model.coef_[0], model.intercept_[0]
    return coef, intercept


def tag_scores(X: sp.csr_matrix, coef: np.ndarray, intercept: np.ndarray) -> np.ndarray:
    """Decision scores, shape (m, T); a tag is predicted where its score is > 0 (p > 0.5)."""
    return np.asarray(X @ coef.T) + intercept


def run_tags(args: argparse.Namespace, X: dict, tags: dict) -> dict:
    """Select ``C`` on validation micro-F1, refit on train + val, score on test."""
    space = tag_space(tags["train"], args.tag_min_count)
    D = {s: tag_matrix(X[s], tags[s], space) for s in SPLITS}
    Xv, Yv = D["val"]
    grid = []
    for C in args.tag_grid:
        (coef, b), secs, cpu = timed(fit_tags, *D["train"], C)
        pred = (tag_scores(Xv, coef, b) > 0).astype(np.int8)
        val_f1 = float(f1_score(Yv, pred, average="micro", zero_division=0))
        grid.append(
            {
                "C": C,
                "val_micro_f1": val_f1,
                "fit_s": secs,
                "fit_cpu_s": cpu,
                "val_pred_pos": int(pred.sum()),
                "val_true_pos": int(Yv.sum()),
            }
        )
        log(
            f"tags C={C:g} val_micro_f1={val_f1:.4f} fit_s={secs:.1f} cpu_s={cpu:.1f} "
            f"pred_pos={pred.sum()} true_pos={Yv.sum()}"
        )
    best = max(grid, key=lambda g: g["val_micro_f1"])
    Xf = sp.vstack([D["train"][0], Xv], format="csr")
    Yf = np.vstack([D["train"][1], Yv])
    (coef, b), secs, cpu = timed(fit_tags, Xf, Yf, best["C"])
    log(f"tags refit C={best['C']:g} fit_s={secs:.1f} cpu_s={cpu:.1f}")
    Xt, Yt = D["test"]
    scores = tag_scores(Xt, coef, b)
    pred = (scores > 0).astype(np.int8)
    return {
        "system": f"OvR LogisticRegression(C={best['C']:g}) on {len(space)} tags",
        "params": {
            "C": best["C"],
            "tags": len(space),
            "min_count": args.tag_min_count,
            "rows": {s: int(D[s][0].shape[0]) for s in SPLITS},
        },
        "grid": grid,
        "select_s": sum(g["fit_s"] for g in grid),
        "fit_s": secs,
        "fit_cpu_s": cpu,
        "model_bytes": model_bytes(coef, b),
        "micro_f1": float(f1_score(Yt, pred, average="micro", zero_division=0)),
        "macro_f1": float(f1_score(Yt, pred, average="macro", zero_division=0)),
        "p_at_1": precision_at(Yt, scores, 1),
        "p_at_5": precision_at(Yt, scores, 5),
    }


# --------------------------------------------------------------------------- driver


def run_child(args: argparse.Namespace) -> None:
    """Run one system in this process and write ``<out>/<system>.json``."""
    warnings.simplefilter("ignore", ConvergenceWarning)  # recorded as n_iter / converged
    X, y, tags, classes = load_data(args.data)
    rss_loaded, load_start = rss_mib(), os.getloadavg()
    log(f"{args.child}: loaded {X['train'].shape} train, rss={rss_loaded:.0f} MiB")
    if args.child in ("lr", "lr_train"):
        res = run_lr(args, X, y, len(classes),
                     refit_rows="train" if args.child == "lr_train" else "train+val")
    elif args.child == "sgd":
        res = run_sgd(args, X, y, len(classes))
    else:
        res = run_tags(args, X, tags)
    res.update(rss_after_load_mib=rss_loaded, peak_rss_mib=peak_rss_mib())
    res.update(loadavg_start=load_start, loadavg_end=os.getloadavg())
    (args.out / f"{args.child}.json").write_text(json.dumps(res, indent=1) + "\n")


def child_argv(args: argparse.Namespace, system: str) -> list[str]:
    """Command line that reruns this script as the child for ``system``."""
    return [
        sys.executable, str(Path(__file__).resolve()), "--child", system,
        "--data", str(args.data), "--out", str(args.out), "--seed", str(args.seed),
        "--lr-grid", ",".join(map(str, args.lr_grid)), "--lr-max-iter", str(args.lr_max_iter),
        "--sgd-alphas", ",".join(map(str, args.sgd_alphas)),
        "--sgd-epochs", str(args.sgd_epochs), "--chunk-rows", str(args.chunk_rows),
        "--tag-grid", ",".join(map(str, args.tag_grid)),
        "--tag-min-count", str(args.tag_min_count),
    ]  # fmt: skip


def fmt(value, spec: str) -> str:
    """Format ``value`` with ``spec``, or ``-`` when it is missing."""
    return "-" if value is None else format(value, spec)


def table(results: list[dict]) -> str:
    """Plain-text table of the results."""
    cols = [("accuracy", ".4f"), ("macro_f1", ".4f"), ("rare_recall", ".4f"),
            ("log_loss", ".4f"), ("micro_f1", ".4f"), ("p_at_1", ".4f"), ("p_at_5", ".4f"),
            ("fit_s", ".1f"), ("fit_cpu_s", ".1f"), ("select_s", ".1f"), ("peak_rss_mib", ".0f"),
            ("model_bytes", ",d")]  # fmt: skip
    lines = [" | ".join(["system"] + [c for c, _ in cols])]
    for r in results:
        lines.append(" | ".join([r["system"]] + [fmt(r.get(c), s) for c, s in cols]))
    return "\n".join(lines)


def run_parent(args: argparse.Namespace) -> None:
    """Run every requested system in a child process, then print and save the table."""
    args.out.mkdir(parents=True, exist_ok=True)
    results = []
    for system in args.systems:
        if args.collect:
            path = next(
                d / f"{system}.json" for d in args.collect if (d / f"{system}.json").exists()
            )
        else:
            subprocess.run(child_argv(args, system), check=True)
            path = args.out / f"{system}.json"
        results.append(json.loads(path.read_text()))
    meta = {
        "data": str(args.data),
        "data_summary": json.loads((args.data / "summary.json").read_text())["options"],
        "sklearn": sklearn.__version__,
        "numpy": np.__version__,
        "python": platform.python_version(),
        "cpus": os.cpu_count(),
        "loadavg_end": os.getloadavg(),
    }
    (args.out / "results.json").write_text(
        json.dumps({"meta": meta, "results": results}, indent=1) + "\n"
    )
    print(table(results))


def floats(text: str) -> list[float]:
    """Parse a comma-separated list of floats."""
    return [float(v) for v in text.split(",") if v]


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    """Parse the command line."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--data", type=Path, default=Path("/tmp/realdata"))
    ap.add_argument("--out", type=Path, required=True)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--systems", type=lambda s: s.split(","), default=list(SYSTEMS))
    ap.add_argument("--lr-grid", type=floats, default=[1.0, 10.0])
    ap.add_argument("--lr-max-iter", type=int, default=500)
    ap.add_argument("--sgd-alphas", type=floats, default=[1e-4, 1e-5, 1e-6])
    ap.add_argument("--sgd-epochs", type=int, default=5)
    ap.add_argument("--chunk-rows", type=int, default=4096)
    ap.add_argument("--tag-grid", type=floats, default=[1.0, 10.0])
    ap.add_argument("--tag-min-count", type=int, default=100)
    ap.add_argument("--collect", type=Path, nargs="+", help="gather existing <system>.json")
    ap.add_argument("--child", choices=SYSTEMS, help=argparse.SUPPRESS)
    return ap.parse_args(argv)


def main(argv: list[str] | None = None) -> None:
    """Command-line entry point."""
    args = parse_args(argv)
    if args.child:
        run_child(args)
    else:
        run_parent(args)


if __name__ == "__main__":
    main()
