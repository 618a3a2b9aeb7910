"""Evaluate and predict straight from Matrix Market and .npz files (no store written)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.io
import scipy.sparse as sp
from ranktide.cli import main as cli
from ranktide.errors import InputError, StoreError
from ranktide.ingest.build import ingest
from ranktide.model import Model
from ranktide.passes.engine import PassProfile
from ranktide.scoring.evaluate import evaluate
from ranktide.scoring.predict import predict_to_file

NAMES = ["bolts", "clamps", "hinges", "locks", "mats"]


def _data(n=120, d=25, seed=0):
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.25, format="csr", random_state=seed, dtype=np.float64)
    X.data = np.round(X.data, 3)  # short decimals: the text round trip is exact
    y = rng.integers(0, len(NAMES), n)
    w = np.round(rng.uniform(0.5, 2.0, n), 3)
    return X, y, w


def _model(d=25, seed=1):
    rng = np.random.default_rng(seed)
    k = len(NAMES)
    U = np.linalg.qr(rng.standard_normal((d, 2)))[0]
    V = np.linalg.qr(rng.standard_normal((k, 2)))[0]
    return Model(U=U, s=np.array([3.0, 1.5]), V=V, b=rng.standard_normal(k) * 0.1,
                 loss="softmax", names=list(NAMES))


@pytest.fixture()
def files(tmp_path):
    X, y, w = _data()
    scipy.io.mmwrite(tmp_path / "rows.mtx", X)  # scipy's Matrix Market writer: an outside file
    sp.save_npz(tmp_path / "rows.npz", X)
    (tmp_path / "labels.txt").write_text("".join(NAMES[c] + "\n" for c in y))
    (tmp_path / "weights.txt").write_text("".join(f"{v}\n" for v in w))
    return tmp_path, X, y, w


def test_evaluate_a_matrix_market_file_equals_its_store_and_numpy(files):
    root, X, y, w = files
    ingest(root / "rows.mtx", root / "rows.zarr", labels=root / "labels.txt",
           weights=root / "weights.txt")
    model = _model()
    extra = {"labels": root / "labels.txt", "weights": root / "weights.txt"}
    prof = PassProfile()
    direct = evaluate(model, root / "rows.mtx", files=extra, block_rows=17, profile=prof)
    stored = evaluate(model, root / "rows.zarr", block_rows=17)
    for key in ("accuracy", "top_k_accuracy", "log_loss", "macro_f1", "total_weight"):
        assert direct[key] == pytest.approx(stored[key], rel=1e-12), key
    # outside reference: numpy's weighted accuracy of the argmax of the scores
    Z = X @ model.U @ np.diag(model.s) @ model.V.T + model.b
    ref = np.sum(w * (np.argmax(Z, axis=1) == y)) / np.sum(w)
    assert direct["accuracy"] == pytest.approx(ref, rel=1e-6)
    # the pass engine read it: one profiled pass of ceil(120 / 17) blocks
    assert len(prof.passes) == 1 and len(prof.records) == -(-120 // 17)


def test_labels_are_matched_to_the_model_by_name(files):
    root, X, y, _w = files
    keep = y >= 2  # a file that names only three of the five classes
    Xs, ys = X[keep], y[keep]
    scipy.io.mmwrite(root / "some.mtx", Xs)
    (root / "some.txt").write_text("".join(NAMES[c] + "\n" for c in ys))
    model = _model()
    direct = evaluate(model, root / "some.mtx", files={"labels": root / "some.txt"})
    api = evaluate(model, (Xs.astype(np.float32), ys.astype(np.int32)))
    assert direct["accuracy"] == pytest.approx(api["accuracy"], rel=1e-12)
    assert direct["log_loss"] == pytest.approx(api["log_loss"], rel=1e-12)
    (root / "bad.txt").write_text("".join(("gears" if i == 0 else NAMES[c]) + "\n"
                                          for i, c in enumerate(ys)))
    with pytest.raises(InputError, match="'gears' is not one of the model's 5 outputs"):
        evaluate(model, root / "some.mtx", files={"labels": root / "bad.txt"})


def test_predict_from_mtx_and_npz_equals_the_store(files):
    root, X, y, _w = files
    ingest(root / "rows.mtx", root / "plain.zarr")
    model = _model()
    outs = {}
    for name in ("rows.mtx", "rows.npz", "plain.zarr"):
        out = root / f"{name}.csv"
        info = predict_to_file(model, root / name, out, top_k=3, proba=True, block_rows=11)
        assert info["n_rows"] == 120
        outs[name] = out.read_text()
    assert outs["rows.mtx"] == outs["plain.zarr"] == outs["rows.npz"]
    first = outs["rows.mtx"].splitlines()[1].split(",")
    Z = (X @ model.U @ np.diag(model.s) @ model.V.T + model.b)[0]
    assert first[1] == NAMES[int(np.argmax(Z))]  # numpy's argmax names the top label


def test_unsorted_file_and_other_formats_say_run_ingest_first(tmp_path, capsys):
    model = _model(d=4)
    (tmp_path / "back.mtx").write_text("%%MatrixMarket matrix coordinate real general\n"
                                       "3 4 3\n2 1 1.0\n1 2 1.0\n3 3 1.0\n")
    with pytest.raises(InputError, match="earlier row.*ranktide ingest"):
        predict_to_file(model, tmp_path / "back.mtx", tmp_path / "p.csv")
    assert not (tmp_path / "p.csv").exists()
    (tmp_path / "rows.txt").write_text("0 1 1.0\n")
    with pytest.raises(StoreError, match="run `ranktide ingest .*rows.txt --out STORE` first"):
        evaluate(model, tmp_path / "rows.txt")
    code = cli.main(["predict", str(tmp_path / "m"), str(tmp_path / "rows.txt"), "--out",
                     str(tmp_path / "q.csv")])
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1


def test_evaluate_cli_takes_the_ingest_target_options(files, capsys):
    root, _X, _y, _w = files
    from ranktide.model import save_model

    save_model(root / "model", _model())
    code = cli.main(["evaluate", str(root / "model"), str(root / "rows.mtx"), "--labels",
                     str(root / "labels.txt"), "--json", "--quiet"])
    assert code == 0
    import json

    res = json.loads(capsys.readouterr().out)
    assert res["n_rows"] == 120 and 0.0 <= res["accuracy"] <= 1.0
    # targets options with a store are refused in one line
    ingest(root / "rows.mtx", root / "s.zarr", labels=root / "labels.txt")
    code = cli.main(["evaluate", str(root / "model"), str(root / "s.zarr"), "--labels",
                     str(root / "labels.txt")])
    assert code == 2
    assert "a store holds its own targets" in capsys.readouterr().err
