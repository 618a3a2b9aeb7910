"""Streamed metric accumulators against scikit-learn on random data.

Reference library: ``sklearn.metrics`` (accuracy_score, top_k_accuracy_score,
log_loss, f1_score, recall_score, precision_score, mean_squared_error,
r2_score). precision@k has no scikit-learn function; it is computed from its
definition (true tags among the k best-scored, divided by k) with a dense
numpy sort.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.errors import InputError
from ranktide.scoring.metrics import (
    WORST_CLASSES,
    MultilabelMetrics,
    SoftmaxMetrics,
    SquaredMetrics,
    make_metrics,
)
from scipy.special import log_softmax, softmax
from sklearn import metrics as skm

CUTS = (0, 7, 8, 61, 140, 200)  # uneven blocks, including a block of one row


def _stream(acc, z, y, w, cuts=CUTS):
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        yb = y[a:b]
        acc.update(z[a:b], yb, None if w is None else w[a:b])
    return acc.result()


def _softmax_data(seed, n=200, k=13):
    rng = np.random.default_rng(seed)
    y = rng.integers(0, k, n)
    y[:k] = np.arange(k)  # every class present in y_true
    z = rng.normal(size=(n, k)) * 2.0
    z[np.arange(n), y] += rng.normal(1.0, 1.0, n)  # better than chance, not perfect
    w = rng.uniform(0.2, 3.0, n)
    return z, y, w


@pytest.mark.parametrize("weighted", [False, True])
def test_softmax_metrics_match_sklearn(weighted):
    z, y, w = _softmax_data(1)
    w = w if weighted else None
    k = z.shape[1]
    res = _stream(SoftmaxMetrics(n_outputs=k, top_k=3), z, y, w)
    pred = z.argmax(axis=1)
    labels = np.arange(k)
    # reference: sklearn.metrics
    assert res["accuracy"] == pytest.approx(skm.accuracy_score(y, pred, sample_weight=w), abs=1e-12)
    assert res["top_k_accuracy"] == pytest.approx(
        skm.top_k_accuracy_score(y, z, k=3, labels=labels, sample_weight=w), abs=1e-12
    )
    assert res["log_loss"] == pytest.approx(
        skm.log_loss(y, softmax(z, axis=1), labels=labels, sample_weight=w), rel=1e-10
    )
    assert res["macro_f1"] == pytest.approx(
        skm.f1_score(y, pred, average="macro", sample_weight=w), abs=1e-12
    )
    recall = skm.recall_score(y, pred, average=None, labels=labels, sample_weight=w)
    worst = res["worst_class_recall"]
    assert len(worst) == WORST_CLASSES
    assert [r["recall"] for r in worst] == pytest.approx(np.sort(recall)[:WORST_CLASSES], abs=1e-12)
    for r in worst:
        assert r["recall"] == pytest.approx(recall[r["class"]], abs=1e-12)
    assert res["n_rows"] == len(y)


def test_softmax_blocks_equal_whole_array_and_merge():
    z, y, w = _softmax_data(2)
    k = z.shape[1]
    whole = SoftmaxMetrics(n_outputs=k, top_k=4)
    whole.update(z, y, w)
    blocks = _stream(SoftmaxMetrics(n_outputs=k, top_k=4), z, y, w)
    left, right = SoftmaxMetrics(n_outputs=k, top_k=4), SoftmaxMetrics(n_outputs=k, top_k=4)
    left.update(z[:90], y[:90], w[:90])
    right.update(z[90:], y[90:], w[90:])
    merged = left.merge(right).result()
    for key in ("accuracy", "top_k_accuracy", "log_loss", "macro_f1"):
        assert blocks[key] == pytest.approx(whole.result()[key], rel=1e-12)
        assert merged[key] == pytest.approx(whole.result()[key], rel=1e-12)


def test_softmax_macro_f1_uses_labels_present_like_sklearn():
    # classes 5..9 never occur, neither true nor predicted: sklearn's default
    # labels (unique_labels of y_true and y_pred) leave them out of the mean.
    rng = np.random.default_rng(3)
    n, k = 150, 10
    y = rng.integers(0, 5, n)
    z = rng.normal(size=(n, k))
    z[:, 5:] -= 100.0
    res = _stream(SoftmaxMetrics(n_outputs=k, top_k=2), z, y, None, cuts=(0, 50, 150))
    pred = z.argmax(axis=1)
    assert res["macro_f1"] == pytest.approx(skm.f1_score(y, pred, average="macro"), abs=1e-12)
    assert res["n_classes_seen"] == len(np.unique(np.concatenate([y, pred])))


def test_softmax_log_loss_is_stable_for_large_scores():
    # log-softmax by scipy (reference) on scores far beyond exp's range
    rng = np.random.default_rng(4)
    z = rng.normal(size=(30, 6)) * 800.0
    y = rng.integers(0, 6, 30)
    res = _stream(SoftmaxMetrics(n_outputs=6), z, y, None, cuts=(0, 11, 30))
    ref = -log_softmax(z, axis=1)[np.arange(30), y].mean()
    assert np.isfinite(res["log_loss"])
    assert res["log_loss"] == pytest.approx(ref, rel=1e-12)


def test_top_k_clipped_to_class_count():
    z, y, _ = _softmax_data(5, n=40, k=4)
    res = _stream(SoftmaxMetrics(n_outputs=4, top_k=10), z, y, None, cuts=(0, 40))
    assert res["top_k"] == 4
    assert res["top_k_accuracy"] == 1.0  # every class is in the top 4 of 4


def _multilabel_data(seed, n=200, k=9):
    rng = np.random.default_rng(seed)
    Y = (rng.random((n, k)) < 0.3).astype(np.float32)
    Y[:, -1] = 0  # a tag that is never true
    z = rng.normal(size=(n, k)) + 1.5 * (2 * Y - 1) * rng.random((n, k))
    z[:, -1] = -5.0  # ... and never predicted: F1 0/0 -> 0 as zero_division=0
    w = rng.uniform(0.2, 3.0, n)
    return z, Y, w


def _precision_at_k(z, Y, k, w):
    # definition: |top-k(z_i) ∩ Y_i| / k, weighted mean over rows
    top = np.argsort(-z, axis=1, kind="stable")[:, :k]
    hits = np.take_along_axis(Y.astype(np.float64), top, axis=1).sum(axis=1) / k
    return np.average(hits, weights=w)


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("as_csr", [False, True])
def test_multilabel_metrics_match_sklearn(weighted, as_csr):
    z, Y, w = _multilabel_data(6)
    w = w if weighted else None
    k = Y.shape[1]
    acc = MultilabelMetrics(n_outputs=k, top_k=3)
    for a, b in zip(CUTS[:-1], CUTS[1:], strict=True):
        T = sp.csr_matrix(Y[a:b]) if as_csr else Y[a:b]
        acc.update(z[a:b], T, None if w is None else w[a:b])
    res = acc.result()
    P = (z > 0).astype(int)
    Yi = Y.astype(int)
    # reference: sklearn.metrics on indicator matrices
    assert res["micro_f1"] == pytest.approx(
        skm.f1_score(Yi, P, average="micro", sample_weight=w), abs=1e-12
    )
    assert res["macro_f1"] == pytest.approx(
        skm.f1_score(Yi, P, average="macro", sample_weight=w, zero_division=0), abs=1e-12
    )
    assert res["micro_precision"] == pytest.approx(
        skm.precision_score(Yi, P, average="micro", sample_weight=w), abs=1e-12
    )
    assert res["micro_recall"] == pytest.approx(
        skm.recall_score(Yi, P, average="micro", sample_weight=w), abs=1e-12
    )
    ww = np.ones(len(Y)) if w is None else w
    assert res["precision_at_k"] == pytest.approx(_precision_at_k(z, Y, 3, ww), abs=1e-12)
    # mean loss: binary cross-entropy summed over tags, reference sklearn log_loss per tag
    ref_loss = sum(
        skm.log_loss(Yi[:, j], 1 / (1 + np.exp(-z[:, j])), labels=[0, 1], sample_weight=w)
        for j in range(k)
    )
    assert res["mean_loss"] == pytest.approx(ref_loss, rel=1e-9)


def test_multilabel_blocks_equal_whole_array():
    z, Y, w = _multilabel_data(7)
    k = Y.shape[1]
    whole = MultilabelMetrics(n_outputs=k, top_k=2)
    whole.update(z, sp.csr_matrix(Y), w)
    blocks = _stream(MultilabelMetrics(n_outputs=k, top_k=2), z, Y, w)
    left, right = MultilabelMetrics(n_outputs=k, top_k=2), MultilabelMetrics(n_outputs=k, top_k=2)
    left.update(z[:77], Y[:77], w[:77])
    right.update(z[77:], Y[77:], w[77:])
    merged = left.merge(right).result()
    for key in ("micro_f1", "macro_f1", "precision_at_k", "mean_loss"):
        assert blocks[key] == pytest.approx(whole.result()[key], rel=1e-12)
        assert merged[key] == pytest.approx(whole.result()[key], rel=1e-12)


def _squared_data(seed, n=200, k=5):
    rng = np.random.default_rng(seed)
    Y = rng.normal(size=(n, k)) * np.array([1.0, 10.0, 0.1, 3.0, 1.0]) + 1e4  # big offset
    z = Y + rng.normal(size=(n, k)) * 0.5
    w = rng.uniform(0.2, 3.0, n)
    return z, Y, w


@pytest.mark.parametrize("weighted", [False, True])
def test_squared_metrics_match_sklearn(weighted):
    z, Y, w = _squared_data(8)
    w = w if weighted else None
    res = _stream(SquaredMetrics(n_outputs=5), z, Y, w)
    # reference: sklearn.metrics mean_squared_error / r2_score
    mse_j = skm.mean_squared_error(Y, z, sample_weight=w, multioutput="raw_values")
    assert res["rmse_per_output"] == pytest.approx(np.sqrt(mse_j), rel=1e-9)
    mse = skm.mean_squared_error(Y, z, sample_weight=w)
    assert res["rmse"] == pytest.approx(np.sqrt(mse), rel=1e-9)
    r2_j = skm.r2_score(Y, z, sample_weight=w, multioutput="raw_values")
    assert res["r2_per_output"] == pytest.approx(r2_j, rel=1e-7)
    assert res["r2"] == pytest.approx(skm.r2_score(Y, z, sample_weight=w), rel=1e-7)
    assert res["mean_loss"] == pytest.approx(0.5 * mse_j.sum(), rel=1e-9)


def test_squared_blocks_merge_and_constant_output():
    z, Y, w = _squared_data(9)
    Y[:, 0] = 3.0  # constant target: sklearn (force_finite) gives 1 if exact, else 0
    z[:, 0] = 3.0
    Y[:, 2] = -1.0
    left, right = SquaredMetrics(n_outputs=5), SquaredMetrics(n_outputs=5)
    left.update(z[:33], Y[:33], w[:33])
    right.update(z[33:], Y[33:], w[33:])
    res = left.merge(right).result()
    r2_j = skm.r2_score(Y, z, sample_weight=w, multioutput="raw_values")
    varying = [1, 3, 4]
    assert np.asarray(res["r2_per_output"])[varying] == pytest.approx(r2_j[varying], rel=1e-7)
    # constant outputs: sklearn r2_score's force_finite rule (1 if exact, else 0);
    # compared unweighted, where sklearn's own mean of a constant is exact (with
    # weights its rounding leaves a ~1e-30 denominator and it returns -5e38)
    r2_u = skm.r2_score(Y, z, multioutput="raw_values")
    assert r2_u[0] == 1.0 and r2_u[2] == 0.0
    assert res["r2_per_output"][0] == r2_u[0] and res["r2_per_output"][2] == r2_u[2]


def test_bad_inputs_raise_one_line_errors():
    acc = SoftmaxMetrics(n_outputs=3)
    with pytest.raises(InputError, match=r"class ids must lie in 0\.\.2"):
        acc.update(np.zeros((2, 3)), np.array([0, 3]))
    with pytest.raises(InputError, match=r"expected \(rows, 3\)"):
        acc.update(np.zeros((2, 4)), np.array([0, 1]))
    with pytest.raises(InputError, match="weights: 1 entries for a block of 2 rows"):
        acc.update(np.zeros((2, 3)), np.array([0, 1]), np.ones(1))
    with pytest.raises(InputError, match="no rows with positive weight"):
        acc.result()
    with pytest.raises(InputError, match="unknown; expected one of"):
        make_metrics("hinge", n_outputs=3)
    with pytest.raises(InputError, match="tag matrix of shape"):
        MultilabelMetrics(n_outputs=3).update(np.zeros((2, 3)), sp.csr_matrix((2, 4)))
    with pytest.raises(InputError, match="top_k=0"):
        SoftmaxMetrics(n_outputs=3, top_k=0)
