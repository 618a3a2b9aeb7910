"""Fused per-block loss kernels: loss sum, residual and intercept gradient.

Every ``*_residual`` function takes the block's scores ``Z`` (n_b x k,
float64), overwrites them in place with the UNNORMALIZED residual
``w_i * dloss/dz_i`` and accumulates into caller-owned buffers::

    out_loss[0] += sum_i w_i * loss(z_i; y_i)
    out_gradb   += sum_i w_i * dloss/dz_i          (column sums of the residual)

The weighted mean loss is ``out_loss[0] / sum(w)``, formed by the caller once
all blocks are in. ``w`` is a (n_b,) float array or ``None`` (all ones).

| loss       | loss(z; y)                         | dloss/dz          |
|------------|------------------------------------|-------------------|
| softmax    | logsumexp(z) - z_y                 | softmax(z) - e_y  |
| squared    | 0.5 * ||z - y||^2                  | z - y             |
| multilabel | sum_j log(1 + exp(z_j)) - y_j z_j  | sigmoid(z) - y    |

The log-sum-exp is shifted by the row maximum and the softplus is evaluated
as ``max(z, 0) + log1p(exp(-|z|))``, so logits of any finite size give finite
losses and residuals.

Rows are processed in parallel in a fixed number of chunks that depends only
on ``n_b``; the chunks' partial sums are added in chunk order, so the result
does not depend on the number of threads. The ``*_loss_only`` variants leave
``Z`` untouched (for line searches).
"""

from __future__ import annotations

import math

import numpy as np
from llvmlite import ir
from numba import njit, prange, types
from numba.extending import intrinsic

from .errors import KernelInputError
from .threads import kernel_guard

_N_CHUNKS = 64
_NO_WEIGHTS = np.zeros(0)


# exp on (-inf, 0] in plain arithmetic, so that LLVM vectorizes the loops that call it
# (numba's math.exp is a scalar libm call per entry). Range reduction x = n ln2 + r with
# |r| <= ln2 / 2 (Cody-Waite: ln2 split in a 32-bit head, exact in n * head, and a tail),
# exp(r) by its Taylor polynomial of degree 13 (truncation < 5e-18 on that range), times
# 2^n built in the exponent bits. Measured against numpy.exp on 2e6 arguments in
# [-708, 0]: at most 1 ulp apart. Below -708 the result is 0 instead of a subnormal
# (absolute error < 3e-308, nothing next to the row maximum's exp(0) = 1); NaN stays NaN.
_LOG2E = 1.4426950408889634
_LN2_HI = 6.93147180369123816490e-01
_LN2_LO = 1.90821492927058770002e-10
_EXP_MIN = -708.0
# multiply-adds may fuse (one rounding instead of two; same result on every run):
# the polynomial then costs about what numpy.exp does
_CONTRACT = {"contract"}


@intrinsic
def _bits_as_float(typingctx, bits):  # pragma: no cover - compiled
    """Reinterpret an int64 bit pattern as a float64 (no conversion)."""
    if bits != types.int64:
        return None

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.DoubleType())

    return types.float64(types.int64), codegen


@njit(nogil=True, cache=True, inline="always", fastmath=_CONTRACT)
def exp_nonpositive(x):  # pragma: no cover - compiled
    """``exp(x)`` for ``x <= 0`` (see the comment above); vectorizes in loops."""
    xc = _EXP_MIN if x < _EXP_MIN else x
    nf = math.floor(xc * _LOG2E + 0.5)
    r = (xc - nf * _LN2_HI) - nf * _LN2_LO
    p = 1.0 / 6227020800.0
    p = p * r + 1.0 / 479001600.0
    p = p * r + 1.0 / 39916800.0
    p = p * r + 1.0 / 3628800.0
    p = p * r + 1.0 / 362880.0
    p = p * r + 1.0 / 40320.0
    p = p * r + 1.0 / 5040.0
    p = p * r + 1.0 / 720.0
    p = p * r + 1.0 / 120.0
    p = p * r + 1.0 / 24.0
    p = p * r + 1.0 / 6.0
    p = p * r + 0.5
    p = p * r + 1.0
    p = p * r + 1.0
    e = p * _bits_as_float((np.int64(nf) + 1023) << 52)
    return 0.0 if x < _EXP_MIN else e


@njit(nogil=True, cache=True, fastmath=_CONTRACT)
def exp_nonpositive_kernel(x, out):  # pragma: no cover - compiled
    """``out[i] = exp(x[i])`` for 1-D ``x <= 0`` (tests and benchmarks of the helper)."""
    for i in range(x.shape[0]):
        out[i] = exp_nonpositive(x[i])


@njit(nogil=True, cache=True)
def _n_chunks(n):  # pragma: no cover - compiled
    return min(n, _N_CHUNKS)


@njit(nogil=True, cache=True)
def _reduce_partials(part, bad, out_loss, out_gradb):  # pragma: no cover - compiled
    """Add chunk partials in chunk order; return the first bad row or -1."""
    k = out_gradb.shape[0]
    first = -1
    for c in range(part.shape[0]):
        out_loss[0] += part[c, 0]
        for j in range(k):
            out_gradb[j] += part[c, 1 + j]
        if first < 0 and bad[c] >= 0:
            first = bad[c]
    return first


@njit(nogil=True, cache=True, inline="always")
def _row_max(Z, i, k):  # pragma: no cover - compiled
    """Largest entry of row ``i`` (eight interleaved lanes, so the loop vectorizes)."""
    m0 = m1 = m2 = m3 = m4 = m5 = m6 = m7 = Z[i, 0]
    j = 0
    while j + 8 <= k:
        m0 = max(m0, Z[i, j])
        m1 = max(m1, Z[i, j + 1])
        m2 = max(m2, Z[i, j + 2])
        m3 = max(m3, Z[i, j + 3])
        m4 = max(m4, Z[i, j + 4])
        m5 = max(m5, Z[i, j + 5])
        m6 = max(m6, Z[i, j + 6])
        m7 = max(m7, Z[i, j + 7])
        j += 8
    while j < k:
        m0 = max(m0, Z[i, j])
        j += 1
    return max(max(max(m0, m1), max(m2, m3)), max(max(m4, m5), max(m6, m7)))


@njit(nogil=True, cache=True, inline="always")
def _row_sum(E, i, k):  # pragma: no cover - compiled
    """Sum of row ``i`` in a fixed order: eight interleaved partial sums, then a tree.

    The order depends only on ``k``, so results are reproducible; the lanes let
    the adds overlap instead of waiting on one running sum.
    """
    s0 = s1 = s2 = s3 = s4 = s5 = s6 = s7 = 0.0
    j = 0
    while j + 8 <= k:
        s0 += E[i, j]
        s1 += E[i, j + 1]
        s2 += E[i, j + 2]
        s3 += E[i, j + 3]
        s4 += E[i, j + 4]
        s5 += E[i, j + 5]
        s6 += E[i, j + 6]
        s7 += E[i, j + 7]
        j += 8
    while j < k:
        s0 += E[i, j]
        j += 1
    return ((s0 + s1) + (s2 + s3)) + ((s4 + s5) + (s6 + s7))


@njit(nogil=True, cache=True, inline="always")
def _row_dot(E, i, t, k):  # pragma: no cover - compiled
    """``sum_j E[i, j] t[j]`` in the fixed order of :func:`_row_sum` (eight lanes, a tree)."""
    s0 = s1 = s2 = s3 = s4 = s5 = s6 = s7 = 0.0
    j = 0
    while j + 8 <= k:
        s0 += E[i, j] * t[j]
        s1 += E[i, j + 1] * t[j + 1]
        s2 += E[i, j + 2] * t[j + 2]
        s3 += E[i, j + 3] * t[j + 3]
        s4 += E[i, j + 4] * t[j + 4]
        s5 += E[i, j + 5] * t[j + 5]
        s6 += E[i, j + 6] * t[j + 6]
        s7 += E[i, j + 7] * t[j + 7]
        j += 8
    while j < k:
        s0 += E[i, j] * t[j]
        j += 1
    return ((s0 + s1) + (s2 + s3)) + ((s4 + s5) + (s6 + s7))


@njit(nogil=True, cache=True, parallel=True, fastmath=_CONTRACT)
def softmax_residual_kernel(Z, y, w, out_loss, out_gradb, out_negent):  # pragma: no cover
    """Softmax cross-entropy; see the module docstring. Returns first bad row or -1.

    Parameters
    ----------
    Z : (n_b, k) float64, scores in, residual out
    y : (n_b,) int32 class ids in ``[0, k)``
    w : (n_b,) float64, or empty for unit weights
    out_loss : (1,) float64, accumulated
    out_gradb : (k,) float64, accumulated
    out_negent : (n_b,) float64, or empty
        Receives ``sum_j p_ij log p_ij`` of each row's probabilities; with
        ``t_j = z_j - max(z)`` and ``s = sum_j exp(t_j)`` it is
        ``sum_j exp(t_j) t_j / s - log s``: one multiply-add per entry, no log
        per entry.
    """
    n, k = Z.shape
    has_w = w.shape[0] > 0
    want_h = out_negent.shape[0] > 0
    nch = _n_chunks(n)
    part = np.zeros((nch, k + 1))
    bad = np.full(nch, -1, dtype=np.int64)
    for c in prange(nch):
        tb = np.empty(k if want_h else 0)  # the row's shifted scores (no reduction in the
        for i in range(n * c // nch, n * (c + 1) // nch):  # exp loop: it stays vectorized)
            yi = y[i]
            if yi < 0 or yi >= k:
                if bad[c] < 0:
                    bad[c] = i
                for j in range(k):
                    Z[i, j] = 0.0
                continue
            wi = w[i] if has_w else 1.0
            mx = _row_max(Z, i, k)
            zy = Z[i, yi]
            if want_h:
                for j in range(k):
                    t = Z[i, j] - mx
                    tb[j] = t
                    Z[i, j] = exp_nonpositive(t)
            else:
                for j in range(k):
                    Z[i, j] = exp_nonpositive(Z[i, j] - mx)
            s = _row_sum(Z, i, k)
            log_s = math.log(s)
            if want_h:
                out_negent[i] = _row_dot(Z, i, tb, k) / s - log_s
            part[c, 0] += wi * (mx + log_s - zy)
            scale = wi / s
            for j in range(k):
                Z[i, j] *= scale
            Z[i, yi] -= wi
            for j in range(k):
                part[c, 1 + j] += Z[i, j]
    return _reduce_partials(part, bad, out_loss, out_gradb)


@njit(nogil=True, cache=True, parallel=True, fastmath=_CONTRACT)
def softmax_loss_only_kernel(Z, y, w, out_loss):  # pragma: no cover - compiled
    """Weighted softmax loss sum, ``Z`` unchanged. Returns first bad row or -1."""
    n, k = Z.shape
    has_w = w.shape[0] > 0
    nch = _n_chunks(n)
    part = np.zeros((nch, 1))
    bad = np.full(nch, -1, dtype=np.int64)
    for c in prange(nch):
        E = np.empty((1, k))
        for i in range(n * c // nch, n * (c + 1) // nch):
            yi = y[i]
            if yi < 0 or yi >= k:
                if bad[c] < 0:
                    bad[c] = i
                continue
            wi = w[i] if has_w else 1.0
            mx = _row_max(Z, i, k)
            for j in range(k):
                E[0, j] = exp_nonpositive(Z[i, j] - mx)
            s = _row_sum(E, 0, k)
            part[c, 0] += wi * (mx + math.log(s) - Z[i, yi])
    return _reduce_partials(part, bad, out_loss, np.zeros(0))


@njit(nogil=True, cache=True, parallel=True)
def squared_residual_kernel(Z, Y, w, out_loss, out_gradb):  # pragma: no cover - compiled
    """Half squared error; ``Y`` (n_b, k) float32/float64. Returns -1."""
    n, k = Z.shape
    has_w = w.shape[0] > 0
    nch = _n_chunks(n)
    part = np.zeros((nch, k + 1))
    bad = np.full(nch, -1, dtype=np.int64)
    for c in prange(nch):
        for i in range(n * c // nch, n * (c + 1) // nch):
            wi = w[i] if has_w else 1.0
            acc = 0.0
            for j in range(k):
                r = Z[i, j] - np.float64(Y[i, j])
                acc += r * r
                Z[i, j] = wi * r
                part[c, 1 + j] += Z[i, j]
            part[c, 0] += 0.5 * wi * acc
    return _reduce_partials(part, bad, out_loss, out_gradb)


@njit(nogil=True, cache=True, parallel=True)
def squared_loss_only_kernel(Z, Y, w, out_loss):  # pragma: no cover - compiled
    """Weighted half squared error sum, ``Z`` unchanged. Returns -1."""
    n, k = Z.shape
    has_w = w.shape[0] > 0
    nch = _n_chunks(n)
    part = np.zeros((nch, 1))
    bad = np.full(nch, -1, dtype=np.int64)
    for c in prange(nch):
        for i in range(n * c // nch, n * (c + 1) // nch):
            wi = w[i] if has_w else 1.0
            acc = 0.0
            for j in range(k):
                r = Z[i, j] - np.float64(Y[i, j])
                acc += r * r
            part[c, 0] += 0.5 * wi * acc
    return _reduce_partials(part, bad, out_loss, np.zeros(0))


@njit(nogil=True, cache=True)
def _tags_ok(tag_indptr, tag_indices, i, k):  # pragma: no cover - compiled
    a = tag_indptr[i]
    e = tag_indptr[i + 1]
    if a < 0 or e > tag_indices.shape[0] or a > e:
        return False
    for q in range(a, e):
        t = tag_indices[q]
        if t < 0 or t >= k:
            return False
    return True


@njit(nogil=True, cache=True, parallel=True, fastmath=_CONTRACT)
def multilabel_residual_kernel(
    Z, tag_indptr, tag_indices, w, out_loss, out_gradb
):  # pragma: no cover - compiled
    """Independent logistic losses; tags of row i are
    ``tag_indices[tag_indptr[i]:tag_indptr[i+1]]`` (unique ids in ``[0, k)``).
    Returns first bad row or -1."""
    n, k = Z.shape
    has_w = w.shape[0] > 0
    nch = _n_chunks(n)
    part = np.zeros((nch, k + 1))
    bad = np.full(nch, -1, dtype=np.int64)
    for c in prange(nch):
        for i in range(n * c // nch, n * (c + 1) // nch):
            if not _tags_ok(tag_indptr, tag_indices, i, k):
                if bad[c] < 0:
                    bad[c] = i
                for j in range(k):
                    Z[i, j] = 0.0
                continue
            wi = w[i] if has_w else 1.0
            acc = 0.0
            for q in range(tag_indptr[i], tag_indptr[i + 1]):
                acc -= Z[i, tag_indices[q]]
            for j in range(k):
                z = Z[i, j]
                ez = exp_nonpositive(-abs(z))
                acc += max(z, 0.0) + math.log1p(ez)
                if z >= 0.0:
                    Z[i, j] = wi / (1.0 + ez)
                else:
                    Z[i, j] = wi * ez / (1.0 + ez)
            for q in range(tag_indptr[i], tag_indptr[i + 1]):
                Z[i, tag_indices[q]] -= wi
            for j in range(k):
                part[c, 1 + j] += Z[i, j]
            part[c, 0] += wi * acc
    return _reduce_partials(part, bad, out_loss, out_gradb)


@njit(nogil=True, cache=True, parallel=True, fastmath=_CONTRACT)
def multilabel_loss_only_kernel(
    Z, tag_indptr, tag_indices, w, out_loss
):  # pragma: no cover - compiled
    """Weighted multilabel loss sum, ``Z`` unchanged. Returns first bad row or -1."""
    n, k = Z.shape
    has_w = w.shape[0] > 0
    nch = _n_chunks(n)
    part = np.zeros((nch, 1))
    bad = np.full(nch, -1, dtype=np.int64)
    for c in prange(nch):
        for i in range(n * c // nch, n * (c + 1) // nch):
            if not _tags_ok(tag_indptr, tag_indices, i, k):
                if bad[c] < 0:
                    bad[c] = i
                continue
            wi = w[i] if has_w else 1.0
            acc = 0.0
            for q in range(tag_indptr[i], tag_indptr[i + 1]):
                acc -= Z[i, tag_indices[q]]
            for j in range(k):
                z = Z[i, j]
                acc += max(z, 0.0) + math.log1p(exp_nonpositive(-abs(z)))
            part[c, 0] += wi * acc
    return _reduce_partials(part, bad, out_loss, np.zeros(0))


@njit(nogil=True, cache=True)
def fold_class_weights_kernel(y, class_weights, w, out):  # pragma: no cover - compiled
    """``out[i] = w[i] * class_weights[y[i]]`` (empty ``w``: ones); -1 or first bad row.

    Serial: one multiply per row is memory-bound, threads would not pay off.
    """
    n = y.shape[0]
    k = class_weights.shape[0]
    has_w = w.shape[0] > 0
    first = -1
    for i in range(n):
        yi = y[i]
        if yi < 0 or yi >= k:
            out[i] = 0.0
            if first < 0:
                first = i
            continue
        wi = w[i] if has_w else 1.0
        out[i] = wi * class_weights[yi]
    return first


# ----------------------------------------------------------------------------
# Python layer: checks, threading guard, errors.


def _check_scores(Z: np.ndarray, where: str, *, writable: bool) -> tuple[int, int]:
    if not isinstance(Z, np.ndarray) or Z.ndim != 2 or Z.dtype != np.float64:
        raise KernelInputError(
            f"{where}: scores must be a 2-D float64 array (n_rows, n_outputs), got "
            f"{getattr(Z, 'dtype', type(Z).__name__)} {getattr(Z, 'shape', None)}"
        )
    if writable and not Z.flags.writeable:
        raise KernelInputError(
            f"{where}: scores must be writable (they are overwritten by the residual)"
        )
    return Z.shape


def _check_weights(w: np.ndarray | None, n: int, where: str) -> np.ndarray | None:
    """Check the row weights; return them as float64 (one compiled variant)."""
    if w is None:
        return None
    if not isinstance(w, np.ndarray) or w.ndim != 1 or w.dtype.kind != "f" or w.shape[0] != n:
        raise KernelInputError(
            f"{where}: weights must be a 1-D float array of {n} values (one per row), got "
            f"{getattr(w, 'dtype', type(w).__name__)} {getattr(w, 'shape', None)}"
        )
    return np.asarray(w, dtype=np.float64)


def _kernel_weights(w: np.ndarray | None) -> np.ndarray:
    """Kernels take a float64 weight array; an empty one means unit weights."""
    return _NO_WEIGHTS if w is None else w


def _check_acc(out_loss: np.ndarray, out_gradb: np.ndarray | None, k: int, where: str) -> None:
    if not isinstance(out_loss, np.ndarray) or out_loss.dtype != np.float64 or out_loss.shape != (
        1,
    ):
        raise KernelInputError(f"{where}: out_loss must be a float64 array of shape (1,)")
    if out_gradb is not None and (
        not isinstance(out_gradb, np.ndarray)
        or out_gradb.dtype != np.float64
        or out_gradb.shape != (k,)
    ):
        raise KernelInputError(f"{where}: out_gradb must be a float64 array of shape ({k},)")


def _check_classes(y: np.ndarray, n: int, where: str) -> np.ndarray:
    """Check the class ids; return them as int64 (one compiled variant)."""
    if not isinstance(y, np.ndarray) or y.ndim != 1 or y.dtype.kind not in "iu" or y.shape[0] != n:
        raise KernelInputError(
            f"{where}: class ids must be a 1-D integer array of {n} values, got "
            f"{getattr(y, 'dtype', type(y).__name__)} {getattr(y, 'shape', None)}"
        )
    if y.dtype == np.uint64 and y.size and int(y.max()) > np.iinfo(np.int64).max:
        raise KernelInputError(f"{where}: a class id does not fit in int64")
    return np.asarray(y, dtype=np.int64)


def _check_values(Y: np.ndarray, shape: tuple[int, int], where: str) -> None:
    if not isinstance(Y, np.ndarray) or Y.dtype.kind != "f" or Y.shape != shape:
        raise KernelInputError(
            f"{where}: target values must be a float array of shape {shape}, got "
            f"{getattr(Y, 'dtype', type(Y).__name__)} {getattr(Y, 'shape', None)}"
        )


def _check_tags(
    tag_indptr: np.ndarray, tag_indices: np.ndarray, n: int, where: str
) -> tuple[np.ndarray, np.ndarray]:
    """Check the tag CSR arrays; return them as int64 (one compiled variant)."""
    for name, arr in (("tag_indptr", tag_indptr), ("tag_indices", tag_indices)):
        if not isinstance(arr, np.ndarray) or arr.ndim != 1 or arr.dtype.kind not in "iu":
            raise KernelInputError(f"{where}: {name} must be a 1-D integer array")
    if tag_indptr.shape[0] != n + 1:
        raise KernelInputError(
            f"{where}: tag_indptr has {tag_indptr.shape[0]} pointers for {n} rows; "
            "it needs one more pointer than rows"
        )
    return np.asarray(tag_indptr, dtype=np.int64), np.asarray(tag_indices, dtype=np.int64)


def _bad_class(y, bad: int, k: int, row_offset: int, where: str) -> None:
    # rows count from 1 in messages, as the user (and Matrix Market) counts them
    if bad >= 0:
        raise KernelInputError(
            f"{where}: row {row_offset + bad + 1} has class id {int(y[bad])} outside 0..{k - 1}; "
            "fix the targets or train with the right number of classes"
        )


def _bad_tags(bad: int, k: int, row_offset: int, where: str) -> None:
    if bad >= 0:
        raise KernelInputError(
            f"{where}: row {row_offset + bad + 1} has a tag id outside 0..{k - 1} or broken tag "
            "pointers; fix the tag list or train with the right number of tags"
        )


def softmax_residual(
    Z: np.ndarray,
    y: np.ndarray,
    w: np.ndarray | None,
    out_loss: np.ndarray,
    out_gradb: np.ndarray,
    *,
    row_offset: int = 0,
    where: str = "block",
    out_negent: np.ndarray | None = None,
) -> np.ndarray:
    """Softmax cross-entropy: residual in place, loss sum and grad_b accumulated.

    Parameters
    ----------
    Z : (n_b, k) float64
        Scores, overwritten by ``w_i * (softmax(z_i) - e_{y_i})``.
    y : (n_b,) int32
        Class ids in ``[0, k)``.
    w : (n_b,) float32/float64 or None
        Row weights (fold class weights in with :func:`fold_class_weights`).
    out_loss : (1,) float64
        ``+= sum_i w_i * (logsumexp(z_i) - z_{i, y_i})``.
    out_gradb : (k,) float64
        ``+=`` column sums of the residual.
    row_offset, where
        Absolute index of the block's first row and the data source's name,
        for error messages.
    out_negent : (n_b,) float64 C array, optional
        Receives each row's ``sum_j p_ij log p_ij`` (``p_i = softmax(z_i)``),
        which the duality gap's conjugate needs (:func:`kernels.conjugates.conjugate_sum`);
        computed from the scores while they are at hand, with no log per entry.

    Returns
    -------
    Z : (n_b, k) float64, the residual
    """
    n, k = _check_scores(Z, where, writable=True)
    y = _check_classes(y, n, where)
    w = _check_weights(w, n, where)
    _check_acc(out_loss, out_gradb, k, where)
    if out_negent is None:
        out_negent = np.zeros(0)
    elif not (isinstance(out_negent, np.ndarray) and out_negent.dtype == np.float64
              and out_negent.shape == (n,) and out_negent.flags.c_contiguous
              and out_negent.flags.writeable):
        raise KernelInputError(f"{where}: out_negent must be a writable float64 C array of "
                               f"shape ({n},)")
    if n == 0:
        return Z
    with kernel_guard():
        bad = softmax_residual_kernel(Z, y, _kernel_weights(w), out_loss, out_gradb,
                                      out_negent)
    _bad_class(y, bad, k, row_offset, where)
    return Z


def softmax_loss_only(
    Z: np.ndarray,
    y: np.ndarray,
    w: np.ndarray | None,
    out_loss: np.ndarray,
    *,
    row_offset: int = 0,
    where: str = "block",
) -> float:
    """Accumulate the weighted softmax loss sum into ``out_loss``; return it."""
    n, k = _check_scores(Z, where, writable=False)
    y = _check_classes(y, n, where)
    w = _check_weights(w, n, where)
    _check_acc(out_loss, None, k, where)
    if n:
        with kernel_guard():
            bad = softmax_loss_only_kernel(Z, y, _kernel_weights(w), out_loss)
        _bad_class(y, bad, k, row_offset, where)
    return float(out_loss[0])


def squared_residual(
    Z: np.ndarray,
    Y: np.ndarray,
    w: np.ndarray | None,
    out_loss: np.ndarray,
    out_gradb: np.ndarray,
    *,
    row_offset: int = 0,
    where: str = "block",
) -> np.ndarray:
    """Half squared error: residual ``w_i (z_i - y_i)`` in place, sums accumulated.

    Parameters
    ----------
    Z : (n_b, k) float64
    Y : (n_b, k) float32/float64 target values
    w : (n_b,) float or None
    out_loss : (1,) float64, ``+= sum_i 0.5 w_i ||z_i - y_i||^2``
    out_gradb : (k,) float64, ``+=`` column sums of the residual

    Returns
    -------
    Z : (n_b, k) float64, the residual
    """
    n, k = _check_scores(Z, where, writable=True)
    _check_values(Y, (n, k), where)
    w = _check_weights(w, n, where)
    _check_acc(out_loss, out_gradb, k, where)
    if n:
        with kernel_guard():
            squared_residual_kernel(Z, Y, _kernel_weights(w), out_loss, out_gradb)
    return Z


def squared_loss_only(
    Z: np.ndarray,
    Y: np.ndarray,
    w: np.ndarray | None,
    out_loss: np.ndarray,
    *,
    row_offset: int = 0,
    where: str = "block",
) -> float:
    """Accumulate the weighted half squared error sum into ``out_loss``; return it."""
    n, k = _check_scores(Z, where, writable=False)
    _check_values(Y, (n, k), where)
    w = _check_weights(w, n, where)
    _check_acc(out_loss, None, k, where)
    if n:
        with kernel_guard():
            squared_loss_only_kernel(Z, Y, _kernel_weights(w), out_loss)
    return float(out_loss[0])


def multilabel_residual(
    Z: np.ndarray,
    tag_indptr: np.ndarray,
    tag_indices: np.ndarray,
    w: np.ndarray | None,
    out_loss: np.ndarray,
    out_gradb: np.ndarray,
    *,
    row_offset: int = 0,
    where: str = "block",
) -> np.ndarray:
    """Multilabel logistic loss: residual ``w_i (sigmoid(z_i) - y_i)`` in place.

    Parameters
    ----------
    Z : (n_b, k) float64
    tag_indptr : (n_b + 1,) int32/int64
    tag_indices : (n_tags,) int32/int64
        Tags of row i are ``tag_indices[tag_indptr[i]:tag_indptr[i + 1]]``,
        unique ids in ``[0, k)`` (the CSR arrays of the tag matrix).
    w : (n_b,) float or None
    out_loss : (1,) float64, ``+= sum_i w_i sum_j (log(1 + e^{z_ij}) - y_ij z_ij)``
    out_gradb : (k,) float64, ``+=`` column sums of the residual

    Returns
    -------
    Z : (n_b, k) float64, the residual
    """
    n, k = _check_scores(Z, where, writable=True)
    tag_indptr, tag_indices = _check_tags(tag_indptr, tag_indices, n, where)
    w = _check_weights(w, n, where)
    _check_acc(out_loss, out_gradb, k, where)
    if n:
        with kernel_guard():
            bad = multilabel_residual_kernel(
                Z, tag_indptr, tag_indices, _kernel_weights(w), out_loss, out_gradb
            )
        _bad_tags(bad, k, row_offset, where)
    return Z


def multilabel_loss_only(
    Z: np.ndarray,
    tag_indptr: np.ndarray,
    tag_indices: np.ndarray,
    w: np.ndarray | None,
    out_loss: np.ndarray,
    *,
    row_offset: int = 0,
    where: str = "block",
) -> float:
    """Accumulate the weighted multilabel loss sum into ``out_loss``; return it."""
    n, k = _check_scores(Z, where, writable=False)
    tag_indptr, tag_indices = _check_tags(tag_indptr, tag_indices, n, where)
    w = _check_weights(w, n, where)
    _check_acc(out_loss, None, k, where)
    if n:
        with kernel_guard():
            bad = multilabel_loss_only_kernel(
                Z, tag_indptr, tag_indices, _kernel_weights(w), out_loss
            )
        _bad_tags(bad, k, row_offset, where)
    return float(out_loss[0])


def fold_class_weights(
    y: np.ndarray,
    class_weights: np.ndarray,
    w: np.ndarray | None = None,
    *,
    out: np.ndarray | None = None,
    row_offset: int = 0,
    where: str = "block",
) -> np.ndarray:
    """Row weights with class weights folded in: ``out[i] = w[i] * cw[y[i]]``.

    Parameters
    ----------
    y : (n_b,) int class ids in ``[0, k)``
    class_weights : (k,) float64, >= 0
    w : (n_b,) float or None (ones)
    out : (n_b,) float64, optional caller-owned output

    Returns
    -------
    out : (n_b,) float64
    """
    n = y.shape[0] if isinstance(y, np.ndarray) else -1
    y = _check_classes(y, n, where)
    w = _check_weights(w, n, where)
    cw = np.asarray(class_weights, dtype=np.float64)
    if cw.ndim != 1 or not np.all(np.isfinite(cw)) or np.any(cw < 0):
        raise KernelInputError(
            f"{where}: class weights must be a 1-D array of finite values >= 0, one per class"
        )
    if out is None:
        out = np.empty(n, dtype=np.float64)
    elif out.dtype != np.float64 or out.shape != (n,):
        raise KernelInputError(f"{where}: out must be a float64 array of shape ({n},)")
    if n:
        with kernel_guard():
            bad = fold_class_weights_kernel(y, cw, _kernel_weights(w), out)
        _bad_class(y, bad, cw.shape[0], row_offset, where)
    return out
