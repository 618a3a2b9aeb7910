"""Compensated sums of d-row partials (kernels/compensated.py).

Reference: ``math.fsum`` of the Python standard library, per element. Its
documentation says it avoids loss of precision by tracking multiple
intermediate partial sums; that the result is the exactly rounded sum (on
IEEE-754 round-half-even arithmetic, Shewchuk's exact partials) is from memory
of the CPython implementation's notes.
The pass's compensated sum must equal it, and equal itself bit for bit
however the partials are grouped (one running sum, contiguous ranges combined
in order, a pairwise tree) or ordered.
"""

from __future__ import annotations

import math

import numba
import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.kernels.compensated import (
    compensated_add,
    compensated_combine,
    csc_t_matmul_compensated,
)
from ranktide.kernels.csc import block_csc
from ranktide.kernels.errors import KernelInputError
from ranktide.kernels.sparse import csr_t_matmul_accumulate


def _partials(n=200, d=40, m=5, seed=0):
    """``n`` partials of shape (d, m), magnitudes 1e-12 .. 1e12, both signs, with cancellation."""
    rng = np.random.default_rng(seed)
    P = rng.standard_normal((n, d, m)) * 10.0 ** rng.uniform(-12, 12, (n, d, m))
    # exact cancellation: some big partials come back negated later in the sequence
    take = rng.random((n // 2, d, m)) < 0.3
    P[n // 2:][take] = -P[: n // 2][take]
    return P


def _fsum(P):
    n, d, m = P.shape
    return np.array([[math.fsum(P[:, i, j]) for j in range(m)] for i in range(d)])


def _running(P):
    """One running compensated sum, every partial through the zeroed block buffer."""
    S, C = np.zeros(P.shape[1:]), np.zeros(P.shape[1:])
    buf = np.zeros(P.shape[1:])
    for x in P:
        buf += x  # the block term formed in the zeroed buffer
        compensated_add(buf, S, C)
        assert not buf.any()  # the add leaves the buffer zeroed for the next block
    return S, C


def _grouped(P, cuts):
    """Contiguous ranges summed on their own (as dask workers do), then combined in order."""
    edges = [0, *cuts, P.shape[0]]
    S, C = _running(P[edges[0]:edges[1]])
    for a, b in zip(edges[1:-1], edges[2:], strict=True):
        S2, C2 = _running(P[a:b])
        compensated_combine(S, C, S2, C2)
    return S, C


def _tree(P):
    """Pairwise tree of combines over single-partial sums."""
    pairs = [_running(P[i:i + 1]) for i in range(P.shape[0])]
    while len(pairs) > 1:
        nxt = []
        for i in range(0, len(pairs) - 1, 2):
            (S, C), (S2, C2) = pairs[i], pairs[i + 1]
            compensated_combine(S, C, S2, C2)
            nxt.append((S, C))
        if len(pairs) % 2:
            nxt.append(pairs[-1])
        pairs = nxt
    return pairs[0]


def test_compensated_sum_is_fsum_in_every_grouping_and_order():
    P = _partials()
    want = _fsum(P)  # math.fsum: exactly rounded (Python standard library)
    # the plain running sum is off in the last bits, so the check below can fail
    assert not np.array_equal(np.add.reduce(P, axis=0), want)
    rng = np.random.default_rng(1)
    perm = rng.permutation(P.shape[0])
    results = {
        "running": _running(P),
        "two ranges": _grouped(P, [97]),
        "five ranges": _grouped(P, [3, 40, 41, 150]),
        "pairwise tree": _tree(P),
        "reversed": _running(P[::-1]),
        "permuted": _running(P[perm]),
        "permuted, three ranges": _grouped(P[perm], [60, 120]),
    }
    for name, (S, C) in results.items():
        # bit for bit, every element: S + C is the exactly rounded sum
        np.testing.assert_array_equal(S + C, want, err_msg=name)


def test_cancellation_that_the_plain_sum_loses():
    # 1e16 + 1 - 1e16: the plain sum in this order gives 0 (1 is below half an ulp of
    # 1e16); the exact sum, and math.fsum, give 1
    P = np.array([1e16, 1.0, -1e16]).reshape(3, 1, 1)
    assert (P[0] + P[1]) + P[2] == 0.0
    for order in ([0, 1, 2], [2, 0, 1], [1, 2, 0]):
        S, C = _running(P[order])
        assert (S + C)[0, 0] == math.fsum([1e16, 1.0, -1e16]) == 1.0
    S, C = _grouped(P, [1])
    assert (S + C)[0, 0] == 1.0


def test_all_zero_rows_are_skipped_and_combine_reads_only_the_second():
    S = np.array([[1.0, -0.0], [2.0, 3.0]])
    C = np.array([[1e-17, -0.0], [0.0, 0.0]])
    B = np.array([[0.0, 0.0], [0.5, 0.0]])
    compensated_add(B, S, C)
    assert np.array_equal(S, [[1.0, 0.0], [2.5, 3.0]]) and np.signbit(S[0, 1])
    assert np.signbit(C[0, 1]) and C[0, 0] == 1e-17 and not B.any()
    S2, C2 = S.copy(), C.copy()
    S2.flags.writeable = C2.flags.writeable = False  # received frames may be read-only
    compensated_combine(S, C, S2, C2)
    np.testing.assert_array_equal(S + C, 2 * (S2 + C2))


@pytest.mark.parametrize("threads", [1, 2])
def test_transposed_block_equals_buffer_then_add(threads):
    # the fused transposed-block kernel forms each column's term in the CSR kernel's
    # row order, so it must give the CSR path's bits (zeroed buffer, then the add)
    rng = np.random.default_rng(2)
    d, m = 300, 4
    S0 = rng.standard_normal((d, m)) * 1e6
    C0 = rng.standard_normal((d, m)) * 1e-11
    S_csr, C_csr, S_csc, C_csc = S0.copy(), C0.copy(), S0.copy(), C0.copy()
    before = numba.get_num_threads()
    numba.set_num_threads(min(threads, numba.config.NUMBA_NUM_THREADS))
    try:
        for seed in range(3):
            X = sp.random(120, d, density=0.05, format="csr", random_state=seed,
                          dtype=np.float32)
            X.data -= 0.5
            D = rng.standard_normal((120, m))
            buf = np.zeros((d, m))
            csr_t_matmul_accumulate(X.indptr, X.indices, X.data, D, buf)
            compensated_add(buf, S_csr, C_csr)
            T = block_csc(X.indptr, X.indices, X.data, d)
            csc_t_matmul_compensated(T, D, S_csc, C_csc)
    finally:
        numba.set_num_threads(before)
    np.testing.assert_array_equal(S_csc, S_csr)
    np.testing.assert_array_equal(C_csc, C_csr)
    assert np.any(C_csr != C0)  # the compensation did collect rounding errors


def test_bad_arrays_are_one_clear_error():
    S, C = np.zeros((4, 3)), np.zeros((4, 3))
    with pytest.raises(KernelInputError, match=r"B must be a writable C-contiguous float64 array"):
        compensated_add(np.zeros((4, 3), dtype=np.float32), S, C)
    with pytest.raises(KernelInputError, match=r"C must be .* of shape \(4, 3\)"):
        compensated_add(np.zeros((4, 3)), S, np.zeros((3, 3)))
    with pytest.raises(KernelInputError, match=r"S2 must be a float64 array of shape \(4, 3\)"):
        compensated_combine(S, C, np.zeros((4, 2)), np.zeros((4, 3)))
    X = sp.random(5, 4, density=0.5, format="csr", random_state=0, dtype=np.float32)
    T = block_csc(X.indptr, X.indices, X.data, 4)
    with pytest.raises(KernelInputError, match=r"S and C must be \(4, 2\)"):
        csc_t_matmul_compensated(T, np.zeros((5, 2)), S, C)
