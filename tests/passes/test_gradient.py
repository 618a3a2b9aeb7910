"""The solver-style gradient pass and the best intercept.

References: the loss and gradient formulas of DESIGN §2 evaluated on the whole
matrix with dense numpy, scipy.special (log_softmax, softmax, expit,
log_expit), scikit-learn's log_loss for the softmax objective,
scipy.optimize.approx_fprime (finite differences of f) and
scipy.optimize.minimize (the best intercept alone).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from ranktide.errors import ConfigError, InputError, ModelError
from ranktide.kernels import products
from ranktide.losses import get_loss
from ranktide.passes.engine import PassProfile
from ranktide.passes.gradient import PassRequest, gradient_pass
from ranktide.passes.intercept import best_intercept
from ranktide.store.memory_source import MemorySource
from scipy.optimize import approx_fprime, minimize
from scipy.special import expit, log_expit, log_softmax, softmax
from sklearn.metrics import log_loss

LOSSES = ["softmax", "squared", "multilabel"]


def _problem(loss, *, n=240, d=30, k=6, seed=0, weights=True):
    rng = np.random.default_rng(seed)
    X = sp.random(n, d, density=0.2, format="csr", random_state=rng, dtype=np.float32)
    if loss == "softmax":
        y = rng.integers(0, k, n).astype(np.int32)
    elif loss == "squared":
        y = rng.standard_normal((n, k)).astype(np.float32)
    else:
        y = sp.csr_matrix((rng.random((n, k)) < 0.3).astype(np.float32))
    w = rng.random(n).astype(np.float32) + 0.1 if weights else None
    return X, y, w


def _model(d, k, r=3, p=2, pp=4, seed=1):
    rng = np.random.default_rng(seed)
    U = np.linalg.qr(rng.standard_normal((d, r)))[0]
    V = np.linalg.qr(rng.standard_normal((k, r)))[0]
    s = np.sort(rng.random(r) * 2)[::-1]
    b = rng.standard_normal(k) * 0.3
    Omega = rng.standard_normal((k, p))
    Psi = rng.standard_normal((d, pp))
    return U, s, V, b, Omega, Psi


def _dense_f_and_R(loss, X, y, w, W, b, cw=None):
    """f and R = w * dloss/dz / sum(w) on the whole matrix (DESIGN §2)."""
    Xd = X.toarray().astype(np.float64)
    n = Xd.shape[0]
    Z = Xd @ W + b
    w = np.ones(n) if w is None else w.astype(np.float64)
    if loss == "softmax":
        if cw is not None:
            w = w * cw[y]
        # scipy.special.log_softmax / softmax as the reference
        lossv = -log_softmax(Z, axis=1)[np.arange(n), y]
        D = softmax(Z, axis=1)
        D[np.arange(n), y] -= 1
    elif loss == "squared":
        D = Z - y
        lossv = 0.5 * (D**2).sum(1)
    else:
        Y = y.toarray()
        # log(1 + exp(z)) - y z = -log_expit(z) + (1 - y) z  (scipy.special)
        lossv = (-log_expit(Z) + (1 - Y) * Z).sum(1)
        D = expit(Z) - Y
    f = float(w @ lossv / w.sum())
    R = w[:, None] * D / w.sum()
    return f, R, Xd


@pytest.mark.parametrize("backend", ["serial", "threads"])
@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("budget", [{"block_rows": 1000}, {"block_bytes": 2000}])
def test_pass_matches_dense_reference(loss, backend, budget):
    X, y, w = _problem(loss)
    n, d = X.shape
    k = 6
    U, s, V, b, Om, Psi = _model(d, k)
    src = MemorySource(X, y, weights=w, n_outputs=k)
    req = PassRequest(loss, U, s, V, b, Omega=Om, Psi=Psi, dense_gradient=True,
                      keep_projections=True)
    res = gradient_pass(src, req, backend=backend, **budget)
    W = (U * s) @ V.T
    f, R, Xd = _dense_f_and_R(loss, X, y, w, W, b)
    G = Xd.T @ R
    tol = {"rtol": 1e-10, "atol": 1e-13}
    assert res.n_rows == n
    np.testing.assert_allclose(res.weight_total, w.astype(np.float64).sum(), rtol=1e-12)
    np.testing.assert_allclose(res.loss, f, rtol=1e-11)
    np.testing.assert_allclose(res.grad_b, R.sum(0), **tol)
    np.testing.assert_allclose(res.G, G, **tol)
    np.testing.assert_allclose(res.GV, G @ V, **tol)
    np.testing.assert_allclose(res.GOmega, G @ Om, **tol)
    np.testing.assert_allclose(res.Gt_Psi, G.T @ Psi, **tol)
    np.testing.assert_allclose(res.Gt_U, G.T @ U, **tol)
    np.testing.assert_allclose(res.inner, np.sum(G * W), rtol=1e-10, atol=1e-13)
    XQ = np.vstack([p.XQ for p in res.projections])
    np.testing.assert_allclose(XQ, Xd @ np.hstack([U, Psi]), rtol=1e-12, atol=1e-12)
    assert [p.start for p in res.projections] == sorted(p.start for p in res.projections)
    assert res.projections[-1].stop == n


def test_softmax_loss_equals_sklearn_log_loss():
    X, y, w = _problem("softmax", seed=4)
    U, s, V, b, _, _ = _model(30, 6)
    res = gradient_pass(MemorySource(X, y, weights=w, n_outputs=6),
                        PassRequest("softmax", U, s, V, b), block_rows=50)
    P = softmax(X.toarray() @ ((U * s) @ V.T) + b, axis=1)
    # scikit-learn's weighted mean cross-entropy
    ref = log_loss(y, P, sample_weight=w, labels=np.arange(6))
    np.testing.assert_allclose(res.loss, ref, rtol=1e-9)


@pytest.mark.parametrize("backend", ["serial", "threads"])
def test_pass_conjugate_is_the_softmax_entropy_sum(backend):
    # closed form (Boyd & Vandenberghe 2004, ex. 3.25): loss*(c a) = sum_j q_j log q_j with
    # q = c softmax(z) + (1 - c) e_y; the pass gives its weighted mean (scipy.special)
    from scipy.special import xlogy

    X, y, w = _problem("softmax", seed=4)
    U, s, V, b, _, _ = _model(30, 6)
    c = 0.8
    res = gradient_pass(MemorySource(X, y, weights=w, n_outputs=6),
                        PassRequest("softmax", U, s, V, b, dual_scale=c), block_rows=50,
                        backend=backend)
    E = np.eye(6)[y]
    q = c * softmax(X.toarray() @ ((U * s) @ V.T) + b, axis=1) + (1 - c) * E
    w64 = np.asarray(w, dtype=np.float64)
    np.testing.assert_allclose(res.conjugate, np.sum(w64 * xlogy(q, q).sum(axis=1)) / w64.sum(),
                               rtol=1e-10)
    off = gradient_pass(MemorySource(X, y, weights=w, n_outputs=6),
                        PassRequest("softmax", U, s, V, b), block_rows=50)
    assert off.conjugate == 0.0 and off.loss == res.loss


@pytest.mark.parametrize("loss", LOSSES)
def test_gradient_against_finite_differences(loss):
    # tiny problem: W of full rank min(d, k), so W <-> (U, s, V) by an SVD
    d, k = 5, 3
    X, y, w = _problem(loss, n=40, d=d, k=k, seed=7)
    src = MemorySource(X, y, weights=w, n_outputs=k)
    rng = np.random.default_rng(3)
    W0 = rng.standard_normal((d, k)) * 0.5
    b0 = rng.standard_normal(k) * 0.2

    def request(theta, **kw):
        W = theta[: d * k].reshape(d, k)
        U, s, Vt = np.linalg.svd(W, full_matrices=False)
        return PassRequest(loss, U, s, Vt.T, theta[d * k:], **kw)

    def f(theta):
        return gradient_pass(src, request(theta)).loss

    theta0 = np.concatenate([W0.ravel(), b0])
    res = gradient_pass(src, request(theta0, dense_gradient=True), block_rows=13)
    # scipy.optimize.approx_fprime: forward differences, error O(eps)
    fd = approx_fprime(theta0, f, 1e-7)
    np.testing.assert_allclose(res.G.ravel(), fd[: d * k], rtol=1e-4, atol=1e-6)
    np.testing.assert_allclose(res.grad_b, fd[d * k:], rtol=1e-4, atol=1e-6)


@pytest.mark.parametrize("loss", LOSSES)
def test_passes_with_many_dense_chunks_per_block(loss, monkeypatch):
    # Blocks of 97 rows in dense chunks of 8 rows (kernels.products.CHUNK_BYTES made
    # tiny: 13 chunks per block), with and without weights: the dense numpy reference
    # (DESIGN §2 on the whole matrix) to rounding, and the serial and threads backends
    # bit for bit.
    monkeypatch.setattr(products, "CHUNK_BYTES", 8 * 8 * 6)
    assert products.dense_chunk_rows(6) == 8
    for weighted in (False, True):
        X, y, w = _problem(loss, n=300, seed=21, weights=weighted)
        U, s, V, b, Om, Psi = _model(30, 6)
        src = MemorySource(X, y, weights=w, n_outputs=6)
        req = PassRequest(loss, U, s, V, b, Omega=Om, Psi=Psi, dense_gradient=True)
        a = gradient_pass(src, req, block_rows=97)
        t = gradient_pass(src, req, block_rows=97, backend="threads", n_threads=2)
        for name in ("grad_b", "G_VO", "Gt_Psi", "Gt_U", "G"):
            np.testing.assert_array_equal(getattr(t, name), getattr(a, name), err_msg=name)
        assert a.loss == t.loss and a.inner == t.inner
        f, R, Xd = _dense_f_and_R(loss, X, y, w, (U * s) @ V.T, b)
        G = Xd.T @ R
        tol = {"rtol": 1e-10, "atol": 1e-13}
        np.testing.assert_allclose(a.loss, f, rtol=1e-11)
        np.testing.assert_allclose(a.G, G, **tol)
        np.testing.assert_allclose(a.G_VO, G @ np.hstack([V, Om]), **tol)
        np.testing.assert_allclose(a.Gt_Psi, G.T @ Psi, **tol)
        np.testing.assert_allclose(a.Gt_U, G.T @ U, **tol)
        np.testing.assert_allclose(a.grad_b, R.sum(axis=0), **tol)


def test_serial_and_threads_passes_are_bit_identical():
    # Reference: the serial backend. The threads backend folds the same block terms in
    # block order into the same compensated sums: every figure has the same bits.
    X, y, w = _problem("softmax", n=600, d=80, k=10, seed=11)
    U, s, V, b, Om, Psi = _model(80, 10, r=4)
    src = MemorySource(X, y, weights=w, n_outputs=10)
    req = PassRequest("softmax", U, s, V, b, Omega=Om, Psi=Psi, dense_gradient=True)
    a = gradient_pass(src, req, block_rows=31)
    t = gradient_pass(src, req, block_rows=31, backend="threads", n_threads=3)
    for name in ("grad_b", "G_VO", "Gt_Psi", "Gt_U", "G"):
        np.testing.assert_array_equal(getattr(t, name), getattr(a, name), err_msg=name)
    assert a.loss == t.loss and a.inner == t.inner


@pytest.mark.parametrize("mode", ["csc", "csr"])
def test_range_and_tree_reductions_give_the_serial_pass_bit_for_bit(mode):
    """Blocks reduced in ranges (as dask workers do), then combined, or in a pairwise tree.

    Reference: the serial pass (one running compensated sum in block order). The
    d-row accumulators are compensated sums, so neither grouping changes their bits
    (kernels/compensated.py); the plain sums of the small figures are left out here,
    since only the serial fold (kept by every backend) promises their bits.
    """
    from ranktide.passes.gradient import _finalize, _state, block_products_kernels, combine_partials
    from ranktide.passes.kernel_path import CHOOSER

    X, y, w = _problem("squared", n=700, d=90, k=8, seed=13)
    X.data *= np.float32(1e3) ** np.random.default_rng(0).uniform(-1, 1, X.nnz).astype(
        np.float32)  # a wide range of magnitudes: plain regrouped sums differ
    U, s, V, b, Om, Psi = _model(90, 8, r=3)
    src = MemorySource(X, y, weights=w, n_outputs=8)
    req = PassRequest("squared", U, s, V, b, Omega=Om, Psi=Psi, dense_gradient=True)
    ranges = src.block_ranges(rows=29)

    def parts():
        st = _state(req, "test")
        return st, [block_products_kernels(src.read_block(a, z), st) for a, z in ranges]

    def fold(ps):
        acc = combine_partials([ps[0]])
        for p in ps[1:]:
            acc = combine_partials([acc, p])
        return acc

    with CHOOSER.forced(mode):
        serial = gradient_pass(src, req, block_rows=29)
        st, ps = parts()
        cuts = [0, 5, 6, 17, len(ps)]
        acc = fold([fold(ps[a:z]) for a, z in zip(cuts[:-1], cuts[1:], strict=True)])
        ranged = _finalize(acc, st, None, "test")
        st, ps = parts()
        level = [combine_partials([p]) for p in ps]
        while len(level) > 1:
            level = [combine_partials(level[i:i + 2]) for i in range(0, len(level), 2)]
        tree = _finalize(level[0], st, None, "test")
    for other in (ranged, tree):
        for name in ("G_VO", "G"):
            np.testing.assert_array_equal(getattr(other, name), getattr(serial, name),
                                          err_msg=name)


@pytest.mark.parametrize("loss", LOSSES)
def test_transposed_and_csr_blocks_give_identical_passes(loss):
    """The column-major block kernels sum in the CSR kernels' order: bit-identical."""
    from ranktide.passes.kernel_path import CHOOSER

    X, y, w = _problem(loss, n=400, d=50, k=7, seed=12)
    U, s, V, b, Om, Psi = _model(50, 7, r=3)
    req = PassRequest(loss, U, s, V, b, Omega=Om, Psi=Psi, keep_projections=True,
                      dense_gradient=True)
    src = MemorySource(X, y, weights=w, n_outputs=7)
    out = {}
    for mode in ("csc", "csr"):
        prof = PassProfile()
        with CHOOSER.forced(mode):
            out[mode] = gradient_pass(src, req, block_rows=64, profile=prof)
        assert ("phase:transpose" in prof.totals()) == (mode == "csc")
    a, c = out["csc"], out["csr"]
    for name in ("grad_b", "G_VO", "Gt_Psi", "Gt_U", "G"):
        assert np.array_equal(getattr(a, name), getattr(c, name)), name
    assert a.loss == c.loss and a.inner == c.inner
    for pa, pc in zip(a.projections, c.projections, strict=True):
        assert np.array_equal(pa.XQ, pc.XQ)


def test_path_chooser_probes_both_paths_then_keeps_the_faster():
    from ranktide.passes.kernel_path import PathChooser

    ch = PathChooser()
    key = ("d", 24)
    seen = []
    for _ in range(4):  # alternates until each path has two timings
        path = ch.pick(key, 1000, 100, sorted_ids=True)
        seen.append(path)
        ch.record(key, path, 1.0 if path == "csr" else 0.5, 1000)
    assert sorted(seen) == ["csc", "csc", "csr", "csr"]
    assert ch.pick(key, 1000, 100, sorted_ids=True) == "csc"
    assert ch.pick(key, 1000, 100, sorted_ids=False) == "csr"  # unsorted ids: always CSR
    assert ch.pick(key, 10, 100, sorted_ids=True) == "csr"  # too few entries per column
    ch.record(("other",), "csr", 0.1, 1000)
    ch.record(("other",), "csr", 0.1, 1000)
    ch.record(("other",), "csc", 0.9, 1000)
    ch.record(("other",), "csc", 0.8, 1000)
    assert ch.pick(("other",), 1000, 100, sorted_ids=True) == "csr"


def test_softmax_class_weights():
    X, y, w = _problem("softmax", seed=5)
    U, s, V, b, _, _ = _model(30, 6)
    cw = np.linspace(0.5, 2.0, 6)
    res = gradient_pass(MemorySource(X, y, weights=w, n_outputs=6),
                        PassRequest("softmax", U, s, V, b, class_weights=cw,
                                    dense_gradient=True), block_rows=41)
    f, R, Xd = _dense_f_and_R("softmax", X, y, w, (U * s) @ V.T, b, cw=cw)
    np.testing.assert_allclose(res.weight_total, (w.astype(np.float64) * cw[y]).sum(),
                               rtol=1e-12)
    np.testing.assert_allclose(res.loss, f, rtol=1e-11)
    np.testing.assert_allclose(res.G, Xd.T @ R, rtol=1e-10, atol=1e-13)


def test_profile_of_a_gradient_pass():
    X, y, w = _problem("squared")
    U, s, V, b, Om, Psi = _model(30, 6)
    res = gradient_pass(MemorySource(X, y, weights=w), PassRequest("squared", U, s, V, b,
                        Omega=Om, Psi=Psi), block_rows=50, profile=True)
    assert isinstance(res.profile, PassProfile)
    recs = res.profile.records
    assert len(recs) == 5 and sum(r.rows for r in recs) == 240
    assert {"projections", "dense", "xt_products"} <= set(res.profile.phase_names())
    # each block's X^T products are timed with that block, the first one included
    assert all(r.fold_phases.get("xt_products", 0.0) > 0 for r in recs)


# --- the best intercept alone ----------------------------------------------
@pytest.mark.parametrize("loss", LOSSES)
def test_best_intercept_minimizes_f_at_zero(loss):
    k = 4
    X, y, w = _problem(loss, n=150, k=k, seed=9)
    src = MemorySource(X, y, weights=w, n_outputs=k)
    b0 = best_intercept(src, loss=loss, block_rows=70)
    zero = PassRequest(loss, np.zeros((30, 0)), np.zeros(0), np.zeros((k, 0)), b0)
    res = gradient_pass(src, zero)
    # stationarity grad_b f(0, b0) = 0, the closed form's defining property
    np.testing.assert_allclose(res.grad_b, 0.0, atol=1e-12)

    def f(bv):  # f(0, b) on the whole matrix, dense numpy (DESIGN §2)
        return _dense_f_and_R(loss, X, y, w, np.zeros((30, k)), bv)[0]

    # scipy.optimize.minimize from b = 0 finds the same optimum (softmax: up to
    # a constant shift, removed by centring)
    opt = minimize(f, np.zeros(k), method="BFGS", options={"gtol": 1e-10})
    ref = opt.x - opt.x.mean() if loss == "softmax" else opt.x
    np.testing.assert_allclose(b0, ref, atol=1e-5)
    assert res.loss <= opt.fun + 1e-12


def test_best_intercept_closed_forms():
    X, y, w = _problem("softmax", n=200, seed=2)
    w64 = w.astype(np.float64)
    b0 = best_intercept(MemorySource(X, y, weights=w, n_outputs=6), loss="softmax")
    freq = np.bincount(y, weights=w64, minlength=6) / w64.sum()
    np.testing.assert_allclose(softmax(b0), freq, rtol=1e-12)  # softmax(log freq) = freq
    assert abs(b0.mean()) < 1e-12
    _, T, _ = _problem("multilabel", n=200, seed=2)
    bm = best_intercept(MemorySource(X, T, weights=w), loss="multilabel", block_rows=33)
    np.testing.assert_allclose(expit(bm), T.T @ w64 / w64.sum(), rtol=1e-10)
    # an absent class gets a finite, clipped intercept
    y2 = np.where(y == 3, 0, y).astype(np.int32)
    b2 = best_intercept(MemorySource(X, y2, n_outputs=6), loss="softmax")
    assert np.all(np.isfinite(b2)) and b2[3] == b2.min()


# --- bad input ---------------------------------------------------------------
def test_bad_requests_and_sources():
    X, y, w = _problem("softmax")
    U, s, V, b, _, _ = _model(30, 6)
    src = MemorySource(X, y, weights=w, n_outputs=6)
    with pytest.raises(InputError, match="holds targets of kind 'classes' but loss 'squared'"):
        gradient_pass(src, PassRequest("squared", U, s, V, b))
    U2, s2, V2, b2, _, _ = _model(31, 6)
    with pytest.raises(ModelError, match="has 30 features and 6 outputs but the model is 31 x 6"):
        gradient_pass(src, PassRequest("softmax", U2, s2, V2, b2))
    with pytest.raises(ConfigError, match="loss 'hinge': unknown"):
        PassRequest("hinge", U, s, V, b)
    with pytest.raises(ConfigError, match="disagree"):
        PassRequest("softmax", U, s[:2], V, b)
    with pytest.raises(ModelError, match="non-finite"):
        PassRequest("softmax", U, np.array([1.0, np.nan, 0.1]), V, b)
    zero_w = MemorySource(X, y, weights=np.zeros(X.shape[0]), n_outputs=6)
    with pytest.raises(InputError, match="every row has weight 0"):
        gradient_pass(zero_w, PassRequest("softmax", U, s, V, b))
    with pytest.raises(ConfigError, match="loss 'hinge'"):
        get_loss("hinge")
    with pytest.raises(ConfigError, match="class weights apply to the softmax loss only"):
        PassRequest("squared", U, s, V, b, class_weights=np.ones(6))


@pytest.mark.parametrize("loss", LOSSES)
def test_loss_objects_match_dense_reference(loss):
    X, y, w = _problem(loss, n=50, seed=21)
    rng = np.random.default_rng(0)
    Z = rng.standard_normal((50, 6)) * 3
    Z[0, :] = [800.0, -800.0, 0.0, 5.0, -5.0, 1.0]  # huge logits stay finite
    cw = np.linspace(0.5, 1.5, 6) if loss == "softmax" else None
    lsum, wsum, R = get_loss(loss).value_residual(Z, y, w, class_weights=cw)
    # the reference at X = 0 rows: scores are exactly b; use W = 0 and b = Z row by
    # row through the dense formulas (scipy.special)
    Xd = sp.identity(50, format="csr", dtype=np.float32)
    f, Rref, _ = _dense_f_and_R(loss, Xd, y, w, Z, np.zeros(6), cw=cw)
    np.testing.assert_allclose(lsum / wsum, f, rtol=1e-12)
    np.testing.assert_allclose(R / wsum, Rref, rtol=1e-10, atol=1e-15)
    assert np.all(np.isfinite(R))


# --- stores (zarr and HDF5) ----------------------------------------------------
@pytest.mark.parametrize("store_backend", ["zarr", "hdf5"])
@pytest.mark.parametrize("loss", ["softmax", "multilabel"])
def test_pass_over_store_equals_in_memory(tmp_path, store_backend, loss):
    from ranktide.store import write_store

    X, y, w = _problem(loss, n=500, d=40, k=6, seed=13)
    U, s, V, b, Om, Psi = _model(40, 6)
    name = "s.h5" if store_backend == "hdf5" else "s.zarr"
    store = write_store(tmp_path / name, X, y, weights=w, backend=store_backend)
    store.close()
    req = PassRequest(loss, U, s, V, b, Omega=Om, Psi=Psi, dense_gradient=True)
    f, R, Xd = _dense_f_and_R(loss, X, y, w, (U * s) @ V.T, b)
    G = Xd.T @ R
    for budget in ({"block_rows": 64}, {"block_bytes": 3000}):
        for backend in ("serial", "threads"):
            res = gradient_pass(tmp_path / name, req, backend=backend, **budget)
            np.testing.assert_allclose(res.loss, f, rtol=1e-11)
            np.testing.assert_allclose(res.G, G, rtol=1e-10, atol=1e-13)
            np.testing.assert_allclose(res.G_VO, G @ np.hstack([V, Om]), rtol=1e-10,
                                       atol=1e-13)
            np.testing.assert_allclose(res.Gt_Psi, G.T @ Psi, rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("loss", LOSSES)
def test_a_kept_row_sample_is_those_rows_of_the_full_projections(loss):
    """``sample_rows`` keeps exactly the named rows of ``X [U, Psi]`` (reference: the
    same rows of scipy's product X @ [U, Psi]), their targets and weights, and
    leaves every other figure of the pass as it was."""
    X, y, w = _problem(loss, n=400, d=50, k=7, seed=5)
    U, s, V, b, Om, Psi = _model(50, 7, r=3)
    src = MemorySource(X, y, weights=w, n_outputs=7)
    rows = np.array([0, 3, 63, 64, 65, 200, 399])
    full = gradient_pass(src, PassRequest(loss, U, s, V, b, Omega=Om, Psi=Psi),
                         block_rows=64)
    kept = gradient_pass(src, PassRequest(loss, U, s, V, b, Omega=Om, Psi=Psi,
                                          keep_projections=True, sample_rows=rows),
                         block_rows=64)
    got = np.concatenate([p.XQ for p in kept.projections])
    np.testing.assert_allclose(got, (X @ np.hstack([U, Psi]))[rows], rtol=1e-12, atol=1e-12)
    assert np.array_equal(np.concatenate([p.rows for p in kept.projections]), rows)
    T = [p.targets for p in kept.projections]
    T = sp.vstack(T).toarray() if sp.issparse(T[0]) else np.concatenate(T)
    want = y[rows].toarray() if sp.issparse(y) else np.asarray(y)[rows]
    assert np.array_equal(T, want)
    np.testing.assert_array_equal(np.concatenate([p.weights for p in kept.projections]),
                                  np.asarray(w)[rows])
    for name in ("grad_b", "G_VO", "Gt_Psi", "Gt_U"):
        assert np.array_equal(getattr(kept, name), getattr(full, name)), name
    with pytest.raises(ConfigError, match="sorted distinct"):
        PassRequest(loss, U, s, V, b, keep_projections=True, sample_rows=np.array([3, 3]))
