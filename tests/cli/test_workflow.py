"""End to end: evaluate, predict, report and demo through the command line.

Each command runs in a subprocess on small generated stores and models.
References: scikit-learn's metrics (accuracy_score, top_k_accuracy_score,
log_loss, f1_score, mean_squared_error, r2_score) on the whole score matrix,
the API (`ranktide.scoring.evaluate.evaluate`, `Model.top_k`, `Model.predict_proba`),
and the PNG file signature (ISO/IEC 15948 / RFC 2083: the 8 bytes
89 50 4E 47 0D 0A 1A 0A).
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.cli import main as cli
from ranktide.model import Model, load_model, save_model
from ranktide.scoring.evaluate import evaluate
from ranktide.store import write_store
from scipy.special import softmax
from sklearn import metrics as skm

REPO = Path(__file__).resolve().parents[2]
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # RFC 2083, section 3.1
D, K, N = 40, 7, 230


def subprocess_ranktide(*args: Any, timeout: float = 300) -> subprocess.CompletedProcess:
    """Run ``ranktide ARGS`` as a separate process (the real entry point)."""
    env = dict(os.environ, PYTHONPATH=str(REPO))
    return subprocess.run(
        [sys.executable, "-m", "ranktide.cli", *map(str, args)],
        capture_output=True, text=True, cwd=REPO, env=env, timeout=timeout,
    )


@pytest.fixture
def ranktide(capsys):
    """Run ``ranktide ARGS`` in this process through ``ranktide.cli.main.main``.

    Most checks use this (a fresh interpreter per call would cost ~1-2 s of
    imports each); the subprocess tests cover the real entry point.
    """

    def call(*args: Any) -> subprocess.CompletedProcess:
        capsys.readouterr()
        try:
            code = cli.main([str(a) for a in args])
        except SystemExit as exc:  # argparse usage errors and --help
            code = exc.code if isinstance(exc.code, int) else 2
        out, err = capsys.readouterr()
        return subprocess.CompletedProcess(list(args), code, out, err)

    return call


def _model(loss: str, *, seed: int = 0, d: int = D, k: int = K, r: int = 3) -> Model:
    rng = np.random.default_rng(seed)
    U, _ = np.linalg.qr(rng.standard_normal((d, r)))
    V, _ = np.linalg.qr(rng.standard_normal((k, r)))
    s = np.array([6.0, 3.0, 1.5])[:r]
    b = 0.3 * rng.standard_normal(k)
    return Model(U=U, s=s, V=V, b=b, loss=loss, names=[f"bin {j}" for j in range(k)])


def _X(seed: int = 1, n: int = N, d: int = D) -> sp.csr_matrix:
    X = sp.random(n, d, density=0.25, random_state=seed, format="csr", dtype=np.float32)
    X.data *= 2.0
    return X


def _targets(loss: str, model: Model, X: sp.csr_matrix, seed: int = 2):
    """Noisy targets that the model predicts better than chance."""
    rng = np.random.default_rng(seed)
    Z = model.scores(X)
    if loss == "softmax":
        y = np.argmax(Z + rng.gumbel(size=Z.shape), axis=1).astype(np.int32)
        y[:K] = np.arange(K)
        return y
    if loss == "multilabel":
        return sp.csr_matrix((Z + rng.logistic(size=Z.shape) > 0).astype(np.float32))
    return (Z + 0.5 * rng.standard_normal(Z.shape)).astype(np.float32)


@pytest.fixture(scope="module", params=["softmax", "multilabel", "squared"])
def case(request, tmp_path_factory):
    loss = request.param
    tmp = tmp_path_factory.mktemp(loss)
    model = _model(loss)
    X = _X()
    T = _targets(loss, model, X)
    w = np.random.default_rng(3).uniform(0.5, 2.0, N).astype(np.float32)
    store = tmp / "data.zarr"
    write_store(store, X, T, weights=w, names=model.names).close()
    save_model(tmp / "model", model)
    return {"loss": loss, "dir": tmp, "store": store, "model_dir": tmp / "model",
            "model": model, "X": X, "T": T, "w": w}


def test_evaluate_cli_equals_api_and_sklearn(case):
    res = subprocess_ranktide("evaluate", case["model_dir"], case["store"], "--top", "3",
                   "--block-rows", "37", "--json", "--quiet")
    assert res.returncode == 0, res.stderr
    got = json.loads(res.stdout)
    api = evaluate(load_model(case["model_dir"]), case["store"], top_k=3, block_rows=50)
    Z = case["model"].scores(case["X"])
    T, w = case["T"], case["w"].astype(np.float64)
    if case["loss"] == "softmax":
        assert {"accuracy", "top_k_accuracy", "log_loss", "macro_f1"} <= set(got)
        # reference: sklearn.metrics on the whole score matrix
        pred = Z.argmax(axis=1)
        ref = {
            "accuracy": skm.accuracy_score(T, pred, sample_weight=w),
            "top_k_accuracy": skm.top_k_accuracy_score(T, Z, k=3, labels=np.arange(K),
                                                       sample_weight=w),
            "log_loss": skm.log_loss(T, softmax(Z, axis=1), labels=np.arange(K), sample_weight=w),
            "macro_f1": skm.f1_score(T, pred, average="macro", sample_weight=w),
        }
        assert got["worst_class_recall"] == api["worst_class_recall"]
    elif case["loss"] == "multilabel":
        P, Y = (Z > 0).astype(int), T.toarray().astype(int)
        ref = {
            "micro_f1": skm.f1_score(Y, P, average="micro", sample_weight=w),
            "macro_f1": skm.f1_score(Y, P, average="macro", sample_weight=w, zero_division=0),
        }
    else:
        ref = {
            "rmse": np.sqrt(skm.mean_squared_error(T, Z, sample_weight=w)),
            "r2": skm.r2_score(T, Z, sample_weight=w),
        }
        assert got["r2_per_output"] == pytest.approx(
            skm.r2_score(T, Z, sample_weight=w, multioutput="raw_values"), rel=1e-6)
    for key, value in ref.items():
        assert got[key] == pytest.approx(value, rel=1e-6, abs=1e-9), key
        assert got[key] == pytest.approx(api[key], rel=1e-9, abs=1e-12), key
    assert got["n_rows"] == N


def test_evaluate_table_output(case, ranktide):
    res = ranktide("evaluate", case["model_dir"], case["store"], "--quiet")
    assert res.returncode == 0, res.stderr
    first = {"softmax": "accuracy", "multilabel": "micro_f1", "squared": "rmse"}[case["loss"]]
    line = next(ln for ln in res.stdout.splitlines() if ln.startswith(first))
    api = evaluate(case["model_dir"], case["store"])
    assert float(line.split()[-1]) == pytest.approx(api[first], rel=1e-5)


def _read_csv(path: Path) -> tuple[list[str], list[list[str]]]:
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    return rows[0], rows[1:]


def test_predict_csv_rows_equal_model_top_k(case, ranktide):
    # squared models have no probabilities (that refusal is in the bad-argument test);
    # the probability runs go through a separate process, the score runs in-process
    for proba in (False,) if case["loss"] == "squared" else (False, True):
        _check_predict_csv(case, proba, subprocess_ranktide if proba else ranktide)


def _check_predict_csv(case, proba, ranktide):
    out = case["dir"] / f"pred-{proba}.csv"
    args = ["predict", case["model_dir"], case["store"], "--out", out, "--top", "3",
            "--block-rows", "64", "--quiet"]
    res = ranktide(*args, *(["--proba"] if proba else []))
    assert res.returncode == 0, res.stderr
    header, rows = _read_csv(out)
    model = load_model(case["model_dir"])
    assert len(rows) == N and [int(r[0]) for r in rows] == list(range(N))
    if case["loss"] == "squared":
        assert header == ["row", *model.names]
        np.testing.assert_allclose(np.array([r[1:] for r in rows], float),
                                   model.scores(case["X"]), rtol=1e-7, atol=1e-9)
        return
    word = "prob" if proba else "score"
    assert header == ["row", "label_1", f"{word}_1", "label_2", f"{word}_2", "label_3", f"{word}_3"]
    _labels, scores, idx = model.top_k(case["X"], 3)  # reference: the API
    if proba:
        scores = np.take_along_axis(model.predict_proba(case["X"]), idx, axis=1)
    name_id = {n: j for j, n in enumerate(model.names)}
    got_idx = np.array([[name_id[r[c]] for c in (1, 3, 5)] for r in rows])
    got_val = np.array([[float(r[c]) for c in (2, 4, 6)] for r in rows])
    np.testing.assert_array_equal(got_idx, idx)
    np.testing.assert_allclose(got_val, scores, rtol=1e-7, atol=1e-12)


def test_predict_npy_and_zarr(case, ranktide):
    import zarr

    model = load_model(case["model_dir"])
    npy, zdir = case["dir"] / "scores.npy", case["dir"] / "top.zarr"
    assert ranktide("predict", case["model_dir"], case["store"], "--out", npy,
                    "--quiet").returncode == 0
    full = np.load(npy, allow_pickle=False)
    np.testing.assert_allclose(full, model.scores(case["X"]), rtol=1e-6, atol=1e-6)
    res = ranktide("predict", case["model_dir"], case["store"], "--out", zdir, "--top", "2",
                   "--json", "--block-rows", "100")
    assert res.returncode == 0, res.stderr
    assert json.loads(res.stdout)["n_rows"] == N
    g = zarr.open_group(str(zdir), mode="r")
    if case["loss"] == "squared":
        np.testing.assert_allclose(g["values"][:], model.scores(case["X"]), rtol=1e-6)
    else:
        _labels, sc, idx = model.top_k(case["X"], 2)
        np.testing.assert_array_equal(g["labels"][:], idx)
        np.testing.assert_allclose(g["scores"][:], sc, rtol=1e-6, atol=1e-6)
        assert g.attrs["output_names"] == model.names


def _one_error_line(res: subprocess.CompletedProcess, *needles: str) -> str:
    assert res.returncode == 2, (res.returncode, res.stderr)
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1, res.stderr
    for needle in needles:
        assert needle in lines[0], lines[0]
    return lines[0]


def test_bad_arguments_exit_2_with_one_line(tmp_path, ranktide):
    model = _model("softmax")
    X = _X()
    y = _targets("softmax", model, X)
    save_model(tmp_path / "m", model)
    write_store(tmp_path / "s.zarr", X, y).close()
    write_store(tmp_path / "nolabels.zarr", X).close()
    write_store(tmp_path / "narrow.zarr", X[:, :10], y).close()
    write_store(tmp_path / "renamed.zarr", X, y, names=model.names[::-1]).close()
    save_model(tmp_path / "sq", _model("squared"))
    m, s = tmp_path / "m", tmp_path / "s.zarr"
    _one_error_line(subprocess_ranktide("evaluate", m, tmp_path / "missing.zarr"), "missing.zarr")
    _one_error_line(ranktide("evaluate", m, s, "--top", "0"), "--top 0")
    _one_error_line(ranktide("evaluate", tmp_path / "nomodel", s), "nomodel")
    _one_error_line(ranktide("evaluate", m, tmp_path / "nolabels.zarr"), "has no targets")
    _one_error_line(ranktide("evaluate", m, tmp_path / "narrow.zarr"), "10 feature columns")
    _one_error_line(ranktide("evaluate", tmp_path / "sq", s), "targets are classes")
    _one_error_line(ranktide("evaluate", m, tmp_path / "renamed.zarr"),
                    "output 0 is 'bin 6' in the store but 'bin 0' in the model")
    _one_error_line(ranktide("predict", m, s, "--out", tmp_path / "p.txt"), "unknown output format")
    _one_error_line(ranktide("predict", tmp_path / "sq", s, "--out", tmp_path / "p.csv",
                             "--proba"), "--proba")
    _one_error_line(ranktide("predict", m, s), "--out")  # usage error: required option
    _one_error_line(ranktide("report", tmp_path / "norun"), "norun")
    # an existing output is refused and left as it was; nothing half-written appears
    out = tmp_path / "keep.csv"
    out.write_text("precious\n")
    _one_error_line(ranktide("predict", m, s, "--out", out), "already exists")
    assert out.read_text() == "precious\n"
    assert ranktide("predict", m, s, "--out", out, "--overwrite", "--quiet").returncode == 0
    assert out.read_text().startswith("row,label_1")
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]


def test_help_has_example_for_each_command(ranktide):
    for name in ("evaluate", "predict", "report", "demo"):
        res = ranktide(name, "--help")
        assert res.returncode == 0 and f"ranktide {name}" in res.stdout.split("example:")[-1]
        assert "--quiet" in res.stdout


def _fake_run(run: Path, model: Model) -> None:
    """A run directory as the trainer leaves it: config, history (passes + path), model."""
    run.mkdir()
    (run / "config.json").write_text(json.dumps({
        "format": "ranktide-run", "format_version": 1, "settings": {"loss": "softmax"},
        "store": {"path": "train.zarr", "fingerprint": "00ff"}}))
    lines = []
    for i in range(1, 13):
        lam = 0.4 if i <= 6 else 0.2
        lines.append({"pass": i, "objective": 1.0 + 1.0 / i, "gap_estimate": 0.5 ** i,
                      "rank": min(i, 3), "seconds": 0.05 * i, "lam": lam})
    lines.append({"kind": "path", "lam": 0.4, "rank": 2, "val_metric": 0.5})
    lines.append({"kind": "path", "lam": 0.2, "rank": 3, "val_metric": 0.6, "best_lam": 0.2})
    (run / "history.jsonl").write_text("".join(json.dumps(r) + "\n" for r in lines) + "{torn")
    save_model(run / "model", model)


def test_report_writes_pngs_and_html(tmp_path):
    from ranktide.diagnostics.profile import profile_store, write_profile

    run = tmp_path / "run"
    model = _model("softmax")
    _fake_run(run, model)
    X = _X()
    write_store(tmp_path / "s.zarr", X, _targets("softmax", model, X)).close()
    # a profiled run: the profiler's own files under RUN/profile
    write_profile(profile_store(tmp_path / "s.zarr", passes=1, rank=2), run / "profile")
    res = subprocess_ranktide("report", run, "--out", tmp_path / "rep", "--json")
    assert res.returncode == 0, res.stderr
    info = json.loads(res.stdout)
    figs = [Path(f) for f in info["figures"]]
    names = {f.name for f in figs}
    assert {"convergence.png", "rank.png", "singular_values.png", "path.png",
            "profile.png"} <= names
    html = Path(info["report"]).read_text()
    for f in figs:
        assert f.read_bytes()[:8] == PNG_MAGIC  # RFC 2083 signature
        assert f'src="{f.name}"' in html
    assert "ranktide run report" in html and "chosen model: rank" in html


def test_report_tolerates_missing_keys(tmp_path, ranktide):
    run = tmp_path / "run"
    run.mkdir()
    (run / "history.jsonl").write_text('{"pass": 1}\n{"pass": 2, "objective": 0.5}\n')
    page = ranktide("report", run, "--quiet")
    assert page.returncode == 0, page.stderr
    html = (run / "report" / "report.html").read_text()
    assert "convergence.png" in html and "no model in RUN/model" in html
    assert (run / "report" / "convergence.png").read_bytes()[:8] == PNG_MAGIC
    assert not (run / "report" / "rank.png").exists()



def test_demo_small_end_to_end(tmp_path):
    out = tmp_path / "demo"
    res = subprocess_ranktide("demo", "--size", "small", "--out", out, "--json", timeout=600)
    assert res.returncode == 0, res.stderr
    made = json.loads(res.stdout)
    assert made["complete"]
    steps = ("data", "ingest", "split", "train", "evaluate", "predict", "report")
    assert all(made["steps"][name]["seconds"] >= 0 for name in steps)
    assert json.loads((out / "demo.json").read_text()) == made
    # the source files parse with an outside reader (scipy's Matrix Market reader)
    import scipy.io

    X = scipy.io.mmread(out / "data" / "catalogue.mtx")
    labels = (out / "data" / "sections.txt").read_text().split()
    assert X.shape[0] == len(labels) == made["steps"]["data"]["n_rows"]
    # the holdout metrics the demo wrote are the API's on the same model and store
    metrics = json.loads((out / "holdout_metrics.json").read_text())
    api = evaluate(out / "run" / "model", out / "holdout.zarr")
    for key in ("accuracy", "top_k_accuracy", "log_loss", "macro_f1"):
        assert metrics[key] == pytest.approx(api[key], rel=1e-12)
    # far above chance on 120 sections (common practice, no source: a learnable planted signal)
    assert metrics["accuracy"] > 10.0 / made["steps"]["data"]["n_sections"]
    header, rows = _read_csv(out / "holdout_predictions.csv")
    assert header[:3] == ["row", "label_1", "prob_1"] and len(rows) == metrics["n_rows"]
    assert (out / "run" / "checkpoints" / "newest.txt").is_file()  # the path ran with checkpoints
    html = (out / "run" / "report" / "report.html").read_text()
    for png in ("convergence.png", "rank.png", "singular_values.png", "path.png"):
        assert (out / "run" / "report" / png).read_bytes()[:8] == PNG_MAGIC
        assert f'src="{png}"' in html
    # an earlier demo (its demo.json, only its own entries) may be replaced by the next run
    from ranktide.cli.demo_workflow import check_replaceable

    check_replaceable(out)


def test_demo_refuses_foreign_directory(tmp_path, ranktide):
    (tmp_path / "notes.txt").write_text("mine\n")
    _one_error_line(ranktide("demo", "--out", tmp_path), "not an earlier demo")
    assert (tmp_path / "notes.txt").read_text() == "mine\n"


def test_evaluate_api_accepts_in_memory_data(case):
    # the same rows from memory (CSR + targets + weights) give the store's metrics
    T = case["T"]
    mem = evaluate(case["model"], (case["X"], T, case["w"]), top_k=3, block_rows=41)
    disk = evaluate(case["model_dir"], case["store"], top_k=3)
    for key, value in disk.items():
        if isinstance(value, float):
            assert mem[key] == pytest.approx(value, rel=1e-9, abs=1e-12), key
