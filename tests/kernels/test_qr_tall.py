"""The tall QR (CholeskyQR2 with a Householder fallback) against numpy's LAPACK QR.

Reference: numpy.linalg.qr (LAPACK geqrf/orgqr): the same R up to the signs of
its rows, Q with orthonormal columns, Q R = A.
"""

from __future__ import annotations

import numpy as np
import pytest
from ranktide.kernels.svd import qr_tall


@pytest.mark.parametrize("cond", [1.0, 1e3, 1e9])
def test_qr_tall_matches_lapack(cond):
    rng = np.random.default_rng(1)
    m, c = 4000, 30
    U, _ = np.linalg.qr(rng.normal(size=(m, c)))
    V, _ = np.linalg.qr(rng.normal(size=(c, c)))
    A = (U * np.geomspace(1.0, 1.0 / cond, c)) @ V.T
    Q, R = qr_tall(A)
    np.testing.assert_allclose(Q.T @ Q, np.eye(c), atol=1e-12)
    np.testing.assert_allclose(Q @ R, A, atol=1e-12 * np.abs(A).max())
    assert np.allclose(np.tril(R, -1), 0.0)
    _, R_ref = np.linalg.qr(A)
    # the same R up to row signs (LAPACK does not fix the signs of R's diagonal)
    signs = np.sign(np.diag(R)) * np.sign(np.diag(R_ref))
    np.testing.assert_allclose(R, signs[:, None] * R_ref, atol=1e-9 * np.abs(R_ref).max())


def test_rank_deficient_and_wide_blocks_fall_back_to_lapack():
    rng = np.random.default_rng(2)
    B = rng.normal(size=(2000, 3))
    A = np.hstack([B, B[:, :1] * 2.0])  # rank 3 of 4: Cholesky of A^T A breaks down
    Q, R = qr_tall(A)
    np.testing.assert_allclose(Q @ R, A, atol=1e-10)
    np.testing.assert_allclose(Q.T @ Q, np.eye(4), atol=1e-12)
    W = rng.normal(size=(10, 6))  # not tall enough: LAPACK directly
    Qw, Rw = qr_tall(W)
    np.testing.assert_allclose(Qw @ Rw, W, atol=1e-12)
