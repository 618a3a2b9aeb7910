"""Refinement of the model on cached projections ``X Q``.

Given an orthonormal basis ``Q`` (d x q) and the cached dense projections
``A = X Q`` (n x q), the solver re-optimizes

    min over N (q x k), b (k):  f(A N + 1 b^T) + lam * ||N||_*

which equals the full objective at ``W = Q N`` because ``||Q N||_* = ||N||_*``.
Nothing here touches the sparse data.

Method (chosen after measuring, see :func:`refine`): accelerated proximal
gradient (FISTA, Beck & Teboulle 2009) with singular value thresholding as the
prox of the trace norm (Cai, Candes & Shen 2010), function-value restart
(O'Donoghue & Candes 2015) and backtracking on the step (started from, and
capped by, a proven Lipschitz bound). For the squared loss the intercept is
eliminated in closed form and every step works on q x q / q x k sufficient
statistics only.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError
from ranktide.kernels import losses as kl
from ranktide.kernels.dense import add_row, extrapolate
from ranktide.kernels.svd import svd
from ranktide.signals import StopRequested

__all__ = ["RefineResult", "refine", "svt", "loss_and_residual"]

_SLACK = 0.0
# Score matrices with fewer entries than this use vectorized numpy instead of the fused
# parallel kernels. Measured on the shared 2-core machine (n = 3000, k = 50, q = 20): numpy
# 9 ms per step, the kernels 59 ms with 2 threads (their thread team stalls when the cores
# are shared) and 7 ms with 1; below ~1e6 entries the kernels' gain is not worth that risk.
_KERNEL_MIN_ENTRIES = 1_000_000
_SHRINK = 1.25
_LOSSES = ("softmax", "squared", "multilabel")
# Curvature bound of each loss in the scores: the Hessian of logsumexp is
# diag(p) - p p^T, whose largest eigenvalue is <= 1/2; sigmoid' <= 1/4;
# the squared loss has Hessian I (standard bounds, e.g. Boehning 1992 for softmax).
_CURVATURE = {"softmax": 0.5, "multilabel": 0.25, "squared": 1.0}


@dataclass(frozen=True)
class RefineResult:
    """Outcome of :func:`refine`.

    Attributes
    ----------
    N : ndarray, shape (q, k)
        Coefficients in the basis ``Q`` (the prox output, exactly low-rank).
    b : ndarray, shape (k,)
        Intercept.
    A : ndarray, shape (q, r)
        Left singular vectors of ``N`` with positive singular values.
    s : ndarray, shape (r,)
        The positive singular values of ``N``, descending.
    B : ndarray, shape (k, r)
        Right singular vectors of ``N``.
    objective : float
        ``f + lam * ||N||_*`` at ``(N, b)``.
    loss : float
        The smooth part ``f`` at ``(N, b)``.
    iterations : int
        Proximal steps taken (accepted or rejected by restart).
    converged : bool
        Whether a stopping test passed (the inner certificate reached ``tol``,
        or the decrease stalled, see :func:`refine`) before ``max_iter``.
    gap_estimate : float
        Relative inner gap estimate at the last check (conditional-gradient bound).
    grad_b_norm : float
        Infinity norm of the intercept gradient at the last check.
    evaluations : int
        Dense ``n x q x k`` products spent (0 for the squared loss).
    """

    N: np.ndarray
    b: np.ndarray
    A: np.ndarray
    s: np.ndarray
    B: np.ndarray
    objective: float
    loss: float
    iterations: int
    converged: bool
    gap_estimate: float
    grad_b_norm: float
    evaluations: int


# ---------------------------------------------------------------- helpers


def svt(M: np.ndarray, thresh: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Singular value thresholding: the prox of ``thresh * ||.||_*``.

    Parameters
    ----------
    M : ndarray, shape (q, k)
    thresh : float
        Non-negative threshold.

    Returns
    -------
    A : ndarray, shape (q, r)
    s : ndarray, shape (r,)
        ``max(sigma - thresh, 0)`` restricted to the positive ones.
    B : ndarray, shape (k, r)
        So that the prox is ``A @ diag(s) @ B.T`` (Cai, Candes & Shen 2010).
    """
    if M.size == 0:
        return np.zeros((M.shape[0], 0)), np.zeros(0), np.zeros((M.shape[1], 0))
    u, sig, vt = svd(M)
    shrunk = sig - thresh
    keep = shrunk > 0.0
    return u[:, keep], shrunk[keep], vt[keep].T


def _as_array(parts, name: str):
    if parts is None:
        return None
    if isinstance(parts, (list, tuple)):
        if len(parts) == 0:
            raise ConfigError(f"refine: {name} is an empty list; pass at least one block")
        if any(p is None for p in parts):
            if all(p is None for p in parts):
                return None
            raise ConfigError(
                f"refine: {name} mixes blocks with and without values; give all or none"
            )
        if sp.issparse(parts[0]):
            return sp.vstack(parts, format="csr")
        return np.concatenate([np.asarray(p) for p in parts], axis=0)
    return parts


def _dense_targets(Y, n: int, k: int, loss: str):
    """Targets as the loss needs them: int64 (n,), CSR tags (n, k) or float64 (n, k)."""
    if loss == "softmax":
        y = np.asarray(Y).reshape(-1)
        if y.shape[0] != n:
            raise ConfigError(f"refine: {y.shape[0]} class ids for {n} rows; give one per row")
        if y.size and (y.min() < 0 or y.max() >= k):
            raise ConfigError(
                f"refine: class ids must lie in 0..{k - 1}; found {y.min()}..{y.max()}"
            )
        return y.astype(np.int64, copy=False)
    if loss == "multilabel":
        T = sp.csr_matrix(Y)
        if T.shape != (n, k):
            raise ConfigError(f"refine: tags have shape {T.shape}, expected ({n}, {k})")
        return T
    if sp.issparse(Y):
        Y = Y.toarray()
    Y = np.asarray(Y, dtype=np.float64)
    if Y.shape != (n, k):
        raise ConfigError(f"refine: targets have shape {Y.shape}, expected ({n}, {k})")
    return Y


def loss_and_residual(
    Z: np.ndarray,
    Y: np.ndarray,
    w: np.ndarray,
    loss: str,
    *,
    want_residual: bool = True,
) -> tuple[float, np.ndarray | None]:
    """Weighted mean loss and residual of dense scores (vectorized numpy).

    Parameters
    ----------
    Z : ndarray, shape (n, k)
        Scores.
    Y : ndarray, shape (n,) int (softmax) or (n, k) float (squared, multilabel)
    w : ndarray, shape (n,)
        Row weights already divided by their total (they sum to 1).
    loss : {"softmax", "squared", "multilabel"}
    want_residual : bool
        Also return ``R = w_i * dloss/dz_i`` (n, k).

    Returns
    -------
    f : float
    R : ndarray, shape (n, k), or None
    """
    n = Z.shape[0]
    if loss == "softmax":
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
    if loss == "multilabel":
        # log(1 + exp(z)) - y z, written stably as logaddexp(0, z)
        f = float(w @ (np.logaddexp(0.0, Z) - Y * Z).sum(axis=1))
        if not want_residual:
            return f, None
        R = 0.5 * (1.0 + np.tanh(0.5 * Z))  # sigmoid without overflow
        R -= Y
        R *= w[:, None]
        return f, R
    D = Z - Y
    f = float(0.5 * (w @ (D * D).sum(axis=1)))
    if not want_residual:
        return f, None
    D *= w[:, None]
    return f, D


class _NumpyLoss:
    """Loss value and residual of dense scores in vectorized numpy (small problems)."""

    def __init__(self, loss: str, Y, w: np.ndarray, k: int) -> None:
        self.loss = loss
        self.Y = Y.toarray() if sp.issparse(Y) else Y
        self.w = w

    def value(self, Z: np.ndarray) -> float:
        return loss_and_residual(Z, self.Y, self.w, self.loss, want_residual=False)[0]

    def residual(self, Z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        f, R = loss_and_residual(Z, self.Y, self.w, self.loss)
        return f, R, R.sum(axis=0)

    @staticmethod
    def extrapolate(X: np.ndarray, P: np.ndarray, beta: float, out: np.ndarray) -> None:
        """``out = X + beta (X - P)`` (``out`` is neither ``X`` nor ``P``)."""
        np.subtract(X, P, out=out)
        out *= beta
        out += X

    @staticmethod
    def add_row(Z: np.ndarray, c: np.ndarray) -> None:
        Z += c


class _KernelLoss:
    """Loss value and residual of dense scores through the fused kernels of ``kernels.losses``.

    ``w`` sums to 1, so the kernels' weighted sums are the weighted means.
    """

    def __init__(self, loss: str, Y, w: np.ndarray, k: int) -> None:
        self.k = k
        self.w = np.ascontiguousarray(w, dtype=np.float64)
        if loss == "softmax":
            y = np.ascontiguousarray(Y, dtype=np.int64)
            self._value = lambda Z, out: kl.softmax_loss_only(Z, y, self.w, out)
            self._resid = lambda Z, out, gb: kl.softmax_residual(Z, y, self.w, out, gb)
        else:
            T = sp.csr_matrix(Y)
            T.sum_duplicates()
            ip = T.indptr.astype(np.int64)
            ix = T.indices.astype(np.int64)
            self._value = lambda Z, out: kl.multilabel_loss_only(Z, ip, ix, self.w, out)
            self._resid = lambda Z, out, gb: kl.multilabel_residual(Z, ip, ix, self.w, out, gb)

    def value(self, Z: np.ndarray) -> float:
        out = np.zeros(1)
        self._value(Z, out)
        return float(out[0])

    def residual(self, Z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        """Loss, residual (overwrites ``Z``) and its column sums."""
        out = np.zeros(1)
        gb = np.zeros(self.k)
        R = self._resid(Z, out, gb)
        return float(out[0]), R, gb

    @staticmethod
    def extrapolate(X: np.ndarray, P: np.ndarray, beta: float, out: np.ndarray) -> None:
        """``out = X + beta (X - P)`` in one fused pass."""
        extrapolate(X, P, beta, out)

    @staticmethod
    def add_row(Z: np.ndarray, c: np.ndarray) -> None:
        add_row(Z, c)


def _certificate(GN: np.ndarray, N: np.ndarray, nuc: float, F: float, lam: float) -> float:
    """Relative conditional-gradient gap bound of the subproblem (DESIGN section 2)."""
    if GN.size == 0:
        return 0.0
    sigma1 = float(np.linalg.norm(GN, 2))
    tau = F / lam
    gap = float(np.sum(GN * N)) + lam * nuc + tau * max(0.0, sigma1 - lam)
    return max(gap, 0.0) / max(abs(F), 1e-300)


def _blas_one_thread():
    """Limit BLAS to one thread for the refinement's thin products, when threadpoolctl exists.

    The products here are (n x q) by (q x k) with q of a few tens: measured on the 2-core
    machine shared with other processes, OpenBLAS's thread pool made each step 9x slower
    (66 ms against 7.4 ms for n = 3000, q = 20, k = 50) by spinning against the fused
    loss kernels' own threads; one BLAS thread leaves the cores to those kernels.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional: without it BLAS keeps its own setting
        return contextlib.nullcontext()
    return threadpool_limits(1, user_api="blas")


def _validate(A, N0, b0, lam, tol, max_iter, loss):
    if loss not in _LOSSES:
        raise ConfigError(f"refine: unknown loss {loss!r}; use one of {', '.join(_LOSSES)}")
    if not np.isfinite(lam) or lam <= 0:
        raise ConfigError(f"refine: lam must be a positive finite number, got {lam!r}")
    if not (tol > 0):
        raise ConfigError(f"refine: tol must be positive, got {tol!r}")
    if int(max_iter) < 1:
        raise ConfigError(f"refine: max_iter must be >= 1, got {max_iter!r}")
    if A.ndim != 2 or N0.ndim != 2 or N0.shape[0] != A.shape[1] or b0.shape != (N0.shape[1],):
        raise ConfigError(
            f"refine: shapes disagree: XQ {A.shape}, N0 {N0.shape}, b0 {b0.shape}; "
            "N0 must be (q, k) and b0 (k,)"
        )


# ---------------------------------------------------------------- main entry


def refine(
    XQ_blocks,
    targets,
    weights,
    loss: str,
    lam: float,
    N0: np.ndarray,
    b0: np.ndarray,
    *,
    tol: float,
    max_iter: int,
    class_weights: np.ndarray | None = None,
    check_every: int = 5,
    should_stop: Callable[[], bool] | None = None,
    stall: float = 0.0,
) -> RefineResult:
    """Solve the refinement ``min f(XQ N + b) + lam ||N||_*`` on cached projections.

    Parameters
    ----------
    XQ_blocks : list of ndarray (n_b, q), or ndarray (n, q)
        Cached projections ``X Q`` per row block (or already concatenated).
    targets : list or array
        Per block (or concatenated): int class ids (n_b,) for softmax, float
        values (n_b, k) for squared, 0/1 tags (n_b, k; dense or CSR) for multilabel.
    weights : list of ndarray (n_b,), ndarray (n,), or None
        Raw row weights (None: all ones). They are normalized by their total.
    loss : {"softmax", "squared", "multilabel"}
    lam : float
        Trace-norm penalty (> 0).
    N0 : ndarray, shape (q, k)
        Warm start (the current model expressed in ``Q``: ``[diag(s) V^T; 0]``).
    b0 : ndarray, shape (k,)
        Warm-start intercept.
    tol : float
        Relative inner tolerance on the subproblem's conditional-gradient gap
        estimate; the solver ties it to the current outer gap.
    max_iter : int
        Maximum number of proximal steps.
    class_weights : ndarray, shape (k,), optional
        Softmax only: row ``i`` weighs ``w_i * class_weights[y_i]``.
    check_every : int
        Steps between two certificate checks (each costs one extra ``n q k`` product).
    should_stop : callable, optional
        Checked before every step; when it returns True the refinement is
        abandoned with :class:`ranktide.signals.StopRequested`.
    stall : float
        Also stop when the decrease of F over the last ``check_every`` steps is
        at most this fraction of the decrease since the start (0: never; the
        solver passes 0.5, see ``ranktide.solver.greedy._INNER_STALL``). Softmax and
        multilabel only.

    Returns
    -------
    RefineResult

    Notes
    -----
    Choice of method: the objective is smooth + trace norm on a small q x k
    variable, but each gradient costs about ``2 n q k`` flops while the prox
    (an SVD of q x k) is negligible, so the method should need few gradients.
    FISTA with restart needs O(sqrt(L/mu) log(1/eps)) of them on these
    locally well-conditioned problems. The scores ``Z = A N + 1 b^T`` are cached
    for the last two iterates, so the extrapolated point's scores are a linear
    combination (no product), and each step costs one gradient product
    ``A^T R`` plus one score product for the backtracking test, whose loss value
    also drives the function-value restart. The iteration runs on the
    weighted-centered projections ``Ac = A - 1 abar^T`` with the intercept
    ``c = b + N^T abar`` (the same scores, the same ``N``): then the curvature
    bound is block diagonal, ``curv * diag(Ac^T W Ac, 1)`` (curv = 1/2 softmax,
    1/4 multilabel), and ``N`` and ``c`` get steps ``1/L`` and
    ``1/(L * ratio)`` with ``ratio = 1 / lambda_max(Ac^T W Ac)`` fixed by the
    bounds. Without centering one step served both and the intercept's
    eigenvalue (~1, against ~1e-3 for the ``A`` block on the benchmark problem)
    made ``N``'s step hundreds of times too short: measured on a refinement of
    the small solver benchmark (n = 5000, q = 88, k = 50, tol 1.9e-3) 140 steps
    became 15, with a lower objective. ``L`` is tried 1.25x smaller each step
    and doubled on a failed sufficient-decrease test, never above the bound.
    Measured before centering (n = 2000-5000, q = 12-20, k = 20-50, relative
    tol 1e-7): softmax needed 2.3-3x fewer products than the fixed bound step,
    multilabel 1.2-1.7x (the bound is loose once predictions are confident);
    growth factors 1.5 and 2 were no better. The sufficient-decrease test has no slack: a slack of
    even 1e-14 |f| let the step grow past the curvature near the optimum and
    the iterates wandered at the 1e-7 level, which stalls the certificate.
    The squared loss eliminates ``b`` exactly
    (``b = ybar - N^T abar``), then runs FISTA with the exact step
    ``1 / lambda_max(C)`` on the statistics ``C = A^T W A - abar abar^T`` and
    ``D = A^T W Y - abar ybar^T``: no ``n x k`` work per step.

    Stopping: every ``check_every`` steps, either the subproblem's own gap
    bound ``<G_N, N> + lam ||N||_* + (F / lam) max(0, ||G_N||_2 - lam)``
    (relative to F) is <= ``tol`` and ``||grad_b||_inf <= tol`` (common
    practice, no source, for the unpenalized intercept), or the refinement has
    stalled: the decrease of F over the last check interval is at most half of
    its decrease since the start (``stall``; off by default). The bound is loose (its last
    term dominates; measured: a bound of 1.9e-3 with the objective 2e-7 above
    the subproblem's optimum), and the outer loop gains nothing from a
    subproblem solved beyond its subspace's worth: with the stall test the
    solver benchmark reached its accuracy in fewer passes and less time. The
    outer certificate is computed in the pass independently of this test, so
    the optimum the solver converges to is unchanged.

    References
    ----------
    Beck & Teboulle (2009), A fast iterative shrinkage-thresholding algorithm.
    Cai, Candes & Shen (2010), A singular value thresholding algorithm.
    O'Donoghue & Candes (2015), Adaptive restart for accelerated gradient schemes.
    """
    A = np.ascontiguousarray(_as_array(XQ_blocks, "XQ_blocks"), dtype=np.float64)
    N0 = np.array(N0, dtype=np.float64, ndmin=2)
    b0 = np.array(b0, dtype=np.float64).reshape(-1)
    _validate(A, N0, b0, lam, tol, max_iter, loss)
    n, q = A.shape
    k = N0.shape[1]
    Y = _dense_targets(_as_array(targets, "targets"), n, k, loss)
    wraw = _as_array(weights, "weights")
    w = np.ones(n) if wraw is None else np.asarray(wraw, dtype=np.float64).reshape(-1)
    if w.shape[0] != n:
        raise ConfigError(f"refine: {w.shape[0]} weights for {n} rows; give one per row")
    if class_weights is not None:
        if loss != "softmax":
            raise ConfigError("refine: class_weights apply to the softmax loss only; drop them")
        w = w * np.asarray(class_weights, dtype=np.float64)[Y]
    total = float(w.sum())
    if not total > 0:
        raise ConfigError("refine: the row weights sum to zero; give some rows positive weight")
    w = w / total
    with _blas_one_thread():
        if loss == "squared":
            return _refine_squared(A, Y, w, lam, N0, b0, tol, int(max_iter), check_every,
                                   should_stop)
        return _refine_smooth(A, Y, w, loss, lam, N0, b0, tol, int(max_iter), check_every,
                              should_stop, float(stall))


def _lipschitz_bound(A: np.ndarray, w: np.ndarray, curvature: float) -> float:
    """``curvature * lambda_max([A, 1]^T diag(w) [A, 1])`` (w sums to 1)."""
    q = A.shape[1]
    M = np.empty((q + 1, q + 1))
    Aw = A * w[:, None]
    M[:q, :q] = A.T @ Aw
    M[:q, q] = M[q, :q] = Aw.sum(axis=0)
    M[q, q] = 1.0
    return curvature * float(np.linalg.eigvalsh(M)[-1]) * (1.0 + 1e-12)


def _check_stop(should_stop: Callable[[], bool] | None, it: int) -> None:
    if should_stop is not None and should_stop():
        raise StopRequested(f"stop requested at refinement step {it}")


def _centered(A: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted column means ``abar = A^T w`` and the centered copy ``A - 1 abar^T``."""
    abar = A.T @ w
    Ac = A - abar
    return Ac, abar


def _refine_smooth(A, Y, w, loss, lam, N0, b0, tol, max_iter, check_every,
                   should_stop=None, stall=0.0) -> RefineResult:
    # Work with centered projections: A N + 1 b^T = Ac N + 1 c^T with c = b + N^T abar.
    # The trace norm is untouched (same N) and the curvature bound becomes block diagonal,
    # c * diag(Ac^T W Ac, 1) (sum_i w_i ac_i = 0), so N and the intercept get steps of their
    # own; with the raw A the intercept's eigenvalue (about 1, against ~1e-3 for the A block)
    # set the one common step and N crawled.
    Ac, abar = _centered(A, w)
    curv = _CURVATURE[loss]
    q = A.shape[1]
    lmax = float(np.linalg.eigvalsh(Ac.T @ (Ac * w[:, None]))[-1]) if q else 0.0
    LN_max = curv * lmax * (1.0 + 1e-12)
    Lc_max = curv * (1.0 + 1e-12)
    LN_max = max(LN_max, 1e-12 * Lc_max)
    ratio = Lc_max / LN_max  # the intercept's step length is 1 / (ratio * L)
    n, k = A.shape[0], N0.shape[1]
    # tiny score matrices: the parallel kernels' start-up costs more than the arithmetic
    ev = (_KernelLoss if n * k >= _KERNEL_MIN_ENTRIES else _NumpyLoss)(loss, Y, w, k)
    L = LN_max
    Ux, sx, Bx = svt(N0, 0.0)
    N_x = N0.copy()
    c_x = b0 + N0.T @ abar
    # four n x k buffers, reused: scores of x, of the previous x, of the trial point, and
    # the residual (the extrapolated scores are formed in it and overwritten)
    bufs = [np.empty((n, k)) for _ in range(3)]
    R_buf = np.empty((n, k))
    Z_x = np.matmul(Ac, N_x, out=bufs[0])
    ev.add_row(Z_x, c_x)
    f_x = ev.value(Z_x)
    F_x = f_x + lam * float(sx.sum())
    F_start = F_check = F_x
    N_p, c_p, Z_p = N_x, c_x, Z_x
    t = 1.0
    evals = 1
    it = 0
    gap_rel, gb = np.inf, np.inf
    converged = False
    while it < max_iter:
        _check_stop(should_stop, it)
        it += 1
        t_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * t * t))
        beta = (t - 1.0) / t_next
        if beta > 0:
            N_y = N_x + beta * (N_x - N_p)
            c_y = c_x + beta * (c_x - c_p)
            ev.extrapolate(Z_x, Z_p, beta, R_buf)
        else:
            N_y, c_y = N_x, c_x
            np.copyto(R_buf, Z_x)
        Z_y = R_buf
        f_y, R, g_c = ev.residual(Z_y)  # Z_y becomes the residual
        G_N = Ac.T @ R
        evals += 1
        L = max(L / _SHRINK, 1e-12 * LN_max)
        while True:
            Lc = ratio * L
            Un, sn, Bn = svt(N_y - G_N / L, lam / L)
            N_n = (Un * sn) @ Bn.T
            c_n = c_y - g_c / Lc
            Z_n = np.matmul(Ac, N_n, out=next(b for b in bufs if b is not Z_x and b is not Z_p))
            ev.add_row(Z_n, c_n)
            evals += 1
            f_n = ev.value(Z_n)
            dN, dc = N_n - N_y, c_n - c_y
            model = (f_y + np.sum(G_N * dN) + g_c @ dc
                     + 0.5 * (L * np.sum(dN * dN) + Lc * (dc @ dc)))
            if f_n <= model + _SLACK * abs(f_y) or L >= LN_max:
                break
            L = min(2.0 * L, LN_max)
        F_n = f_n + lam * float(sn.sum())
        if F_n > F_x and beta > 0:
            # function-value restart: drop momentum, retry from x (monotone step)
            t = 1.0
            N_p, c_p, Z_p = N_x, c_x, Z_x
            continue
        N_p, c_p, Z_p = N_x, c_x, Z_x
        N_x, c_x, Z_x, f_x, F_x = N_n, c_n, Z_n, f_n, F_n
        Ux, sx, Bx = Un, sn, Bn
        t = t_next
        if it % check_every == 0 or it >= max_iter:
            np.copyto(R_buf, Z_x)
            _, R_x, gb_x = ev.residual(R_buf)
            evals += 1
            gap_rel = _certificate(Ac.T @ R_x, N_x, float(sx.sum()), F_x, lam)
            gb = float(np.abs(gb_x).max())
            if gap_rel <= tol and gb <= tol:
                converged = True
                break
            if stall > 0 and F_check - F_x <= stall * (F_start - F_x):
                converged = True
                break
            F_check = F_x
    return RefineResult(
        N=N_x, b=c_x - N_x.T @ abar, A=Ux, s=sx, B=Bx, objective=float(F_x), loss=float(f_x),
        iterations=it, converged=converged, gap_estimate=float(gap_rel),
        grad_b_norm=float(gb), evaluations=evals,
    )


def _refine_squared(A, Y, w, lam, N0, b0, tol, max_iter, check_every,
                    should_stop=None) -> RefineResult:
    abar = A.T @ w
    ybar = Y.T @ w
    Aw = A * w[:, None]
    C = A.T @ Aw - np.outer(abar, abar)
    D = Aw.T @ Y - np.outer(abar, ybar)
    c0 = float(w @ (Y * Y).sum(axis=1) - ybar @ ybar)
    L = float(np.linalg.eigvalsh(C)[-1]) * (1.0 + 1e-12) if C.size else 1.0
    L = max(L, 1e-300)

    def smooth(N):
        CN = C @ N
        return 0.5 * (float(np.sum(N * CN)) - 2.0 * float(np.sum(N * D)) + c0), CN - D

    Ux, sx, Bx = svt(N0, 0.0)
    N_x = N0.copy()
    f_x, _ = smooth(N_x)
    F_x = f_x + lam * float(sx.sum())
    N_p = N_x
    t = 1.0
    it = 0
    gap_rel = np.inf
    converged = False
    while it < max_iter:
        _check_stop(should_stop, it)
        it += 1
        t_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * t * t))
        beta = (t - 1.0) / t_next
        N_y = N_x + beta * (N_x - N_p) if beta > 0 else N_x
        _, G = smooth(N_y)
        Un, sn, Bn = svt(N_y - G / L, lam / L)
        N_n = (Un * sn) @ Bn.T
        f_n, G_n = smooth(N_n)
        F_n = f_n + lam * float(sn.sum())
        if F_n > F_x and beta > 0:
            t = 1.0
            N_p = N_x
            continue
        N_p, N_x, f_x, F_x, G_x = N_x, N_n, f_n, F_n, G_n
        Ux, sx, Bx = Un, sn, Bn
        t = t_next
        if it % check_every == 0 or it >= max_iter:
            gap_rel = _certificate(G_x, N_x, float(sx.sum()), F_x, lam)
            if gap_rel <= tol:
                converged = True
                break
    b = ybar - N_x.T @ abar
    # intercept exact => grad_b = 0 up to rounding; recompute the loss exactly from data-free
    # statistics (the trace form above equals the weighted mean squared loss at this b)
    return RefineResult(
        N=N_x, b=b, A=Ux, s=sx, B=Bx, objective=float(F_x), loss=float(f_x),
        iterations=it, converged=converged, gap_estimate=float(gap_rel),
        grad_b_norm=0.0, evaluations=0,
    )
