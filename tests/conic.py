"""Test helper: the trace-norm problems solved by CVXPY with the Clarabel conic solver.

An independent reference for the solvers: CVXPY (Diamond & Boyd 2016) turns
the problem into exponential, second-order and semidefinite cones
(``cp.normNuc``), and Clarabel (Goulart & Chen 2024), an interior-point
solver, solves it. Keep problems small (n <= 300, d <= 40, k <= 8): each solve
should take a few seconds at most.

    F(W, b) = (1 / sum_i w_i) * sum_i w_i * loss(W^T x_i + b; y_i) + lam * ||W||_*
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import cvxpy as cp
import numpy as np
import scipy.sparse as sp

# Clarabel's own defaults are 1e-8; tighter settings make the reference
# accurate enough for 1e-7 relative comparisons (common practice, no source).
CLARABEL_OPTIONS = {
    "tol_gap_abs": 1e-10,
    "tol_gap_rel": 1e-10,
    "tol_feas": 1e-10,
    "max_iter": 400,
}


OBJECTIVE_SCALE = 10.0


@dataclass(frozen=True)
class ConicSolution:
    """Optimum found by CVXPY + Clarabel: W (d, k), b (k,), objective F*, solver status."""

    W: np.ndarray
    b: np.ndarray
    objective: float
    status: str

    @property
    def singular_values(self) -> np.ndarray:
        return np.linalg.svd(self.W, compute_uv=False)


def solve_conic(
    X,
    targets,
    *,
    loss: str,
    lam: float,
    weights=None,
    n_outputs: int | None = None,
    intercept: bool = True,
) -> ConicSolution:
    """Solve the problem with CVXPY + Clarabel.

    Parameters
    ----------
    X : scipy sparse or ndarray, shape (n, d)
    targets : class ids (n,) for softmax; (n, k) values or {0, 1} tags otherwise
    loss : {"softmax", "squared", "multilabel"}
    lam : float
    weights : ndarray, shape (n,), optional
    n_outputs : int, optional
        Number of classes (softmax).
    intercept : bool
        Fit an unpenalized intercept (otherwise b = 0).
    """
    Xd = X.toarray() if sp.issparse(X) else np.asarray(X, dtype=np.float64)
    n, d = Xd.shape
    if loss == "softmax":
        y = np.asarray(targets).astype(np.int64)
        k = int(n_outputs) if n_outputs is not None else int(y.max()) + 1
        Y = np.zeros((n, k))
        Y[np.arange(n), y] = 1.0
    else:
        Y = targets.toarray() if sp.issparse(targets) else np.asarray(targets, dtype=np.float64)
        Y = Y.reshape(n, -1).astype(np.float64)
        k = Y.shape[1]
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
    # Scale the objective by OBJECTIVE_SCALE * n (the optimum W, b does not change): with
    # weights normalized to sum 1 the coefficients are ~1/n and Clarabel stalls near 1e-7
    # gap on the exponential cones; at this scale it reaches ~1e-10 (measured, no source).
    scale = OBJECTIVE_SCALE * n
    wn = scale * w / w.sum()

    W = cp.Variable((d, k))
    b = cp.Variable(k) if intercept else cp.Constant(np.zeros(k))
    Z = Xd @ W + np.ones((n, 1)) @ cp.reshape(b, (1, k), order="C")
    if loss == "softmax":
        # logsumexp(z_i) - z_{i, y_i}, row by row
        f = wn @ cp.log_sum_exp(Z, axis=1) - cp.sum(cp.multiply(wn[:, None] * Y, Z))
    elif loss == "squared":
        f = 0.5 * cp.sum_squares(cp.multiply(np.sqrt(wn)[:, None], Z - Y))
    elif loss == "multilabel":
        # log(1 + exp(z)) - y z, elementwise
        f = cp.sum(cp.multiply(wn[:, None], cp.logistic(Z) - cp.multiply(Y, Z)))
    else:
        raise ValueError(f"unknown loss {loss!r}")
    constraints = []
    if loss == "softmax" and intercept:
        # softmax is invariant to b + c 1: pin the free direction so the optimum is unique
        constraints.append(cp.sum(b) == 0)
    prob = cp.Problem(cp.Minimize(f + scale * lam * cp.normNuc(W)), constraints)
    with warnings.catch_warnings():
        # "optimal_inaccurate" is reported in .status; the tests compare values directly
        warnings.simplefilter("ignore", UserWarning)
        prob.solve(solver=cp.CLARABEL, **CLARABEL_OPTIONS)
    bval = np.asarray(b.value, dtype=np.float64).reshape(k) if intercept else np.zeros(k)
    return ConicSolution(
        W=np.asarray(W.value, dtype=np.float64), b=bval, objective=float(prob.value) / scale,
        status=str(prob.status),
    )


def orthonormal_centred_design(n: int, d: int, seed: int, *, float32: bool = False) -> np.ndarray:
    """X (n, d) with X^T X = I and 1^T X = 0 (so the intercept decouples).

    ``float32=True`` rounds it to float32 values, which is what a store holds.
    """
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((n, d))
    A -= A.mean(axis=0)
    Q, _ = np.linalg.qr(A)
    return Q.astype(np.float32).astype(np.float64) if float32 else Q


def svt_numpy(A: np.ndarray, tau: float) -> np.ndarray:
    """Singular value thresholding in plain numpy (Cai, Candès & Shen 2010)."""
    U, s, Vt = np.linalg.svd(A, full_matrices=False)
    return (U * np.maximum(s - tau, 0.0)) @ Vt
