"""Dense reference solver: accelerated proximal gradient with singular value thresholding.

This solver keeps the whole d×k weight matrix in memory and is meant for tests
and benchmarks only: it is an independent check on the greedy low-rank
solver. Its loss arithmetic is written here in numpy / ``scipy.special`` and
does not use the project's numba kernels.

Problem (DESIGN.md §2)::

    minimize  F(W, b) = (1 / sum_i w_i) * sum_i w_i * loss(W^T x_i + b; y_i) + lam * ||W||_*

References
----------
A. Beck and M. Teboulle, "A fast iterative shrinkage-thresholding algorithm for
linear inverse problems", SIAM J. Imaging Sciences 2(1), 2009 (FISTA with
backtracking).

K. Scheinberg, D. Goldfarb and X. Bai, "Fast first-order methods for composite
convex optimization with backtracking", Found. Comput. Math. 14, 2014 (the
step may also grow between iterations).

B. O'Donoghue and E. Candès, "Adaptive restart for accelerated gradient
schemes", Found. Comput. Math. 15, 2015 (gradient restart).

J.-F. Cai, E. J. Candès and Z. Shen, "A singular value thresholding algorithm
for matrix completion", SIAM J. Optimization 20(4), 2010 (the prox of the
nuclear norm).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.linalg
import scipy.sparse as sp
from ranktide.errors import ConfigError, InputError
from scipy.special import expit, log_expit, logsumexp

__all__ = [
    "ReferenceResult",
    "reference_solve",
    "lam_max_dense",
    "svt",
    "dense_objective",
    "dense_gradient",
    "best_intercept",
    "LOSSES",
]

LOSSES: tuple[str, ...] = ("softmax", "squared", "multilabel")

#: Largest d*k the reference accepts by default (dense float64 W, several copies).
MAX_DENSE_ENTRIES = 20_000_000
#: Largest number of stored entries of X the reference accepts by default.
MAX_NNZ = 200_000_000
# Floor on class frequencies for the closed-form intercept: a class that never
# occurs has an optimal intercept of -inf, which is not representable.
_FREQ_FLOOR = 1e-12
# Below this relative change of f, the sufficient-decrease test switches to gradients.
_PRECISE = 1e-9


@dataclass(frozen=True)
class ReferenceResult:
    """Result of :func:`reference_solve`.

    Attributes
    ----------
    W : ndarray, shape (d, k)
        Dense weight matrix.
    b : ndarray, shape (k,)
        Intercept (unpenalized).
    objective : float
        F(W, b) at the returned point.
    iterations : int
        Accelerated proximal gradient iterations taken.
    passes : int
        Evaluations of the smooth loss over the data (each gradient evaluation
        and each backtracking trial is one pass).
    status : str
        ``"converged"``, ``"max_iter"``, ``"time_limit"`` or ``"stopped"``
        (callback).
    message : str
        One line describing why the run ended.
    seconds : float
        Wall time of the run.
    residual : float
        Final estimated relative suboptimality (see :func:`reference_solve`).
    history : list of dict
        One record per iteration: ``iteration``, ``passes``, ``objective``,
        ``residual``, ``seconds``, ``L``.
    """

    W: np.ndarray
    b: np.ndarray
    objective: float
    iterations: int
    passes: int
    status: str
    message: str
    seconds: float
    residual: float
    history: list[dict[str, Any]] = field(default_factory=list)

    @property
    def singular_values(self) -> np.ndarray:
        """Singular values of ``W`` (descending), shape (min(d, k),)."""
        return _svd(self.W, compute_uv=False)

    def rank(self, *, rtol: float = 1e-8) -> int:
        """Number of singular values above ``rtol`` times the largest."""
        s = self.singular_values
        if s.size == 0 or s[0] == 0.0:
            return 0
        return int(np.count_nonzero(s > rtol * s[0]))


@dataclass(frozen=True)
class _Problem:
    """Validated, standardized problem data (private)."""

    X: Any  # scipy CSR (n, d) float64 or ndarray (n, d) float64
    Y: np.ndarray  # (n, k) float64: one-hot / values / tag indicators
    w: np.ndarray  # (n,) effective row weights, float64
    cw: np.ndarray | None  # (k,) per-output weights (squared / multilabel), or None
    wsum: float
    loss: str

    @property
    def shape(self) -> tuple[int, int, int]:
        return self.X.shape[0], self.X.shape[1], self.Y.shape[1]


# --------------------------------------------------------------------------- validation


def _standardize(
    X: Any,
    targets: Any,
    *,
    loss: str,
    weights: Any,
    class_weights: Any,
    n_outputs: int | None,
    max_dense_entries: int,
    max_nnz: int,
) -> _Problem:
    """Check and standardize the inputs of every public entry point."""
    if loss not in LOSSES:
        raise ConfigError(f"loss {loss!r}: unknown; use one of {', '.join(LOSSES)}")
    if sp.issparse(X):
        X = sp.csr_matrix(X, dtype=np.float64)
        X.sum_duplicates()
        vals = X.data
        nnz = X.nnz
    else:
        X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2:
            raise InputError(f"X: expected a 2-D matrix, got {X.ndim} dimension(s); pass n x d")
        vals = X
        nnz = X.size
    n, d = X.shape
    if not np.all(np.isfinite(vals)):
        raise InputError("X: holds NaN or infinite values; clean the data before solving")
    if n == 0:
        raise InputError("X: has no rows; pass at least one row")
    if nnz > max_nnz:
        raise ConfigError(
            f"X: {nnz} stored entries exceed the reference solver's limit of {max_nnz}; "
            "use ranktide.runs.train for problems this large"
        )
    Y = _targets_matrix(targets, loss=loss, n=n, n_outputs=n_outputs)
    k = Y.shape[1]
    if d * k > max_dense_entries:
        raise ConfigError(
            f"problem: d*k = {d}*{k} = {d * k} dense entries exceed the reference solver's "
            f"limit of {max_dense_entries}; use ranktide.runs.train for problems this large"
        )
    if weights is None:
        w = np.ones(n)
    else:
        w = np.asarray(weights, dtype=np.float64).reshape(-1)
        if w.shape != (n,):
            raise InputError(f"weights: length {w.size} does not match {n} rows of X")
        bad = np.flatnonzero(~np.isfinite(w) | (w < 0))
        if bad.size:
            raise InputError(
                f"weights: row {bad[0]} has weight {float(w[bad[0]])!r}; "
                "weights must be finite and >= 0"
            )
    cw = None
    if class_weights is not None:
        c = np.asarray(class_weights, dtype=np.float64).reshape(-1)
        if c.shape != (k,):
            raise InputError(f"class_weights: length {c.size} does not match {k} outputs")
        bad = np.flatnonzero(~np.isfinite(c) | (c < 0))
        if bad.size:
            raise InputError(
                f"class_weights: entry {bad[0]} is {float(c[bad[0]])!r}; class weights must be "
                "finite and >= 0"
            )
        if loss == "softmax":
            # A class weight scales the weight of every row of that class.
            w = w * c[np.argmax(Y, axis=1)]
        else:
            cw = c
    wsum = float(w.sum())
    if not wsum > 0:
        raise InputError("weights: all row weights are zero; give at least one row weight > 0")
    return _Problem(X=X, Y=Y, w=w, cw=cw, wsum=wsum, loss=loss)


def _targets_matrix(targets: Any, *, loss: str, n: int, n_outputs: int | None) -> np.ndarray:
    """Return the targets as a dense (n, k) float64 matrix."""
    if loss == "softmax":
        y = np.asarray(targets).reshape(-1)
        if y.shape != (n,):
            raise InputError(f"targets: {y.size} class ids for {n} rows of X; give one per row")
        if not np.issubdtype(y.dtype, np.integer):
            yf = y.astype(np.float64)
            if not np.all(np.isfinite(yf)) or np.any(yf != np.round(yf)):
                raise InputError("targets: class ids must be integers 0..k-1")
            y = yf.astype(np.int64)
        y = y.astype(np.int64)
        k = int(n_outputs) if n_outputs is not None else int(y.max()) + 1
        bad = np.flatnonzero((y < 0) | (y >= k))
        if bad.size:
            raise InputError(
                f"targets: row {bad[0]} has class id {y[bad[0]]}, outside 0..{k - 1}; "
                "fix the id or raise n_outputs"
            )
        if k < 2:
            raise InputError("targets: softmax needs at least 2 classes; pass n_outputs >= 2")
        Y = np.zeros((n, k))
        Y[np.arange(n), y] = 1.0
        return Y
    Y = targets.toarray() if sp.issparse(targets) else np.asarray(targets)
    Y = np.asarray(Y, dtype=np.float64)
    if Y.ndim == 1:
        Y = Y[:, None]
    if Y.ndim != 2 or Y.shape[0] != n:
        raise InputError(f"targets: shape {Y.shape} does not match {n} rows of X; give n x k")
    if n_outputs is not None and Y.shape[1] != n_outputs:
        raise InputError(f"targets: {Y.shape[1]} columns, but n_outputs is {n_outputs}")
    if not np.all(np.isfinite(Y)):
        raise InputError("targets: hold NaN or infinite values; clean the targets")
    if loss == "multilabel":
        bad = np.argwhere((Y != 0) & (Y != 1))
        if bad.size:
            i, j = bad[0]
            raise InputError(
                f"targets: row {i}, tag {j} is {float(Y[i, j])!r}; multilabel tags must be 0 or 1"
            )
    return Y


# --------------------------------------------------------------------------- loss math


def _scores(P: _Problem, W: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.asarray(P.X @ W) + b


def _loss_and_residual(P: _Problem, Z: np.ndarray, *, need_residual: bool):
    """Weighted mean loss f and the residual R (n, k) with grad_W f = X^T R."""
    Y, w = P.Y, P.w
    if P.loss == "softmax":
        lse = logsumexp(Z, axis=1)
        per_row = lse - np.einsum("ij,ij->i", Z, Y)
        f = float(w @ per_row) / P.wsum
        if not need_residual:
            return f, None
        D = np.exp(Z - lse[:, None]) - Y
    elif P.loss == "squared":
        D = Z - Y
        per = 0.5 * D * D
        if P.cw is not None:
            per = per * P.cw
        f = float(w @ per.sum(axis=1)) / P.wsum
        if not need_residual:
            return f, None
        if P.cw is not None:
            D = D * P.cw
    else:  # multilabel: log(1 + exp(z)) - y z = -log sigmoid(z) + (1 - y) z
        per = -log_expit(Z) + (1.0 - Y) * Z
        if P.cw is not None:
            per = per * P.cw
        f = float(w @ per.sum(axis=1)) / P.wsum
        if not need_residual:
            return f, None
        D = expit(Z) - Y
        if P.cw is not None:
            D = D * P.cw
    R = D * (w / P.wsum)[:, None]
    return f, R


def _smooth(P: _Problem, W: np.ndarray, b: np.ndarray, *, need_grad: bool):
    """Return f, grad_W f (d, k) and grad_b f (k,) (the last two None if not needed)."""
    Z = _scores(P, W, b)
    f, R = _loss_and_residual(P, Z, need_residual=need_grad)
    if not need_grad:
        return f, None, None
    GW = np.asarray(P.X.T @ R)
    Gb = R.sum(axis=0)
    return f, GW, Gb


def _svd(A: np.ndarray, *, compute_uv: bool):
    """numpy's thin SVD (LAPACK gesdd), or gesvd when gesdd does not converge.

    The reference keeps to numpy/scipy (no project kernels), so it has its own
    two-line fallback rather than :mod:`kernels.svd`.
    """
    try:
        return np.linalg.svd(A, full_matrices=False, compute_uv=compute_uv)
    except np.linalg.LinAlgError:
        return scipy.linalg.svd(A, full_matrices=False, compute_uv=compute_uv,
                                lapack_driver="gesvd")


def svt(A: np.ndarray, tau: float) -> tuple[np.ndarray, np.ndarray]:
    """Singular value thresholding: the prox of ``tau * ||.||_*`` at ``A``.

    Parameters
    ----------
    A : ndarray, shape (d, k)
    tau : float
        Threshold (>= 0).

    Returns
    -------
    W : ndarray, shape (d, k)
        U diag((s - tau)_+) V^T where A = U diag(s) V^T.
    s : ndarray, shape (r,)
        The thresholded singular values that are > 0 (descending).

    References
    ----------
    Cai, Candès and Shen (2010), Theorem 2.1.
    """
    U, s, Vt = _svd(A, compute_uv=True)
    keep = s > tau
    st = s[keep] - tau
    W = (U[:, keep] * st) @ Vt[keep]
    return W, st


def best_intercept(P: _Problem) -> np.ndarray:
    """Intercept minimizing f at W = 0 (closed form per loss), shape (k,)."""
    Y, w = P.Y, P.w
    p = (w @ Y) / P.wsum  # weighted mean target per output
    if P.loss == "softmax":
        lp = np.log(np.maximum(p, _FREQ_FLOOR))
        return lp - lp.mean()
    if P.loss == "squared":
        return p
    q = np.clip(p, _FREQ_FLOOR, 1.0 - _FREQ_FLOOR)
    return np.log(q) - np.log1p(-q)


# --------------------------------------------------------------------------- public helpers


def dense_objective(
    X: Any,
    targets: Any,
    W: np.ndarray,
    b: np.ndarray,
    *,
    loss: str,
    lam: float,
    weights: Any = None,
    class_weights: Any = None,
    n_outputs: int | None = None,
) -> float:
    """F(W, b) computed densely in numpy (an independent evaluation of the objective).

    Parameters
    ----------
    X : sparse or dense, shape (n, d)
    targets : class ids (n,), values (n, k) or tag indicators (n, k)
    W : ndarray, shape (d, k)
    b : ndarray, shape (k,)
    """
    W = np.asarray(W, dtype=np.float64)
    n_out = W.shape[1] if n_outputs is None else n_outputs
    P = _standardize(
        X, targets, loss=loss, weights=weights, class_weights=class_weights,
        n_outputs=n_out, max_dense_entries=MAX_DENSE_ENTRIES, max_nnz=MAX_NNZ,
    )
    f, _, _ = _smooth(P, W, np.asarray(b, dtype=np.float64), need_grad=False)
    return f + lam * float(_svd(W, compute_uv=False).sum())


def dense_gradient(
    X: Any,
    targets: Any,
    W: np.ndarray,
    b: np.ndarray,
    *,
    loss: str,
    weights: Any = None,
    class_weights: Any = None,
    n_outputs: int | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Gradient of the smooth part: (grad_W f (d, k), grad_b f (k,)), computed in numpy."""
    W = np.asarray(W, dtype=np.float64)
    n_out = W.shape[1] if n_outputs is None else n_outputs
    P = _standardize(
        X, targets, loss=loss, weights=weights, class_weights=class_weights,
        n_outputs=n_out, max_dense_entries=MAX_DENSE_ENTRIES, max_nnz=MAX_NNZ,
    )
    _, GW, Gb = _smooth(P, W, np.asarray(b, dtype=np.float64), need_grad=True)
    return GW, Gb


def lam_max_dense(
    X: Any,
    targets: Any,
    loss: str,
    *,
    weights: Any = None,
    class_weights: Any = None,
    n_outputs: int | None = None,
) -> float:
    """Smallest lam for which W = 0 is optimal: sigma_1 of grad_W f at (0, b0).

    b0 is the best intercept alone (closed form per loss). By the nuclear-norm
    subdifferential (Watson 1992), W = 0 is optimal iff ||G(0, b0)||_2 <= lam.

    Parameters
    ----------
    X : sparse or dense, shape (n, d)
    targets : class ids (n,), values (n, k) or tag indicators (n, k)
    loss : {"softmax", "squared", "multilabel"}

    Returns
    -------
    float
    """
    P = _standardize(
        X, targets, loss=loss, weights=weights, class_weights=class_weights,
        n_outputs=n_outputs, max_dense_entries=MAX_DENSE_ENTRIES, max_nnz=MAX_NNZ,
    )
    _, d, k = P.shape
    _, GW, _ = _smooth(P, np.zeros((d, k)), best_intercept(P), need_grad=True)
    return float(np.linalg.norm(GW, 2))


# --------------------------------------------------------------------------- the solver


def reference_solve(
    X: Any,
    targets: Any,
    *,
    loss: str,
    lam: float,
    weights: Any = None,
    class_weights: Any = None,
    n_outputs: int | None = None,
    tol: float = 1e-10,
    max_iter: int = 20_000,
    max_seconds: float | None = None,
    W0: np.ndarray | None = None,
    b0: np.ndarray | None = None,
    L0: float = 1.0,
    callback: Callable[[dict[str, Any]], bool | None] | None = None,
    max_dense_entries: int = MAX_DENSE_ENTRIES,
    max_nnz: int = MAX_NNZ,
) -> ReferenceResult:
    """Solve the trace-norm problem densely by accelerated proximal gradient.

    FISTA with backtracking (Beck & Teboulle 2009) in the variant whose step may
    also grow between iterations (Scheinberg, Goldfarb & Bai 2014), with
    gradient-based adaptive restart (O'Donoghue & Candès 2015). The prox of the
    nuclear norm is singular value thresholding (Cai, Candès & Shen 2010); the
    intercept is unpenalized and takes a plain gradient step.

    Parameters
    ----------
    X : scipy sparse matrix or ndarray, shape (n, d)
    targets : array
        softmax: class ids, shape (n,); squared: values, shape (n, k);
        multilabel: tag indicators in {0, 1}, shape (n, k) (dense or sparse).
    loss : {"softmax", "squared", "multilabel"}
    lam : float
        Penalty strength (>= 0).
    weights : ndarray, shape (n,), optional
        Row weights (>= 0); default all ones.
    class_weights : ndarray, shape (k,), optional
        softmax: multiplies the weight of each row by its class's weight;
        squared / multilabel: multiplies each output's loss term.
    n_outputs : int, optional
        Number of classes for softmax (default: largest class id + 1).
    tol : float
        Stop when the estimated relative suboptimality
        ``2 L ||x+ - y|| (||x+|| + 1) / max(|F|, 1e-300)`` is <= tol. Since the
        subgradient of F at the accepted point x+ has a member of norm
        <= 2 L ||x+ - y||, this bounds (F - F*) / F whenever ||x+ - x*|| <=
        ||x+|| + 1; it is an estimate, not a certificate.
    max_iter : int
        Iteration budget.
    max_seconds : float, optional
        Wall-time budget (status ``"time_limit"`` when hit).
    W0 : ndarray, shape (d, k), optional
        Starting weights (default 0).
    b0 : ndarray, shape (k,), optional
        Starting intercept (default: the best intercept at W = 0).
    L0 : float
        Initial Lipschitz estimate.
    callback : callable, optional
        Called after each iteration with the history record plus ``W`` and
        ``b``; returning True stops the run (status ``"stopped"``).
    max_dense_entries, max_nnz : int
        Size limits on d*k and nnz(X); larger problems raise ConfigError.

    Returns
    -------
    ReferenceResult
    """
    if not (np.isfinite(lam) and lam >= 0):
        raise ConfigError(f"lam = {lam!r}: must be a finite number >= 0")
    if not (tol > 0):
        raise ConfigError(f"tol = {tol!r}: must be > 0")
    if max_iter < 1:
        raise ConfigError(f"max_iter = {max_iter!r}: must be >= 1")
    P = _standardize(
        X, targets, loss=loss, weights=weights, class_weights=class_weights,
        n_outputs=n_outputs, max_dense_entries=max_dense_entries, max_nnz=max_nnz,
    )
    _, d, k = P.shape
    W = np.zeros((d, k)) if W0 is None else np.array(W0, dtype=np.float64)
    if W.shape != (d, k):
        raise ConfigError(f"W0: shape {W.shape} does not match (d, k) = ({d}, {k})")
    b = best_intercept(P) if b0 is None else np.array(b0, dtype=np.float64).reshape(-1)
    if b.shape != (k,):
        raise ConfigError(f"b0: length {b.size} does not match k = {k}")
    return _fista(P, W, b, lam=lam, tol=tol, max_iter=max_iter, max_seconds=max_seconds,
                  L=float(L0), callback=callback)


def _fista(P, W, b, *, lam, tol, max_iter, max_seconds, L, callback) -> ReferenceResult:
    t0 = time.perf_counter()
    passes = 0
    Wy, by = W.copy(), b.copy()
    t = 1.0
    F = _smooth(P, W, b, need_grad=False)[0] + lam * float(_svd(W, compute_uv=False).sum())
    passes += 1
    history: list[dict[str, Any]] = []
    status, message, res = "max_iter", f"iteration budget of {max_iter} reached", np.inf
    it = 0
    for it in range(1, max_iter + 1):
        fy, GW, Gb = _smooth(P, Wy, by, need_grad=True)
        passes += 1
        L_prev = L
        L = max(L * 0.8, 1e-12)  # let the step grow again (Scheinberg et al. 2014)
        while True:
            Wn, sn = svt(Wy - GW / L, lam / L)
            bn = by - Gb / L
            fn = _smooth(P, Wn, bn, need_grad=False)[0]
            passes += 1
            dW, db = Wn - Wy, bn - by
            sq = float(np.vdot(dW, dW) + db @ db)
            if sq == 0.0:
                break
            model = fy + float(np.vdot(GW, dW) + Gb @ db) + 0.5 * L * sq
            if abs(fn - fy) > _PRECISE * abs(fy):
                if fn <= model:
                    break
            else:
                # Near the optimum f(x+) - f(y) is lost to rounding; test the local
                # Lipschitz constant from gradients instead (as TFOCS does, Becker,
                # Candès & Grant 2011). Costs one more evaluation.
                _, GWn, Gbn = _smooth(P, Wn, bn, need_grad=True)
                passes += 1
                dg = float(np.vdot(GWn - GW, GWn - GW) + (Gbn - Gb) @ (Gbn - Gb))
                if dg <= L * L * sq:
                    break
            L *= 2.0
        Fn = fn + lam * float(sn.sum())
        scale = np.sqrt(float(np.vdot(Wn, Wn) + bn @ bn)) + 1.0
        res = 2.0 * L * np.sqrt(sq) * scale / max(abs(Fn), 1e-300)
        # Momentum (Scheinberg et al. 2014: t accounts for the change of step).
        t_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * (L / L_prev) * t * t))
        # Gradient restart (O'Donoghue & Candès 2015): the step points against the momentum.
        if float(np.vdot(Wy - Wn, Wn - W) + (by - bn) @ (bn - b)) > 0.0:
            t, t_next = 1.0, 1.0
        beta = (t - 1.0) / t_next
        Wy = Wn + beta * (Wn - W)
        by = bn + beta * (bn - b)
        W, b, F, t = Wn, bn, Fn, t_next
        rec = {"iteration": it, "passes": passes, "objective": F, "residual": res,
               "seconds": time.perf_counter() - t0, "L": L}
        history.append(rec)
        if res <= tol:
            status, message = "converged", (
                f"estimated relative suboptimality {res:.3g} <= tol {tol:.3g} after {it} iterations"
            )
            break
        if callback is not None and callback({**rec, "W": W, "b": b}):
            status, message = "stopped", f"stopped by the callback after {it} iterations"
            break
        if max_seconds is not None and rec["seconds"] > max_seconds:
            status, message = "time_limit", (
                f"time budget of {max_seconds:g} s reached after {it} iterations"
            )
            break
    return ReferenceResult(
        W=W, b=b, objective=F, iterations=it, passes=passes, status=status, message=message,
        seconds=time.perf_counter() - t0, residual=float(res), history=history,
    )
