"""Per-block sums of the losses' convex conjugates at a scaled residual (duality gap).

For ``f(Z) = sum_i omega_i loss(z_i; y_i)`` and a dual point ``Theta = c R``,
where ``R`` holds the residual rows ``w_i * a_i`` with ``a_i = dloss/dz(z_i)``,
the Fenchel dual needs ``sum_i w_i loss*(c a_i)``. With ``v = c a_i``:

| loss       | loss*(v) (finite where shown)                         |
|------------|-------------------------------------------------------|
| softmax    | sum_j q_j log q_j,  q = v + e_y in the simplex        |
| squared    | 0.5 ||v||^2 + v^T y                                   |
| multilabel | sum_j h(v_j + y_j),  h(t) = t log t + (1 - t) log(1 - t), t in [0, 1] |

(standard conjugate pairs: negative entropy for log-sum-exp, Boyd &
Vandenberghe, Convex Optimization, 2004, example 3.25; the quadratic; the
binary entropy for the softplus). For ``0 <= c <= 1`` the points stay in the
domains: ``c (p - e_y) + e_y = c p + (1 - c) e_y`` is a probability vector and
``c (sigma - y) + y`` lies in [0, 1].

Each kernel takes the residual as the residual kernels of
:mod:`kernels.losses` leave it (unnormalized, ``w_i a_i``), so ``a_i`` is
recovered as ``R_i / w_i``; rows of weight 0 contribute nothing. Rounding can
push a ``q`` a few ulps outside [0, 1]; it is clipped. Rows are summed in a
fixed number of chunks added in order, so the sum does not depend on threads.

Softmax needs no log per entry. Off the target, ``q_j = c p_j``, so with
``H_i = sum_j p_j log p_j`` (which the residual kernel hands over, see
``out_negent`` of :func:`kernels.losses.softmax_residual`)::

    sum_j q_j log q_j = c log(c) (1 - p_y) + c (H_i - p_y log p_y) + q_y log q_y,
    q_y = c p_y + 1 - c,

three logs per row instead of k.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .errors import KernelInputError
from .losses import _check_classes, _check_tags, _check_weights, _kernel_weights
from .threads import kernel_guard

__all__ = ["conjugate_sum"]

_N_CHUNKS = 64


@njit(nogil=True, cache=True, inline="always")
def _xlogx(t):  # pragma: no cover - compiled
    return t * math.log(t) if t > 0.0 else 0.0


@njit(nogil=True, cache=True, inline="always")
def _clip01(t):  # pragma: no cover - compiled
    return min(1.0, max(0.0, t))


_SOFTMAX, _SQUARED, _MULTILABEL = 0, 1, 2
_LOSS_CODES = {"softmax": _SOFTMAX, "squared": _SQUARED, "multilabel": _MULTILABEL}


@njit(nogil=True, cache=True, inline="always")
def _row_conjugate(R, i, k, c, wi, code, y, Y, tagged, H):  # pragma: no cover
    """``loss*(c R_i / w_i)`` of row ``i`` (``tagged``: the row's tag flags, multilabel;
    ``H``: the rows' negative entropies, softmax)."""
    acc = 0.0
    scale = c / wi
    if code == _SOFTMAX:
        py = _clip01(R[i, y[i]] / wi + 1.0)
        acc = (_xlogx(c) * (1.0 - py) + c * (H[i] - _xlogx(py))
               + _xlogx(_clip01(c * py + 1.0 - c)))
    elif code == _SQUARED:
        for j in range(k):
            v = scale * R[i, j]
            acc += 0.5 * v * v + v * Y[i, j]
    else:
        for j in range(k):
            t = _clip01(scale * R[i, j] + (1.0 if tagged[j] else 0.0))
            acc += _xlogx(t) + _xlogx(1.0 - t)
    return acc


@njit(nogil=True, cache=True, parallel=True)
def conjugate_kernel(R, code, y, Y, tag_indptr, tag_indices, w, c, H):  # pragma: no cover
    """``sum_i w_i loss*(c R_i / w_i; y_i)``; ``code`` picks the loss, the other
    loss's target arrays may be empty (see :func:`conjugate_sum`)."""
    n, k = R.shape
    has_w = w.shape[0] > 0
    nch = min(n, _N_CHUNKS)
    part = np.zeros(nch)
    for ch in prange(nch):
        tagged = np.zeros(k, dtype=np.bool_)
        for i in range(n * ch // nch, n * (ch + 1) // nch):
            wi = w[i] if has_w else 1.0
            if wi <= 0.0:
                continue
            if code == _MULTILABEL:
                for q in range(tag_indptr[i], tag_indptr[i + 1]):
                    tagged[tag_indices[q]] = True
            part[ch] += wi * _row_conjugate(R, i, k, c, wi, code, y, Y, tagged, H)
            if code == _MULTILABEL:
                for q in range(tag_indptr[i], tag_indptr[i + 1]):
                    tagged[tag_indices[q]] = False
    total = 0.0
    for ch in range(nch):
        total += part[ch]
    return total


def conjugate_sum(R: np.ndarray, targets, w: np.ndarray | None, loss: str, c: float, *,
                  negentropy: np.ndarray | None = None, where: str = "block") -> float:
    """``sum_i w_i loss*(c R_i / w_i; y_i)`` over one block (see the module docstring).

    Parameters
    ----------
    R : (n_b, k) float64
        The unnormalized residual ``w_i * dloss/dz_i`` (as the residual kernels leave it).
    targets
        softmax: (n_b,) int class ids; squared: (n_b, k) float values;
        multilabel: an ``(indptr, indices)`` pair of the tag CSR arrays.
    w : (n_b,) float or None
        The row weights the residual was formed with (class weights folded in).
    loss : {"softmax", "squared", "multilabel"}
    c : float
        Dual scale in [0, 1].
    negentropy : (n_b,) float64, softmax only (required there)
        Each row's ``sum_j p_ij log p_ij``, from the ``out_negent`` of
        :func:`kernels.losses.softmax_residual` on the same scores.

    Returns
    -------
    float
    """
    if not (isinstance(R, np.ndarray) and R.ndim == 2 and R.dtype == np.float64):
        raise KernelInputError(f"{where}: the residual must be a 2-D float64 array")
    if not 0.0 <= c <= 1.0:
        raise KernelInputError(f"{where}: dual scale {c!r} must lie in [0, 1]")
    n, k = R.shape
    if n == 0:
        return 0.0
    w = _kernel_weights(_check_weights(w, n, where))
    if loss not in _LOSS_CODES:
        raise KernelInputError(f"{where}: unknown loss {loss!r}")
    y, Y = np.zeros(0, np.int64), np.zeros((0, 0))
    tp, ti = np.zeros(1, np.int64), np.zeros(0, np.int64)
    H = np.zeros(0)
    if loss == "softmax":
        y = _check_classes(targets, n, where)
        H = np.asarray(negentropy, dtype=np.float64) if negentropy is not None else H
        if H.shape != (n,):
            raise KernelInputError(f"{where}: the softmax conjugate needs the rows' negative "
                                   f"entropies, shape ({n},) (out_negent of softmax_residual)")
    elif loss == "squared":
        Y = np.asarray(targets, dtype=np.float64)
        if Y.shape != (n, k):
            raise KernelInputError(f"{where}: target values must have shape {(n, k)}")
    else:
        tp, ti = _check_tags(targets[0], targets[1], n, where)
    with kernel_guard():
        return float(conjugate_kernel(R, _LOSS_CODES[loss], y, Y, tp, ti, w, c, H))
