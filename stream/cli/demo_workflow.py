"""The demo: invented data and the whole workflow on it.

The scenario is made up. Quarrymoss Hardware, a fictional hardware retailer,
files every product description into one of a few hundred catalogue sections
("plumbing/brass-couplers", ...). A description is a bag of hashed word
features: words follow a Zipf-like law, and each section tilts the word
frequencies along a few shared latent themes (department, item type), so the
sections' weight vectors share a planted low-rank structure. Section sizes
are Zipf-like too, so rare sections must borrow strength from frequent ones.
No real shop, brand, product or person is named; every number is synthetic.

:func:`make_demo_data` writes the data as a Matrix Market file and a labels
file; :func:`run_demo` ingests them, splits a holdout, trains a short
regularization path with validation and checkpoints, evaluates the holdout,
predicts it, writes the report and prints where everything is.

The demo is built under a temporary sibling of its output directory and
swapped in only once complete (:func:`ranktide.atomic.replace_with`), so an
earlier demo stays whole until then. It replaces only a directory it made
itself (its ``demo.json`` marker and nothing but its own entries) or an
empty one; anything else is refused.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.atomic import (
    atomic_write_bytes,
    atomic_write_json,
    fsync_tree,
    remove_path,
    replace_with,
    temp_sibling,
)
from ranktide.diagnostics.report import write_report
from ranktide.errors import ConfigError, OutputExistsError
from ranktide.ingest.build import ingest
from ranktide.runs.train import train
from ranktide.scoring.evaluate import evaluate
from ranktide.scoring.predict import predict_to_file
from ranktide.store.split import split_store

__all__ = [
    "DemoSize",
    "DemoPaths",
    "SIZES",
    "section_names",
    "generate_catalogue",
    "make_demo_data",
    "run_demo",
]


# section names are "department/item" slugs (no spaces: one label per line, one token)
DEPARTMENTS = (
    "fasteners",
    "plumbing",
    "electrical",
    "garden",
    "paint",
    "hand-tools",
    "power-tools",
    "lumber",
    "lighting",
    "storage",
    "safety",
    "flooring",
    "heating",
    "doors",
    "adhesives",
    "cleaning",
    "outdoor",
    "kitchen-fittings",
    "bath-fittings",
    "ladders",
)
ITEMS = (
    "brass-couplers",
    "steel-brackets",
    "hex-bolts",
    "wood-screws",
    "rubber-seals",
    "copper-pipe",
    "wall-plugs",
    "hinges",
    "spring-clips",
    "cable-ties",
    "rollers",
    "brushes",
    "sanding-pads",
    "drill-bits",
    "saw-blades",
    "clamps",
    "hooks",
    "chains",
    "filters",
    "valves",
    "switches",
    "sockets",
    "lamps",
    "shelving",
    "bins",
    "gloves",
    "goggles",
    "tiles",
    "mats",
    "heaters",
    "thermostats",
    "handles",
    "locks",
    "sealant",
    "glue-sticks",
    "sponges",
    "hoses",
    "planters",
    "taps",
    "step-stools",
)


@dataclass(frozen=True)
class DemoSize:
    """Dimensions of one demo size (rows, hashed features, sections, latent rank)."""

    n_rows: int
    n_features: int
    n_sections: int
    rank: int
    vocab: int
    mean_words: float


SIZES: dict[str, DemoSize] = {
    "small": DemoSize(
        n_rows=2000, n_features=2048, n_sections=60, rank=6, vocab=3000, mean_words=24.0
    ),
    "medium": DemoSize(
        n_rows=40000, n_features=16384, n_sections=300, rank=10, vocab=20000, mean_words=30.0
    ),
}


def section_names(n: int) -> list[str]:
    """The first ``n`` invented catalogue section names ("department/item")."""
    n_all = len(DEPARTMENTS) * len(ITEMS)
    if n > n_all:
        raise ValueError(f"n={n}: at most {n_all} section names exist")
    nd, ni = len(DEPARTMENTS), len(ITEMS)
    # walk departments fastest so that every department appears early
    return [f"{DEPARTMENTS[i % nd]}/{ITEMS[(i // nd + 7 * i) % ni]}" for i in range(n)]


def _word_hash(word_ids: np.ndarray, n_features: int, salt: int) -> np.ndarray:
    """Feature column of each word id: a 32-bit multiply-xorshift hash modulo d."""
    h = (word_ids.astype(np.uint64) + np.uint64(salt)) * np.uint64(0x9E3779B1)
    h &= np.uint64(0xFFFFFFFF)
    h ^= h >> np.uint64(15)
    h = (h * np.uint64(0x85EBCA77)) & np.uint64(0xFFFFFFFF)
    h ^= h >> np.uint64(13)
    return (h % np.uint64(n_features)).astype(np.int64)


def _section_word_probs(size: DemoSize, rng: np.random.Generator) -> np.ndarray:
    """Word distribution of each section, shape (n_sections, vocab), rows sum to 1.

    log p_c(v) = log zipf(v) + a_c . B_v + const with a_c (rank r) the section's
    themes: department and item embeddings plus a little noise.
    """
    k, r, V = size.n_sections, size.rank, size.vocab
    dept = rng.normal(size=(len(DEPARTMENTS), r))
    item = rng.normal(size=(len(ITEMS), r))
    idx = np.arange(k)
    d_of = idx % len(DEPARTMENTS)
    i_of = (idx // len(DEPARTMENTS) + 7 * idx) % len(ITEMS)
    themes = dept[d_of] + 0.8 * item[i_of] + 0.3 * rng.normal(size=(k, r))
    # each word loads on the themes sparsely: most words are generic
    loads = rng.normal(size=(r, V)) * (rng.random((r, V)) < 0.15) * 1.6
    logits = themes @ loads - 1.05 * np.log(np.arange(V) + 10.0)
    logits -= logits.max(axis=1, keepdims=True)
    p = np.exp(logits)
    return p / p.sum(axis=1, keepdims=True)


def generate_catalogue(
    size: DemoSize, *, seed: int | np.random.Generator | None = 0
) -> tuple[sp.csr_matrix, np.ndarray, list[str]]:
    """Generate the demo matrix and section labels.

    Parameters
    ----------
    size : DemoSize
        Dimensions (see :data:`SIZES`).
    seed : int or Generator, optional
        Seed, normalized with :func:`numpy.random.default_rng`.

    Returns
    -------
    X : scipy.sparse.csr_matrix, shape (n_rows, n_features), float32
        Rows of ``log(1 + count)`` of hashed words, scaled to unit length.
    y : ndarray of int32, shape (n_rows,)
        Section id of each row.
    names : list of str
        The ``n_sections`` section names.
    """
    rng = np.random.default_rng(seed)
    n, k = size.n_rows, size.n_sections
    prior = 1.0 / (np.arange(k) + 4.0) ** 0.9
    prior = prior[rng.permutation(k)]
    y = rng.choice(k, size=n, p=prior / prior.sum()).astype(np.int32)
    y[:k] = np.arange(k, dtype=np.int32)  # every section occurs
    y.sort()  # draw the words section by section, shuffle the rows at the end
    lengths = 6 + rng.poisson(size.mean_words - 6, size=n)
    probs = _section_word_probs(size, rng)
    slot = np.concatenate([[0], np.cumsum(lengths)])[np.searchsorted(y, np.arange(k + 1))]
    words = np.empty(int(lengths.sum()), dtype=np.int64)
    for c in range(k):  # one vectorized draw per section, never per row
        a, b = slot[c], slot[c + 1]
        words[a:b] = rng.choice(size.vocab, size=b - a, p=probs[c])
    feats = _word_hash(words, size.n_features, salt=int(rng.integers(1, 2**31)))
    rows = np.repeat(np.arange(n), lengths)
    X = sp.csr_matrix(
        (np.ones(len(feats), dtype=np.float64), (rows, feats)), shape=(n, size.n_features)
    )
    X.sum_duplicates()
    X.data = np.log1p(X.data)
    norms = np.sqrt(np.asarray(X.multiply(X).sum(axis=1)).ravel())
    X = sp.csr_matrix(sp.diags(1.0 / np.maximum(norms, 1e-12)) @ X)
    perm = rng.permutation(n)
    X = X[perm]
    X.sort_indices()
    return X.astype(np.float32), y[perm], section_names(k)


# ------------------------------------------------------------------ files
class DemoPaths(dict):
    """Paths of the demo's files (a dict with attribute access)."""

    __getattr__ = dict.__getitem__


def _write_matrix_market(path: Path, X: sp.csr_matrix) -> None:
    """Write ``X`` as a Matrix Market coordinate real general file, atomically."""
    import io

    import scipy.io

    buf = io.BytesIO()
    scipy.io.mmwrite(
        buf,
        X.tocoo(),
        field="real",
        precision=8,
        comment=" invented demo data: Quarrymoss Hardware product descriptions",
    )
    atomic_write_bytes(path, buf.getvalue())


def make_demo_data(
    out_dir: str | os.PathLike, *, size: str = "small", seed: int | None = 0
) -> DemoPaths:
    """Generate the demo data and write it as source files.

    Parameters
    ----------
    out_dir : path
        Directory to write into (created when missing).
    size : {"small", "medium"}
        See :data:`SIZES`.
    seed : int, optional
        Seed for :func:`numpy.random.default_rng`.

    Returns
    -------
    DemoPaths
        ``matrix`` (``catalogue.mtx``, Matrix Market), ``labels``
        (``sections.txt``, one section name per line, in row order),
        ``names`` (``section_names.txt``, one name per line in id order) and
        the dimensions ``n_rows``, ``n_features``, ``n_sections``.
    """
    if size not in SIZES:
        raise ConfigError(f"--size {size!r}: unknown; choose one of {', '.join(SIZES)}")
    dims = SIZES[size]
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    X, y, names = generate_catalogue(dims, seed=seed)
    paths = DemoPaths(
        matrix=out / "catalogue.mtx",
        labels=out / "sections.txt",
        names=out / "section_names.txt",
        n_rows=dims.n_rows,
        n_features=dims.n_features,
        n_sections=dims.n_sections,
    )
    _write_matrix_market(paths.matrix, X)
    arr = np.array(names)
    atomic_write_bytes(paths.labels, ("\n".join(arr[y].tolist()) + "\n").encode())
    atomic_write_bytes(paths.names, ("\n".join(names) + "\n").encode())
    return paths


# ------------------------------------------------------------------ workflow
MARKER = "demo.json"


class _Demo:
    """State shared by the demo's steps: where things go, what was made, how to talk.

    ``out`` is where the steps write (the temporary sibling of ``final``);
    messages and ``demo.json`` name the paths as they will be under ``final``.
    """

    def __init__(self, out: Path, *, final: Path, size: str, seed: int, quiet: bool) -> None:
        self.out = out
        self.final = final
        self.size = size
        self.seed = seed
        self.quiet = quiet
        self.made: dict[str, Any] = {
            "made_by": MADE_BY,
            "size": size,
            "seed": seed,
            "complete": False,
            "steps": {},
        }
        self.t0 = time.perf_counter()

    def shown(self, obj: Any) -> Any:
        """``obj`` (str, Path, or dicts and lists of them) with paths named under ``final``."""
        if isinstance(obj, (str, Path)):
            text = str(obj)
            for old, new in _moved_prefixes(self.out, self.final):
                text = text.replace(old, new)
            return text if isinstance(obj, str) else Path(text)
        if isinstance(obj, dict):
            return {k: self.shown(v) for k, v in obj.items()}
        if isinstance(obj, list):
            return [self.shown(v) for v in obj]
        return obj

    def say(self, text: str) -> None:
        if not self.quiet:
            print(self.shown(text), flush=True)

    def record(self, step: str, **info: Any) -> None:
        self.made["steps"][step] = self.shown(info)
        atomic_write_json(self.out / MARKER, self.made)


#: ``made_by`` in ``demo.json``: the mark of a directory the demo made
MADE_BY = "ranktide demo"

#: every top-level entry a demo writes; anything else in its directory is the user's
DEMO_ENTRIES = frozenset({
    MARKER, "data", "catalogue.zarr", "train.zarr", "holdout.zarr", "fit.zarr", "valid.zarr",
    "run", "holdout_metrics.json", "holdout_predictions.csv",
})

#: text files of the run that name the stores by path, for reading (``config.json``'s
#: settings, ``--valid`` among them, must stay as the checkpoints recorded them)
_RUN_TEXT_WITH_PATHS = ("history.jsonl", "report/report.html")


def _moved_prefixes(stage: Path, final: Path) -> list[tuple[str, str]]:
    """(old, new) path prefixes, absolute (symbolic links resolved) first, then as given."""
    parent = final.parent if str(final.parent) else Path(".")
    absolute = (os.path.realpath(stage), os.path.join(os.path.realpath(parent), final.name))
    return [absolute, (str(stage), str(final))]


def _is_demo_marker(path: Path) -> bool:
    """Whether ``path`` is a ``demo.json`` written by the demo (this or an earlier version)."""
    try:
        doc = json.loads(path.read_text())
    except (OSError, ValueError):
        return False
    if not isinstance(doc, dict) or not isinstance(doc.get("steps"), dict):
        return False
    return doc.get("made_by") == MADE_BY or ("made_by" not in doc and {"size", "seed"} <= set(doc))


def _own_entry(name: str) -> bool:
    """A demo entry, or a temporary sibling of one left by an interrupted earlier demo."""
    return name in DEMO_ENTRIES or any(name.startswith(f".{e}.") for e in DEMO_ENTRIES)


def check_replaceable(out: Path) -> None:
    """Refuse an existing ``out`` that the demo may not replace.

    The demo replaces nothing but a missing or empty directory or an earlier
    demo: a directory with the demo's ``demo.json`` and only the demo's own
    entries. A user's folder is never cleared, whatever the flags.

    Raises
    ------
    OutputExistsError
        One line naming ``out``, what is in the way and what to do.
    """
    if not os.path.lexists(out):
        return
    if out.is_symlink() or not out.is_dir():
        what = "a symbolic link" if out.is_symlink() else "not a directory"
        raise OutputExistsError(f"{out}: is {what}; the demo replaces only a directory it "
                                "made: choose another --out")
    names = sorted(p.name for p in out.iterdir())
    if not names:
        return
    if not _is_demo_marker(out / MARKER):
        raise OutputExistsError(
            f"{out}: not empty and not an earlier demo (no {MARKER} written by the demo); the "
            "demo replaces only a directory it made: choose another --out"
        )
    foreign = [n for n in names if not _own_entry(n)]
    if foreign:
        raise OutputExistsError(
            f"{out}: an earlier demo, but {foreign[0]!r} in it is not the demo's; move it out "
            "or choose another --out (the demo replaces only what it made)"
        )


def _relocate_run(stage: Path, final: Path) -> None:
    """Name the demo's stores in its run directory by their paths under ``final``.

    The run was trained inside the temporary ``stage``. ``config.json``'s
    store path (which ``resume`` opens, checking its fingerprint) and the
    history and report, which are for reading, are rewritten. The settings
    (``--valid`` among them) stay as the checkpoints recorded them: resume
    checks that they agree.
    """
    prefixes = _moved_prefixes(stage, final)

    def moved(text: str) -> str:
        for old, new in prefixes:
            text = text.replace(old, new)
        return text

    config_path = stage / "run" / "config.json"
    config = json.loads(config_path.read_text())
    store = config.get("store") or {}
    if isinstance(store.get("path"), str):
        store["path"] = moved(store["path"])
        atomic_write_json(config_path, config)
    for rel in _RUN_TEXT_WITH_PATHS:
        path = stage / "run" / rel
        if path.is_file():
            text = path.read_text()
            if moved(text) != text:
                atomic_write_bytes(path, moved(text).encode())


def _step_data(demo: _Demo) -> None:
    paths = make_demo_data(demo.out / "data", size=demo.size, seed=demo.seed)
    demo.paths = paths
    demo.say(
        f"  {paths.n_rows} product descriptions, {paths.n_features} hashed word features, "
        f"{paths.n_sections} catalogue sections -> {paths.matrix}"
    )
    demo.record("data", **{k: str(v) if isinstance(v, Path) else v for k, v in paths.items()})


def _step_ingest(demo: _Demo) -> None:
    store = demo.out / "catalogue.zarr"
    summary = ingest(demo.paths.matrix, store, labels=demo.paths.labels, progress=not demo.quiet)
    demo.store = store
    demo.say(
        f"  store {store}: {summary.n_rows} rows x {summary.n_cols} columns, {summary.nnz} entries"
    )
    demo.record("ingest", store=str(store), n_rows=summary.n_rows, nnz=summary.nnz)


def _step_split(demo: _Demo) -> None:
    store = demo.store
    train, hold = demo.out / "train.zarr", demo.out / "holdout.zarr"
    info = split_store(store, train, hold, holdout=0.2, seed=demo.seed)
    # the path picks its lam on a validation set carved out of the training rows
    fit, valid = demo.out / "fit.zarr", demo.out / "valid.zarr"
    vinfo = split_store(train, fit, valid, holdout=0.2, seed=demo.seed + 1)
    demo.train_store, demo.holdout_store = train, hold
    demo.fit_store, demo.valid_store = fit, valid
    demo.say(f"  {info.get('holdout_rows')} holdout rows -> {hold}; the other "
             f"{info.get('train_rows')} -> {train}, split again into {vinfo.get('train_rows')} "
             f"fitting rows ({fit.name}) and {vinfo.get('holdout_rows')} validation rows "
             f"({valid.name})")
    demo.record("split", train=str(train), holdout=str(hold), fit=str(fit), valid=str(valid),
                train_rows=info.get("train_rows"), holdout_rows=info.get("holdout_rows"),
                fit_rows=vinfo.get("train_rows"), valid_rows=vinfo.get("holdout_rows"))


def _step_train(demo: _Demo) -> None:
    fit = demo.fit_store
    run = demo.out / "run"
    result = train(fit, valid=demo.valid_store, out=run, seed=demo.seed,
                   progress=not demo.quiet, **TRAIN_SETTINGS[demo.size])
    demo.run_dir = run
    demo.model_dir = run / "model"
    path = [(float(p.lam), p.rank, p.passes, float(p.score)) for p in result.path]
    m = int(TRAIN_SETTINGS[demo.size]["path_steps"])
    for j, (lam, rank, passes, score) in enumerate(path):
        where = f"{j + 1}/{m}" if j < m else f"{j + 1} (+{j + 1 - m})"
        best = "  <- chosen" if j == result.best_index else ""
        demo.say(f"    value {where:<8} lam {lam:9.4g}  rank {rank:3d}  passes {passes:3d}  "
                 f"validation accuracy {score:.3f}{best}")
    chosen = result.path[result.best_index]
    demo.say(f"  chosen lam {result.lam:.4g} (rank {result.rank}, {chosen.passes} passes in its "
             f"step); run: {len(path)} values, {result.passes} passes in {result.seconds:.1f} s, "
             f"{result.status} -> {run}")
    demo.record("train", run=str(run), model=str(run / "model"),
                checkpoints=str(run / "checkpoints"), lam=float(result.lam),
                lam_max=float(result.lam_max), rank=int(result.rank),
                passes=int(result.passes), status=str(result.status),
                objective=float(result.objective), gap_estimate=float(result.gap),
                path=[{"lam": a, "rank": r, "passes": p, "validation_accuracy": v}
                      for a, r, p, v in path])


def _step_evaluate(demo: _Demo) -> None:
    model = demo.model_dir
    hold = demo.holdout_store
    res = evaluate(model, hold, top_k=5, progress=not demo.quiet)
    atomic_write_json(demo.out / "holdout_metrics.json", demo.shown(res))
    demo.metrics = res
    demo.say(f"  holdout accuracy {res['accuracy']:.3f}, top-5 accuracy "
             f"{res['top_k_accuracy']:.3f}, macro-F1 {res['macro_f1']:.3f}, log-loss "
             f"{res['log_loss']:.3f} -> {demo.out / 'holdout_metrics.json'}")
    demo.record("evaluate", metrics=str(demo.out / "holdout_metrics.json"),
                accuracy=res["accuracy"], top_k_accuracy=res["top_k_accuracy"],
                macro_f1=res["macro_f1"], log_loss=res["log_loss"])


def _step_predict(demo: _Demo) -> None:
    model = demo.model_dir
    hold = demo.holdout_store
    out = demo.out / "holdout_predictions.csv"
    info = predict_to_file(model, hold, out, top_k=5, proba=True, progress=not demo.quiet)
    demo.say(f"  top-5 sections with probabilities for {info['n_rows']} rows -> {out}")
    demo.record("predict", predictions=str(out), n_rows=info["n_rows"])


def _step_report(demo: _Demo) -> None:
    run = demo.run_dir
    page = write_report(run)
    demo.say(f"  {page}")
    demo.record("report", report=str(page))


#: A short regularization path with validation and checkpoints, per size.
TRAIN_SETTINGS: dict[str, dict[str, Any]] = {
    "small": {"loss": "softmax", "path_steps": 3, "path_floor": 0.05, "path_extend": 2,
              "max_passes": 6,
              "tol": 2e-2, "max_seconds": 60.0, "checkpoint_passes": 2},
    "medium": {"loss": "softmax", "path_steps": 5, "path_floor": 0.02, "max_passes": 20,
               "tol": 3e-3, "max_seconds": 900.0, "checkpoint_passes": 5},
}

STEPS: tuple[tuple[str, str, Callable[[_Demo], None]], ...] = (
    ("data", "generating the invented catalogue", _step_data),
    ("ingest", "ingesting the Matrix Market file into a store", _step_ingest),
    ("split", "holding out 20% of the rows (stratified by section)", _step_split),
    ("train", "training a short regularization path (validation, checkpoints)", _step_train),
    ("evaluate", "evaluating the model on the holdout", _step_evaluate),
    ("predict", "predicting the holdout's top-5 sections", _step_predict),
    ("report", "writing the run report", _step_report),
)


def _next_steps(demo: _Demo) -> str:
    o = demo.final
    lines = [
        "",
        f"done in {time.perf_counter() - demo.t0:.1f} s; everything is under {o}/:",
        f"  data/             the invented source files ({o / 'data' / 'catalogue.mtx'}, "
        "sections.txt)",
        "  catalogue.zarr    the ingested store; train.zarr / holdout.zarr its split,",
        "                    train.zarr split again into fit.zarr / valid.zarr for the path",
        "  run/              the training run: history.jsonl, checkpoints/, model/",
        "  run/report/       report.html with the plots",
        "  holdout_metrics.json, holdout_predictions.csv",
        "",
        "what to run next:",
        f"  ranktide inspect {o / 'train.zarr'}",
        f"  ranktide evaluate {o / 'run' / 'model'} {o / 'holdout.zarr'} --top 10",
        f"  ranktide predict {o / 'run' / 'model'} {o / 'holdout.zarr'} --out preds.csv --proba",
        f"  ranktide profile {o / 'fit.zarr'} --model {o / 'run' / 'model'} "
        f"--out {o / 'run' / 'profile'}",
        f"  ranktide report {o / 'run'}   (adds the profile; open "
        f"{o / 'run' / 'report' / 'report.html'})",
    ]
    return "\n".join(lines)


def run_demo(
    out_dir: str | os.PathLike = "demo-out",
    *,
    size: str = "small",
    seed: int = 0,
    quiet: bool = False,
) -> dict[str, Any]:
    """Run the whole workflow on invented data.

    Steps: generate the data (:func:`make_demo_data`), ingest, split off a
    holdout, train a short regularization path with validation and
    checkpoints, evaluate the holdout, predict it, write the report.

    Everything is built in a temporary sibling of ``out_dir`` and swapped in
    once complete: until then an earlier demo there is untouched, and a
    failure or kill leaves it as it was.

    Parameters
    ----------
    out_dir : path
        Where everything goes: a missing or empty directory, or an earlier
        demo (which is replaced); anything else is refused
        (:func:`check_replaceable`).
    size : {"small", "medium"}
    seed : int
    quiet : bool
        Print nothing (and show no progress bars).

    Returns
    -------
    dict
        What was made (also written to ``OUT/demo.json``).
    """
    if size not in SIZES:
        raise ConfigError(f"--size {size!r}: unknown; choose one of {', '.join(SIZES)}")
    out = Path(out_dir)
    check_replaceable(out)
    stage = temp_sibling(out)
    stage.mkdir()
    try:
        demo = _Demo(stage, final=out, size=size, seed=int(seed), quiet=quiet)
        demo.record("start", out=str(stage))
        for i, (name, what, step) in enumerate(STEPS, 1):
            t = time.perf_counter()
            demo.say(f"[{i}/{len(STEPS)}] {what}")
            step(demo)
            demo.made["steps"][name]["seconds"] = round(time.perf_counter() - t, 3)
        _relocate_run(stage, out)
        demo.made["complete"] = True
        demo.made["seconds"] = round(time.perf_counter() - demo.t0, 3)
        atomic_write_json(stage / MARKER, demo.made)
        fsync_tree(stage)
        check_replaceable(out)  # again: the build took a while, the user may have written there
        replace_with(stage, out)
    except BaseException:
        remove_path(stage)
        raise
    demo.say(_next_steps(demo))
    return demo.made
