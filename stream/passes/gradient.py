"""The solver-style pass: every per-pass figure from one read of the data.

For a model ``W = U diag(s) V^T`` with intercept ``b``, one pass computes
(DESIGN §2 and §7 step 1), with ``R = w * dloss/dz / sum(w)`` the ``n x k``
weighted residual and ``G = X^T R`` the gradient of ``f``:

* ``f(W, b)``, the weighted mean loss, and ``grad_b f = 1^T R``;
* ``G [V, Omega]`` (d x (r+p)) and ``G^T Psi`` (k x p') — the two products of
  the two-sided subspace iteration — and ``G^T U`` (k x r);
* ``<G, W> = sum_j s_j u_j^T G v_j``;
* optionally the dense ``G`` (when the memory planner says it fits) and the
  cached projections ``X [U, Psi]`` of every block.

Blocks work with raw weights; the combine only sums, and the division by the
total weight comes after the last block, so nothing needs the total in
advance. ``R`` never exists beyond one block.

The d-row sums (``G [V, Omega]`` and the dense ``G``) are compensated sums
(:mod:`kernels.compensated`): every block's term is formed on its own, from
zero, and added with an error-free two-sum, so their value does not depend on
how the blocks are grouped into partials — the serial running sum, the
threads backend and the per-worker ranges of the dask backend give the same
bits, and a solver run on a cluster takes the serial run's steps.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from ranktide.errors import ConfigError, InputError, ModelError
from ranktide.kernels.compensated import (
    compensated_add,
    compensated_combine,
    csc_t_matmul_compensated,
)
from ranktide.kernels.csc import BlockCSC, block_csc, csc_t_matmul_accumulate
from ranktide.kernels.products import (
    ProductBuffers,
    block_dense,
    block_projections,
    prepare_operands,
)
from ranktide.kernels.sparse import csr_t_matmul_accumulate
from ranktide.losses import check_loss_source, get_loss
from ranktide.passes.engine import PassProfile, phase, run_pass
from ranktide.passes.kernel_path import CHOOSER
from ranktide.passes.projections import take_rows, write_projection_block
from ranktide.store.memory_source import as_source

__all__ = [
    "PassRequest",
    "PassResult",
    "Projection",
    "gradient_pass",
    "combine_partials",
    "block_products_kernels",
]


def _mat(name: str, a: Any, ndim: int) -> np.ndarray:
    arr = np.ascontiguousarray(a, dtype=np.float64)
    if arr.ndim != ndim:
        raise ConfigError(f"pass request: {name} must be {ndim}-D, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ModelError(f"pass request: {name} has a non-finite entry; the model is damaged")
    return arr


@dataclass(frozen=True)
class PassRequest:
    """What a gradient pass computes, at which model.

    Parameters
    ----------
    loss : str
        A name in :data:`ranktide.losses.LOSS_NAMES`.
    U : (d, r) array
        Left factor (orthonormal columns).
    s : (r,) array
        Singular values (``>= 0``).
    V : (k, r) array
        Right factor (orthonormal columns).
    b : (k,) array
        Intercept.
    Omega : (k, p) array, optional
        Power block for ``G Omega`` (p = 0 when omitted).
    Psi : (d, p') array, optional
        Expansion block for ``G^T Psi`` and the cached ``X Psi`` (p' = 0
        when omitted).
    class_weights : (k,) array, optional
        See :mod:`ranktide.losses`.
    keep_projections : bool
        Keep ``X [U, Psi]`` of every block (with its targets and weights).
    projections_dir : str, optional
        With ``keep_projections``: write each block's projections to a
        scratch ``.npy`` record in this directory (see
        :class:`ranktide.passes.projections.ScratchProjections`) instead of keeping
        them in memory; the result's projections then name the files.
    sample_rows : (m,) int array, optional
        With ``keep_projections``: keep in memory only these rows (global
        indices, sorted, distinct) of the projections, targets and weights;
        each block's :class:`Projection` then holds its rows among them
        (``Projection.rows``), an empty one when it has none.
    dense_gradient : bool
        Also accumulate the dense ``G`` (d x k).
    dual_scale : float
        ``c`` in [0, 1]: also sum the losses' convex conjugates at ``c`` times
        the residual (the dual point of the duality gap, see
        :mod:`kernels.conjugates`); 0 (default) skips it.

    All arrays are stored as C-contiguous float64.
    """

    loss: str
    U: np.ndarray
    s: np.ndarray
    V: np.ndarray
    b: np.ndarray
    Omega: np.ndarray | None = None
    Psi: np.ndarray | None = None
    class_weights: np.ndarray | None = None
    keep_projections: bool = False
    dense_gradient: bool = False
    projections_dir: str | None = None
    dual_scale: float = 0.0
    sample_rows: np.ndarray | None = None

    def __post_init__(self) -> None:
        get_loss(self.loss)
        if self.sample_rows is not None:
            idx = np.asarray(self.sample_rows)
            if (idx.ndim != 1 or idx.dtype.kind not in "iu" or (idx.size and idx[0] < 0)
                    or np.any(np.diff(idx) <= 0)):
                raise ConfigError("pass request: sample_rows must be sorted distinct row "
                                  "indices >= 0")
            if self.projections_dir is not None:
                raise ConfigError("pass request: give sample_rows or projections_dir, not both")
            object.__setattr__(self, "sample_rows", idx.astype(np.int64))
        if not 0.0 <= float(self.dual_scale) <= 1.0:
            raise ConfigError(f"gradient pass: dual_scale {self.dual_scale!r} must lie in [0, 1]")
        U, s, V, b = (
            _mat("U", self.U, 2),
            _mat("s", self.s, 1),
            _mat("V", self.V, 2),
            _mat("b", self.b, 1),
        )
        d, r = U.shape
        k = b.shape[0]
        Om = np.zeros((k, 0)) if self.Omega is None else _mat("Omega", self.Omega, 2)
        Ps = np.zeros((d, 0)) if self.Psi is None else _mat("Psi", self.Psi, 2)
        if s.shape != (r,) or V.shape != (k, r):
            raise ConfigError(
                f"pass request: U {U.shape}, s {s.shape}, V {V.shape} and "
                f"b {b.shape} disagree; expect U (d, r), s (r,), V (k, r), b (k,)"
            )
        if Om.shape[0] != k or Ps.shape[0] != d:
            raise ConfigError(
                f"pass request: Omega {Om.shape} needs {k} rows and Psi {Ps.shape} needs {d} rows"
            )
        cw = None
        if self.class_weights is not None:
            cw = _mat("class_weights", self.class_weights, 1)
            if cw.shape != (k,) or np.any(cw < 0):
                raise ConfigError(f"pass request: class_weights must be {k} values >= 0")
            if not get_loss(self.loss).class_weights_ok:
                raise ConfigError("pass request: class weights apply to the softmax loss only; "
                                  f"drop them for loss {self.loss!r}")
        for name, val in (
            ("U", U),
            ("s", s),
            ("V", V),
            ("b", b),
            ("Omega", Om),
            ("Psi", Ps),
            ("class_weights", cw),
        ):
            object.__setattr__(self, name, val)

    @property
    def shape(self) -> tuple[int, int]:
        """``(d, k)`` of the weight matrix."""
        return (self.U.shape[0], self.b.shape[0])

    @property
    def rank(self) -> int:
        return int(self.U.shape[1])


@dataclass(frozen=True)
class Projection:
    """Cached projections of one block: ``XQ = X[start:stop] @ [U, Psi]``.

    ``XQ`` is float64 ``(stop - start, r + p')``; ``targets`` and ``weights``
    are the block's own (raw weights, float32 or None). When the pass wrote
    them to a scratch file, ``XQ``, ``targets`` and ``weights`` are None and
    ``path`` names the file. When the pass kept a row sample
    (``PassRequest.sample_rows``), ``rows`` holds the global indices of the
    block's rows kept, and ``XQ``, ``targets`` and ``weights`` those rows only.
    """

    start: int
    stop: int
    XQ: np.ndarray | None
    targets: Any
    weights: np.ndarray | None
    path: str | None = None
    rows: np.ndarray | None = None


def _own(a: Any) -> Any:
    """``a`` in memory of its own: a copy when it is a view of a larger buffer.

    A store block's targets and weights are views of the reader's buffers, which
    span whole store chunks; a kept projection holding such a view pins the whole
    buffer. Measured (600k rows, 2662-row blocks, 131k-row chunks): 244 MiB of
    buffers kept through the pass and the refinement for 2.3 MiB of targets.
    """
    if a is None:
        return None
    if isinstance(a, np.ndarray):
        return a.copy() if a.base is not None else a
    return a.copy()  # a sparse matrix (tags): copies its arrays


@dataclass(frozen=True)
class PassResult:
    """The figures of one gradient pass (all divided by ``weight_total``).

    Attributes
    ----------
    n_rows : int
    weight_total : float
        ``sum_i w_i`` (softmax with class weights: ``sum_i w_i c_{y_i}``).
    loss : float
        ``f(W, b)``, the weighted mean loss.
    grad_b : (k,) array
    G_VO : (d, r + p) array
        ``G [V, Omega]``; :attr:`GV` and :attr:`GOmega` are its two parts.
    Gt_Psi : (k, p') array
    Gt_U : (k, r) array
    inner : float
        ``<G, W>``.
    conjugate : float
        ``(1 / sum w) sum_i w_i loss*(c a_i)`` at the request's ``dual_scale``
        ``c`` (0 when it is 0).
    G : (d, k) array or None
    projections : list of Projection or None
    profile : PassProfile or None
    """

    n_rows: int
    weight_total: float
    loss: float
    grad_b: np.ndarray
    G_VO: np.ndarray
    Gt_Psi: np.ndarray
    Gt_U: np.ndarray
    inner: float
    G: np.ndarray | None = None
    projections: list[Projection] | None = None
    profile: PassProfile | None = field(default=None, repr=False)
    conjugate: float = 0.0

    @property
    def GV(self) -> np.ndarray:
        """``G V`` (d x r)."""
        return self.G_VO[:, : self.Gt_U.shape[1]]

    @property
    def GOmega(self) -> np.ndarray:
        """``G Omega`` (d x p)."""
        return self.G_VO[:, self.Gt_U.shape[1] :]


# ---------------------------------------------------------------------------
# per block
# ---------------------------------------------------------------------------
@dataclass
class _Partial:
    """Raw-weighted sums of one or more consecutive blocks.

    The d-row products ``X^T (R [V, Omega])`` and ``X^T R`` of a block are
    kept as pending terms ``(X_b or its transpose, R_b [V, Omega], R_b or None,
    timing)`` and added into the d-row accumulators by the combine, so no
    block ever allocates a d x (r + p) (or d x k) array of its own.

    Each d-row accumulator is a compensated sum (:mod:`kernels.compensated`):
    ``G_VO`` (resp. ``G``) holds the running sum ``S`` and ``G_VO_err`` (resp.
    ``G_err``) its compensation ``C``; the value is ``S + C``, the same bits
    however the blocks were grouped into partials (serial running sum,
    threads, worker ranges on dask). ``scratch`` holds the zeroed block-term
    buffers of the CSR path, reused across blocks; it never travels
    (``wire=False``: :func:`ranktide.passes.dask_backend.to_wire` sends None).
    """

    rows: int
    weight: float
    loss: float
    grad_b: np.ndarray
    Gt_Psi: np.ndarray
    Gt_U: np.ndarray
    G_VO: np.ndarray | None = None
    G: np.ndarray | None = None
    terms: list = field(default_factory=list)
    projections: list[Projection] | None = None
    G_VO_err: np.ndarray | None = None
    G_err: np.ndarray | None = None
    scratch: dict | None = field(default=None, repr=False, metadata={"wire": False})
    conj: float = 0.0


@dataclass(frozen=True)
class _State:
    """Per-pass operands shared (read-only) by every block."""

    ops: Any  # kernels.products.BlockOperands (its VO is [V, Omega] too)
    VO: np.ndarray  # (k, r + p)
    s: np.ndarray
    V: np.ndarray
    keep_projections: bool
    dense_gradient: bool
    where: str
    projections_dir: str | None = None
    sample_rows: np.ndarray | None = None


def _state(req: PassRequest, where: str) -> _State:
    ops = prepare_operands(
        U=req.U,
        s=req.s,
        V=req.V,
        b=req.b,
        loss=req.loss,
        Psi=req.Psi,
        Omega=req.Omega,
        class_weights=req.class_weights,
        n_cols=req.shape[0],
    )
    VO = ops.VO
    # block_dense forms R [V, Omega]; the combine adds X^T of it into the one
    # compensated d x (r + p) accumulator
    ops = replace(ops, dual_scale=float(req.dual_scale))
    return _State(
        ops=ops,
        VO=VO,
        s=req.s,
        V=req.V,
        keep_projections=req.keep_projections,
        projections_dir=req.projections_dir,
        sample_rows=req.sample_rows,
        dense_gradient=req.dense_gradient,
        where=where,
    )


def _xt_accumulate(X: Any, D: np.ndarray, out: np.ndarray) -> None:
    """``out += X^T D`` with the deterministic kernels (CSR block or its transpose)."""
    if isinstance(X, BlockCSC):
        csc_t_matmul_accumulate(X, D, out)
    else:
        csr_t_matmul_accumulate(X.indptr, X.indices, X.data, D, out)


def block_products_kernels(block: Any, st: _State) -> _Partial:
    """Block function of the gradient pass (numba kernels and BLAS).

    :func:`kernels.products.block_projections` gives ``XQ = X [U, Psi]``
    (sparse kernels); :func:`kernels.products.block_dense` then forms, in
    cache-sized row chunks with raw weights, the scores, the loss sum,
    ``R = w * dloss/dz``, ``1^T R``, ``R^T X U``, ``R^T X Psi`` and
    ``R [V, Omega]`` (BLAS and the fused loss kernel). ``X^T (R [V, Omega])``
    (and ``X^T R``, when the dense gradient is kept: then ``R`` is kept whole)
    is left as a pending term for the combine.
    """
    t0 = time.perf_counter()
    n = int(block.stop - block.start)
    k, m = st.VO.shape
    bufs = ProductBuffers.zeros(st.ops, d_rows=False)  # X^T (R [V, Omega]) stays pending
    X = block.X
    key = (X.shape[1], st.ops.Q.shape[1], m, st.dense_gradient)
    path = CHOOSER.pick(key, X.nnz, X.shape[1], sorted_ids=bool(X.has_sorted_indices))
    csc = None
    if path == "csc":
        with phase("transpose"):
            csc = block_csc(X.indptr, X.indices, X.data, X.shape[1], where=st.where,
                            row_offset=int(block.start))
    with phase("projections"):
        XQ = block_projections(X, st.ops, csc=csc, where=st.where, row_offset=int(block.start))
    sparse_s = time.perf_counter() - t0
    R = np.empty((n, k)) if st.dense_gradient else None
    D = np.empty((n, m))
    with phase("dense"):
        block_dense(XQ, block.targets, block.weights, st.ops, bufs, out_RVO=D, out_R=R,
                    row_offset=int(block.start), where=st.where)
    proj = None
    if st.keep_projections and st.sample_rows is not None:
        proj = [_sampled_projection(block, XQ, st.sample_rows)]
    elif st.keep_projections and st.projections_dir is not None:
        file = write_projection_block(st.projections_dir, int(block.start), XQ, block.targets,
                                      block.weights)
        proj = [Projection(start=int(block.start), stop=int(block.stop), XQ=None, targets=None,
                           weights=None, path=str(file))]
    elif st.keep_projections:
        proj = [
            Projection(
                start=int(block.start),
                stop=int(block.stop),
                XQ=XQ,
                targets=_own(block.targets),
                weights=_own(block.weights),
            )
        ]
    # the combine adds X^T D and records the block's sparse time with the path chooser
    # (the dense part does not depend on the path)
    timing = (key, path, sparse_s, int(X.nnz))
    term = (block.X if csc is None else csc, D, R, timing)
    return _Partial(
        rows=n,
        weight=float(bufs.weight_sum[0]),
        loss=float(bufs.loss_sum[0]),
        grad_b=bufs.grad_b,
        Gt_Psi=bufs.Gt_Psi,
        Gt_U=bufs.Gt_U,
        terms=[term],
        projections=proj,
        conj=float(bufs.conj[0]),
    )


def _sampled_projection(block: Any, XQ: np.ndarray, sample: np.ndarray) -> Projection:
    """The block's rows among ``sample`` (sorted global indices), as copies of their own."""
    rows, XQ_s, T, W = take_rows(sample, int(block.start), XQ, block.targets, block.weights)
    return Projection(start=int(block.start), stop=int(block.stop), XQ=XQ_s, targets=T,
                      weights=W, rows=rows)


def _add_term(acc: _Partial, name: str, X: Any, D: np.ndarray) -> None:
    """Add the block term ``X^T D`` into the compensated accumulator ``name`` of ``acc``.

    The first term goes straight into the zero sum (two-sum of 0 and ``x`` is
    ``(x, 0)``, so this is the compensated add's own result). Later terms: on a
    transposed block the fused kernel forms each column's term and adds it;
    on a CSR block the term is scattered into a zeroed ``d x m`` buffer
    (reused across blocks, zeroed again by the add).
    """
    S = getattr(acc, name)
    if S is None:
        S = np.zeros((X.shape[1], D.shape[1]))
        _xt_accumulate(X, D, S)
        setattr(acc, name, S)
        setattr(acc, name + "_err", np.zeros_like(S))
        return
    C = getattr(acc, name + "_err")
    if isinstance(X, BlockCSC):
        csc_t_matmul_compensated(X, D, S, C)
        return
    if acc.scratch is None:
        acc.scratch = {}
    buf = acc.scratch.get(name)
    if buf is None:
        buf = acc.scratch[name] = np.zeros_like(S)
    _xt_accumulate(X, D, buf)
    compensated_add(buf, S, C)


def _materialize(acc: _Partial) -> None:
    """Add the pending terms of ``acc`` into its d-row accumulators."""
    for X, D, R, (key, path, block_s, nnz) in acc.terms:
        t0 = time.perf_counter()
        with phase("xt_products"):
            _add_term(acc, "G_VO", X, D)
            if R is not None:
                _add_term(acc, "G", X, R)
        CHOOSER.record(key, path, block_s + time.perf_counter() - t0, nnz)
    acc.terms = []


def _combine_sums(acc: _Partial, p: _Partial) -> None:
    """``acc += p`` for the d-row accumulators of an already reduced partial ``p``."""
    for name in ("G_VO", "G"):
        S2 = getattr(p, name)
        if S2 is None:
            continue
        C2 = getattr(p, name + "_err")
        if getattr(acc, name) is None:  # nothing here yet: take p's pair as it is
            setattr(acc, name, S2)
            setattr(acc, name + "_err", C2)
            continue
        compensated_combine(getattr(acc, name), getattr(acc, name + "_err"), S2, C2)


def combine_partials(parts: list[_Partial]) -> _Partial:
    """Sum partials in block order, accumulating into the first.

    The pass engine owns the partials it hands over, so the first one's
    buffers are reused: one compensated d x (r + p) accumulator (and one
    block-term buffer) per pass. The d-row sums are compensated, so the
    grouping of blocks into partials does not change them (see
    :mod:`kernels.compensated`); the small figures are plain sums, folded in
    block order by every backend.
    """
    acc = parts[0]
    _materialize(acc)
    for p in parts[1:]:
        acc.rows += p.rows
        acc.weight += p.weight
        acc.loss += p.loss
        acc.grad_b += p.grad_b
        acc.Gt_Psi += p.Gt_Psi
        acc.Gt_U += p.Gt_U
        acc.conj += p.conj
        _combine_sums(acc, p)  # an already reduced partial (tree reduction, worker range)
        acc.terms = p.terms
        _materialize(acc)
        if acc.projections is not None:
            acc.projections.extend(p.projections)
    return acc


def _split_remote(p: _Partial) -> tuple[_Partial, _Partial]:
    """A block's own small figures (and projections), and the rest to fold remotely.

    Used by backends that fold ranges of blocks on workers (ranktide.passes.dask_backend):
    the client folds the light partials in block order, so every figure is
    summed exactly as on the serial backend (the d-row accumulators by their
    compensated sums, the rest by the same fold).
    """
    light = _Partial(
        rows=p.rows,
        weight=p.weight,
        loss=p.loss,
        grad_b=p.grad_b.copy(),  # the worker's fold accumulates into p's arrays
        Gt_Psi=p.Gt_Psi.copy(),
        Gt_U=p.Gt_U.copy(),
        projections=p.projections,
        conj=p.conj,
    )
    p.projections = None  # they travel once, with the light partial
    return light, p


def _join_remote(light: _Partial, rest: _Partial) -> _Partial:
    """Attach a range's folded d-row accumulators (sums and compensations) to its first block."""
    light.G_VO, light.G_VO_err = rest.G_VO, rest.G_VO_err
    light.G, light.G_err = rest.G, rest.G_err
    return light


combine_partials.split_remote = _split_remote  # type: ignore[attr-defined]
combine_partials.join_remote = _join_remote  # type: ignore[attr-defined]


def _finalize(acc: _Partial, st: _State, profile: PassProfile | None, where: str) -> PassResult:
    if not acc.weight > 0:
        raise InputError(f"{where}: every row has weight 0; give some rows a positive weight")
    inv = 1.0 / acc.weight
    Gt_U = acc.Gt_U * inv
    inner = float(np.einsum("j,kj,kj->", st.s, st.V, Gt_U))
    # the compensated sums' values S + C, scaled in place (the accumulators belong
    # to this pass); the compensations and block-term buffers are dropped
    for S, C in ((acc.G_VO, acc.G_VO_err), (acc.G, acc.G_err)):
        if S is not None:
            if C is not None:
                S += C
            S *= inv
    acc.G_VO_err = acc.G_err = acc.scratch = None
    return PassResult(
        n_rows=acc.rows,
        weight_total=acc.weight,
        loss=acc.loss * inv,
        grad_b=acc.grad_b * inv,
        G_VO=acc.G_VO,
        Gt_Psi=acc.Gt_Psi * inv,
        Gt_U=Gt_U,
        inner=inner,
        G=acc.G,
        projections=acc.projections,
        profile=profile,
        conjugate=acc.conj * inv,
    )


def gradient_pass(
    source: Any,
    request: PassRequest,
    *,
    backend: str = "serial",
    block_rows: int | None = None,
    block_bytes: int | None = None,
    n_threads: int | None = None,
    profile: PassProfile | bool | None = None,
    progress: bool = False,
    should_stop: Any = None,
) -> PassResult:
    """One pass over ``source`` at the model of ``request``.

    Parameters
    ----------
    source : Store, path, scipy CSR tuple ``(X, targets[, weights])`` or source
    request : PassRequest
    backend, block_rows, block_bytes, n_threads, progress, should_stop
        As in :func:`ranktide.passes.engine.run_pass` (``should_stop`` abandons the
        pass at a block boundary with :class:`ranktide.signals.StopRequested`).
    profile : PassProfile or bool, optional
        A profile to append this pass's timings to, or True for a new one.

    Returns
    -------
    PassResult
    """
    opened = isinstance(source, (str, os.PathLike))
    src = as_source(source)
    try:
        where = getattr(src, "path", None) or "in-memory source"
        check_loss_source(request.loss, src)
        n, d = src.shape
        if request.shape != (d, src.n_outputs):
            raise ModelError(
                f"{where}: has {d} features and {src.n_outputs} outputs but the model is "
                f"{request.shape[0]} x {request.shape[1]}; use a model trained on this data"
            )
        if n == 0:
            raise InputError(f"{where}: has no rows")
        prof = PassProfile() if profile is True else (profile or None)
        st = _state(request, where)
        acc = run_pass(
            src,
            block_products_kernels,
            combine_partials,
            state=st,
            backend=backend,
            block_rows=block_rows,
            block_bytes=block_bytes,
            n_threads=n_threads,
            profile=prof,
            progress=progress,
            desc="gradient pass",
            should_stop=should_stop,
        )
        acc = combine_partials([acc])  # adds the last pending terms (a one-block pass)
        return _finalize(acc, st, prof, where)
    finally:
        if opened:
            src.close()
