"""The refinement when its n x k scores do not fit in memory: streamed over blocks.

:func:`ranktide.solver.refine.refine` keeps the n x k scores of its iterates to save
products; for data with many rows they do not fit. :func:`refine_streamed`
solves the same subproblem (DESIGN §7 step 3)::

    min over N (q x k), b   f(A N + b) + lam * ||N||_*

keeping only q x k iterates: every evaluation streams over the blocks of the
cached projections ``A = X Q`` (held in memory, or in scratch files written
by the gradient pass, see :class:`ScratchProjections`), forms one block's
scores ``A_b N + b``, its loss and residual ``R_b``, and adds ``A_b^T R_b``.
The scheme is accelerated proximal gradient with backtracking and singular
value thresholding (Beck & Teboulle 2009; Cai, Candès & Shen 2010) with a
function-value restart (O'Donoghue & Candès 2015) on the centered problem
(as :func:`ranktide.solver.refine.refine`: separate steps for N and the intercept),
started from ``L`` = curvature bound x largest eigenvalue of the weighted
covariance of ``A``, which one stream over the blocks gives. Peak memory:
one block's scores.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp
from ranktide.errors import ConfigError, StoreError
from ranktide.losses import get_loss
from ranktide.signals import StopRequested
from ranktide.solver.refine import _CURVATURE, RefineResult, _certificate, svt

__all__ = ["refine_streamed", "ScratchProjections", "MemoryProjections",
           "write_projection_block"]

_SHRINK = 1.25  # L shrinks by this factor before each step (then backtracking doubles it)


# ---------------------------------------------------------------- projection sources
class MemoryProjections:
    """Projection blocks held in memory: ``(XQ_b, targets_b, weights_b)`` triples."""

    def __init__(self, blocks: Sequence[tuple[np.ndarray, Any, np.ndarray | None]]) -> None:
        if not blocks:
            raise ConfigError("refine: no projection blocks; the pass kept none")
        self._blocks = list(blocks)

    def __iter__(self) -> Iterator[tuple[np.ndarray, Any, np.ndarray | None]]:
        return iter(self._blocks)

    @property
    def q(self) -> int:
        return int(self._blocks[0][0].shape[1])


class ScratchProjections:
    """Projection blocks written to a scratch directory, one ``.npz`` per block.

    Each file holds ``XQ`` (n_b x q float64), the block's targets (``y``,
    ``Y``, or ``tag_indptr``/``tag_indices``) and optionally ``w``; files are
    written with ``allow_pickle=False`` and read back the same way. The
    directory is the caller's (the solver makes one per pass and removes it).
    """

    def __init__(self, directory: str | os.PathLike, k: int) -> None:
        self.dir = Path(directory)
        self.k = int(k)
        self.files: list[Path] = []

    @classmethod
    def from_files(cls, paths: Sequence[str | os.PathLike], k: int) -> ScratchProjections:
        """The blocks that :func:`write_projection_block` wrote, in row order."""
        if not paths:
            raise ConfigError("refine: no scratch projection files; the pass wrote none")
        obj = cls(Path(paths[0]).parent, k)
        obj.files = [Path(p) for p in paths]
        return obj

    def add(self, start: int, XQ: np.ndarray, targets: Any, weights: np.ndarray | None) -> None:
        """Write one block (blocks must be added in row order)."""
        self.files.append(write_projection_block(self.dir, start, XQ, targets, weights))
        self._q = int(XQ.shape[1])

    def __iter__(self) -> Iterator[tuple[np.ndarray, Any, np.ndarray | None]]:
        for path in self.files:
            with np.load(path, allow_pickle=False) as z:
                XQ = z["XQ"]
                if "y" in z:
                    targets: Any = z["y"]
                elif "Y" in z:
                    targets = z["Y"]
                else:
                    ip, ix = z["tag_indptr"], z["tag_indices"]
                    targets = sp.csr_matrix((np.ones(ix.shape[0], np.float32), ix, ip),
                                            shape=(XQ.shape[0], self.k))
                w = z["w"] if "w" in z else None
            yield XQ, targets, w

    def nbytes(self) -> int:
        return int(sum(p.stat().st_size for p in self.files))

    def remove(self) -> None:
        """Delete the scratch files (and the directory when it is left empty)."""
        for p in self.files:
            p.unlink(missing_ok=True)
        self.files = []
        try:
            self.dir.rmdir()
        except OSError:
            pass


def write_projection_block(directory: str | os.PathLike, start: int, XQ: np.ndarray,
                           targets: Any, weights: np.ndarray | None) -> Path:
    """Write one block's projections, targets and weights to ``DIR/xq-START.npz``.

    Parameters
    ----------
    directory : path
        The scratch directory (created if missing).
    start : int
        The block's first row (names the file, so files sort in row order).
    XQ : (n_b, q) array
    targets : (n_b,) class ids, (n_b, k) values, or (n_b, k) sparse tags
    weights : (n_b,) raw row weights or None

    Returns
    -------
    Path
    """
    arrays: dict[str, np.ndarray] = {"XQ": np.ascontiguousarray(XQ, dtype=np.float64)}
    if sp.issparse(targets):
        T = sp.csr_matrix(targets)
        arrays["tag_indptr"] = T.indptr.astype(np.int64)
        arrays["tag_indices"] = T.indices.astype(np.int64)
    else:
        t = np.asarray(targets)
        arrays["y" if t.ndim == 1 else "Y"] = t
    if weights is not None:
        arrays["w"] = np.asarray(weights)
    d = Path(directory)
    path = d / f"xq-{int(start):012d}.npz"
    try:
        d.mkdir(parents=True, exist_ok=True)
        np.savez(path, **arrays)
    except OSError as exc:
        raise StoreError(f"{path}: cannot write the refinement's scratch file ({exc}); "
                         "free disk space or point the scratch directory elsewhere") from exc
    return path


# ---------------------------------------------------------------- streamed evaluations
@dataclass
class _Eval:
    f: float
    G: np.ndarray | None  # (q, k) A^T R
    gb: np.ndarray | None  # (k,)


class _Streamer:
    """Streams the blocks for loss values and gradients at ``(N, b)``."""

    def __init__(self, blocks: Iterable, loss: str, k: int,
                 class_weights: np.ndarray | None) -> None:
        self.blocks = blocks
        self.loss = get_loss(loss)
        self.k = k
        self.cw = class_weights
        self.evaluations = 0
        self.total = 0.0
        self.abar = np.zeros(0)  # weighted column means of A (set below)
        gram = None
        for XQ, targets, w in blocks:  # total weight and the Lipschitz Gram in one stream
            ww = self._weights(XQ.shape[0], targets, w)
            A1 = np.hstack([XQ, np.ones((XQ.shape[0], 1))])
            g = A1.T @ (A1 * ww[:, None])
            gram = g if gram is None else gram + g
            self.total += float(ww.sum())
        if not self.total > 0:
            raise ConfigError("refine: the row weights sum to zero; give some rows positive weight")
        self.gram = gram / self.total
        q = self.gram.shape[0] - 1
        self.abar = self.gram[:q, q].copy()
        # weighted covariance of A: the curvature of the centered problem in N
        self.cov = self.gram[:q, :q] - np.outer(self.abar, self.abar)

    def _weights(self, n: int, targets: Any, w: np.ndarray | None) -> np.ndarray:
        ww = np.ones(n) if w is None else np.asarray(w, dtype=np.float64)
        if self.cw is not None:
            ww = ww * np.asarray(self.cw, dtype=np.float64)[np.asarray(targets, dtype=np.int64)]
        return ww

    def centered(self, N: np.ndarray, c: np.ndarray, *, grad: bool) -> _Eval:
        """Loss (and gradients) of the centered problem ``(A - 1 abar^T) N + 1 c^T``."""
        e = self(N, c - N.T @ self.abar, grad=grad)
        if grad:
            e.G -= np.outer(self.abar, e.gb)
        return e

    def __call__(self, N: np.ndarray, b: np.ndarray, *, grad: bool) -> _Eval:
        self.evaluations += 1
        f = 0.0
        G = np.zeros_like(N) if grad else None
        gb = np.zeros(self.k) if grad else None
        for XQ, targets, w in self.blocks:
            Z = XQ @ N
            Z += b
            loss_sum, _, R = self.loss.value_residual(Z, targets, w, class_weights=self.cw,
                                                      out=Z, where="refinement block")
            f += loss_sum
            if grad:
                G += XQ.T @ R
                gb += R.sum(axis=0)
        inv = 1.0 / self.total
        if grad:
            G *= inv
            gb *= inv
        return _Eval(f * inv, G, gb)


def refine_streamed(
    blocks: Iterable[tuple[np.ndarray, Any, np.ndarray | None]],
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
    """Solve the refinement subproblem streaming over projection blocks.

    Parameters
    ----------
    blocks : iterable of (XQ_b, targets_b, weights_b), re-iterable
        :class:`MemoryProjections` or :class:`ScratchProjections`: ``XQ_b``
        (n_b, q) float64, the block's targets, raw row weights or None.
    loss : {"softmax", "squared", "multilabel"}
    lam : float
        Trace-norm penalty (> 0).
    N0 : (q, k) array
        Warm start.
    b0 : (k,) array
        Warm-start intercept.
    tol : float
        Relative tolerance on the subproblem's gap estimate (and on ``grad_b``).
    max_iter : int
        Maximum proximal steps.
    class_weights : (k,) array, optional
        Softmax only.
    check_every : int
        Steps between two certificate checks (each costs one extra stream).
    should_stop : callable, optional
        Checked before every step (:class:`ranktide.signals.StopRequested`).
    stall : float
        As in :func:`ranktide.solver.refine.refine`: also stop once the decrease over the
        last ``check_every`` steps is at most this fraction of the whole
        decrease so far (0 turns it off).

    Returns
    -------
    RefineResult
        As :func:`ranktide.solver.refine.refine`; ``evaluations`` counts streams.
    """
    if not lam > 0:
        raise ConfigError(f"refine: lam must be > 0, got {lam!r}")
    if int(max_iter) < 1:
        raise ConfigError(f"refine: max_iter must be >= 1, got {max_iter!r}")
    N0 = np.array(N0, dtype=np.float64, ndmin=2)
    b0 = np.array(b0, dtype=np.float64).reshape(-1)
    k = N0.shape[1]
    ev = _Streamer(blocks, loss, k, class_weights)
    # centered, as in ranktide.solver.refine: A N + 1 b^T = (A - 1 abar^T) N + 1 c^T with
    # c = b + N^T abar, so N and the intercept get step sizes of their own
    curv = _CURVATURE[loss]
    lmax = float(np.linalg.eigvalsh(ev.cov)[-1]) if ev.cov.size else 0.0
    Lc_max = curv * (1.0 + 1e-12)
    LN_max = max(curv * lmax * (1.0 + 1e-12), 1e-12 * Lc_max)
    ratio = Lc_max / LN_max
    L = LN_max
    Ux, sx, Bx = svt(N0, 0.0)
    N_x, c_x = N0.copy(), b0 + N0.T @ ev.abar
    f_x = ev.centered(N_x, c_x, grad=False).f
    F_x = f_x + lam * float(sx.sum())
    F_start = F_check = F_x
    N_p, c_p = N_x, c_x
    t, it = 1.0, 0
    gap_rel, gb_norm, converged = np.inf, np.inf, False
    while it < int(max_iter):
        if should_stop is not None and should_stop():
            raise StopRequested(f"stop requested at refinement step {it}")
        it += 1
        t_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * t * t))
        beta = (t - 1.0) / t_next
        N_y = N_x + beta * (N_x - N_p) if beta > 0 else N_x
        c_y = c_x + beta * (c_x - c_p) if beta > 0 else c_x
        e_y = ev.centered(N_y, c_y, grad=True)
        L = max(L / _SHRINK, 1e-12 * LN_max)
        while True:
            Lc = ratio * L
            Un, sn, Bn = svt(N_y - e_y.G / L, lam / L)
            N_n = (Un * sn) @ Bn.T
            c_n = c_y - e_y.gb / Lc
            f_n = ev.centered(N_n, c_n, grad=False).f
            dN, dc = N_n - N_y, c_n - c_y
            model = (e_y.f + float(np.sum(e_y.G * dN)) + float(e_y.gb @ dc)
                     + 0.5 * (L * float(np.sum(dN * dN)) + Lc * float(dc @ dc)))
            if f_n <= model or L >= LN_max:
                break
            L = min(2.0 * L, LN_max)
        F_n = f_n + lam * float(sn.sum())
        if F_n > F_x and beta > 0:  # function-value restart: retry from x without momentum
            t = 1.0
            N_p, c_p = N_x, c_x
            continue
        N_p, c_p = N_x, c_x
        N_x, c_x, f_x, F_x = N_n, c_n, f_n, F_n
        Ux, sx, Bx = Un, sn, Bn
        t = t_next
        if it % check_every == 0 or it >= int(max_iter):
            e_x = ev.centered(N_x, c_x, grad=True)
            gap_rel = _certificate(e_x.G, N_x, float(sx.sum()), F_x, lam)
            gb_norm = float(np.abs(e_x.gb).max())
            if gap_rel <= tol and gb_norm <= tol:
                converged = True
                break
            if stall > 0 and F_check - F_x <= stall * (F_start - F_x):
                converged = True
                break
            F_check = F_x
    b_x = c_x - N_x.T @ ev.abar
    return RefineResult(
        N=N_x, b=b_x, A=Ux, s=sx, B=Bx, objective=float(F_x), loss=float(f_x),
        iterations=it, converged=converged, gap_estimate=float(gap_rel),
        grad_b_norm=float(gb_norm), evaluations=ev.evaluations,
    )
