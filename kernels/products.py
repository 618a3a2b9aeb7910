"""Fused per-block products of the solver pass (DESIGN §7 step 1).

For one CSR row block ``X`` (n_b x d) and the model ``W = U diag(s) V^T``,
intercept ``b``, expansion block ``Psi`` (d x p') and power block ``Omega``
(k x p), :func:`block_products` computes, in one sweep over ``X``::

    XQ     = X [U, Psi]                       (n_b x (r + p'), returned: the cached projections)
    scores = XQ[:, :r] diag(s) V^T + b        (n_b x k)
    R      = w_i * dloss/dz_i                 (in place of the scores, a row chunk at a time)

and accumulates into a :class:`ProductBuffers` (all UNNORMALIZED: sums with
the raw row weights; divide by ``weight_sum`` once all blocks are in)::

    loss_sum   += sum_i w_i loss_i
    weight_sum += sum_i w_i
    grad_b     += 1^T R                                   (k,)
    G_VO       += X^T (R [V, Omega])                      (d x (r + p))
    Gt_Psi     += R^T (X Psi)                             (k x p')
    Gt_U       += R^T (X U)                               (k x r)
    gw         += sum_j s_j (X u_j)^T R v_j               (<G, W>)
    G          += X^T R            (optional dense gradient, d x k)

The sparse sweeps are the numba kernels of :mod:`kernels.sparse` (CSR) or
:mod:`kernels.csc` (the block transposed once, faster on large blocks; same
results). The dense part (:func:`block_dense`) runs in row chunks of about
:data:`CHUNK_BYTES` of scores, so that each chunk's scores, residual and
products stay in the core's cache: per chunk ``S = XQ_U (diag(s) V^T)``
(numpy matmul, BLAS), ``S += b``, the fused loss/residual kernel of
:mod:`kernels.losses` (numba, in place), then ``S^T XQ`` and ``S [V, Omega]``
(BLAS). The chunks run side by side on a small pool, one BLAS thread each
(:mod:`kernels.rowchunks`), and their sums are added in chunk order, so the
result does not depend on the thread count. No Python loop runs over rows.

Precision: every product here is float64, float32 holds for none of them.
The scores feed the loss sum, the objective of the gap; ``R [V, Omega]`` and
``R^T X [U, Psi]`` give ``G [V, Omega]``, ``G^T U`` and ``G^T Psi``, whose
Rayleigh-Ritz values are the ``sigma_1`` lower bound (the stopping rule and
``lam_max``) and ``<G, W>`` (the gap) — even the ``Omega`` columns, which
otherwise only steer the power iteration. Near the optimum ``G`` is a
difference of larger per-row terms, so a float32 residual's error relative to
``G`` grows with that cancellation. Measured (softmax, n = 4000, d = 300,
k = 40, at the reference solver's optimum for lam = 0.5 and 0.1 lam_max): a
float32 ``R`` moved the ``sigma_1`` bound by 4e-8 relative and ``G [V, Omega]``
by 1e-7 to 2e-7 (per-row terms 4 to 9 times ``G``), against ~1e-16 in float64.
The saving would be small: float32 matmuls took the chunked dense part at rank
24 (k = 500, q = 78, 20k rows) from about 83 to 43 ms per block, under a tenth
of the pass.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import losses as _losses
from .conjugates import conjugate_sum
from .csc import BlockCSC, csc_matmul_dense, csc_t_matmul_accumulate
from .errors import KernelConfigError, KernelInputError
from .rowchunks import chunk_buffer, chunk_ranges, map_chunks
from .sparse import csr_matmul_dense, csr_t_matmul_accumulate

LOSSES = ("softmax", "squared", "multilabel")


def _as_f64_2d(name: str, a: np.ndarray | None, rows: int, cols: int | None = None) -> np.ndarray:
    if a is None:
        return np.zeros((rows, 0 if cols is None else cols))
    arr = np.asarray(a, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[0] != rows or (cols is not None and arr.shape[1] != cols):
        want = f"({rows}, {'any' if cols is None else cols})"
        raise KernelConfigError(f"block operands: {name} must have shape {want}, got {arr.shape}")
    return arr


@dataclass(frozen=True)
class BlockOperands:
    """Model-side operands of a pass, prepared once per pass.

    Attributes
    ----------
    Q : (d, r + p') float64, C order
        ``[U, Psi]``: one sweep over ``X`` gives both projections.
    SVt : (r, k) float64
        ``diag(s) V^T``.
    VO : (k, r + p) float64
        ``[V, Omega]``.
    s : (r,) float64
    V : (k, r) float64
    b : (k,) float64
    loss : str
        ``"softmax"``, ``"squared"`` or ``"multilabel"``.
    class_weights : (k,) float64 or None
        Softmax only: folded into the row weights (``w_i * cw[y_i]``).
    dual_scale : float
        ``c`` in [0, 1]: also sum the losses' conjugates at ``c`` times the
        residual (:mod:`kernels.conjugates`, for the duality gap); 0 skips it.
    """

    Q: np.ndarray
    SVt: np.ndarray
    VO: np.ndarray
    s: np.ndarray
    V: np.ndarray
    b: np.ndarray
    loss: str
    class_weights: np.ndarray | None = None
    dual_scale: float = 0.0

    @property
    def d(self) -> int:
        return self.Q.shape[0]

    @property
    def k(self) -> int:
        return self.b.shape[0]

    @property
    def r(self) -> int:
        return self.s.shape[0]

    @property
    def p_psi(self) -> int:
        return self.Q.shape[1] - self.r

    @property
    def p_omega(self) -> int:
        return self.VO.shape[1] - self.r


def prepare_operands(
    *,
    U: np.ndarray | None,
    s: np.ndarray | None,
    V: np.ndarray | None,
    b: np.ndarray,
    loss: str,
    Psi: np.ndarray | None = None,
    Omega: np.ndarray | None = None,
    class_weights: np.ndarray | None = None,
    n_cols: int | None = None,
) -> BlockOperands:
    """Check and pack the model-side operands of a pass.

    Parameters
    ----------
    U : (d, r) or None
        Left factor (None or r = 0 for the zero model; then ``n_cols`` is needed).
    s : (r,) or None
    V : (k, r) or None
    b : (k,)
    loss : {"softmax", "squared", "multilabel"}
    Psi : (d, p') or None
    Omega : (k, p) or None
    class_weights : (k,) or None
    n_cols : int, optional
        d, when neither U nor Psi gives it.

    Returns
    -------
    BlockOperands
    """
    if loss not in LOSSES:
        raise KernelConfigError(
            f"block operands: unknown loss {loss!r}; use one of {', '.join(LOSSES)}"
        )
    b = np.ascontiguousarray(b, dtype=np.float64)
    if b.ndim != 1 or b.shape[0] < 1:
        raise KernelConfigError(
            f"block operands: b must be a 1-D array of k >= 1 values, got {b.shape}"
        )
    k = b.shape[0]
    if n_cols is None:
        src = U if U is not None else Psi
        if src is None:
            raise KernelConfigError("block operands: give U, Psi or n_cols so that d is known")
        n_cols = np.shape(src)[0]
    d = int(n_cols)
    U2 = _as_f64_2d("U", U, d)
    r = U2.shape[1]
    s1 = np.zeros(0) if s is None else np.asarray(s, dtype=np.float64).reshape(-1)
    if s1.shape[0] != r:
        raise KernelConfigError(f"block operands: s has {s1.shape[0]} values but U has {r} columns")
    V2 = _as_f64_2d("V", V, k, r)
    Psi2 = _as_f64_2d("Psi", Psi, d)
    Om2 = _as_f64_2d("Omega", Omega, k)
    cw = None
    if class_weights is not None:
        if loss != "softmax":
            raise KernelConfigError("block operands: class weights apply to the softmax loss only")
        cw = np.asarray(class_weights, dtype=np.float64)
        if cw.shape != (k,):
            raise KernelConfigError(f"block operands: class_weights must have {k} values")
    return BlockOperands(
        Q=np.ascontiguousarray(np.hstack([U2, Psi2])),
        SVt=np.ascontiguousarray(s1[:, None] * V2.T),
        VO=np.ascontiguousarray(np.hstack([V2, Om2])),
        s=s1,
        V=np.ascontiguousarray(V2),
        b=b,
        loss=loss,
        class_weights=cw,
    )


@dataclass
class ProductBuffers:
    """Accumulators of one pass (unnormalized sums over the blocks seen).

    Attributes
    ----------
    loss_sum : (1,) float64       sum_i w_i loss_i
    weight_sum : (1,) float64     sum_i w_i
    n_rows : (1,) int64           rows seen
    grad_b : (k,) float64         1^T R
    G_VO : (d, r + p) float64     X^T R [V, Omega]
    Gt_Psi : (k, p') float64      R^T X Psi
    Gt_U : (k, r) float64         R^T X U
    gw : (1,) float64             sum_j s_j (X u_j)^T R v_j
    G : (d, k) float64 or None    X^T R (only when asked for)
    conj : (1,) float64           sum_i w_i loss*(c a_i) (``ops.dual_scale`` = c > 0)
    """

    loss_sum: np.ndarray
    weight_sum: np.ndarray
    n_rows: np.ndarray
    grad_b: np.ndarray
    G_VO: np.ndarray
    Gt_Psi: np.ndarray
    Gt_U: np.ndarray
    gw: np.ndarray
    G: np.ndarray | None = field(default=None)
    conj: np.ndarray = field(default_factory=lambda: np.zeros(1))

    @classmethod
    def zeros(cls, ops: BlockOperands, *, dense_G: bool = False,
              d_rows: bool = True) -> ProductBuffers:
        """Zeroed buffers shaped for ``ops`` (``d_rows=False``: no ``d x (r + p)``
        ``G_VO``, for a caller that keeps ``X^T (R [V, Omega])`` as a pending term)."""
        d, k, r = ops.d, ops.k, ops.r
        return cls(
            loss_sum=np.zeros(1),
            weight_sum=np.zeros(1),
            n_rows=np.zeros(1, dtype=np.int64),
            grad_b=np.zeros(k),
            G_VO=np.zeros((d if d_rows else 0, ops.VO.shape[1])),
            Gt_Psi=np.zeros((k, ops.p_psi)),
            Gt_U=np.zeros((k, r)),
            gw=np.zeros(1),
            G=np.zeros((d, k)) if dense_G else None,
        )

    def add(self, other: ProductBuffers) -> ProductBuffers:
        """In place ``self += other`` (combine partials in block order)."""
        for name in ("loss_sum", "weight_sum", "n_rows", "grad_b", "G_VO", "Gt_Psi", "Gt_U", "gw",
                     "conj"):
            getattr(self, name)[...] += getattr(other, name)
        if self.G is not None and other.G is not None:
            self.G += other.G
        return self


def _tags_arrays(targets) -> tuple[np.ndarray, np.ndarray]:
    if isinstance(targets, tuple) and len(targets) == 2:
        return targets[0], targets[1]
    if hasattr(targets, "indptr") and hasattr(targets, "indices"):
        return targets.indptr, targets.indices
    raise KernelInputError(
        "block targets: tags must be a scipy CSR matrix or an (indptr, indices) pair"
    )


def _check_buffers(bufs: ProductBuffers, ops: BlockOperands) -> None:
    want = {
        "grad_b": (ops.k,),
        "G_VO": (ops.d, ops.VO.shape[1]),
        "Gt_Psi": (ops.k, ops.p_psi),
        "Gt_U": (ops.k, ops.r),
    }
    for name, shape in want.items():
        if getattr(bufs, name).shape != shape:
            raise KernelConfigError(
                f"product buffers: {name} has shape {getattr(bufs, name).shape}, the operands "
                f"need {shape}; build them with ProductBuffers.zeros(ops)"
            )


# rows per dense chunk: the chunk's scores (rows x k float64) take about this many
# bytes, so that scores, residual and both products stay in the core's L2 cache
# (measured with tools/bench_pass.py --floors, k = 500: see the commit message)
CHUNK_BYTES = 1 << 20


def dense_chunk_rows(k: int, chunk_bytes: int | None = None) -> int:
    """Rows per dense chunk for ``k`` outputs (at least 8)."""
    cb = CHUNK_BYTES if chunk_bytes is None else int(chunk_bytes)
    return max(8, cb // (8 * max(int(k), 1)))


def block_projections(
    X,
    ops: BlockOperands,
    *,
    out_XQ: np.ndarray | None = None,
    csc: BlockCSC | None = None,
    where: str = "block",
    row_offset: int = 0,
) -> np.ndarray:
    """``XQ = X [U, Psi]`` for one block (sparse kernels).

    Parameters
    ----------
    X : scipy.sparse CSR matrix (n_b, d)
    ops : BlockOperands
    out_XQ : (n_b, r + p') float64, optional
        Caller-owned output (allocated when None).
    csc : BlockCSC, optional
        The block transposed by :func:`kernels.csc.block_csc` (same results).
    where : str
        Data source name (error messages).
    row_offset : int
        Index of the block's first row in the data source (0-based), so that
        messages name rows as the user counts them (from 1).

    Returns
    -------
    XQ : (n_b, r + p') float64
    """
    n, d = X.shape
    if d != ops.d:
        raise KernelInputError(
            f"{where}: block has {d} columns but the model has {ops.d}; "
            "use the model trained on this store's features"
        )
    if out_XQ is None:
        out_XQ = np.empty((n, ops.Q.shape[1]))
    if csc is not None:
        if csc.shape != (n, d):
            raise KernelConfigError(
                f"{where}: transposed block {csc.shape} is not the block {(n, d)}"
            )
        csc_matmul_dense(csc, ops.Q, out_XQ, where=where)
    else:
        csr_matmul_dense(X.indptr, X.indices, X.data, ops.Q, out_XQ, where=where,
                         row_offset=row_offset)
    return out_XQ


def _dense_out(name: str, a: np.ndarray | None, shape: tuple[int, int], where: str) -> None:
    if a is None:
        return
    if (
        not isinstance(a, np.ndarray)
        or a.dtype != np.float64
        or a.shape != shape
        or not a.flags.c_contiguous
        or not a.flags.writeable
    ):
        raise KernelConfigError(
            f"{where}: {name} must be a writable C-contiguous float64 array of shape {shape}, "
            f"got {getattr(a, 'dtype', type(a).__name__)} {getattr(a, 'shape', None)}"
        )


def block_dense(
    XQ: np.ndarray,
    targets,
    weights: np.ndarray | None,
    ops: BlockOperands,
    bufs: ProductBuffers,
    *,
    out_RVO: np.ndarray | None = None,
    out_R: np.ndarray | None = None,
    chunk_rows: int | None = None,
    workers: int | None = None,
    row_offset: int = 0,
    where: str = "block",
) -> None:
    """The dense part of a block: scores, loss, residual and their products.

    In row chunks (see the module docstring), accumulates into ``bufs``:
    ``loss_sum``, ``weight_sum``, ``n_rows``, ``grad_b``, ``Gt_U``,
    ``Gt_Psi``, ``gw`` and ``conj`` (not ``G_VO`` or ``G``: they need the
    sparse block, see :func:`block_products`).

    Parameters
    ----------
    XQ : (n_b, r + p') float64
        ``X [U, Psi]`` from :func:`block_projections`.
    targets, weights, ops, bufs, row_offset, where
        As in :func:`block_products`.
    out_RVO : (n_b, r + p) float64 C array, optional
        Receives ``R [V, Omega]`` (needed when ``[V, Omega]`` has columns).
    out_R : (n_b, k) float64 C array, optional
        Receives the residual ``R`` (unnormalized ``w_i dloss/dz_i``); when
        None the chunks work in per-thread buffers and ``R`` is not kept.
    chunk_rows : int, optional
        Rows per chunk (default :func:`dense_chunk_rows`). The results depend
        on it (the order of the sums), not on ``workers``.
    workers : int, optional
        Threads running the chunks (default :func:`kernels.rowchunks.default_workers`).
    """
    k, r, q, m = ops.k, ops.r, ops.Q.shape[1], ops.VO.shape[1]
    if (not isinstance(XQ, np.ndarray) or XQ.ndim != 2 or XQ.dtype != np.float64
            or XQ.shape[1] != q):
        raise KernelConfigError(f"{where}: XQ must be a 2-D float64 array of {q} columns, got "
                                f"{getattr(XQ, 'dtype', type(XQ).__name__)} "
                                f"{getattr(XQ, 'shape', None)}")
    n = XQ.shape[0]
    _dense_out("out_RVO", out_RVO, (n, m), where)
    _dense_out("out_R", out_R, (n, k), where)
    if m and out_RVO is None:
        raise KernelConfigError(f"{where}: out_RVO is needed for the {m} columns of [V, Omega]")
    w = weights
    if ops.class_weights is not None:
        w = _losses.fold_class_weights(targets, ops.class_weights, weights,
                                       row_offset=row_offset, where=where)
    tp = ti = None
    if ops.loss == "multilabel":
        tp, ti = _tags_arrays(targets)
    bufs.weight_sum[0] += float(n) if w is None else float(np.sum(w, dtype=np.float64))
    bufs.n_rows[0] += n
    if n == 0:
        return
    rows = dense_chunk_rows(k) if chunk_rows is None else max(1, int(chunk_rows))

    def chunk(ab: tuple[int, int]):
        a, e = ab
        S = out_R[a:e] if out_R is not None else chunk_buffer(e - a, k)
        if r:
            np.matmul(XQ[a:e, :r], ops.SVt, out=S)
            S += ops.b
        else:
            S[...] = ops.b
        loss = np.zeros(1)
        gb = np.zeros(k)
        wc = None if w is None else w[a:e]
        kw = {"row_offset": row_offset + a, "where": where}
        H = None
        if ops.loss == "softmax":
            tgt = targets[a:e]
            H = np.empty(e - a) if ops.dual_scale > 0.0 else None
            _losses.softmax_residual(S, tgt, wc, loss, gb, out_negent=H, **kw)
        elif ops.loss == "squared":
            tgt = targets[a:e]
            _losses.squared_residual(S, tgt, wc, loss, gb, **kw)
        else:
            tgt = (tp[a:e + 1], ti)
            _losses.multilabel_residual(S, tgt[0], ti, wc, loss, gb, **kw)
        conj = 0.0
        if ops.dual_scale > 0.0:
            conj = conjugate_sum(S, tgt, wc, ops.loss, ops.dual_scale, negentropy=H,
                                 where=where)
        T = S.T @ XQ[a:e] if q else None
        if m:
            np.matmul(S, ops.VO, out=out_RVO[a:e])
        return loss[0], gb, T, conj

    T = np.zeros((k, q))
    # folded as they come, in chunk order: the same sums for any thread count
    for loss, gb, Tc, conj in map_chunks(chunk, chunk_ranges(n, rows), workers=workers):
        bufs.loss_sum[0] += loss
        bufs.grad_b += gb
        bufs.conj[0] += conj
        if q:
            T += Tc
    if q:
        bufs.Gt_U += T[:, :r]
        bufs.Gt_Psi += T[:, r:]
        if r:
            bufs.gw[0] += float(ops.s @ np.einsum("kj,kj->j", T[:, :r], ops.V))


def block_products(
    X,
    targets,
    weights: np.ndarray | None,
    ops: BlockOperands,
    bufs: ProductBuffers,
    *,
    out_XQ: np.ndarray | None = None,
    scratch: np.ndarray | None = None,
    csc: BlockCSC | None = None,
    out_RVO: np.ndarray | None = None,
    chunk_rows: int | None = None,
    workers: int | None = None,
    row_offset: int = 0,
    where: str = "block",
) -> np.ndarray:
    """All per-block products of a solver pass; accumulates into ``bufs``.

    :func:`block_projections`, then :func:`block_dense`, then the sparse
    ``X^T (R [V, Omega])`` (and ``X^T R`` when ``bufs.G`` is kept).

    Parameters
    ----------
    X : scipy.sparse CSR matrix (n_b, d)
        The block (float32 or float64 data, int32 or int64 indices).
    targets
        softmax: (n_b,) int class ids; squared: (n_b, k) float values;
        multilabel: scipy CSR (n_b, k) tag matrix or an ``(indptr, indices)`` pair.
    weights : (n_b,) float or None
        Raw row weights (None: all ones).
    ops : BlockOperands
        From :func:`prepare_operands`, once per pass.
    bufs : ProductBuffers
        Accumulators, from ``ProductBuffers.zeros(ops)``.
    out_XQ : (n_b, r + p') float64, optional
        Caller-owned output for the projections (allocated when None).
    scratch : (>= n_b * k,) float64 C-contiguous, optional
        When given, it holds the block's residual ``R`` (unnormalized,
        ``w_i * dloss/dz_i``) on return: ``scratch[:n_b * k].reshape(n_b, k)``.
        Without it (and without ``bufs.G``) the residual lives only in
        cache-sized chunks.
    csc : BlockCSC, optional
        The block transposed by :func:`kernels.csc.block_csc`; when given,
        the sparse products walk it instead of the CSR arrays (same results,
        faster on large blocks).
    out_RVO : (n_b, r + p) float64, optional
        When given, receives ``R [V, Omega]`` and ``bufs.G_VO`` is left for the
        caller (who adds ``X^T`` of it, e.g. into a compensated sum).
    chunk_rows, workers
        See :func:`block_dense`.
    row_offset : int
        Absolute row index of the block's first row (error messages).
    where : str
        Data source name (error messages).

    Returns
    -------
    XQ : (n_b, r + p') float64
        ``X [U, Psi]``; ``XQ[:, :r]`` is ``X U``, ``XQ[:, r:]`` is ``X Psi``.
    """
    _check_buffers(bufs, ops)
    n = X.shape[0]
    k, m = ops.k, ops.VO.shape[1]
    XQ = block_projections(X, ops, out_XQ=out_XQ, csc=csc, where=where, row_offset=row_offset)
    R = None
    if scratch is not None:
        if (
            isinstance(scratch, np.ndarray)
            and scratch.dtype == np.float64
            and scratch.size >= n * k
            and scratch.flags.c_contiguous
        ):
            R = scratch.reshape(-1)[: n * k].reshape(n, k)
        else:
            raise KernelConfigError(
                f"{where}: scratch must be a C-contiguous float64 array of at least {n * k} "
                "values"
            )
    elif bufs.G is not None:
        R = np.empty((n, k))
    D = out_RVO
    if D is None and m:
        D = np.empty((n, m))
    block_dense(XQ, targets, weights, ops, bufs, out_RVO=D, out_R=R, chunk_rows=chunk_rows,
                workers=workers, row_offset=row_offset, where=where)
    if n == 0:
        return XQ
    if m and out_RVO is None:
        _xt(X, csc, D, bufs.G_VO, where)
    if bufs.G is not None:
        _xt(X, csc, R, bufs.G, where)
    return XQ


def _xt(X, csc: BlockCSC | None, D: np.ndarray, out: np.ndarray, where: str) -> None:
    if csc is not None:
        csc_t_matmul_accumulate(csc, D, out, where=where)
    else:
        csr_t_matmul_accumulate(X.indptr, X.indices, X.data, D, out, where=where)
