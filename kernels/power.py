"""Top singular pairs by randomized, warm-startable block power iteration.

Two-sided subspace iteration with Rayleigh–Ritz extraction (Halko, Martinsson
& Tropp 2011, Algorithm 4.4 with the Ritz step of §5.1; Saad, *Numerical
Methods for Large Eigenvalue Problems*, 2011, ch. 5): with a right block
``V`` (n x l, orthonormal)::

    Y = G V,  Q = orth(Y),  B = Q^T G = (G^T Q)^T,  B = Ub S Vb^T,
    u_j = Q Ub[:, j],  sigma_j = S[j],  v_j = Vb^T[j]

and the next block is ``Vb`` (refilled with random directions orthogonal to
it when a rank-revealing step dropped columns). Each ``sigma_j`` is a lower
bound of the j-th singular value of ``G`` (interlacing, since ``Q`` has
orthonormal columns). The accuracy estimate is the residual pair
``||G v_j - sigma_j u_j||`` (from the next product ``G V``) and
``||G^T u_j - sigma_j v_j||``; the iteration stops when the largest left
residual of the wanted pairs is ``<= tol * sigma_1``.

``orth`` must be rank-revealing: a plain QR of a rank-deficient block returns
spurious directions (DESIGN §7 step 2). :func:`orth_rank_revealing` takes a
Householder QR and then the SVD of its small triangular factor, and keeps only
the directions whose singular value is above ``tol`` times the largest.

``G`` is either a dense in-memory array (products through numpy's BLAS) or an
operator given by its two products ``matvec(V) = G @ V`` and
``rmatvec(Q) = G.T @ Q`` on blocks (for instance one pass over the data
each).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from .errors import KernelConfigError
from .svd import svd

BlockOp = Callable[[np.ndarray], np.ndarray]


def orth_rank_revealing(A: np.ndarray, tol: float = 1e-10, *, atol: float = 0.0) -> np.ndarray:
    """Orthonormal basis of the numerical range of ``A``, dependent columns dropped.

    Parameters
    ----------
    A : (m, c) array
    tol : float
        Relative drop tolerance: directions with singular value
        ``<= tol * sigma_max(A)`` are dropped.
    atol : float
        Absolute drop tolerance (directions with singular value ``<= atol``
        are dropped as well).

    Returns
    -------
    Q : (m, c') float64 with orthonormal columns, ``c' <= min(m, c)``
        Ordered by decreasing singular value of ``A``; ``c' = 0`` for a zero
        block.
    """
    A = np.asarray(A, dtype=np.float64)
    if A.ndim != 2:
        raise KernelConfigError(f"orth_rank_revealing: A must be 2-D, got shape {A.shape}")
    m, c = A.shape
    if c == 0 or m == 0:
        return np.zeros((m, 0))
    if not np.all(np.isfinite(A)):
        raise KernelConfigError("orth_rank_revealing: A has a non-finite entry")
    Q, R = np.linalg.qr(A)
    Ur, S, _ = svd(R)
    if S[0] <= 0.0:
        return np.zeros((m, 0))
    keep = S > max(tol * S[0], atol)
    return np.ascontiguousarray(Q @ Ur[:, keep])


def orth_against(A: np.ndarray, U: np.ndarray | None, tol: float = 1e-10) -> np.ndarray:
    """Orthonormal basis of ``(I - U U^T) A``, dependent columns dropped.

    Projects twice (classical Gram–Schmidt with reorthogonalization, Giraud
    et al. 2005) and drops directions whose norm after projection is at most
    ``tol`` times the largest column norm of ``A`` (so columns of ``A`` that
    lie in ``span(U)`` do not come back as noise).

    Parameters
    ----------
    A : (m, c) array
    U : (m, r) array with orthonormal columns, or None
    tol : float

    Returns
    -------
    Q : (m, c') float64, orthonormal columns, orthogonal to ``U``
    """
    A = np.array(A, dtype=np.float64)
    if A.ndim != 2:
        raise KernelConfigError(f"orth_against: A must be 2-D, got shape {A.shape}")
    if A.shape[1] == 0:
        return np.zeros((A.shape[0], 0))
    scale = float(np.max(np.linalg.norm(A, axis=0)))
    if U is not None and np.shape(U)[1]:
        U = np.asarray(U, dtype=np.float64)
        if U.shape[0] != A.shape[0]:
            raise KernelConfigError(
                f"orth_against: U has {U.shape[0]} rows but A has {A.shape[0]}; they must match"
            )
        for _ in range(2):
            A -= U @ (U.T @ A)
    return orth_rank_revealing(A, tol, atol=tol * scale)


@dataclass(frozen=True)
class PowerResult:
    """Top singular pairs of ``G`` (m x n) and their accuracy.

    Attributes
    ----------
    U : (m, t) float64, orthonormal left vectors
    sigma : (t,) float64, decreasing; lower bounds of the singular values
    V : (n, t) float64, orthonormal right vectors
    residual_left : (t,) float64, ``||G v_j - sigma_j u_j||``
    residual_right : (t,) float64, ``||G^T u_j - sigma_j v_j||``
    n_iter : int
        Rayleigh–Ritz steps taken; each cost one product ``G^T @ Q`` and one
        ``G @ V`` (``n_iter + 1`` products ``G @ V`` in all, counting the
        start).
    converged : bool
        ``max(residual_left) <= tol * sigma_1``.
    block : (n, l) float64
        The final right block (Ritz vectors first), to warm-start the next call.

    ``t = n_pairs`` unless ``G`` has numerical rank below ``n_pairs`` (then
    the pairs found; ``t = 0`` for ``G = 0``).
    """

    U: np.ndarray
    sigma: np.ndarray
    V: np.ndarray
    residual_left: np.ndarray
    residual_right: np.ndarray
    n_iter: int
    converged: bool
    block: np.ndarray

    @property
    def sigma1(self) -> float:
        """Largest singular value found (0.0 when ``G = 0``)."""
        return float(self.sigma[0]) if self.sigma.size else 0.0

    @property
    def relative_residual(self) -> float:
        """``max_j max(residuals_j) / sigma_1`` (0.0 when ``G = 0``)."""
        if not self.sigma.size or self.sigma[0] == 0.0:
            return 0.0
        res = np.maximum(self.residual_left, self.residual_right)
        return float(np.max(res) / self.sigma[0])


def _operator(G, matvec, rmatvec, shape) -> tuple[BlockOp, BlockOp, tuple[int, int]]:
    if G is not None:
        if matvec is not None or rmatvec is not None:
            raise KernelConfigError("top_singular_pairs: give either G or matvec/rmatvec, not both")
        if hasattr(G, "toarray") and not isinstance(G, np.ndarray):
            Gs = G.tocsr()  # scipy sparse: products through its own kernels
            return (lambda X: np.asarray(Gs @ X), lambda Y: np.asarray(Gs.T @ Y), Gs.shape)
        Gd = np.asarray(G, dtype=np.float64)
        if Gd.ndim != 2:
            raise KernelConfigError(f"top_singular_pairs: G must be 2-D, got shape {Gd.shape}")
        if not np.all(np.isfinite(Gd)):
            raise KernelConfigError("top_singular_pairs: G has a non-finite entry")
        return (lambda X: Gd @ X, lambda Y: Gd.T @ Y, Gd.shape)
    if matvec is None or rmatvec is None or shape is None:
        raise KernelConfigError("top_singular_pairs: give G, or matvec, rmatvec and shape=(m, n)")
    m, n = (int(v) for v in shape)
    return matvec, rmatvec, (m, n)


def _product(op: BlockOp, X: np.ndarray, rows: int, name: str) -> np.ndarray:
    Y = np.asarray(op(X), dtype=np.float64)
    if Y.shape != (rows, X.shape[1]):
        raise KernelConfigError(
            f"top_singular_pairs: {name} returned shape {Y.shape}, expected {(rows, X.shape[1])}"
        )
    if not np.all(np.isfinite(Y)):
        raise KernelConfigError(f"top_singular_pairs: {name} returned a non-finite entry")
    return Y


def _fill(V: np.ndarray, l: int, rng: np.random.Generator) -> np.ndarray:
    """Pad the orthonormal block ``V`` (n x c) to ``l`` columns with random
    directions orthogonal to it."""
    n = V.shape[0]
    for _ in range(3):
        need = l - V.shape[1]
        if need <= 0:
            break
        extra = orth_against(rng.standard_normal((n, need)), V)
        V = np.hstack([V, extra])
    return np.ascontiguousarray(V[:, :l])


def top_singular_pairs(
    G=None,
    *,
    matvec: BlockOp | None = None,
    rmatvec: BlockOp | None = None,
    shape: tuple[int, int] | None = None,
    n_pairs: int = 1,
    oversample: int = 4,
    max_iter: int = 100,
    tol: float = 1e-6,
    seed: int | np.random.Generator | None = None,
    warm_start: np.ndarray | None = None,
    drop_tol: float = 1e-12,
) -> PowerResult:
    """Top ``n_pairs`` singular triplets of ``G`` by block power iteration.

    Parameters
    ----------
    G : (m, n) array or scipy.sparse matrix, optional
        A dense (or sparse) in-memory matrix. Otherwise give ``matvec``,
        ``rmatvec`` and ``shape``.
    matvec : callable ``(n, c) -> (m, c)``
        ``X -> G @ X`` on a block of columns.
    rmatvec : callable ``(m, c) -> (n, c)``
        ``Y -> G.T @ Y``.
    shape : (m, n)
        Shape of the operator.
    n_pairs : int
        Number of singular pairs wanted (``1 <= n_pairs <= min(m, n)``).
    oversample : int
        Extra block columns (``>= 0``); the block has
        ``min(n_pairs + oversample, min(m, n))`` columns. Oversampling speeds
        convergence when singular values are clustered.
    max_iter : int
        Maximum Rayleigh–Ritz steps (``>= 1``).
    tol : float
        Stop when ``max_j ||G v_j - sigma_j u_j|| <= tol * sigma_1``.
    seed : int, Generator or None
        Normalized with ``numpy.random.default_rng``; draws the random start
        and refill columns.
    warm_start : (n, c) array, optional
        Right block to start from (for example the previous call's
        ``block``); orthonormalized, and padded with random columns.
    drop_tol : float
        Relative tolerance of the rank-revealing orthonormalization.

    Returns
    -------
    PowerResult

    References
    ----------
    N. Halko, P.-G. Martinsson and J. A. Tropp, "Finding structure with
    randomness", SIAM Review 53(2), 2011. Y. Saad, "Numerical Methods for
    Large Eigenvalue Problems", 2nd ed., SIAM, 2011.
    """
    mv, rmv, (m, n) = _operator(G, matvec, rmatvec, shape)
    if not (1 <= int(n_pairs) <= min(m, n)):
        raise KernelConfigError(
            f"top_singular_pairs: n_pairs={n_pairs} must be between 1 and min(m, n)={min(m, n)}"
        )
    if int(oversample) < 0 or int(max_iter) < 1 or not (tol > 0) or not (drop_tol > 0):
        raise KernelConfigError(
            "top_singular_pairs: need oversample >= 0, max_iter >= 1, tol > 0 and drop_tol > 0"
        )
    t = int(n_pairs)
    l = min(t + int(oversample), min(m, n))
    rng = np.random.default_rng(seed)
    if warm_start is not None:
        W0 = np.asarray(warm_start, dtype=np.float64)
        if W0.ndim != 2 or W0.shape[0] != n:
            raise KernelConfigError(
                f"top_singular_pairs: warm_start must have {n} rows, got shape {W0.shape}"
            )
        V = orth_rank_revealing(W0[:, :l], drop_tol)
    else:
        V = np.zeros((n, 0))
    V = _fill(V, l, rng)

    Y = _product(mv, V, m, "matvec")
    n_iter = 0
    empty = np.zeros(0)
    while True:
        Q = orth_rank_revealing(Y, drop_tol)
        if Q.shape[1] == 0:  # G V = 0: G = 0 (or a start in its null space)
            return PowerResult(np.zeros((m, 0)), empty, np.zeros((n, 0)), empty, empty,
                               n_iter, True, V)
        Z = _product(rmv, Q, n, "rmatvec")  # G^T Q = B^T
        Ub, S, Vbt = svd(Z.T)
        c = min(t, S.shape[0])
        U_r = Q @ Ub[:, :c]
        V_r = Vbt[:c].T
        res_right = np.linalg.norm(Z @ Ub[:, :c] - V_r * S[:c], axis=0)
        V = _fill(np.ascontiguousarray(Vbt.T), l, rng)
        Y = _product(mv, V, m, "matvec")
        n_iter += 1
        res_left = np.linalg.norm(Y[:, :c] - U_r * S[:c], axis=0)
        converged = bool(np.max(res_left) <= tol * S[0])
        if converged or n_iter >= max_iter:
            return PowerResult(np.ascontiguousarray(U_r), S[:c].copy(), np.ascontiguousarray(V_r),
                               res_left, res_right, n_iter, converged, V)
