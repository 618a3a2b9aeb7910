"""Model files: round trip, predictions against dense numpy, and bad model directories."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.atomic import save_npz
from ranktide.errors import ConfigError, InputError, ModelError, OutputExistsError
from ranktide.model import Model, load_model, save_model
from scipy.special import expit, softmax


def _random_model(loss: str, *, d: int = 25, k: int = 6, r: int = 3, seed: int = 0) -> Model:
    rng = np.random.default_rng(seed)
    U, _ = np.linalg.qr(rng.standard_normal((d, r)))
    V, _ = np.linalg.qr(rng.standard_normal((k, r)))
    s = np.sort(rng.uniform(0.5, 3.0, r))[::-1]
    b = rng.standard_normal(k)
    names = [f"out-{j}" for j in range(k)]
    return Model(U=U, s=s, V=V, b=b, loss=loss, names=names, meta={"lam": 0.25, "passes": 7})


def _X(n: int = 40, d: int = 25, seed: int = 1) -> sp.csr_matrix:
    return sp.random(n, d, density=0.3, random_state=seed, format="csr", dtype=np.float32)


def _dense_W(m: Model) -> np.ndarray:
    return m.U @ np.diag(m.s) @ m.V.T


@pytest.mark.parametrize("loss", ["softmax", "squared", "multilabel"])
def test_scores_match_dense_numpy(loss):
    m = _random_model(loss)
    X = _X()
    # Reference: dense numpy W = U diag(s) V^T, then X W + b.
    want = X.toarray().astype(np.float64) @ _dense_W(m) + m.b
    np.testing.assert_allclose(m.scores(X), want, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(m.scores(X.toarray()), want, rtol=1e-12, atol=1e-12)


def test_predictions_match_scipy_special():
    X = _X()
    m = _random_model("softmax")
    Z = X.toarray().astype(np.float64) @ _dense_W(m) + m.b
    # Reference: scipy.special.softmax / expit on the dense scores.
    np.testing.assert_allclose(m.predict_proba(X), softmax(Z, axis=1), rtol=1e-12)
    np.testing.assert_array_equal(m.predict(X), np.argmax(Z, axis=1))
    ml = _random_model("multilabel")
    Zm = X.toarray().astype(np.float64) @ _dense_W(ml) + ml.b
    np.testing.assert_allclose(ml.predict_proba(X), expit(Zm), rtol=1e-12, atol=1e-15)
    pred = ml.predict(X)
    assert sp.issparse(pred)
    np.testing.assert_array_equal(pred.toarray() == 1, expit(Zm) >= 0.5)
    sq = _random_model("squared")
    np.testing.assert_allclose(sq.predict(X), X.toarray() @ _dense_W(sq) + sq.b, rtol=1e-12)
    with pytest.raises(ConfigError, match="squared loss predicts values"):
        sq.predict_proba(X)


def test_top_k_matches_numpy_sort():
    X = _X(n=30)
    m = _random_model("softmax", k=8)
    labels, val, idx = m.top_k(X, 3)
    Z = m.scores(X)
    # Reference: numpy's full sort of each row (descending).
    ref = np.argsort(-Z, axis=1, kind="stable")[:, :3]
    np.testing.assert_array_equal(idx, ref)
    np.testing.assert_allclose(val, np.sort(Z, axis=1)[:, ::-1][:, :3])
    assert idx.shape == (30, 3) and idx.dtype == np.int64
    assert np.all(np.diff(val, axis=1) <= 0)
    # labels: the output names of those columns (ids as text without names)
    names = [f"out-{j}" for j in range(8)]
    named = Model(U=m.U, s=m.s, V=m.V, b=m.b, loss="softmax", names=names)
    np.testing.assert_array_equal(named.top_k(X, 3).labels, np.asarray(names)[ref])
    bare = Model(U=m.U, s=m.s, V=m.V, b=m.b, loss="softmax")
    np.testing.assert_array_equal(bare.top_k(X, 3).labels, ref.astype(str))
    with pytest.raises(ConfigError, match="top_k: k = 9"):
        m.top_k(X, 9)


def test_rank_zero_model_scores_are_intercept():
    b = np.array([0.5, -1.0, 2.0])
    m = Model(U=np.zeros((10, 0)), s=np.zeros(0), V=np.zeros((3, 0)), b=b, loss="softmax")
    X = _X(n=5, d=10)
    np.testing.assert_array_equal(m.scores(X), np.tile(b, (5, 1)))


def test_from_dense_recovers_W():
    rng = np.random.default_rng(3)
    W = rng.standard_normal((12, 2)) @ rng.standard_normal((2, 5))
    m = Model.from_dense(W, np.zeros(5), loss="squared")
    assert m.rank == 2
    np.testing.assert_allclose(_dense_W(m), W, atol=1e-12)


@pytest.mark.parametrize("loss,key", [("softmax", "classes"), ("multilabel", "tags"),
                                      ("squared", "outputs")])
def test_round_trip(tmp_path, loss, key):
    m = _random_model(loss)
    out = save_model(tmp_path / "m", m, meta={"objective": np.float64(1.5), "gap": 1e-5,
                                              "store_fingerprint": "abc123"})
    doc = json.loads((out / "model.json").read_text())
    assert doc[key] == m.names
    assert doc["loss"] == loss and doc["d"] == 25 and doc["k"] == 6 and doc["rank"] == 3
    assert doc["lam"] == 0.25 and doc["objective"] == 1.5 and doc["passes"] == 7
    assert set(doc["versions"]) >= {"numpy", "scipy", "numba", "zarr", "h5py", "ranktide"}
    back = load_model(out)
    for name in ("U", "s", "V", "b"):
        np.testing.assert_array_equal(getattr(back, name), getattr(m, name))
    assert back.loss == loss and back.names == m.names
    assert back.meta["store_fingerprint"] == "abc123"
    X = _X()
    np.testing.assert_array_equal(back.scores(X), m.scores(X))
    # no temporary siblings left behind
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m"]


def test_save_refuses_existing_and_overwrites_on_request(tmp_path):
    m = _random_model("softmax")
    save_model(tmp_path / "m", m)
    with pytest.raises(OutputExistsError, match="already exists"):
        save_model(tmp_path / "m", m)
    m2 = _random_model("softmax", seed=5)
    save_model(tmp_path / "m", m2, overwrite=True)
    np.testing.assert_array_equal(load_model(tmp_path / "m").b, m2.b)


def test_save_refuses_non_json_meta_and_leaves_nothing(tmp_path):
    m = _random_model("softmax")
    with pytest.raises(ConfigError, match="'when'.*not JSON data"):
        save_model(tmp_path / "m", m, meta={"when": object()})
    assert list(tmp_path.iterdir()) == []


def _saved(tmp_path, loss="softmax"):
    return save_model(tmp_path / "m", _random_model(loss))


def test_missing_directory(tmp_path):
    with pytest.raises(ModelError, match="no such model directory"):
        load_model(tmp_path / "nope")
    (tmp_path / "afile").write_text("x")
    with pytest.raises(ModelError, match="is a file, not a model directory"):
        load_model(tmp_path / "afile")


def test_missing_files(tmp_path):
    d = _saved(tmp_path)
    (d / "factors.npz").unlink()
    with pytest.raises(ModelError, match=r"factors\.npz: file not found"):
        load_model(d)
    (d / "model.json").unlink()
    with pytest.raises(ModelError, match=r"model\.json: file not found"):
        load_model(d)


def _edit_json(d, **changes):
    doc = json.loads((d / "model.json").read_text())
    doc.update(changes)
    (d / "model.json").write_text(json.dumps(doc))


def test_bad_json(tmp_path):
    d = _saved(tmp_path)
    (d / "model.json").write_text("{not json")
    with pytest.raises(ModelError, match="not readable JSON"):
        load_model(d)
    (d / "model.json").write_text("[1, 2]")
    with pytest.raises(ModelError, match="expected a JSON object"):
        load_model(d)


def test_newer_format_and_unknown_loss(tmp_path):
    d = _saved(tmp_path)
    _edit_json(d, format_version=99)
    with pytest.raises(ModelError, match="format version 99 is newer.*upgrade ranktide"):
        load_model(d)
    _edit_json(d, format_version=1, loss="hinge")
    with pytest.raises(ModelError, match="unknown loss 'hinge'"):
        load_model(d)
    _edit_json(d, loss="softmax", format="something-else")
    with pytest.raises(ModelError, match="not a ranktide model"):
        load_model(d)


def test_object_arrays_refused(tmp_path):
    d = _saved(tmp_path)
    m = _random_model("softmax")
    # Hand-written npz with an object array (np.savez pickles it).
    with open(d / "factors.npz", "wb") as fh:
        np.savez(fh, U=m.U, s=m.s, V=np.array([None] * 6, dtype=object), b=m.b)
    with pytest.raises(ModelError, match="object"):
        load_model(d)


def test_inconsistent_shapes(tmp_path):
    d = _saved(tmp_path)
    m = _random_model("softmax")
    save_npz(d / "factors.npz", {"U": m.U, "s": m.s[:2], "V": m.V, "b": m.b})
    with pytest.raises(ModelError, match="inconsistent shapes"):
        load_model(d)
    save_npz(d / "factors.npz", {"U": m.U, "s": m.s, "V": m.V})
    with pytest.raises(ModelError, match="array 'b' is missing"):
        load_model(d)
    save_npz(d / "factors.npz", {"U": m.U[:20], "s": m.s, "V": m.V, "b": m.b})
    with pytest.raises(ModelError, match="d = 25 but factors.npz has d = 20"):
        load_model(d)


def test_bad_names_and_values(tmp_path):
    d = _saved(tmp_path)
    _edit_json(d, classes=["a", "b"])
    with pytest.raises(ModelError, match="2 output names for 6 outputs"):
        load_model(d)
    m = _random_model("softmax")
    with pytest.raises(ModelError, match="singular value 0 is negative"):
        Model(U=m.U, s=-m.s, V=m.V, b=m.b, loss="softmax")
    bad = m.U.copy()
    bad[0, 0] = np.nan
    with pytest.raises(ModelError, match="'U' holds NaN"):
        Model(U=bad, s=m.s, V=m.V, b=m.b, loss="softmax")


def test_scores_refuse_wrong_width():
    m = _random_model("softmax")
    with pytest.raises(InputError, match="has 7 columns but the model was fitted on 25"):
        m.scores(sp.csr_matrix((3, 7)))


# ---------------------------------------------------------------- compact and float32 factors


def _sparse_rows_model(d: int = 400, present: int = 60, seed: int = 3) -> Model:
    """A model whose U is zero outside ``present`` rows (features absent from training)."""
    rng = np.random.default_rng(seed)
    m = _random_model("softmax", d=present, seed=seed)
    rows = np.sort(rng.choice(d, present, replace=False))
    U = np.zeros((d, m.rank))
    U[rows] = m.U
    return Model(U=U, s=m.s, V=m.V, b=m.b, loss="softmax", names=m.names, meta=m.meta)


def test_only_nonzero_rows_of_U_are_stored(tmp_path):
    m = _sparse_rows_model()
    save_model(tmp_path / "m", m)
    with np.load(tmp_path / "m" / "factors.npz", allow_pickle=False) as z:
        rows, U_stored = z["U_rows"], z["U"]
    # reference: numpy's own nonzero-row test on the dense U
    np.testing.assert_array_equal(rows, np.flatnonzero(np.abs(m.U).sum(axis=1) > 0))
    assert U_stored.shape == (60, m.rank)
    doc = json.loads((tmp_path / "m" / "model.json").read_text())
    assert doc["format_version"] == 2 and doc["d"] == 400
    assert doc["factors"] == {"dtype": "float64", "stored_rows": 60, "zero_rows_left_out": 340}
    back = load_model(tmp_path / "m")
    np.testing.assert_array_equal(back.U, m.U)  # lossless in float64
    X = sp.random(30, 400, density=0.2, random_state=4, format="csr")
    np.testing.assert_array_equal(back.scores(X), m.scores(X))
    assert "factors" not in back.meta  # recomputed on every save, not carried over


def test_version_1_directory_still_loads(tmp_path):
    # a directory as format 1 wrote it: the whole U in float64, no U_rows, no "factors"
    m = _random_model("multilabel")
    d = tmp_path / "old"
    save_model(d, m)
    doc = json.loads((d / "model.json").read_text())
    doc["format_version"] = 1
    del doc["factors"]
    (d / "model.json").write_text(json.dumps(doc))
    save_npz(d / "factors.npz", {"U": m.U, "s": m.s, "V": m.V, "b": m.b})
    back = load_model(d)
    for name in ("U", "s", "V", "b"):
        np.testing.assert_array_equal(getattr(back, name), getattr(m, name))


def test_float32_factors_agree_with_float64_on_a_real_model(tmp_path):
    # A real model: scikit-learn's LogisticRegression on its bundled digits data set,
    # factored by SVD (Model.from_dense); the float32 file must give the same top-1 class
    # on every row and probabilities within 1e-4 of the float64 model (tolerance: common
    # practice, no source; float32 rounds each factor entry by at most 2**-24 relative).
    from sklearn.datasets import load_digits
    from sklearn.linear_model import LogisticRegression

    X, y = load_digits(return_X_y=True)
    lr = LogisticRegression(C=1.0, max_iter=300).fit(X, y)
    m = Model.from_dense(lr.coef_.T, lr.intercept_, loss="softmax")
    np.testing.assert_allclose(m.predict_proba(X), lr.predict_proba(X), atol=1e-8)
    save_model(tmp_path / "f64", m)
    save_model(tmp_path / "f32", m, factor_dtype="float32")
    with np.load(tmp_path / "f32" / "factors.npz", allow_pickle=False) as z:
        assert z["U"].dtype == np.float32 and z["V"].dtype == np.float32
        assert z["s"].dtype == np.float64 and z["b"].dtype == np.float64
    p64 = load_model(tmp_path / "f64").predict_proba(X)
    p32 = load_model(tmp_path / "f32").predict_proba(X)
    np.testing.assert_array_equal(p32.argmax(axis=1), p64.argmax(axis=1))
    assert np.max(np.abs(p32 - p64)) <= 1e-4
    size = {t: (tmp_path / t / "factors.npz").stat().st_size for t in ("f32", "f64")}
    assert size["f32"] < 0.7 * size["f64"]  # U and V halve; s, b and the zip headers stay
    with pytest.raises(ConfigError, match="factor_dtype 'float16'"):
        save_model(tmp_path / "f16", m, factor_dtype="float16")


def test_bad_row_ids_refused(tmp_path):
    m = _sparse_rows_model()
    d = tmp_path / "m"
    save_model(d, m)
    with np.load(d / "factors.npz", allow_pickle=False) as z:
        arrays = {key: z[key] for key in z.files}
    for rows, msg in ((arrays["U_rows"][::-1], "increasing ids in 0..399"),
                      (arrays["U_rows"] + 400, "increasing ids in 0..399"),
                      (arrays["U_rows"][:-1], "59 row ids for 60 rows"),
                      (arrays["U_rows"].astype(np.float64), "1-D integer array")):
        save_npz(d / "factors.npz", dict(arrays, U_rows=rows))
        with pytest.raises(ModelError, match=msg):
            load_model(d)
