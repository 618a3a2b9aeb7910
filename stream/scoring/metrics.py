"""Streamed evaluation metrics, one accumulator per loss.

Every accumulator is fed block by block with ``update(block_scores, targets,
weights)`` and reports with ``result() -> dict``. The state is a handful of
weighted sums (per class, per tag or per output), so the result over many
blocks equals the result over the whole array, and two accumulators over
disjoint row ranges combine with ``merge``. All work inside ``update`` is
vectorized over the block; nothing loops over rows in Python.

Scores are the model's raw outputs ``z = W^T x + b`` (logits for softmax and
multilabel, predicted values for squared). Row weights scale each row's
contribution (``None`` means weight 1), as ``sample_weight`` does in
scikit-learn.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import InputError

__all__ = [
    "SoftmaxMetrics",
    "MultilabelMetrics",
    "SquaredMetrics",
    "make_metrics",
    "WORST_CLASSES",
]

#: How many of the lowest per-class recalls the softmax report lists.
WORST_CLASSES = 10


def _weights(weights: np.ndarray | None, n: int) -> np.ndarray:
    if weights is None:
        return np.ones(n, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64).reshape(-1)
    if w.shape[0] != n:
        raise InputError(f"weights: {w.shape[0]} entries for a block of {n} rows; pass one per row")
    return w


def _scores(block_scores: np.ndarray, k: int) -> np.ndarray:
    z = np.asarray(block_scores, dtype=np.float64)
    if z.ndim != 2 or z.shape[1] != k:
        raise InputError(f"scores: shape {z.shape}, expected (rows, {k}); use the model's scores")
    return z


def _safe_ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """``num / den`` with 0 where ``den == 0`` (scikit-learn's ``zero_division=0``)."""
    out = np.zeros_like(num, dtype=np.float64)
    np.divide(num, den, out=out, where=den > 0)
    return out


def _name(names: Sequence[str] | None, j: int) -> str | None:
    return None if names is None else str(names[j])


class _Base:
    """Shared bookkeeping: output count, names, total weight, row count."""

    loss: str = ""

    def __init__(self, *, n_outputs: int, output_names: Sequence[str] | None = None) -> None:
        if int(n_outputs) < 1:
            raise InputError(f"n_outputs={n_outputs}: a model has at least one output")
        self.n_outputs = int(n_outputs)
        self.output_names = None if output_names is None else [str(s) for s in output_names]
        if self.output_names is not None and len(self.output_names) != self.n_outputs:
            raise InputError(
                f"output_names: {len(self.output_names)} names for {self.n_outputs} outputs; "
                "pass one name per output"
            )
        self.n_rows = 0
        self.total_weight = 0.0

    def _check_merge(self, other: _Base) -> None:
        if type(other) is not type(self) or other.n_outputs != self.n_outputs:
            raise InputError("merge: accumulators differ in loss or output count")

    def _header(self) -> dict[str, Any]:
        if not self.total_weight > 0:
            raise InputError(
                f"no rows with positive weight were seen ({self.n_rows} rows); "
                "evaluate on a non-empty set with positive weights"
            )
        return {"loss": self.loss, "n_rows": int(self.n_rows), "total_weight": self.total_weight}


class _Counted(_Base):
    """Per-output weighted counts (true positives, predicted, true) and the k of top-k."""

    _sums: tuple[str, ...] = ()

    def __init__(
        self, *, n_outputs: int, top_k: int = 5, output_names: Sequence[str] | None = None
    ) -> None:
        super().__init__(n_outputs=n_outputs, output_names=output_names)
        if int(top_k) < 1:
            raise InputError(f"top_k={top_k}: must be at least 1")
        self.top_k = min(int(top_k), self.n_outputs)
        self.tp = np.zeros(self.n_outputs)
        self.n_pred = np.zeros(self.n_outputs)
        self.n_true = np.zeros(self.n_outputs)
        for name in self._sums:
            setattr(self, name, 0.0)

    def merge(self, other: _Counted) -> _Counted:
        """Add the sums of ``other`` (a disjoint set of rows) into this one."""
        self._check_merge(other)
        for name in (*self._sums, "total_weight", "n_rows"):
            setattr(self, name, getattr(self, name) + getattr(other, name))
        self.tp += other.tp
        self.n_pred += other.n_pred
        self.n_true += other.n_true
        return self


class SoftmaxMetrics(_Counted):
    """Accuracy, top-k accuracy, log-loss, macro-F1 and the worst per-class recalls.

    Parameters
    ----------
    n_outputs : int
        Number of classes k.
    top_k : int
        The k of top-k accuracy (clipped to the number of classes).
    output_names : sequence of str, optional
        Class names, used in the worst-recall list.

    Notes
    -----
    Macro-F1 averages the per-class F1 ``2 tp / (n_pred + n_true)`` over the
    classes that occur among the true or the predicted labels, as
    ``sklearn.metrics.f1_score(average="macro")`` does with its default labels.
    The log-loss is ``logsumexp(z) - z_y`` computed from the scores directly
    (no clipping of probabilities). The prediction is the first arg-max.
    """

    loss = "softmax"
    _sums = ("correct", "topk_correct", "logloss_sum")

    def __init__(
        self, *, n_outputs: int, top_k: int = 5, output_names: Sequence[str] | None = None
    ) -> None:
        super().__init__(n_outputs=n_outputs, top_k=top_k, output_names=output_names)
        self.seen = np.zeros(self.n_outputs, dtype=bool)

    def update(
        self, block_scores: np.ndarray, targets: np.ndarray, weights: np.ndarray | None = None
    ) -> None:
        """Add one block.

        Parameters
        ----------
        block_scores : ndarray, shape (n_b, k)
            Raw class scores.
        targets : ndarray of int, shape (n_b,)
            True class ids in ``0..k-1``.
        weights : ndarray, shape (n_b,), optional
            Row weights.
        """
        k = self.n_outputs
        z = _scores(block_scores, k)
        y = np.asarray(targets).reshape(-1).astype(np.int64, copy=False)
        n = z.shape[0]
        if y.shape[0] != n:
            raise InputError(f"targets: {y.shape[0]} class ids for {n} rows of scores")
        if n and (y.min() < 0 or y.max() >= k):
            raise InputError(f"targets: class ids must lie in 0..{k - 1}")
        w = _weights(weights, n)
        rows = np.arange(n)
        zy = z[rows, y]
        zmax = z.max(axis=1) if n else np.zeros(0)
        lse = zmax + np.log(np.exp(z - zmax[:, None]).sum(axis=1))
        pred = np.argmax(z, axis=1) if n else np.zeros(0, dtype=np.int64)
        # true class among the top k <=> fewer than k classes score strictly higher
        higher = (z > zy[:, None]).sum(axis=1)
        hit = pred == y
        self.correct += float(w @ hit)
        self.topk_correct += float(w @ (higher < self.top_k))
        self.logloss_sum += float(w @ (lse - zy))
        self.tp += np.bincount(y, weights=w * hit, minlength=k)
        self.n_pred += np.bincount(pred, weights=w, minlength=k)
        self.n_true += np.bincount(y, weights=w, minlength=k)
        self.seen[y] = True
        self.seen[pred] = True
        self.n_rows += n
        self.total_weight += float(w.sum())

    def merge(self, other: SoftmaxMetrics) -> SoftmaxMetrics:
        """Add the sums of ``other`` (a disjoint set of rows) into this one."""
        super().merge(other)
        self.seen |= other.seen
        return self

    def per_class_recall(self) -> np.ndarray:
        """Recall per class, shape (k,); NaN for classes without true rows."""
        rec = np.full(self.n_outputs, np.nan)
        np.divide(self.tp, self.n_true, out=rec, where=self.n_true > 0)
        return rec

    def result(self) -> dict[str, Any]:
        """Return the metrics as a JSON-ready dict."""
        out = self._header()
        W = self.total_weight
        f1 = _safe_ratio(2.0 * self.tp, self.n_pred + self.n_true)
        rec = self.per_class_recall()
        have = np.flatnonzero(self.n_true > 0)
        worst = have[np.argsort(rec[have], kind="stable")][:WORST_CLASSES]
        out.update(
            accuracy=self.correct / W,
            top_k=self.top_k,
            top_k_accuracy=self.topk_correct / W,
            log_loss=self.logloss_sum / W,
            mean_loss=self.logloss_sum / W,
            macro_f1=float(f1[self.seen].mean()) if self.seen.any() else 0.0,
            n_classes_seen=int(self.seen.sum()),
            worst_class_recall=[
                {
                    "class": int(j),
                    "name": _name(self.output_names, int(j)),
                    "recall": float(rec[j]),
                    "support": float(self.n_true[j]),
                }
                for j in worst
            ],
        )
        return out


def _tag_entries(targets: Any, n: int, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Row and column ids of the tags of a block (CSR or dense 0/1), deduplicated."""
    if sp.issparse(targets):
        T = sp.csr_matrix(targets)
        if T.shape != (n, k):
            raise InputError(f"targets: tag matrix of shape {T.shape}, expected ({n}, {k})")
        T.sum_duplicates()
        T.eliminate_zeros()
        rows = np.repeat(np.arange(n), np.diff(T.indptr))
        return rows, T.indices.astype(np.int64)
    D = np.asarray(targets)
    if D.shape != (n, k):
        raise InputError(f"targets: tag matrix of shape {D.shape}, expected ({n}, {k})")
    rows, cols = np.nonzero(D)
    return rows, cols.astype(np.int64)


class MultilabelMetrics(_Counted):
    """Micro- and macro-F1 of the predicted tag sets, and precision@k.

    A tag is predicted when its score is positive (probability above 1/2).

    Parameters
    ----------
    n_outputs : int
        Number of tags k.
    top_k : int
        The k of precision@k (clipped to the number of tags).
    output_names : sequence of str, optional
        Tag names (kept for the caller; not used in the sums).

    Notes
    -----
    Macro-F1 averages the per-tag F1 over all k tags; a tag that is neither
    true nor predicted anywhere counts as 0, as with
    ``sklearn.metrics.f1_score(average="macro", zero_division=0)``.
    precision@k of a row is the number of its true tags among its k
    highest-scoring tags, divided by k; the reported value is its weighted mean.
    ``mean_loss`` is the training loss, ``sum_j log(1 + e^z_j) - y_j z_j``.
    """

    loss = "multilabel"
    _sums = ("patk_sum", "loss_sum")

    def update(
        self, block_scores: np.ndarray, targets: Any, weights: np.ndarray | None = None
    ) -> None:
        """Add one block.

        Parameters
        ----------
        block_scores : ndarray, shape (n_b, k)
            Raw tag scores (logits).
        targets : scipy sparse matrix or ndarray, shape (n_b, k)
            The true tags as a 0/1 matrix (a stored tag block is CSR of ones).
        weights : ndarray, shape (n_b,), optional
            Row weights.
        """
        k = self.n_outputs
        z = _scores(block_scores, k)
        n = z.shape[0]
        rows, cols = _tag_entries(targets, n, k)
        w = _weights(weights, n)
        z_at = z[rows, cols]
        w_at = w[rows]
        on = z > 0
        self.tp += np.bincount(cols, weights=w_at * (z_at > 0), minlength=k)
        self.n_pred += w @ on
        self.n_true += np.bincount(cols, weights=w_at, minlength=k)
        # precision@k: membership of each row's top-k columns in its tag set,
        # by matching flat keys row * k + col (both sides unique within a row)
        K = self.top_k
        if n:
            if K < k:
                top = np.argpartition(-z, K - 1, axis=1)[:, :K]
            else:
                top = np.broadcast_to(np.arange(k), (n, k))
            top_keys = (np.arange(n)[:, None] * k + top).ravel()
            hits = np.isin(top_keys, rows * k + cols).reshape(n, K).sum(axis=1)
            self.patk_sum += float(w @ hits) / K
            softplus = np.logaddexp(0.0, z).sum(axis=1)
            self.loss_sum += float(w @ softplus) - float(w_at @ z_at)
        self.n_rows += n
        self.total_weight += float(w.sum())

    def result(self) -> dict[str, Any]:
        """Return the metrics as a JSON-ready dict."""
        out = self._header()
        W = self.total_weight
        tp, npred, ntrue = self.tp.sum(), self.n_pred.sum(), self.n_true.sum()
        micro = 2.0 * tp / (npred + ntrue) if npred + ntrue > 0 else 0.0
        f1 = _safe_ratio(2.0 * self.tp, self.n_pred + self.n_true)
        out.update(
            micro_f1=float(micro),
            macro_f1=float(f1.mean()),
            micro_precision=float(tp / npred) if npred > 0 else 0.0,
            micro_recall=float(tp / ntrue) if ntrue > 0 else 0.0,
            top_k=self.top_k,
            precision_at_k=self.patk_sum / W,
            mean_loss=self.loss_sum / W,
        )
        return out


class SquaredMetrics(_Base):
    """RMSE and R², overall and per output.

    Parameters
    ----------
    n_outputs : int
        Number of outputs k.
    output_names : sequence of str, optional
        Output names, reported beside the per-output lists.

    Notes
    -----
    Per output j: ``rmse_j = sqrt(sum_i w_i (y_ij - z_ij)^2 / sum_i w_i)`` and
    ``r2_j = 1 - SS_res / SS_tot`` with the weighted total sum of squares about
    the weighted mean; an output with ``SS_tot = 0`` gets 1 if it is predicted
    exactly and 0 otherwise (scikit-learn's ``force_finite``). Overall,
    ``rmse = sqrt(mean_j rmse_j^2)`` (the square root of the mean squared error
    over all entries) and ``r2`` is the plain mean of the ``r2_j``
    (``multioutput="uniform_average"``). The weighted mean and ``SS_tot`` are
    combined across blocks with the pairwise update of Chan, Golub & LeVeque
    (1979), which stays accurate where ``sum w y^2 - (sum w y)^2 / W`` cancels.
    """

    loss = "squared"

    def __init__(
        self, *, n_outputs: int, top_k: int = 5, output_names: Sequence[str] | None = None
    ) -> None:
        super().__init__(n_outputs=n_outputs, output_names=output_names)
        k = self.n_outputs
        self.mean = np.zeros(k)
        self.m2 = np.zeros(k)
        self.sse = np.zeros(k)

    def _combine(self, wb: float, mb: np.ndarray, m2b: np.ndarray) -> None:
        W = self.total_weight + wb
        if W <= 0:
            return
        delta = mb - self.mean
        self.m2 += m2b + delta**2 * (self.total_weight * wb / W)
        self.mean += delta * (wb / W)

    def update(
        self, block_scores: np.ndarray, targets: np.ndarray, weights: np.ndarray | None = None
    ) -> None:
        """Add one block.

        Parameters
        ----------
        block_scores : ndarray, shape (n_b, k)
            Predicted values.
        targets : ndarray, shape (n_b, k)
            True values.
        weights : ndarray, shape (n_b,), optional
            Row weights.
        """
        k = self.n_outputs
        z = _scores(block_scores, k)
        n = z.shape[0]
        y = np.asarray(targets, dtype=np.float64)
        if y.ndim == 1 and k == 1:
            y = y[:, None]
        if y.shape != (n, k):
            raise InputError(f"targets: shape {y.shape}, expected ({n}, {k})")
        w = _weights(weights, n)
        wb = float(w.sum())
        self.sse += w @ (y - z) ** 2
        if wb > 0:
            mb = (w @ y) / wb
            m2b = w @ (y - mb) ** 2
            self._combine(wb, mb, m2b)
        self.n_rows += n
        self.total_weight += wb

    def merge(self, other: SquaredMetrics) -> SquaredMetrics:
        """Add the sums of ``other`` (a disjoint set of rows) into this one."""
        self._check_merge(other)
        if other.total_weight > 0:
            self._combine(other.total_weight, other.mean, other.m2)
        self.total_weight += other.total_weight
        self.n_rows += other.n_rows
        self.sse += other.sse
        return self

    def result(self) -> dict[str, Any]:
        """Return the metrics as a JSON-ready dict."""
        out = self._header()
        W = self.total_weight
        mse = self.sse / W
        # a constant output leaves only rounding in m2: treat a relative spread
        # below ~1e-13 of the mean as zero (common practice, no source)
        floor = (64 * np.finfo(np.float64).eps) ** 2 * W * np.maximum(self.mean**2, 1e-300)
        varies = self.m2 > floor
        r2 = np.where(self.sse == 0, 1.0, 0.0)
        np.subtract(1.0, self.sse / np.where(varies, self.m2, 1.0), out=r2, where=varies)
        out.update(
            rmse=float(np.sqrt(mse.mean())),
            r2=float(r2.mean()),
            mean_loss=float(0.5 * mse.sum()),
            rmse_per_output=np.sqrt(mse).tolist(),
            r2_per_output=r2.tolist(),
        )
        if self.output_names is not None:
            out["output_names"] = list(self.output_names)
        return out


# the accumulators by the name of the loss each one scores (its ``loss`` attribute)
_BY_LOSS: dict[str, type[_Base]] = {
    cls.loss: cls for cls in (SoftmaxMetrics, MultilabelMetrics, SquaredMetrics)
}


def make_metrics(
    loss: str, *, n_outputs: int, top_k: int = 5, output_names: Sequence[str] | None = None
) -> SoftmaxMetrics | MultilabelMetrics | SquaredMetrics:
    """Return the accumulator for ``loss`` (a name in :data:`ranktide.losses.LOSS_NAMES`)."""
    cls = _BY_LOSS.get(str(loss))
    if cls is None:
        raise InputError(f"loss {loss!r}: unknown; expected one of {', '.join(_BY_LOSS)}")
    return cls(n_outputs=n_outputs, top_k=top_k, output_names=output_names)  # type: ignore[return-value]
