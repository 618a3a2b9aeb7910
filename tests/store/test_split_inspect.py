"""inspect_store and split_store against direct numpy / scipy computations.

Every expected figure is computed independently from the in-memory matrix
with numpy (``np.quantile(method="inverted_cdf")``, ``np.bincount``) or scipy.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.cli.main import main
from ranktide.errors import ConfigError, OutputExistsError
from ranktide.store import open_store, write_store
from ranktide.store.inspect import QUANTILES, hist_quantiles, inspect_store
from ranktide.store.split import split_store


def _matrix(n=300, d=40, seed=0):
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.08, random_state=seed, format="csr", dtype=np.float32)
    X = sp.lil_matrix(X)
    X[:, 7] = 0  # an empty column
    X[:, 0] = (np.arange(n, dtype=np.float32) + 1)[:, None]  # row id, to trace rows
    X = sp.csr_matrix(X)
    X.eliminate_zeros()
    return X, rng


def test_hist_quantiles_match_numpy():
    rng = np.random.default_rng(1)
    v = rng.poisson(4.0, 1001)
    got = hist_quantiles(np.bincount(v), QUANTILES)
    # reference: numpy's inverse empirical CDF quantile
    want = [int(np.quantile(v, q, method="inverted_cdf")) for q in QUANTILES]
    assert got == want


def test_inspect_classes(tmp_path):
    X, rng = _matrix()
    y = rng.integers(0, 6, X.shape[0])
    y[y == 5] = 4  # class 5 never occurs
    w = rng.random(X.shape[0]).astype(np.float32)
    w[:3] = 0
    write_store(tmp_path / "s.zarr", X, y, kind="classes", weights=w,
                names=[f"c{i}" for i in range(6)])
    info = inspect_store(tmp_path / "s.zarr")
    lens = np.diff(X.indptr)
    assert info["shape"] == list(X.shape) and info["nnz"] == X.nnz
    assert info["density"] == pytest.approx(X.nnz / (X.shape[0] * X.shape[1]))
    assert info["empty_rows"] == int(np.sum(lens == 0))
    assert info["empty_cols"] == int(np.sum(np.bincount(X.indices, minlength=X.shape[1]) == 0))
    q = info["row_nnz"]["quantiles"]
    assert [q[f"{p:g}"] for p in QUANTILES] == [
        int(np.quantile(lens, p, method="inverted_cdf")) for p in QUANTILES
    ]
    counts = np.bincount(y, minlength=6)
    t = info["targets"]
    assert t["counts"] == counts.tolist() and t["classes_present"] == 5
    assert t["top"][0]["count"] == counts.max() and t["bottom"][0]["count"] == 0
    assert t["bottom"][0]["name"] == "c5"
    assert info["weights"]["zero"] == 3
    assert info["weights"]["sum"] == pytest.approx(float(w.astype(np.float64).sum()))
    assert info["bytes_disk"] > 0 and info["bytes_decoded"] >= X.nnz * 8
    json.dumps(info)  # JSON-ready


def test_inspect_tags_and_values(tmp_path, capsys):
    X, rng = _matrix(n=50, seed=2)
    T = sp.csr_matrix((rng.random((50, 4)) < 0.3).astype(np.float32))
    write_store(tmp_path / "t.zarr", X, T, kind="tags")
    t = inspect_store(tmp_path / "t.zarr")["targets"]
    per_row = np.diff(T.indptr)
    assert t["rows_without_tags"] == int(np.sum(per_row == 0))
    assert t["tags_per_row"]["max"] == per_row.max()
    assert t["tags_per_row"]["mean"] == pytest.approx(per_row.mean())
    assert t["tag_counts"] == np.asarray(T.sum(axis=0)).ravel().astype(int).tolist()
    V = rng.standard_normal((50, 3)).astype(np.float32)
    write_store(tmp_path / "v.h5", X, V, kind="values")
    t = inspect_store(tmp_path / "v.h5")["targets"]
    assert t["min"] == V.min(axis=0).astype(float).tolist()
    assert t["max"] == V.max(axis=0).astype(float).tolist()
    assert main(["inspect", str(tmp_path / "v.h5")]) == 0
    out = capsys.readouterr().out
    assert "values: 3 outputs" in out and "hdf5" in out


def _rows_of(path):
    """Original row ids (column 0 holds id + 1), classes and weights of a store."""
    with open_store(path) as st:
        ids, ys, ws = [], [], []
        for b in st.blocks(block_bytes=2048):
            ids.append(b.X[:, 0].toarray().ravel().astype(np.int64) - 1)
            ys.append(b.targets)
            ws.append(b.weights)
    return np.concatenate(ids), np.concatenate(ys), np.concatenate(ws)


def test_split_stratified_exact_and_deterministic(tmp_path):
    X, rng = _matrix(n=403)
    y = rng.choice(5, X.shape[0], p=[0.5, 0.2, 0.15, 0.1, 0.05])
    w = rng.random(X.shape[0]).astype(np.float32)
    write_store(tmp_path / "s.zarr", X, y, kind="classes", weights=w)

    def do(seed, tag):
        res = split_store(tmp_path / "s.zarr", tmp_path / f"tr{tag}.zarr",
                          tmp_path / f"ho{tag}.zarr", holdout=0.3, seed=seed, block_bytes=4096)
        return res, _rows_of(tmp_path / f"tr{tag}.zarr"), _rows_of(tmp_path / f"ho{tag}.zarr")

    res, (id_tr, y_tr, w_tr), (id_ho, y_ho, w_ho) = do(7, "a")
    counts = np.bincount(y, minlength=5)
    want = np.rint(0.3 * counts).astype(int)  # round(holdout * count), half to even
    assert np.bincount(y_ho, minlength=5).tolist() == want.tolist()
    assert res["holdout_per_class"] == want.tolist()
    # the union is the original rows, each exactly once, order kept within each part
    assert sorted(np.concatenate((id_tr, id_ho)).tolist()) == list(range(X.shape[0]))
    assert np.all(np.diff(id_tr) > 0) and np.all(np.diff(id_ho) > 0)
    # targets and weights travel with their rows
    assert np.array_equal(y_tr, y[id_tr]) and np.array_equal(y_ho, y[id_ho])
    assert np.array_equal(w_ho, w[id_ho])
    # rows are intact
    with open_store(tmp_path / "hoa.zarr") as st:
        H = sp.vstack([b.X for b in st.blocks()]).tocsr()
    assert (H != X[id_ho]).nnz == 0
    # same seed, same split; another seed, another split
    _, _, (id_ho2, _, _) = do(7, "b")
    _, _, (id_ho3, _, _) = do(8, "c")
    assert np.array_equal(id_ho, id_ho2)
    assert not np.array_equal(id_ho, id_ho3)


def test_split_untargeted_and_cli(tmp_path, capsys):
    X, _ = _matrix(n=101, seed=3)
    write_store(tmp_path / "s.zarr", X)
    rc = main(["split", str(tmp_path / "s.zarr"), "--holdout", "0.25", "--seed", "1",
               "--out", str(tmp_path / "tr.zarr"), "--out-holdout", str(tmp_path / "ho.zarr"),
               "--json"])
    assert rc == 0
    res = json.loads(capsys.readouterr().out)
    assert res["holdout_rows"] == round(0.25 * 101) and res["train_rows"] == 101 - 25
    with open_store(tmp_path / "ho.zarr") as st:
        assert st.shape == (25, X.shape[1])
    rc = main(["split", str(tmp_path / "s.zarr"), "--out", str(tmp_path / "tr.zarr"),
               "--out-holdout", str(tmp_path / "x.zarr")])
    err = capsys.readouterr().err.strip().split("\n")
    assert rc == 2 and len(err) == 1 and "already exists" in err[0]
    assert not (tmp_path / "x.zarr").exists()


def test_split_bad_settings(tmp_path):
    X, _ = _matrix(n=20, seed=4)
    write_store(tmp_path / "s.zarr", X)
    with pytest.raises(ConfigError, match="strictly between 0 and 1"):
        split_store(tmp_path / "s.zarr", tmp_path / "a.zarr", tmp_path / "b.zarr", holdout=1.0)
    with pytest.raises(ConfigError, match="must differ"):
        split_store(tmp_path / "s.zarr", tmp_path / "a.zarr", tmp_path / "a.zarr")
    (tmp_path / "b.zarr").mkdir()
    with pytest.raises(OutputExistsError, match="b.zarr: already exists"):
        split_store(tmp_path / "s.zarr", tmp_path / "a.zarr", tmp_path / "b.zarr")
    assert not (tmp_path / "a.zarr").exists()
