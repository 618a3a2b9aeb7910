"""Losses over dense scores, loss dispatch, and the best intercept alone.

Each loss (DESIGN §2) is an object from :func:`get_loss` that evaluates, for a
block of dense scores ``Z = X W + b``, the weighted loss sum and the raw
weighted residual ``w * dloss/dz`` (not yet divided by the total weight, so a
pass can sum blocks before it knows the total):

=========== ==================== ========================================
loss        targets (kind)       loss(z; y)
=========== ==================== ========================================
softmax     class ids (classes)  logsumexp(z) - z_y
squared     values (values)      0.5 * sum_j (z_j - y_j)^2
multilabel  tags (tags)          sum_j log(1 + exp(z_j)) - y_j z_j
=========== ==================== ========================================

Class weights ``c`` (k,) apply to softmax only: a row's weight becomes
``w_i c_{y_i}`` and the total weight sums those (as in :mod:`kernels.products`).

:func:`intercept_from_sums` turns weighted target sums into the intercept that
minimizes ``f(0, b)``: log class frequencies (mean-centred), the weighted mean of
the values, or the logit of the tag frequencies
(:func:`ranktide.passes.intercept.best_intercept` streams the sums in one pass).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError, InputError
from ranktide.kernels import losses as kl

__all__ = ["Loss", "SoftmaxLoss", "SquaredLoss", "MultilabelLoss", "get_loss", "loss_for_kind",
           "LOSS_NAMES", "TARGET_KIND", "check_loss_source", "row_weights"]

#: frequencies are clipped to [FREQ_CLIP, 1 - FREQ_CLIP] before log / logit
FREQ_CLIP = 1e-9


def row_weights(n: int, weights: np.ndarray | None) -> np.ndarray:
    """Return the row weights of a block as float64 ``(n,)`` (ones if None)."""
    if weights is None:
        return np.ones(n, dtype=np.float64)
    return np.asarray(weights, dtype=np.float64)


class Loss(ABC):
    """One loss of DESIGN §2 and everything the rest of ranktide asks of it.

    Attributes
    ----------
    name : str
        ``"softmax"``, ``"squared"`` or ``"multilabel"``.
    target_kind : str
        The store's target kind it needs (``"classes"``, ``"values"``, ``"tags"``).
    names_key : str
        Key under which ``model.json`` lists the output names.
    curvature : float
        Bound on the second derivative of ``loss(z; y)`` along any unit direction
        of ``z`` (the Lipschitz constant of its gradient): 1/2 for softmax (the
        Hessian ``diag(p) - p p^T`` has norm <= 1/2), 1/4 for the logistic terms,
        1 for squared. The refinement's first step size comes from it.
    metric : str
        The validation metric that picks the best lam on a path.
    higher_is_better : bool
        Direction of ``metric``.
    has_probabilities : bool
        Whether scores map to probabilities.
    class_weights_ok : bool
        Whether per-class weights apply.
    quadratic : bool
        Whether the loss is a quadratic in the scores (a constant Hessian): its
        refinement then runs on sufficient statistics with the exact step (no
        n x k work per step, no stall test) and samples rows only on request.
    """

    name: str
    target_kind: str
    names_key: str
    curvature: float
    metric: str
    higher_is_better: bool
    has_probabilities: bool = True
    class_weights_ok: bool = False
    quadratic: bool = False

    def __repr__(self) -> str:
        return f"<loss {self.name}>"

    def check_class_weights_allowed(self) -> None:
        """Raise unless per-class weights apply to this loss."""
        if not self.class_weights_ok:
            raise ConfigError(f"class weights apply to the softmax loss only; drop them for "
                              f"loss {self.name!r}")

    @abstractmethod
    def residual_kernel(self, R: np.ndarray, targets: Any, w: np.ndarray | None,
                        loss: np.ndarray, gradb: np.ndarray, where: str) -> None:
        """Overwrite scores ``R`` (n, k) by the raw weighted residual; add the loss sum to
        ``loss[0]`` and the column sums of the residual to ``gradb`` (k,)."""

    @abstractmethod
    def target_sums(self, targets: Any, w: np.ndarray, k: int) -> np.ndarray:
        """Weighted sums (k,) of a block's targets (class counts, values, tag counts)."""

    @abstractmethod
    def intercept_link(self, mean: np.ndarray, clip: float = FREQ_CLIP) -> np.ndarray:
        """The best intercept alone from the weighted mean target (k,)."""

    @abstractmethod
    def mean_at(self, b: np.ndarray) -> np.ndarray:
        """The expected target (k,) at a constant score ``b`` (k,): a row's residual at
        ``W = 0`` is ``w_i (mean_at(b) - y_i)`` (the inverse link)."""

    @abstractmethod
    def probabilities(self, Z: np.ndarray, top: np.ndarray | None = None) -> np.ndarray:
        """Probabilities from all scores ``Z`` (n, k); of ``top`` (n, K) scores when given."""

    @abstractmethod
    def random_targets(self, rng: np.random.Generator, n: int, k: int) -> Any:
        """Invented targets of ``n`` rows and ``k`` outputs, as a store block holds them
        (for a tiny problem that loads the kernels before the memory floor is measured)."""

    @abstractmethod
    def predict(self, Z: np.ndarray) -> Any:
        """Predictions from scores ``Z`` (n, k): class ids (n,) int64, a CSR (n, k) indicator
        of the tags whose probability is >= 0.5, or the values (n, k) themselves."""

    @abstractmethod
    def refine_targets(self, Y: Any, n: int, k: int, where: str = "refine") -> Any:
        """The targets of ``n`` rows as the refinement's dense evaluators take them: int64
        class ids (n,), CSR tags (n, k) or float64 values (n, k); shapes checked."""

    @abstractmethod
    def dense_value_residual(self, Z: np.ndarray, Y: Any, w: np.ndarray, *,
                             want_residual: bool = True) -> tuple[float, np.ndarray | None]:
        """Weighted mean loss and residual of dense scores, in vectorized numpy.

        Parameters
        ----------
        Z : ndarray, shape (n, k)
            Scores (left unchanged).
        Y : ndarray
            Targets as :meth:`refine_targets` gives them, tags as a dense (n, k) array.
        w : ndarray, shape (n,)
            Row weights already divided by their total (they sum to 1).
        want_residual : bool
            Also return ``R = w_i * dloss/dz_i`` (n, k).

        Returns
        -------
        f : float
        R : ndarray, shape (n, k), or None
        """

    def fused_evaluators(self, Y: Any, w: np.ndarray) -> tuple[Callable, Callable]:
        """The fused kernels of :mod:`ranktide.kernels.losses` bound to targets and weights.

        Parameters
        ----------
        Y :
            Targets as :meth:`refine_targets` gives them.
        w : float64 C-contiguous ndarray, shape (n,)
            Row weights summing to 1 (the kernels' weighted sums are then means).

        Returns
        -------
        value : callable
            ``value(Z, out)``: adds the loss of scores ``Z`` (n, k) to ``out[0]``.
        residual : callable
            ``residual(Z, out, gb) -> R``: overwrites ``Z`` by the residual, adds
            the loss to ``out[0]`` and the residual's column sums to ``gb`` (k,).
        """
        raise ConfigError(f"loss {self.name!r}: refines from its sufficient statistics; it has "
                          "no score evaluators")

    def value_residual(
        self,
        scores: np.ndarray,
        targets: Any,
        weights: np.ndarray | None = None,
        *,
        class_weights: np.ndarray | None = None,
        out: np.ndarray | None = None,
        where: str = "scores",
    ) -> tuple[float, float, np.ndarray]:
        """Weighted loss sum, weight sum and raw weighted residual of a block.

        Parameters
        ----------
        scores : (n, k) float64 array
            ``X W + b`` for the block's rows.
        targets : (n,) int array, (n, k) float array or (n, k) sparse 0/1
            Class ids, values or tags (by the loss's target kind).
        weights : (n,) array, optional
            Raw row weights (ones when omitted).
        class_weights : (k,) array, optional
            Per-class weights (softmax only).
        out : (n, k) float64 array, optional
            Where to write the residual (may be ``scores`` itself, which is
            then overwritten); a new array by default.
        where : str
            Name of the data for error messages.

        Returns
        -------
        loss_sum : float
            ``sum_i w_i loss(z_i; y_i)`` (softmax: ``w_i c_{y_i}``).
        weight_sum : float
            The matching sum of row weights.
        residual : (n, k) float64 array
            ``w_i * dloss/dz_i`` for each row.
        """
        Z = np.asarray(scores, dtype=np.float64)
        if Z.ndim != 2:
            raise ConfigError(f"{where}: scores must be 2-D (n, k), got shape {Z.shape}")
        n, k = Z.shape
        if out is None:
            R = np.array(Z, dtype=np.float64, order="C", copy=True)
        else:
            R = out
            if R is not Z:
                R[...] = Z
        w = None if weights is None else np.asarray(weights, dtype=np.float64)
        if class_weights is not None:
            self.check_class_weights_allowed()
            y = np.asarray(targets, dtype=np.int32)
            w = kl.fold_class_weights(y, np.asarray(class_weights, dtype=np.float64), w,
                                      where=where)
        loss = np.zeros(1)
        gradb = np.zeros(k)
        self.residual_kernel(R, targets, w, loss, gradb, where)
        wsum = float(n) if w is None else float(np.sum(w))
        return float(loss[0]), wsum, R


class SoftmaxLoss(Loss):
    """Multinomial logistic loss over k classes: ``logsumexp(z) - z_y``."""

    name = "softmax"
    target_kind = "classes"
    names_key = "classes"
    curvature = 0.5
    metric = "accuracy"
    higher_is_better = True
    class_weights_ok = True

    def residual_kernel(self, R, targets, w, loss, gradb, where):
        kl.softmax_residual(R, np.asarray(targets, dtype=np.int32), w, loss, gradb, where=where)

    def target_sums(self, targets, w, k):
        return np.bincount(np.asarray(targets), weights=w, minlength=k).astype(np.float64)

    def intercept_link(self, mean, clip=FREQ_CLIP):
        # log frequencies, centred: softmax(b0) = freq, so grad_b f(0, b0) = 0
        b = np.log(np.clip(mean, clip, None))
        return b - b.mean()

    def mean_at(self, b):
        z = np.asarray(b, dtype=np.float64)
        e = np.exp(z - z.max())
        return e / e.sum()

    def probabilities(self, Z, top=None):
        zmax = Z.max(axis=1, keepdims=True)
        lse = zmax + np.log(np.exp(Z - zmax).sum(axis=1, keepdims=True))
        return np.exp((Z if top is None else top) - lse)

    def random_targets(self, rng, n, k):
        return rng.integers(0, k, n).astype(np.int32)

    def predict(self, Z):
        return np.argmax(Z, axis=1).astype(np.int64)

    def refine_targets(self, Y, n, k, where="refine"):
        y = np.asarray(Y).reshape(-1)
        if y.shape[0] != n:
            raise ConfigError(f"{where}: {y.shape[0]} class ids for {n} rows; give one per row")
        if y.size and (y.min() < 0 or y.max() >= k):
            raise ConfigError(
                f"{where}: class ids must lie in 0..{k - 1}; found {y.min()}..{y.max()}"
            )
        return y.astype(np.int64, copy=False)

    def dense_value_residual(self, Z, Y, w, *, want_residual=True):
        n = Z.shape[0]
        m = Z.max(axis=1, keepdims=True)
        E = np.exp(Z - m)
        se = E.sum(axis=1, keepdims=True)
        lse = m[:, 0] + np.log(se[:, 0])
        zy = Z[np.arange(n), Y]
        f = float(w @ (lse - zy))
        if not want_residual:
            return f, None
        E /= se
        E[np.arange(n), Y] -= 1.0
        E *= w[:, None]
        return f, E

    def fused_evaluators(self, Y, w):
        y = np.ascontiguousarray(Y, dtype=np.int64)
        return (lambda Z, out: kl.softmax_loss_only(Z, y, w, out),
                lambda Z, out, gb: kl.softmax_residual(Z, y, w, out, gb))


class SquaredLoss(Loss):
    """Half the squared error over k real outputs: ``0.5 ||z - y||^2``."""

    name = "squared"
    target_kind = "values"
    names_key = "outputs"
    curvature = 1.0
    metric = "rmse"
    higher_is_better = False
    has_probabilities = False
    quadratic = True

    def residual_kernel(self, R, targets, w, loss, gradb, where):
        kl.squared_residual(R, np.ascontiguousarray(targets, dtype=np.float64), w, loss, gradb,
                            where=where)

    def target_sums(self, targets, w, k):
        return w @ np.asarray(targets, dtype=np.float64)

    def intercept_link(self, mean, clip=FREQ_CLIP):
        return np.asarray(mean, dtype=np.float64)

    def mean_at(self, b):
        return np.asarray(b, dtype=np.float64)

    def probabilities(self, Z, top=None):
        raise ConfigError("model: the squared loss predicts values, not probabilities; "
                          "use predict()")

    def random_targets(self, rng, n, k):
        return rng.standard_normal((n, k)).astype(np.float32)

    def predict(self, Z):
        return Z

    def refine_targets(self, Y, n, k, where="refine"):
        if sp.issparse(Y):
            Y = Y.toarray()
        Y = np.asarray(Y, dtype=np.float64)
        if Y.shape != (n, k):
            raise ConfigError(f"{where}: targets have shape {Y.shape}, expected ({n}, {k})")
        return Y

    def dense_value_residual(self, Z, Y, w, *, want_residual=True):
        D = Z - Y
        f = float(0.5 * (w @ (D * D).sum(axis=1)))
        if not want_residual:
            return f, None
        D *= w[:, None]
        return f, D


class MultilabelLoss(Loss):
    """Independent logistic losses over k tags: ``sum_j log(1 + exp(z_j)) - y_j z_j``."""

    name = "multilabel"
    target_kind = "tags"
    names_key = "tags"
    curvature = 0.25
    metric = "micro_f1"
    higher_is_better = True

    def residual_kernel(self, R, targets, w, loss, gradb, where):
        T = sp.csr_matrix(targets)
        kl.multilabel_residual(R, T.indptr, T.indices, w, loss, gradb, where=where)

    def target_sums(self, targets, w, k):
        T = sp.csr_matrix(targets)
        return np.asarray(T.T @ w, dtype=np.float64).ravel()

    def intercept_link(self, mean, clip=FREQ_CLIP):
        p = np.clip(mean, clip, 1.0 - clip)
        return np.log(p) - np.log1p(-p)

    def mean_at(self, b):
        return 0.5 * (1.0 + np.tanh(0.5 * np.asarray(b, dtype=np.float64)))

    def probabilities(self, Z, top=None):
        # sigmoid, written to avoid overflow for large |z|
        return 0.5 * (1.0 + np.tanh(0.5 * (Z if top is None else top)))

    def random_targets(self, rng, n, k):
        return sp.csr_matrix((rng.random((n, k)) < 0.5).astype(np.float32))

    def predict(self, Z):
        # sigmoid(z) >= 0.5  <=>  z >= 0
        return sp.csr_matrix((Z >= 0.0).astype(np.float32))

    def refine_targets(self, Y, n, k, where="refine"):
        T = sp.csr_matrix(Y)
        if T.shape != (n, k):
            raise ConfigError(f"{where}: tags have shape {T.shape}, expected ({n}, {k})")
        return T

    def dense_value_residual(self, Z, Y, w, *, want_residual=True):
        # log(1 + exp(z)) - y z, written stably as logaddexp(0, z)
        f = float(w @ (np.logaddexp(0.0, Z) - Y * Z).sum(axis=1))
        if not want_residual:
            return f, None
        R = 0.5 * (1.0 + np.tanh(0.5 * Z))  # sigmoid without overflow
        R -= Y
        R *= w[:, None]
        return f, R

    def fused_evaluators(self, Y, w):
        T = sp.csr_matrix(Y)
        T.sum_duplicates()
        ip = T.indptr.astype(np.int64)
        ix = T.indices.astype(np.int64)
        return (lambda Z, out: kl.multilabel_loss_only(Z, ip, ix, w, out),
                lambda Z, out, gb: kl.multilabel_residual(Z, ip, ix, w, out, gb))


_LOSSES: dict[str, Loss] = {c.name: c() for c in (SoftmaxLoss, SquaredLoss, MultilabelLoss)}
#: the loss names, in the order the command line lists them
LOSS_NAMES: tuple[str, ...] = tuple(_LOSSES)
#: target kind each loss needs
TARGET_KIND: dict[str, str] = {name: loss.target_kind for name, loss in _LOSSES.items()}


def loss_for_kind(kind: str) -> Loss:
    """The loss that fits targets of ``kind`` (``classes``, ``values`` or ``tags``)."""
    for loss in _LOSSES.values():
        if loss.target_kind == kind:
            return loss
    raise ConfigError(f"target kind {kind!r}: unknown; expected one of "
                      f"{', '.join(TARGET_KIND.values())}")


def get_loss(name: str | Loss) -> Loss:
    """Return the loss called ``name`` (``softmax``, ``squared`` or ``multilabel``)."""
    if isinstance(name, Loss):
        return name
    loss = _LOSSES.get(name)
    if loss is None:
        raise ConfigError(f"loss {name!r}: unknown; choose one of {', '.join(LOSS_NAMES)}")
    return loss


def check_loss_source(loss: str, source: Any) -> Loss:
    """Check that ``source`` carries the targets ``loss`` needs; return the loss."""
    spec = get_loss(loss)
    kind = getattr(source, "target_kind", None)
    where = getattr(source, "path", None) or "in-memory source"
    if kind != spec.target_kind:
        raise InputError(
            f"{where}: holds targets of kind {kind!r} but loss {loss!r} needs "
            f"{spec.target_kind!r}; choose the loss that matches the targets or re-ingest"
        )
    return spec


def intercept_from_sums(loss: str, weight_total: float, sums: np.ndarray, *,
                        clip: float = FREQ_CLIP) -> np.ndarray:
    """The best intercept alone from weighted target sums (see :func:`best_intercept`)."""
    if not weight_total > 0:
        raise InputError("every row has weight 0; give some rows a positive weight")
    mean = np.asarray(sums, dtype=np.float64) / weight_total
    return get_loss(loss).intercept_link(mean, clip)
