"""The solver's subspace step: a randomized, warm-started block power iteration.

One implementation (DESIGN section 7 step 2), used by :class:`ranktide.solver.greedy.GreedySolver`
and tested against numpy / scipy. Two-sided subspace iteration with Rayleigh-Ritz
extraction (Halko, Martinsson & Tropp 2011, Algorithm 4.4 with the Ritz step of
section 5.1; Saad, *Numerical Methods for Large Eigenvalue Problems*, 2011, ch. 5):

* matrix-free, one step per pass: the pass computes ``G [V, Omega]`` and
  ``G^T Psi``; :func:`sigma1_lower_bound` turns them into a lower bound of
  ``sigma_1(G)`` and :func:`next_blocks` into the next pass's ``Psi`` (rotations
  of the current atoms and new atoms) and ``Omega`` (random columns from the
  solver's seeded generator refill dropped ones, :func:`fill`);
* in memory (the dense-gradient path): :func:`top_singular_pairs` runs the same
  Ritz step (:func:`ritz_step`) in a loop on a dense ``G``, warm-started from the
  previous pass's block;
* at ``W = 0`` (the ``lam_max`` phase), :class:`KrylovUnion` keeps the products of
  every pass and takes the Rayleigh-Ritz value over their union: a block Krylov
  space grown across passes (Lanczos-style acceleration: the union of the
  power blocks of ``q`` passes spans ``span{B, G^T G B, ...}``), whose top Ritz
  value is never below the last block's.

The rank-revealing orthonormalizations live in :mod:`ranktide.kernels.power`
(re-exported here): a plain QR of a rank-deficient block returns spurious
directions and the estimate overshoots (DESIGN section 7).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from ranktide.kernels.errors import KernelConfigError
from ranktide.kernels.power import orth_against, orth_rank_revealing
from ranktide.kernels.svd import qr_tall, svd

__all__ = [
    "KrylovUnion",
    "dense_top_pairs",
    "PowerResult",
    "fill",
    "momentum_directions",
    "next_blocks",
    "orth_against",
    "orth_rank_revealing",
    "ritz_extend",
    "ritz_step",
    "sigma1_lower_bound",
    "top_left",
    "top_singular_pairs",
]


# ---------------------------------------------------------------- building blocks


def fill(M: np.ndarray, B: np.ndarray, want: int, rng: np.random.Generator,
         *, cap: int | None = None) -> np.ndarray:
    """``orth_against(M, B)`` (at most ``cap`` columns), topped up with random directions.

    Random columns (from the caller's seeded generator) replace dropped ones so
    the block keeps at least ``want`` columns while the dimension allows.

    Parameters
    ----------
    M : (m, c) block to orthonormalize
    B : (m, r) orthonormal columns to stay orthogonal to
    want : int
        Columns wanted (fewer only when ``m - r`` is smaller).
    rng : numpy.random.Generator
    cap : int, optional
        Most columns kept from ``M`` (default ``want``).

    Returns
    -------
    (m, c') float64, orthonormal, orthogonal to ``B``.
    """
    dim = M.shape[0]
    room = max(0, dim - B.shape[1])
    want = min(want, room)
    cap = min(room, want if cap is None else max(cap, want))
    Q = orth_against(M, B)[:, :cap]
    tries = 0
    while Q.shape[1] < want and tries < 5:
        extra = rng.standard_normal((dim, want - Q.shape[1]))
        R = orth_against(extra, np.hstack([B, Q]))
        Q = np.hstack([Q, R])
        tries += 1
    return Q


def top_left(M: np.ndarray, count: int, *, rtol: float = 1e-8) -> np.ndarray:
    """Top ``count`` left singular directions of ``M`` (d x c), negligible ones dropped."""
    if M.shape[1] == 0 or count <= 0:
        return np.zeros((M.shape[0], 0))
    Q, R = qr_tall(M)
    u, sv, _ = svd(R)
    if sv[0] <= 0:
        return np.zeros((M.shape[0], 0))
    keep = int(np.sum(sv > rtol * sv[0]))
    return Q @ u[:, : min(count, keep)]


def sigma1_lower_bound(G_VO: np.ndarray, Gt_Q: np.ndarray) -> float:
    """Rayleigh-Ritz lower bound on ``||G||_2`` from two products.

    ``||G B||_2 <= ||G||_2`` for orthonormal ``B`` (k x c) and ``||Q^T G||_2 <=
    ||G||_2`` for orthonormal ``Q`` (d x c): the largest of the two is returned.

    Parameters
    ----------
    G_VO : ndarray (d, c1)
        ``G [V, Omega]`` with ``[V, Omega]`` orthonormal.
    Gt_Q : ndarray (k, c2)
        ``G^T [U, Psi]`` with ``[U, Psi]`` orthonormal.
    """
    best = 0.0
    for M in (G_VO, Gt_Q):
        if M.size:
            if M.shape[0] > M.shape[1]:
                M = np.linalg.qr(M, mode="r")
            best = max(best, float(np.linalg.norm(M, 2)))
    return best


def momentum_directions(U_prev: np.ndarray, Q: np.ndarray, *, atol: float = 1e-9) -> np.ndarray:
    """Orthonormal directions of ``(I - Q Q^T) U_prev``: where the subspace last moved.

    ``U_prev`` (d x r') has orthonormal (unit) columns, so :func:`orth_against`'s
    relative drop tolerance is absolute here: directions whose residual is at
    most ``atol`` (no motion) are dropped. Returns (d, m), ``m <= r'``,
    orthogonal to ``Q``.
    """
    return orth_against(U_prev, Q, tol=atol)


def ritz_step(B: np.ndarray, GB: np.ndarray, *, drop_tol: float = 1e-8
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rayleigh-Ritz of ``G`` on ``span(B)`` from the product ``G B`` alone.

    ``B`` (n x c) need not be orthonormal: with ``B = P S W^T`` (thin SVD,
    directions with ``S <= drop_tol * S_max`` dropped), ``Q = P`` is an
    orthonormal basis and ``G Q = G B W S^-1``; the SVD ``G Q = Y Sigma Z^T``
    gives the Ritz values ``Sigma`` (each a lower bound of the matching
    singular value of ``G``, by interlacing) and right Ritz vectors ``Q Z``.

    Returns
    -------
    sigma : (c',) decreasing Ritz values
    R : (n, c') orthonormal right Ritz vectors
    GR : (m, c') ``G R`` (exact up to rounding: the products transform linearly)
    """
    m, n = GB.shape[0], B.shape[0]
    if B.shape[1] == 0:
        return np.zeros(0), np.zeros((n, 0)), np.zeros((m, 0))
    P, S, Wt = svd(B)
    if S[0] <= 0.0:
        return np.zeros(0), np.zeros((n, 0)), np.zeros((m, 0))
    keep = S > drop_tol * S[0]
    Q = P[:, keep]
    GQ = (GB @ Wt[keep].T) / S[keep]
    Y, sig, Zt = svd(GQ)
    return sig, Q @ Zt.T, Y * sig


def ritz_extend(Q: np.ndarray, AQ: np.ndarray, B: np.ndarray, AB: np.ndarray, cap: int, *,
                drop_tol: float = 1e-8) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`ritz_step` on ``span([Q, B])`` for an orthonormal ``Q``, in memory ~ ``(n + m) cap``.

    With ``A`` the operator (``AQ = A Q``, ``AB = A B``): ``B`` is projected off
    ``Q`` twice (classical Gram-Schmidt, "twice is enough") and its remainder
    ``B' = P S W^T`` (thin SVD of an ``n x b`` block, ``b`` small) gives the new
    orthonormal columns ``P`` with ``A P = (AB - AQ C) W S^-1``, ``C = Q^T B``.
    The Ritz vectors of ``A`` on ``[Q, P]`` are the eigenvectors ``Z`` of the
    small Gram matrix ``M^T M``, ``M = [AQ, AP]``, formed block by block, so no
    ``n x (a + b)`` or ``m x (a + b)`` copy is made; the kept ``cap`` columns are
    ``R = [Q, P] Z`` and ``A R = [AQ, AP] Z``, both exact linear transforms.
    The Ritz values are the column norms of ``A R``: each is ``||A r||`` for a
    unit ``r``, a lower bound of ``sigma_1(A)`` however the Gram matrix rounds.

    Parameters
    ----------
    Q : (n, a) float64, orthonormal columns (``a`` may be 0)
    AQ : (m, a) float64
    B : (n, b) float64
    AB : (m, b) float64
    cap : int
        Ritz vectors kept.

    Returns
    -------
    sigma : (c,) decreasing Ritz values, ``c <= cap``
    R : (n, c) orthonormal Ritz vectors
    AR : (m, c) ``A R``
    """
    a = Q.shape[1]
    C = Q.T @ B
    Bp = B - Q @ C
    C2 = Q.T @ Bp
    Bp -= Q @ C2
    C += C2
    scale = float(np.max(np.linalg.norm(B, axis=0))) if B.shape[1] else 0.0
    P, S, Wt = svd(Bp) if B.shape[1] else (Bp, np.zeros(0), np.zeros((0, 0)))
    keep = S > drop_tol * scale
    P = P[:, keep]
    AP = ((AB - AQ @ C) @ Wt[keep].T) / S[keep]
    M11, M12, M22 = AQ.T @ AQ, AQ.T @ AP, AP.T @ AP
    gram = np.block([[M11, M12], [M12.T, M22]])
    if gram.shape[0] == 0:
        return np.zeros(0), np.zeros((Q.shape[0], 0)), np.zeros((AQ.shape[0], 0))
    _, Z = np.linalg.eigh(gram)
    Z = Z[:, ::-1][:, :cap]
    R = Q @ Z[:a] + P @ Z[a:]
    AR = AQ @ Z[:a] + AP @ Z[a:]
    sig = np.linalg.norm(AR, axis=0)
    order = np.argsort(-sig, kind="stable")
    return sig[order], R[:, order], AR[:, order]


# ---------------------------------------------------------------- one step per pass


def next_blocks(*, U: np.ndarray, V: np.ndarray, G_VO: np.ndarray, Gt_Psi: np.ndarray,
                expand: int, n_rotations: int) -> tuple[np.ndarray, np.ndarray]:
    """The next pass's ``Psi`` and ``Omega`` from this pass's products (matrix-free).

    ``Psi`` gets the top ``n_rotations`` directions of the rotation block
    ``(I - U U^T) G V`` and the top ``expand`` directions of ``(I - U U^T) G
    Omega`` (new atoms), chosen separately: ranked together, the rotations
    (often a tenth of lam) lose every slot to the many complement directions
    near lam and the solver stalls (measured: relative gap stuck at 1e-2 with
    p = p' = 6 on a softmax problem, d = 200, k = 30). ``Omega`` is ``G^T Psi``
    (to be orthogonalized against the next ``V`` by :func:`fill` before the pass).

    Parameters
    ----------
    U : (d, r), V : (k, r) the model's factors at the pass
    G_VO : (d, r + p) ``G [V, Omega]``
    Gt_Psi : (k, p') ``G^T Psi``
    expand : int
        ``p'``, new-atom directions.
    n_rotations : int
        Rotation directions kept (``<= r``).

    Returns
    -------
    Psi : (d, c) orthonormal columns, c <= n_rotations + expand
    Omega : (k, p') the raw ``G^T Psi``
    """
    r = U.shape[1]
    if V.shape[1] != r or G_VO.shape[0] != U.shape[0] or G_VO.shape[1] < r \
            or Gt_Psi.shape[0] != V.shape[0]:
        raise KernelConfigError(
            f"next_blocks: U {U.shape}, V {V.shape}, G_VO {G_VO.shape} and Gt_Psi "
            f"{Gt_Psi.shape} disagree; expect (d, r), (k, r), (d, r + p), (k, p')")
    M = G_VO - U @ (U.T @ G_VO)
    rot, new = M[:, :r], M[:, r:]
    Psi = np.hstack([top_left(rot, n_rotations), top_left(new, expand)])
    return Psi, Gt_Psi.copy()


# ---------------------------------------------------------------- in memory


@dataclass(frozen=True)
class PowerResult:
    """Top singular pairs of a dense ``G`` (m x n) by :func:`top_singular_pairs`.

    Attributes
    ----------
    U : (m, t) orthonormal left vectors
    sigma : (t,) decreasing Ritz values (lower bounds of the singular values)
    V : (n, t) orthonormal right vectors
    residual : float
        ``max_j ||G^T u_j - sigma_j v_j|| / sigma_1`` of the returned pairs.
    n_iter : int
        Ritz steps taken (one product ``G @ B`` and one ``G.T @ Y`` each).
    converged : bool
        ``residual <= tol``.
    block : (n, l) the last right block, to warm-start the next call.
    """

    U: np.ndarray
    sigma: np.ndarray
    V: np.ndarray
    residual: float
    n_iter: int
    converged: bool
    block: np.ndarray

    @property
    def sigma1(self) -> float:
        """Largest singular value found (0.0 when ``G = 0``)."""
        return float(self.sigma[0]) if self.sigma.size else 0.0


def top_singular_pairs(G: np.ndarray, n_pairs: int, *, oversample: int = 4,
                       tol: float = 1e-10, max_iter: int = 300,
                       warm_start: np.ndarray | None = None,
                       seed: int | np.random.Generator | None = 0) -> PowerResult:
    """Top ``n_pairs`` singular triplets of a dense ``G`` by block power iteration.

    The in-memory loop of :func:`ritz_step` (Halko et al. 2011, Alg. 4.4): with
    the right block ``B`` (n x l, ``l = n_pairs + oversample``), one step forms
    ``G B``, its Ritz pairs, and the next block ``G^T Y`` from the left Ritz
    vectors ``Y``. It stops when the right residuals of the wanted pairs are
    below ``tol * sigma_1``.

    Parameters
    ----------
    G : (m, n) float array
    n_pairs : int
        ``1 <= n_pairs <= min(m, n)``.
    oversample : int
        Extra block columns (clustered values converge faster with more).
    tol : float
    max_iter : int
    warm_start : (n, c) array, optional
        Right block to start from (e.g. the previous call's ``block``); padded
        with random directions.
    seed : int or Generator
        ``numpy.random.default_rng`` seed of the random columns.
    """
    G = np.asarray(G, dtype=np.float64)
    if G.ndim != 2:
        raise KernelConfigError(f"top_singular_pairs: G must be 2-D, got shape {G.shape}")
    m, n = G.shape
    if not (1 <= int(n_pairs) <= min(m, n)):
        raise KernelConfigError(f"top_singular_pairs: n_pairs={n_pairs} must be between 1 and "
                                f"min(m, n)={min(m, n)}")
    if int(oversample) < 0 or int(max_iter) < 1 or not tol > 0:
        raise KernelConfigError("top_singular_pairs: need oversample >= 0, max_iter >= 1 and "
                                "tol > 0")
    if not np.all(np.isfinite(G)):
        raise KernelConfigError("top_singular_pairs: G has a non-finite entry")
    rng = np.random.default_rng(seed)
    t = int(n_pairs)
    width = min(t + int(oversample), min(m, n))
    start = np.zeros((n, 0))
    if warm_start is not None:
        W0 = np.asarray(warm_start, dtype=np.float64)
        if W0.ndim != 2 or W0.shape[0] != n:
            raise KernelConfigError(f"top_singular_pairs: warm_start must have {n} rows, got "
                                    f"shape {W0.shape}")
        start = W0[:, :width]
    B = fill(start, np.zeros((n, 0)), width, rng)
    it = 0
    while True:
        sig, R, GR = ritz_step(B, G @ B)
        it += 1
        # pairs with a negligible Ritz value are G's null space (a rank-deficient G)
        c = min(t, int(np.sum(sig > 1e-12 * sig[0]))) if sig.size and sig[0] > 0 else 0
        if c == 0:  # G B = 0: G = 0 (or a start in its null space)
            return PowerResult(np.zeros((m, 0)), np.zeros(0), np.zeros((n, 0)), 0.0, it,
                               True, B)
        Y = GR[:, :c] / sig[:c]
        GtY = G.T @ (GR / np.where(sig > 0, sig, 1.0))
        res = float(np.max(np.linalg.norm(GtY[:, :c] - R[:, :c] * sig[:c], axis=0)) / sig[0])
        if res <= tol or it >= max_iter:
            return PowerResult(np.ascontiguousarray(Y), sig[:c].copy(),
                               np.ascontiguousarray(R[:, :c]), res, it, res <= tol, R)
        B = fill(GtY, np.zeros((n, 0)), width, rng)


# ---------------------------------------------------------------- lam_max across passes


@dataclass
class KrylovUnion:
    """Products of ``G`` kept across passes; their Rayleigh-Ritz value bounds ``sigma_1``.

    ``R`` (k x c) right vectors with ``GR = G R`` (d x c); ``L`` (d x c') left
    vectors with ``GtL = G^T L`` (k x c'). :meth:`add` appends one pass's
    blocks and compresses each side to its top ``cap`` Ritz vectors (exact: a
    Ritz rotation of the products needs no new pass, :func:`ritz_extend`), so
    memory stays at ``(k + d) cap`` numbers per side, and an update needs about
    as much again (measured at d = 262144: the earlier SVD of the stacked
    ``d x (cap + p)`` blocks took 210 MiB more, past a 1 GB budget).
    """

    R: np.ndarray
    GR: np.ndarray
    L: np.ndarray
    GtL: np.ndarray

    @classmethod
    def empty(cls, d: int, k: int) -> KrylovUnion:
        return cls(np.zeros((k, 0)), np.zeros((d, 0)), np.zeros((d, 0)), np.zeros((k, 0)))

    def add(self, *, right: np.ndarray | None = None, g_right: np.ndarray | None = None,
            left: np.ndarray | None = None, gt_left: np.ndarray | None = None,
            cap: int) -> float:
        """Add ``right`` (k x c, with ``g_right = G right``) and ``left`` (d x c', with
        ``gt_left = G^T left``); return the Ritz lower bound of ``sigma_1`` over the union."""
        best = 0.0
        if right is not None and right.shape[1]:
            sig, self.R, self.GR = ritz_extend(self.R, self.GR, right, g_right, cap)
        elif self.R.shape[1]:
            sig = np.linalg.norm(self.GR, axis=0)
        else:
            sig = np.zeros(0)
        best = max(best, float(np.max(sig)) if sig.size else 0.0)
        if left is not None and left.shape[1]:
            sig, self.L, self.GtL = ritz_extend(self.L, self.GtL, left, gt_left, cap)
        elif self.L.shape[1]:
            sig = np.linalg.norm(self.GtL, axis=0)
        else:
            sig = np.zeros(0)
        return max(best, float(np.max(sig)) if sig.size else 0.0)


def dense_top_pairs(G: np.ndarray, count: int, warm: np.ndarray | None = None
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Top ``count`` singular triplets ``(U (d, c), sigma (c,), V (k, c))`` of a dense ``G``.

    A tall ``G`` (``d >= 8 k``, ``k <= 400``; hashed features by a few hundred
    outputs) takes the eigenvectors of the ``k x k`` Gram matrix ``G^T G`` as its
    right subspace and one Rayleigh-Ritz step on it (``Q = orth(G V)``, then the
    SVD of the small ``Q^T G``), so every singular value and vector is as
    accurate as a direct SVD's while the work is two ``d x k`` matrix products
    and a ``d x c`` QR instead of a full SVD of ``G`` (measured: 0.3 s against
    2.1 s for 262144 x 58 on this machine). Other small shapes use LAPACK, large
    ones the block power iteration of :func:`top_singular_pairs`, warm-started
    from ``warm``.
    """
    d, k = G.shape
    count = max(1, min(count, min(d, k)))
    if k <= 400 and d >= 8 * k:
        _, evecs = np.linalg.eigh(G.T @ G)
        V0 = evecs[:, ::-1][:, :count]
        Q, _ = qr_tall(G @ V0)
        ub, sv, vbt = svd(Q.T @ G)
        return Q @ ub[:, :count], sv[:count], vbt[:count].T
    if min(d, k) <= 400 or count >= min(d, k) - 1:
        u, sv, vt = svd(G)
        return u[:, :count], sv[:count], vt[:count].T
    res = top_singular_pairs(G, count, tol=1e-10, warm_start=warm, seed=0)
    return res.U, res.sigma, res.V

