"""The solver's subspace step (ranktide.solver.subspace): block power iteration,
Rayleigh-Ritz, the per-pass two-sided update, the lam_max Krylov union, orthonormalization.

References: ``numpy.linalg.svd`` (dense singular values/vectors),
``scipy.linalg.subspace_angles`` (principal angles between subspaces), ``scipy.linalg.svd``
with the gesvd driver (the SVD fallback).
"""

from __future__ import annotations

import numpy as np
import pytest
from ranktide.kernels.errors import KernelConfigError
from ranktide.solver.subspace import (
    KrylovUnion,
    fill,
    next_blocks,
    orth_against,
    orth_rank_revealing,
    ritz_extend,
    ritz_step,
    sigma1_lower_bound,
    top_singular_pairs,
)
from scipy.linalg import subspace_angles


def _with_spectrum(m, n, sv, seed, tail=0.5):
    """m x n matrix with singular values ``sv`` (padded with a decaying tail)."""
    rng = np.random.default_rng(seed)
    U = np.linalg.qr(rng.standard_normal((m, n)))[0]
    V = np.linalg.qr(rng.standard_normal((n, n)))[0]
    s = np.concatenate([sv, np.linspace(tail, 0.01, n - len(sv))])
    return (U * s) @ V.T


def _check_pairs(res, G, t, *, tol_sigma, tol_angle):
    Ur, S, Vt = np.linalg.svd(G, full_matrices=False)  # reference: numpy.linalg.svd
    np.testing.assert_allclose(res.sigma, S[:t], rtol=tol_sigma)
    assert np.all(res.sigma <= S[:t] * (1 + 1e-12))  # Rayleigh-Ritz values are lower bounds
    # reference: scipy.linalg.subspace_angles between found and true top-t subspaces
    assert np.max(subspace_angles(res.U, Ur[:, :t])) < tol_angle
    assert np.max(subspace_angles(res.V, Vt[:t].T)) < tol_angle
    np.testing.assert_allclose(res.U.T @ res.U, np.eye(t), atol=1e-10)
    np.testing.assert_allclose(res.V.T @ res.V, np.eye(t), atol=1e-12)


def test_dense_top_pairs_match_numpy_svd():
    G = _with_spectrum(200, 60, [9.0, 6.0, 4.0, 2.0], seed=0)
    res = top_singular_pairs(G, 3, oversample=3, tol=1e-10, seed=1)
    assert res.converged and res.residual <= 1e-10
    _check_pairs(res, G, 3, tol_sigma=1e-12, tol_angle=1e-8)


def test_clustered_top_values():
    G = _with_spectrum(300, 80, [10.0, 9.99, 9.98, 5.0], seed=2)
    res = top_singular_pairs(G, 3, oversample=4, tol=1e-9, seed=3, max_iter=500)
    assert res.converged
    # clustered values: individual vectors are ill-determined, the subspace is not
    _check_pairs(res, G, 3, tol_sigma=1e-10, tol_angle=1e-6)


def test_warm_start_converges_in_fewer_iterations():
    G = _with_spectrum(250, 70, [8.0, 7.0, 6.5, 6.0], seed=8)
    cold = top_singular_pairs(G, 2, oversample=2, tol=1e-9, seed=9, max_iter=500)
    G2 = G + 1e-3 * np.random.default_rng(10).standard_normal(G.shape)
    cold2 = top_singular_pairs(G2, 2, oversample=2, tol=1e-9, seed=9, max_iter=500)
    warm2 = top_singular_pairs(G2, 2, oversample=2, tol=1e-9, seed=9, max_iter=500,
                               warm_start=cold.block)
    assert cold2.converged and warm2.converged
    assert warm2.n_iter < cold2.n_iter
    np.testing.assert_allclose(warm2.sigma, np.linalg.svd(G2, compute_uv=False)[:2],
                               rtol=1e-9)  # reference: numpy.linalg.svd


def test_same_seed_same_result_and_degenerate_inputs():
    G = _with_spectrum(120, 40, [3.0, 2.0], seed=11)
    a = top_singular_pairs(G, 2, tol=1e-4, seed=12)
    b = top_singular_pairs(G, 2, tol=1e-4, seed=np.random.default_rng(12))
    assert np.array_equal(a.U, b.U) and np.array_equal(a.block, b.block)
    rng = np.random.default_rng(14)
    R2 = rng.standard_normal((90, 2)) @ rng.standard_normal((2, 30))  # rank 2
    res = top_singular_pairs(R2, 4, oversample=2, tol=1e-10, seed=15)
    S = np.linalg.svd(R2, compute_uv=False)  # reference: numpy.linalg.svd
    assert res.sigma.shape == (2,)
    np.testing.assert_allclose(res.sigma, S[:2], rtol=1e-12)
    z = top_singular_pairs(np.zeros((10, 6)), 2)
    assert z.sigma.shape == (0,) and z.sigma1 == 0.0 and z.converged


def test_ritz_step_on_a_redundant_basis():
    G = _with_spectrum(60, 20, [5.0, 3.0], seed=30)
    rng = np.random.default_rng(31)
    B = rng.standard_normal((20, 4))
    B = np.hstack([B, B @ rng.standard_normal((4, 3))])  # 7 columns spanning 4 directions
    sig, R, GR = ritz_step(B, G @ B)
    assert sig.shape == (4,)
    np.testing.assert_allclose(R.T @ R, np.eye(4), atol=1e-12)
    np.testing.assert_allclose(GR, G @ R, atol=1e-12)  # the products rotate exactly
    Q = np.linalg.qr(B[:, :4])[0]
    # reference: numpy.linalg.svd of G on an orthonormal basis of the same span
    np.testing.assert_allclose(sig, np.linalg.svd(G @ Q, compute_uv=False), rtol=1e-12)
    full = ritz_step(np.eye(20), G)[0]  # the whole space: the singular values themselves
    np.testing.assert_allclose(full, np.linalg.svd(G, compute_uv=False), rtol=1e-12)


def test_ritz_extend_matches_the_svd_on_the_joined_span():
    G = _with_spectrum(80, 30, [6.0, 4.0, 3.9, 2.0], seed=32)
    rng = np.random.default_rng(33)
    Q = np.linalg.qr(rng.standard_normal((30, 5)))[0]
    B = rng.standard_normal((30, 3))
    B = np.hstack([B, Q[:, :2] @ rng.standard_normal((2, 2)), B[:, :1] * 2.0])  # 3 new dirs
    sig, R, GR = ritz_extend(Q, G @ Q, B, G @ B, cap=6)
    # reference: numpy.linalg.svd of G on an orthonormal basis of span([Q, B])
    basis = np.linalg.svd(np.hstack([Q, B]), full_matrices=False)[0][:, :8]
    want = np.linalg.svd(G @ basis, compute_uv=False)[:6]
    np.testing.assert_allclose(sig, want, rtol=1e-10)
    np.testing.assert_allclose(R.T @ R, np.eye(6), atol=1e-12)
    np.testing.assert_allclose(GR, G @ R, atol=1e-12)
    empty = ritz_extend(np.zeros((30, 0)), np.zeros((80, 0)), B[:, :0], np.zeros((80, 0)), 4)
    assert empty[0].shape == (0,) and empty[1].shape == (30, 0)


def _iterate(G, U, V, p, n_pass, seed):
    """The solver's per-pass loop: fill, products, sigma bound, next_blocks."""
    rng = np.random.default_rng(seed)
    Psi = fill(np.zeros((G.shape[0], 0)), U, p, rng)
    Om = fill(np.zeros((G.shape[1], 0)), V, p, rng)
    sig = []
    for _ in range(n_pass):
        G_VO, Gt_Psi = G @ np.hstack([V, Om]), G.T @ Psi
        sig.append(sigma1_lower_bound(G_VO, np.hstack([G.T @ U, Gt_Psi])))
        Psi, Om = next_blocks(U=U, V=V, G_VO=G_VO, Gt_Psi=Gt_Psi, expand=p,
                              n_rotations=U.shape[1])
        Psi = fill(Psi, U, p, rng, cap=U.shape[1] + p)
        Om = fill(Om, V, p, rng)
        np.testing.assert_allclose(U.T @ Psi, 0.0, atol=1e-12)
        np.testing.assert_allclose(V.T @ Om, 0.0, atol=1e-12)
        np.testing.assert_allclose(Om.T @ Om, np.eye(Om.shape[1]), atol=1e-12)
    return np.array(sig)


def test_per_pass_two_sided_iteration():
    d, k = 80, 30
    G = _with_spectrum(d, k, [6.0, 4.0, 3.5, 3.0], seed=19)
    S_true = np.linalg.norm(G, 2)  # reference: numpy (spectral norm via SVD)
    # W = 0 (r = 0): plain two-sided subspace iteration, converges to sigma_1
    sig0 = _iterate(G, np.zeros((d, 0)), np.zeros((k, 0)), 3, 40, seed=18)
    assert np.all(sig0 <= S_true * (1 + 1e-12))  # always a lower bound
    np.testing.assert_allclose(sig0[-1], S_true, rtol=1e-10)
    # with a model (random U, V): still a lower bound at every pass, and close to sigma_1
    rng = np.random.default_rng(20)
    U = np.linalg.qr(rng.standard_normal((d, 2)))[0]
    V = np.linalg.qr(rng.standard_normal((k, 2)))[0]
    sig = _iterate(G, U, V, 3, 40, seed=21)
    assert np.all(sig <= S_true * (1 + 1e-12))
    np.testing.assert_allclose(sig[-1], S_true, rtol=1e-3)


def test_krylov_union_bounds_and_beats_the_last_block():
    d, k, p = 400, 60, 4
    # clustered top values over a slowly decaying bulk
    G = _with_spectrum(d, k, [1.0, 0.995, 0.99, 0.985], seed=40, tail=0.8)
    S_true = np.linalg.norm(G, 2)  # reference: numpy (spectral norm via SVD)
    rng = np.random.default_rng(41)
    Om = fill(np.zeros((k, 0)), np.zeros((k, 0)), p, rng)
    Psi = fill(np.zeros((d, 0)), np.zeros((d, 0)), p, rng)
    kry = KrylovUnion.empty(d, k)
    union, single = [], []
    for _ in range(6):
        G_O, Gt_P = G @ Om, G.T @ Psi
        union.append(kry.add(right=Om, g_right=G_O, left=Psi, gt_left=Gt_P, cap=2 * p))
        single.append(sigma1_lower_bound(G_O, Gt_P))
        np.testing.assert_allclose(kry.GR, G @ kry.R, atol=1e-12)  # compression is exact
        np.testing.assert_allclose(kry.GtL, G.T @ kry.L, atol=1e-12)
        assert kry.R.shape[1] <= 2 * p and kry.L.shape[1] <= 2 * p
        Psi, Om = next_blocks(U=np.zeros((d, 0)), V=np.zeros((k, 0)), G_VO=G_O, Gt_Psi=Gt_P,
                              expand=p, n_rotations=0)
        Om = fill(Om, np.zeros((k, 0)), p, rng)
    union, single = np.array(union), np.array(single)
    assert np.all(union <= S_true * (1 + 1e-12))  # Rayleigh-Ritz: lower bounds
    assert np.all(np.diff(union) >= -1e-12)  # the union only grows
    assert np.all(union >= single - 1e-12)
    assert S_true - union[-1] < 0.75 * (S_true - single[-1])  # and is closer


def test_bad_arguments():
    G = np.ones((5, 4))
    with pytest.raises(KernelConfigError, match="n_pairs=5 must be between 1 and min"):
        top_singular_pairs(G, 5)
    with pytest.raises(KernelConfigError, match="warm_start must have 4 rows"):
        top_singular_pairs(G, 1, warm_start=np.ones((3, 1)))
    with pytest.raises(KernelConfigError, match="non-finite"):
        top_singular_pairs(np.full((3, 3), np.nan), 1)
    with pytest.raises(KernelConfigError, match="need oversample >= 0"):
        top_singular_pairs(G, 1, oversample=-1)
    with pytest.raises(KernelConfigError, match="disagree"):
        next_blocks(U=np.eye(4)[:, :1], V=np.eye(3)[:, :1], G_VO=np.ones((5, 1)),
                    Gt_Psi=np.ones((3, 0)), expand=0, n_rotations=0)
    with pytest.raises(KernelConfigError, match="A must be 2-D"):
        orth_rank_revealing(np.ones(3))
    with pytest.raises(KernelConfigError, match="A has a non-finite entry"):
        orth_rank_revealing(np.full((3, 2), np.inf))
    with pytest.raises(KernelConfigError, match="U has 5 rows but A has 4"):
        orth_against(np.ones((4, 2)), np.eye(5)[:, :2])


def test_orth_rank_revealing_drops_dependent_columns():
    rng = np.random.default_rng(16)
    B = rng.standard_normal((50, 3))
    A = np.hstack([B, B @ rng.standard_normal((3, 4))])  # 7 columns, rank 3
    Q = orth_rank_revealing(A)
    assert Q.shape == (50, 3)
    np.testing.assert_allclose(Q.T @ Q, np.eye(3), atol=1e-13)
    assert np.max(subspace_angles(Q, B)) < 1e-10  # reference: scipy.linalg.subspace_angles
    # a plain QR keeps 7 columns: 4 spurious directions outside range(A)
    Qp = np.linalg.qr(A)[0]
    assert Qp.shape[1] == 7
    assert np.linalg.norm(Qp[:, 3:].T @ orth_rank_revealing(A)) < 1e-6
    assert orth_rank_revealing(np.zeros((5, 3))).shape == (5, 0)


def test_power_block_not_orthogonal_to_v_overshoots():
    # DESIGN §7 step 2: [V, Omega] must be orthonormal for the Rayleigh-Ritz bound
    G = _with_spectrum(70, 25, [4.0, 2.0], seed=20)
    S_true = np.linalg.svd(G, compute_uv=False)[0]  # reference: numpy.linalg.svd
    v1 = np.linalg.svd(G)[2][0][:, None]
    rng = np.random.default_rng(21)
    raw = np.hstack([v1 + 1e-9 * rng.standard_normal((25, 1)), rng.standard_normal((25, 2))])
    plain = np.linalg.qr(raw)[0]  # orthonormal by itself, not against V
    over = np.linalg.norm(G @ np.hstack([v1, plain]), 2)
    np.testing.assert_allclose(over, np.sqrt(2) * S_true, rtol=1e-6)  # the sqrt(2) overshoot
    good = orth_against(raw, v1, 1e-6)
    assert good.shape[1] == 2
    assert np.linalg.norm(G @ np.hstack([v1, good]), 2) <= S_true * (1 + 1e-12)


def test_orth_against():
    rng = np.random.default_rng(17)
    U = np.linalg.qr(rng.standard_normal((60, 4)))[0]
    A = np.hstack([rng.standard_normal((60, 3)), U @ rng.standard_normal((4, 2))])
    Q = orth_against(A, U)
    assert Q.shape == (60, 3)  # the two columns inside span(U) are dropped
    np.testing.assert_allclose(U.T @ Q, 0.0, atol=1e-13)
    np.testing.assert_allclose(Q.T @ Q, np.eye(3), atol=1e-13)
    P = A - U @ (U.T @ A)
    assert np.max(subspace_angles(Q, P[:, :3])) < 1e-10  # reference: scipy subspace_angles


def test_svd_falls_back_to_gesvd_when_gesdd_fails(monkeypatch):
    """kernels.svd: when numpy's gesdd raises, scipy's gesvd answers (scipy.linalg reference)."""
    import scipy.linalg
    from ranktide.kernels import svd as svd_mod

    A = np.random.default_rng(0).standard_normal((30, 7))
    want = scipy.linalg.svd(A, full_matrices=False, lapack_driver="gesvd")

    def refuse(*args, **kwargs):
        raise np.linalg.LinAlgError("SVD did not converge")

    monkeypatch.setattr(svd_mod.np.linalg, "svd", refuse)
    U, s, Vt = svd_mod.svd(A)
    np.testing.assert_allclose(s, want[1], rtol=1e-14)
    np.testing.assert_allclose((U * s) @ Vt, A, atol=1e-12)
    np.testing.assert_allclose(svd_mod.singular_values(A), want[1], rtol=1e-14)


@pytest.mark.parametrize("shape, rank", [((4000, 40), 40), ((3000, 30), 5), ((200, 150), 150)])
def test_dense_top_pairs_against_numpy_svd(shape, rank):
    from ranktide.solver.subspace import dense_top_pairs

    # reference: numpy.linalg.svd (LAPACK), compared sign-invariantly
    rng = np.random.default_rng(7)
    d, k = shape
    scale = np.geomspace(1, 1e-3, rank)[:, None]
    A = rng.normal(size=(d, rank)) @ (rng.normal(size=(rank, k)) * scale)
    U, s, V = dense_top_pairs(A, 6)
    u_ref, s_ref, vt_ref = np.linalg.svd(A, full_matrices=False)
    np.testing.assert_allclose(s, s_ref[:6], rtol=1e-10, atol=1e-10 * s_ref[0])
    m = min(6, rank)  # beyond the rank the directions are any orthonormal completion
    np.testing.assert_allclose(np.abs(np.sum(U[:, :m] * u_ref[:, :m], axis=0)), 1.0, atol=1e-8)
    np.testing.assert_allclose(np.abs(np.sum(V[:, :m] * vt_ref[:m].T, axis=0)), 1.0, atol=1e-8)
    np.testing.assert_allclose(U.T @ U, np.eye(6), atol=1e-12)
