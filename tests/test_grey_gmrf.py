"""Greyscale sampler against exact Gaussian-MRF results.

With a single-scale (quadratic) prior and Gaussian noise the posterior is the
Gaussian MRF ``N(Q^-1 b, Q^-1)`` with ``Q = I / sigma^2 + sum_o lambda D_o^T D_o``
and ``b = y / sigma^2`` (Rue & Held 2005, ch. 2).  The references are computed
in the tests with scipy.sparse (matrix, solve) and a dense inverse (marginal
variances ``diag Q^-1``).
"""

import numba
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from scipy import special, stats
from scipy.stats import chi2 as chi2_dist

from mrfclean import kernels, sampler
from mrfclean.models.grey import GreyModel, GSMPrior, PriorGroup


def difference_matrices(shape, offsets):
    """Sparse ``D_o`` (rows: cliques ``(p, p + o)`` inside the lattice; ``+1`` at ``p + o``)."""
    Z, H, W = shape
    idx = np.arange(Z * H * W).reshape(shape)
    out = []
    for dz, di, dj in offsets:
        zz, ii, jj = np.meshgrid(np.arange(Z), np.arange(H), np.arange(W), indexing="ij")
        ok = (zz + dz < Z) & (ii + di < H) & (jj + dj >= 0) & (jj + dj < W)
        p = idx[zz[ok], ii[ok], jj[ok]]
        q = idx[zz[ok] + dz, ii[ok] + di, jj[ok] + dj]
        m = p.size
        rows = np.r_[np.arange(m), np.arange(m)]
        out.append((ok, sp.csr_matrix((np.r_[np.ones(m), -np.ones(m)], (rows, np.r_[q, p])),
                                      shape=(m, Z * H * W))))
    return out


def second_difference_matrix(shape):
    """Sparse ``[Dxx; Dyy]``: rows ``x[p] - 2 x[p + e] + x[p + 2 e]`` of every in-plane triple."""
    Z, H, W = shape
    eye = sp.identity

    def d2(n):
        return sp.diags([1.0, -2.0, 1.0], [0, 1, 2], shape=(max(n - 2, 0), n))

    dxx = sp.kron(eye(Z * H), d2(W))
    dyy = sp.kron(eye(Z), sp.kron(d2(H), eye(W)))
    return sp.vstack([dxx, dyy]).tocsr()


def triple_middles(g):
    """``g`` at the middle pixel of each row of :func:`second_difference_matrix`, in its order."""
    return np.r_[g[:, :, 1:-1].ravel(), g[:, 1:-1, :].ravel()]


def triple_factors(model):
    """Weights of the rows of :func:`second_difference_matrix` under a prior with
    ``noise_ref``: ``noise_ref / v`` at each triple's middle pixel (1 without it)."""
    if not model.prior.noise_ref:
        return np.ones(triple_middles(model.dw).shape)
    return triple_middles(model.prior.noise_ref * model.dw)


def sparse_precision(model, weights):
    """``Q`` assembled from the clique weights the model uses, plus its data precision
    and its second-difference term (built independently with scipy)."""
    Q = sp.diags(model.dw.ravel())
    for (ok, D), w in zip(difference_matrices(model.grid.shape, model.offsets), weights):
        Q = Q + D.T @ sp.diags(w[ok]) @ D
    if model.curv:
        C = second_difference_matrix(model.grid.shape)
        Q = Q + model.curv * (C.T @ sp.diags(triple_factors(model)) @ C)
    return Q.tocsc()


@pytest.mark.parametrize("shape, neighbourhood", [((1, 12, 13), "20"), ((3, 7, 9), "8"),
                                                  ((1, 3, 5), "4"), ((2, 6, 4), "8"),
                                                  ((1, 9, 11), "8"), ((1, 3, 3), "8"),
                                                  ((1, 2, 6), "8")])
@pytest.mark.parametrize("tol, dtype, rtol", [(1e-9, np.float64, 1e-12), (1e-3, np.float32, 2e-6)])
@pytest.mark.parametrize("curvature, noise_ref", [(0.0, 0.0), (2.5, 0.0), (2.5, 0.7)])
def test_operator_matches_sparse_matrix(shape, neighbourhood, tol, dtype, rtol, curvature,
                                        noise_ref):
    """Matrix-free ``Q x`` and ``diag Q`` equal the assembled sparse matrix (round-off only),
    with and without the second-difference term, and with its triples weighted by a
    noise-stabilised prior's factor (``noise_ref``; the clique weights here are given).
    Planes with the in-plane 8-neighbourhood take the kernels' one-pass row
    (``kernels._q_row8``) on their interior rows; the other shapes, the general loop.

    ``apply`` works in float64 always; the solver's diagonal is float32 for the
    usual tolerances (rounding of about 20 float32 terms: within 2e-6 relative)."""
    gen = np.random.default_rng(11)
    prior = GSMPrior.quadratic(1.0, neighbourhood=neighbourhood,
                               strength_z=0.5).with_curvature(curvature).with_noise_ref(noise_ref)
    m = GreyModel(gen.normal(size=shape), variance=gen.uniform(0.5, 2, size=shape), prior=prior,
                  tol=tol)
    assert m.solver_dtype == dtype
    assert m.curv == curvature  # the references below take the weight from the model
    w = gen.uniform(0.1, 3.0, size=m.w.shape)
    x = gen.normal(size=shape)
    Q = sparse_precision(m, w)
    np.testing.assert_allclose(m.apply(x, w).ravel(), Q @ x.ravel(), rtol=1e-12, atol=1e-12)
    m.w[...] = w
    m._set_operator()
    np.testing.assert_allclose(m._diag.ravel(), Q.diagonal(), rtol=rtol)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("curvature, scaled", [(0.0, False), (2.5, False), (2.5, True)])
@pytest.mark.parametrize("shape", [(1, 9, 11), (1, 3, 3), (1, 2, 6), (2, 5, 7)])
def test_one_pass_row_equals_the_general_loop_bit_for_bit(dtype, curvature, scaled, shape):
    """The kernels' one-pass row for the in-plane 8-neighbourhood (``_q_row8``) adds the
    same terms in the same order as the general loop, so ``Q x`` is identical to the last
    bit.  A fifth offset along z with zero weights adds only exact zeros (after the
    in-plane terms) but forces the general loop; the sparse-matrix test above is the
    outside reference for both."""
    from mrfclean import kernels

    gen = np.random.default_rng(17)
    Z, H, W = shape
    grid8 = np.array([[0, 0, 1], [0, 1, 0], [0, 1, 1], [0, 1, -1]], np.int64)
    general = np.vstack([grid8, [[1, 0, 0]]])
    x = gen.normal(size=(2, *shape)).astype(dtype)
    w = gen.uniform(0.1, 3.0, size=(4, *shape)).astype(dtype)
    w5 = np.concatenate([w, np.zeros((1, *shape), dtype)])
    dw = gen.uniform(0.5, 2.0, size=shape).astype(dtype)
    cs = gen.uniform(0.5, 2.0, size=shape).astype(dtype) if scaled else np.zeros((0, 0, 0), dtype)
    assert kernels._is_grid8(grid8) and not kernels._is_grid8(general)
    fast, slow = np.empty_like(x), np.empty_like(x)
    kernels.gmrf_matvec(x, w, grid8, dw, curvature, cs, fast, np.empty((2, Z * H)))
    kernels.gmrf_matvec(x, w5, general, dw, curvature, cs, slow, np.empty((2, Z * H)))
    np.testing.assert_array_equal(fast, slow)


def four_colour_sgs(Q, shape, r):
    """``M^-1 r`` for ``M = (D + L) D^-1 (D + L)^T`` built with scipy from the sparse ``Q``:
    ``D = diag Q``, ``L`` the entries of ``Q`` between 8-neighbours whose column pixel has
    the lower colour ``2 (i mod 2) + (j mod 2)`` (Saad 2003, sections 10.2 and 12.4);
    the entries two pixels apart (the curvature triples') are left out."""
    _, H, W = shape
    C = Q.tocoo()
    ri, rj = np.divmod(C.row, W)
    ci, cj = np.divmod(C.col, W)
    near = (np.abs(ri - ci) <= 1) & (np.abs(rj - cj) <= 1)
    Q8 = sp.csr_matrix((C.data[near], (C.row[near], C.col[near])), shape=Q.shape)
    ii, jj = np.divmod(np.arange(H * W), W)
    order = np.argsort(2 * (ii % 2) + (jj % 2), kind="stable")  # pixels by colour
    Qc = Q8[order][:, order]
    d = Qc.diagonal()
    y = sla.spsolve_triangular(sp.tril(Qc, format="csr"), r[order], lower=True)
    z = sla.spsolve_triangular(sp.triu(Qc, format="csr"), d * y, lower=False)
    out = np.empty_like(z)
    out[order] = z
    return out


def drawn_grey_model(shape, curvature, noise_ref, seed, tol=1e-9, preconditioner="sgs"):
    """A float64 model with the shipped 8-neighbour prior and scales drawn from noise."""
    gen = np.random.default_rng(seed)
    prior = GSMPrior.load().with_curvature(curvature).with_noise_ref(noise_ref)
    m = GreyModel(gen.normal(scale=0.1, size=shape), variance=gen.uniform(0.005, 0.02, shape),
                  prior=prior, tol=tol, preconditioner=preconditioner)
    st = m.start(0, 0)
    m._draw_scales(st, 1.0, kernels.stream_key(seed, 0, 0))
    m._set_scales(st.comp)
    return m


@pytest.mark.parametrize("shape", [(1, 9, 11), (1, 10, 12), (1, 9, 12), (1, 1, 7), (1, 2, 5),
                                   (1, 3, 3), (1, 6, 2), (1, 5, 1)])
@pytest.mark.parametrize("curvature, noise_ref", [(0.0, 0.0), (40.0, 0.0), (40.0, 0.01)])
def test_sgs_preconditioner_is_the_four_colour_sweep_of_the_sparse_matrix(shape, curvature,
                                                                       noise_ref):
    """``kernels._sgs_apply`` with the model's weights (``kernels.sgs_weights``, which adds
    the curvature triples' entries between neighbours) against the two triangular solves
    of the same ``M`` built by scipy from the independently assembled sparse ``Q``;
    float64, so round-off only (1e-10 relative).  Two such planes as one stack give each
    plane's own answer.  The row sums of ``r z`` are the solver's ``r^T M^-1 r``."""
    if curvature and min(shape[1:]) < 3:
        pytest.skip("the second-difference term needs three pixels along both axes")
    gen = np.random.default_rng(5)
    zs, refs, models = [], [], []
    for seed in (1, 2):
        m = drawn_grey_model(shape, curvature, noise_ref, seed)
        assert m.solver_dtype == np.float64 and m.describe()["cg_preconditioner"] == "sgs"
        r = gen.normal(size=shape)
        refs.append(four_colour_sgs(sparse_precision(m, m.w[:m.npair]), shape, r.ravel()))
        zs.append(r)
        models.append(m)
    # stack the two planes (weights, inverse diagonals, residuals) and sweep both at once
    pw = np.concatenate([m._pw for m in models], axis=1)
    minv = np.concatenate([m._minv for m in models], axis=0)
    R = np.concatenate(zs, axis=0)[None]
    Z = np.zeros_like(R)
    rows = np.zeros((4, 1, R.shape[1] * R.shape[2]))
    kernels._sgs_apply(pw, minv, R, Z, np.ones(1, np.bool_), rows)
    for k in range(2):
        np.testing.assert_allclose(Z[0, k].ravel(), refs[k], rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(rows[0, 0].sum(), sum(z.ravel() @ f for z, f in zip(zs, refs)),
                               rtol=1e-10)


@pytest.mark.parametrize("curvature", [0.0, 40.0])
def test_both_preconditioners_reach_the_sparse_solution(curvature):
    """Conjugate gradients with either preconditioner solve ``Q x = b`` (scipy's sparse
    direct solve is the reference) to the requested residual, from the same start; the
    Gauss-Seidel sweep gets there in fewer iterations (measured: about half).  The error
    bound ``||x - x*|| <= ||r|| / lambda_min(Q)``, with ``lambda_min`` at least the
    smallest data precision (50 here), is computed and checked alongside.  A volume's
    operator (offsets along z) has no four-colour layout and keeps Jacobi."""
    out = {}
    for pc in ("jacobi", "sgs"):
        m = drawn_grey_model((1, 48, 40), curvature, 0.0, 3, preconditioner=pc)
        assert m.describe()["cg_preconditioner"] == pc
        Q = sparse_precision(m, m.w[:m.npair])
        exact = sla.spsolve(Q, m.b.ravel())
        X, it = m.solve(np.stack([m.b, 0.5 * m.b]), (0.0, m.y), (1e-8, 1e-8))
        for k, scale in enumerate((1.0, 0.5)):
            x = X[k].ravel()
            res = np.linalg.norm(Q @ x - scale * m.b.ravel())
            assert res <= 1.01e-8 * scale * np.linalg.norm(m.b)
            assert np.linalg.norm(x - scale * exact) <= res / m.dw.min() * (1 + 1e-6)
        out[pc] = it
    assert out["sgs"] < 0.7 * out["jacobi"], out
    volume = GreyModel(np.zeros((3, 5, 6)), variance=1.0, prior=GSMPrior.load())
    assert volume.describe()["cg_preconditioner"] == "jacobi"


@pytest.mark.parametrize("tol", [1e-3, 1e-2])
def test_single_precision_solve_meets_its_tolerance(tol):
    """The float32 solver (default tolerances) against scipy's sparse direct solve in float64:
    the true residual of its answer is within its tolerance (with 10% slack for the drift
    of the recursively updated residual), on stiff weights spanning 0.1 to 3000."""
    gen = np.random.default_rng(21)
    shape = (1, 40, 37)
    y = gen.normal(size=shape)
    m = GreyModel(y, variance=0.05, prior=GSMPrior.quadratic(1.0, neighbourhood="8"), tol=tol)
    assert m.solver_dtype == np.float32
    w = np.exp(gen.uniform(np.log(0.1), np.log(3000.0), size=m.w.shape))
    m.w[...] = w
    m._set_operator()
    X, it = m.solve(m.b[None], np.zeros((1, *shape)))
    Q = sparse_precision(m, w)
    b = m.b.ravel()
    x = X[0].astype(np.float64).ravel()
    assert np.linalg.norm(Q @ x - b) <= 1.1 * tol * np.linalg.norm(b)
    exact = sla.spsolve(Q, b)
    # the error is the residual through Q^-1: here about tol (measured 1.2e-3 and 1.2e-2)
    assert np.linalg.norm(x - exact) <= 3 * tol * np.linalg.norm(exact)



@pytest.mark.parametrize("sigma", [1e-3, 3e-3, 1e-2])
def test_conditional_mean_error_is_small_against_the_noise_at_low_noise(sigma):
    """At very low noise the relative residual ``tol`` alone would leave an error of
    about ``tol * ||x||``, as large as the noise itself (so chains from different
    starts disagree); the mean solve is tightened until its error bound is
    ``MEAN_ERROR_SHARE * sqrt(N) sigma``.  Checked against scipy's sparse direct
    solve: the root-mean-square error stays within ``0.03 sigma`` (measured 0.007-0.016
    sigma; with the plain relative residual 3e-3 it was 0.07-0.4 sigma)."""
    from mrfclean.models.grey import MEAN_ERROR_SHARE

    gen = np.random.default_rng(7)
    shape = (1, 48, 40)
    clean = 0.5 + 0.2 * np.sin(np.arange(40) / 5.0)[None, None, :] * np.ones(shape)
    y = clean + sigma * gen.normal(size=shape)
    m = GreyModel(y, variance=sigma**2, prior=GSMPrior.quadratic(1.0, neighbourhood="8"), tol=3e-3)
    assert m.mean_tol < 3e-3
    w = np.exp(gen.uniform(0.0, np.log(3e4), size=m.w.shape))  # stiff, as at high strength
    got = m.conditional_mean(w).ravel()
    exact = sla.spsolve(sparse_precision(m, w), m.b.ravel())
    assert np.sqrt(np.mean((got - exact) ** 2)) <= MEAN_ERROR_SHARE * sigma


@pytest.mark.parametrize("shape", [(1, 6, 7), (2, 5, 4)])
@pytest.mark.parametrize("weighted", [False, True])
def test_curvature_perturbation_is_the_transposed_second_differences_of_its_normals(shape, weighted):
    """With no clique weights and no data precision the perturbation is exactly
    ``scale sqrt(kappa) C^T S^(1/2) e``, ``C`` the stacked second differences built with
    scipy, ``S`` the triples' weights (``cs`` at their middle pixels, or 1) and ``e`` the
    counter normals of the row triples (``(n + 1) N + p``) and column triples
    (``(n + 2) N + p``): so its covariance is ``scale^2 kappa C^T S C`` and the two families
    draw different numbers (round-off only)."""
    offsets = np.array([(0, 0, 1), (0, 1, 0)], dtype=np.int64)
    n, N = len(offsets), int(np.prod(shape))
    w = np.zeros((n, *shape))
    dw = np.zeros(shape)
    out, buf, cbuf = np.empty(shape), np.empty_like(w), np.empty((2, *shape))
    key, scale, kappa = np.uint64(kernels.stream_key(3, 1, 4)), 0.7, 2.5
    cs = np.random.default_rng(5).uniform(0.2, 3.0, shape) if weighted else None
    kernels.gmrf_perturbation(w, offsets, dw, key, scale, out, buf, kappa, cbuf, cs)
    e = kernels.normal_many(key, (n + 1) * N, 2 * N)
    Z, H, W = shape
    zz, ii, jj = np.meshgrid(np.arange(Z), np.arange(H), np.arange(W), indexing="ij")
    e_rows = e[:N][(jj < W - 2).ravel()]
    e_cols = e[N:][(ii < H - 2).ravel()]
    C = second_difference_matrix(shape)
    s = triple_middles(cs) if weighted else np.ones(C.shape[0])
    expect = scale * np.sqrt(kappa) * (C.T @ (np.sqrt(s) * np.r_[e_rows, e_cols]))
    np.testing.assert_allclose(out.ravel(), expect, rtol=1e-12, atol=1e-12)

def test_ziggurat_tables_match_published_constants():
    """The base-layer edge r found by bisection: 3.442619855899 for 128 layers (Marsaglia &
    Tsang 2000, J. Stat. Softw. 5(8), printed to 12 decimals) and 3.6541528853610088 for 256
    (Doornik 2005, ZIGNOR; the value printed in implementations of it, from memory); every
    layer has the same area."""
    x128, _ = kernels.ziggurat_tables(128)
    assert x128[1] == pytest.approx(3.442619855899, abs=5e-12)
    x, ratio = kernels.ziggurat_tables(256)
    assert x[1] == pytest.approx(3.6541528853610088, rel=1e-14)
    f = np.exp(-0.5 * x**2)
    areas = x[1:-1] * (f[2:] - f[1:-1])  # layers 1 .. 255; the top one ends at f(0) = 1
    base = x[1] * f[1] + np.sqrt(np.pi / 2) * special.erfc(x[1] / np.sqrt(2))  # box + tail
    np.testing.assert_allclose(areas, base, rtol=1e-9)
    assert np.all(ratio < 1) and ratio[-1] == 0


def test_normal_variates_against_scipy_normal():
    """Ziggurat normals: Kolmogorov-Smirnov against scipy's normal CDF, and the share beyond
    the base edge r and beyond 4.5 (tail path) against ``2 Phi(-t)``.

    n = 2e6: a correct sampler fails the KS test at p < 1e-3 one time in 1000 (the seed is
    fixed, so the outcome is too); the tail counts are binomial, checked within 5 sd.
    """
    n = 2_000_000
    z = kernels.normal_many(np.uint64(kernels.stream_key(6, 0, 0)), 0, n)
    assert stats.kstest(z, "norm").pvalue > 1e-3
    for t in (kernels.ziggurat_tables()[0][1], 4.5):
        p = 2 * stats.norm.sf(t)
        assert abs(np.sum(np.abs(z) > t) - n * p) < 5 * np.sqrt(n * p * (1 - p)) + 1


def test_normal_variates_moments():
    """Ziggurat normals from the counter RNG: mean 0, variance 1, kurtosis 3.

    n = 400000: standard errors are 1/sqrt(n) = 0.0016 (mean), sqrt(2/n) =
    0.0022 (variance) and sqrt(96/n) = 0.0155 (kurtosis); tolerances are 5 of them.
    """
    z = kernels.normal_many(np.uint64(kernels.stream_key(5, 0, 0)), 0, 400_000)
    assert abs(z.mean()) < 0.008
    assert abs(z.var() - 1) < 0.011
    assert abs(np.mean(z**4) / z.var() ** 2 - 3) < 0.08


@pytest.fixture(scope="module", params=[0.0, 4.0], ids=["pairwise", "curvature"])
def gmrf_case(request):
    gen = np.random.default_rng(2024)
    H = W = 32
    sigma2, lam = 0.5, 3.0
    y = gen.normal(size=(H, W))
    prior = GSMPrior.quadratic(lam, neighbourhood="8").with_curvature(request.param)
    model = GreyModel(y, variance=sigma2, prior=prior, tol=1e-9)
    assert model.curv == request.param
    Q = sparse_precision(model, np.broadcast_to(lam, model.w.shape))
    mean = sla.spsolve(Q, y.ravel() / sigma2)
    var = np.diag(np.linalg.inv(Q.toarray()))
    return model, mean, var


@pytest.mark.slow
def test_posterior_mean_and_variance_match_exact_gmrf(gmrf_case):
    """Sampled moments against ``Q^-1 b`` and ``diag Q^-1`` (exact, scipy in the test).

    Mean: with one scale the Rao-Blackwellised mean is ``Q^-1 b`` at every sweep,
    so only the solver tolerance (1e-9 relative residual) separates it from the
    sparse solve: 1e-6 absolute.  Variance: S = 2000 kept sweeps of exact
    independent draws; ``(x - mu)^2 / var`` is a chi-square(1) variable with
    relative sd sqrt(2 / S) = 0.032 per pixel, so the average ratio over the
    1024 pixels has sd 0.032 / sqrt(1024) = 0.001 (neighbours are correlated,
    at most a few times that): tolerance 0.01.  Per pixel, the worst of 1024
    ratios stays within 5 sd = 0.16.
    """
    model, mean, var = gmrf_case
    run = sampler.run(model, sweeps=2010, burn_in=10, seed=7, tally=True)
    np.testing.assert_allclose(run.tally.mean64().ravel(), mean, atol=1e-6)
    ratio = run.tally.var64().ravel() / var
    assert abs(ratio.mean() - 1) < 0.01
    assert np.abs(ratio - 1).max() < 0.16


def test_short_run_variance_close_to_exact(gmrf_case):
    """A 300-sweep run: mean ratio of sampled to exact variance within 0.03.

    sd of the average ratio: sqrt(2/300)/sqrt(1024) = 0.0026, times a few for
    correlation between neighbouring pixels; 0.03 is over 5 of those.
    """
    model, mean, var = gmrf_case
    run = sampler.run(model, sweeps=305, burn_in=5, seed=8, tally=True)
    np.testing.assert_allclose(run.tally.mean64().ravel(), mean, atol=1e-6)
    assert abs((run.tally.var64().ravel() / var).mean() - 1) < 0.03


@pytest.mark.parametrize("sample_tol, low, high", [(1e-2, 0.85, 0.95), (3e-3, 0.96, 1.01)])
def test_loose_draw_solves_read_a_stiff_posterior_variance_low(sample_tol, low, high):
    """Why SURE's draws solve to 3e-3 (``mrfclean.fit.grey._sure_risk``): conjugate
    gradients started from zero stop short of the draw's full spread, so a loose
    perturbation solve under-reports ``diag Q^-1`` (exact here, dense inverse; Rue & Held
    2005, ch. 2) when the prior is stiff.  A weak pairwise prior with a strong
    second-difference term (a 32^2 smooth-scene configuration of the kind SURE compares):
    measured 0.911 of the exact variance at 1e-2 and 0.983 at 3e-3 (sd 0.004 over 6 seeds
    of 40 draws; 0.9906 at 1e-3).  The summed variance of 3 x 40 draws here has a
    relative sd of about 0.004 (chi-square(1) per pixel, sqrt(2 / 120) / sqrt(1024) times
    a few for neighbour correlation), so the bands leave 3-4 of those on either side."""
    gen = np.random.default_rng(12)
    ii, jj = np.mgrid[0:32, 0:32]
    y = 0.5 + 0.3 * np.sin(ii / 5.0) * np.cos(jj / 7.0) + 0.1 * gen.standard_normal((32, 32))
    prior = GSMPrior.quadratic(15.0, neighbourhood="4").with_curvature(3200.0)
    model = GreyModel(y, variance=0.01, prior=prior, tol=3e-3, sample_tol=sample_tol)
    Q = sparse_precision(model, np.broadcast_to(15.0, model.w.shape))
    exact = np.trace(np.linalg.inv(Q.toarray()))
    run = sampler.run(model, sweeps=41, burn_in=1, chains=3, seed=4, tally=True)
    assert low < run.tally.var64().sum() / exact < high


def test_single_system_draws_follow_the_exact_gmrf(gmrf_case):
    """Burn-in sweeps draw the image from one system ``Q x = b + eta`` started at the
    current image (``single_solves``).  Solved tightly, each draw is an exact independent
    draw from ``N(Q^-1 b, Q^-1)`` (Papandreou & Yuille 2010), checked against the
    scipy mean and dense-inverse variances: over S = 400 draws the average ratio of
    sampled to exact variance has sd sqrt(2/S)/sqrt(1024) = 0.002 (a few times that
    with neighbour correlation; tolerance 0.03), and the squared standardised error of
    the draws' average, ``(xbar - m)^2 S / var``, is chi-square(1) per pixel, so its
    average over 1024 pixels is 1 with sd 0.044 (tolerance 0.3)."""
    model, mean, var = gmrf_case
    m = GreyModel(model.y, variance=1.0 / model.dw, prior=model.prior, tol=1e-9,
                  single_solves=10**6)
    S = 400
    xs = np.empty((S, mean.size))
    for st in sampler.iterate(m, sampler.Constant(1.0), sweeps=S + 5, chain=0, seed=11, burn_in=5):
        if st.sampling:
            xs[st.sweep - 5] = st.state.x.ravel()
    assert st.state.draws == S + 5
    assert abs((xs.var(axis=0, ddof=1) / var).mean() - 1) < 0.03
    assert abs(((xs.mean(axis=0) - mean) ** 2 * S / var).mean() - 1) < 0.3


@pytest.mark.parametrize("curvature", [0.0, 4.0])
def test_noise_stabilised_quadratic_prior_matches_exact_gmrf(curvature):
    """A quadratic prior with ``noise_ref`` under heteroscedastic noise is still a Gaussian MRF,
    with clique weight ``lambda * noise_ref * (1/v_p + 1/v_q) / 2`` and, with the
    second-difference term, each triple weighted by ``noise_ref / v`` at its middle pixel
    (the factors written out here from the variance).  Sampled moments against ``Q^-1 b`` and ``diag Q^-1`` (scipy
    sparse solve and dense inverse; Rue & Held 2005, ch. 2), as in
    :func:`test_short_run_variance_close_to_exact`: the Rao-Blackwellised mean is exact up
    to the 1e-9 solves, and the mean variance ratio over 300 kept sweeps has sd
    sqrt(2/300)/sqrt(1024) = 0.0026 (a few times that with neighbour correlation; 0.03)."""
    gen = np.random.default_rng(31)
    H = W = 32
    lam, ref = 3.0, 0.5
    v = gen.uniform(0.2, 1.5, (H, W))
    y = gen.normal(size=(H, W))
    prior = GSMPrior.quadratic(lam, neighbourhood="8").with_noise_ref(ref).with_curvature(curvature)
    model = GreyModel(y, variance=v, prior=prior, tol=1e-9)
    weights = np.zeros(model.w.shape)
    for o, (dz, di, dj) in enumerate(model.offsets):
        tail, _ = _clique_pairs(weights[o], dz, di, dj)
        tail[...] = lam * _stabilising_factor(model, dz, di, dj)
    Q = sparse_precision(model, weights)
    mean = sla.spsolve(Q, (y / v).ravel())
    var = np.diag(np.linalg.inv(Q.toarray()))
    run = sampler.run(model, sweeps=305, burn_in=5, seed=8, tally=True)
    np.testing.assert_allclose(run.tally.mean64().ravel(), mean, atol=1e-6)
    assert abs((run.tally.var64().ravel() / var).mean() - 1) < 0.03
    # the factor matters here: the weights without it give another posterior mean
    assert np.abs(sla.spsolve(sparse_precision(model, np.full(model.w.shape, lam)),
                              (y / v).ravel()) - mean).max() > 1e-2


def test_noise_stabilised_weights_on_a_stack_against_numpy():
    """On a (2, 5, 6) stack with z cliques, the clique weights of drawn scales
    (``gsm_expand``) and the half-quadratic weights (``gsm_mean_weights``) of a prior with
    ``noise_ref`` against numpy written out here: ``lam pi_c m`` and
    ``lam m E[pi | m d^2]`` (scipy's logsumexp for the mixture), with ``m`` the factor of
    each clique from the variance, 0 off the lattice (round-off only)."""
    from scipy.special import logsumexp

    gen = np.random.default_rng(17)
    shape = (2, 5, 6)
    x = gen.normal(size=shape)
    prior = GSMPrior.load().with_strength(1.3, 0.7).with_noise_ref(0.6)
    m = GreyModel(x, variance=gen.uniform(0.2, 1.5, shape), prior=prior)
    assert any(tuple(o) == (1, 0, 0) for o in m.offsets)
    comp = np.full(m.w.shape, kernels.NO_CLIQUE, np.uint8)  # off the lattice: no clique
    for o, (dz, di, dj) in enumerate(m.offsets):
        tail, _ = _clique_pairs(comp[o], dz, di, dj)
        tail[...] = gen.integers(0, m.prec.shape[1], size=tail.shape)
    w = np.zeros(m.w.shape)
    kernels.gsm_expand(comp, m.prec, m.strength, w, m.offsets, m.gs)
    hq = np.zeros(m.w.shape)
    kernels.gsm_mean_weights(x, m.offsets, m.logamp, m.prec, m.strength, hq, m.gs)
    for o, (dz, di, dj) in enumerate(m.offsets):
        factor = _stabilising_factor(m, dz, di, dj)
        expect = np.zeros(shape)
        tail, _ = _clique_pairs(expect, dz, di, dj)
        tail[...] = m.strength[o] * m.prec[o][_clique_pairs(comp[o], dz, di, dj)[0]] * factor
        np.testing.assert_allclose(w[o], expect, rtol=1e-12, atol=0)
        a, b = _clique_pairs(x, dz, di, dj)
        d2 = ((b - a) ** 2 * factor)[..., None]
        lp = m.logamp[o] - 0.5 * m.strength[o] * m.prec[o] * d2
        post = np.exp(lp - logsumexp(lp, axis=-1, keepdims=True))
        expect = np.zeros(shape)
        tail, _ = _clique_pairs(expect, dz, di, dj)
        tail[...] = m.strength[o] * factor * np.sum(post * m.prec[o], axis=-1)
        np.testing.assert_allclose(hq[o], expect, rtol=1e-10, atol=0)
    with pytest.raises(ValueError, match="offsets"):
        kernels.gsm_expand(comp, m.prec, m.strength, w, None, m.gs)


@pytest.mark.parametrize("shape", [(2, 40, 37), (1, 41, 38)])
def test_sweep_independent_of_thread_count(shape):
    """Counter-based random numbers and ordered row sums: 1 thread and 2 threads agree bit for
    bit (a stack, whose solver is Jacobi-preconditioned, and a plane, whose is four-colour
    Gauss-Seidel)."""
    gen = np.random.default_rng(3)
    y = gen.normal(size=shape)
    prior = GSMPrior.load()

    def go():
        m = GreyModel(y, variance=0.3, prior=prior)
        assert m.describe()["cg_preconditioner"] == ("sgs" if shape[0] == 1 else "jacobi")
        st = m.start(0, 1)
        for k in range(3):
            m.sweep(st, 1.0, int(kernels.stream_key(9, 0, k)))
        return st.x.copy(), m.energy(st)

    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        a, ea = go()
        numba.set_num_threads(max(before, 2) if numba.config.NUMBA_NUM_THREADS >= 2 else 1)
        b, eb = go()
    finally:
        numba.set_num_threads(before)
    assert np.array_equal(a, b)
    assert ea == eb


def test_zero_temperature_sweep_is_the_conditional_mean():
    """At T = 0 the image update adds no perturbation: ``x = Q^-1 b`` for the chosen scales."""
    gen = np.random.default_rng(4)
    y = gen.normal(size=(16, 16))
    m = GreyModel(y, variance=0.2, prior=GSMPrior.load(), tol=1e-10)
    st = m.start(0, 1)
    m.sweep(st, 0.0, 12345)
    Q = sparse_precision(m, m.w)
    np.testing.assert_allclose(st.x.ravel(), sla.spsolve(Q, m.b.ravel()), atol=1e-7)
    assert np.array_equal(st.x, st.mu)


def _clique_pairs(arr, dz, di, dj):
    """``(tail, head)`` views of ``arr`` over the cliques ``(p, p + o)`` inside the lattice."""
    Z, H, W = arr.shape
    return (arr[:Z - dz, :H - di, max(0, -dj):W - max(0, dj)],
            arr[dz:, di:, max(0, dj):W + min(0, dj)])


def _stabilising_factor(model, dz, di, dj):
    """Per-clique factor of a prior with ``noise_ref``: ``noise_ref`` times the mean of the
    clique's two data precisions ``1 / v`` (1 without it), from the model's variance."""
    if not model.prior.noise_ref:
        return 1.0
    t, h = _clique_pairs(1.0 / model.dw, dz, di, dj)
    return model.prior.noise_ref * 0.5 * (1.0 / t + 1.0 / h)


def _energy_reference(model, x):
    """``E(x)`` written out with numpy and scipy's logsumexp, clique by clique (no kernel)."""
    from scipy.special import logsumexp

    x = np.asarray(x, dtype=np.float64).reshape(model.grid.shape)
    e = 0.5 * np.sum((x - model.y) ** 2 * model.dw)
    for o, (dz, di, dj) in enumerate(model.offsets):
        a, b = _clique_pairs(x, dz, di, dj)
        d2 = ((b - a) ** 2 * _stabilising_factor(model, dz, di, dj)).ravel()[:, None]
        lp = model.logamp[o][None, :] - 0.5 * model.strength[o] * model.prec[o][None, :] * d2
        e -= np.sum(logsumexp(lp, axis=1))
    if model.curv:  # the second-difference term through scipy's sparse matrix
        C = second_difference_matrix(x.shape)
        e += 0.5 * model.curv * float(np.sum(triple_factors(model) * (C @ x.ravel()) ** 2))
    return float(e)


@pytest.mark.parametrize("temperature,spread,curvature,noise_ref",
                         [(1.0, 1.0, 0.0, 0.0), (0.3, 1.0, 0.0, 0.0), (1.0, 40.0, 0.0, 0.0),
                          (1.0, 1.0, 3.0, 0.0), (1.0, 1.0, 0.0, 0.5), (0.3, 40.0, 3.0, 0.5)])
def test_energy_from_the_scale_draw_equals_direct_energy(temperature, spread, curvature, noise_ref):
    """The energy a sweep gets from its scale-draw pass (at T = 1 and while annealing, when the
    draw itself is tempered) equals the energy written out here with scipy's logsumexp.

    The shipped prior's precisions are on the 4^c ladder, so at T = 1 the draw takes its
    one-exp path; with ``spread`` 40 many clique sums fall below that path's floor and go
    the general way, so both paths and their mixing within a row are checked.  With
    ``noise_ref`` (heteroscedastic variance here) each clique's precisions carry the
    noise-stabilising factor, computed in the reference from the variance itself.
    """
    gen = np.random.default_rng(12)
    y = spread * gen.normal(size=(2, 21, 19))
    m = GreyModel(y, variance=gen.uniform(0.2, 1.0, y.shape),
                  prior=GSMPrior.load().with_strength(1.3, 0.7).with_curvature(curvature)
                  .with_noise_ref(noise_ref))
    assert kernels.ladder4(m.prec) and m.curv == curvature
    st = m.start(0, 1)
    for k in range(2):
        m.sweep(st, temperature, int(kernels.stream_key(4, 0, k)))
        assert m.energy(st) == pytest.approx(_energy_reference(m, st.x), rel=1e-12)
        assert m.energy_of(st.x) == pytest.approx(_energy_reference(m, st.x), rel=1e-12)


def _mirror_transitions(p):
    """``T[c, c']``: the chance that a mirrored draw from ``p`` moves component ``c`` to ``c'``.

    Component ``c`` owns ``[F_(c-1), F_c)`` of ``[0, 1)`` (``F`` the cumulative sums);
    a point uniform there, mirrored to ``1 - point``, lands in ``c'``'s share with
    probability ``|mirror of c's share and c''s share| / p_c`` (Neal 1998, section 5).
    """
    hi = np.cumsum(p)
    lo = hi - p
    mlo, mhi = 1 - hi, 1 - lo
    overlap = np.clip(np.minimum(mhi[:, None], hi[None]) - np.maximum(mlo[:, None], lo[None]), 0, None)
    return overlap / p[:, None]


def _mirror_draws(model, d, c0, temperature, draws, stream):
    """Counts of the components mirrored draws of the horizontal clique of ``[[0, d]]`` take
    from component ``c0`` (reset before each draw, each with its own stream key), with the
    model's per-pixel prior scales if it has them."""
    x = np.array([[[0.0, d]]])
    comp = np.empty((len(model.offsets), 1, 1, 2), np.uint8)
    counts = np.zeros(model.prec.shape[1])
    for k in range(draws):
        comp[0, 0, 0, 0] = c0
        kernels.gsm_draw_components(x, x, model.dw, model.offsets, model.logamp, model.prec,
                                    model.strength, temperature,
                                    np.uint64(kernels.stream_key(stream, c0, k)), comp, model.gs, True)
        counts[comp[0, 0, 0, 0]] += 1
    return counts


@pytest.mark.parametrize("temperature, noise_ref", [(1.0, 0.0), (0.5, 0.0), (1.0, 0.4)])
def test_mirrored_scale_draws_follow_the_exact_transition_probabilities(temperature, noise_ref):
    """Ordered over-relaxation of one clique's scale (``reflect=True``): from each of the
    three most probable components, 6000 mirrored draws against the exact transition
    probabilities of :func:`_mirror_transitions` (chi-square, each check failing by chance
    one time in 1000).  T = 1 takes the one-exp ladder path, T = 0.5 the general path.  The
    exact transitions keep ``p`` (``p T = p``, checked), so the draws leave the conditional
    distribution invariant; and from at least one start the counts must reject the
    probabilities of a fresh draw, which a plain draw would not."""
    prior = GSMPrior.load().with_noise_ref(noise_ref)
    y = np.array([[0.0, 0.08]])
    v = np.array([[0.5, 2.0]])
    m = GreyModel(y, variance=v, prior=prior)
    o = 0
    factor = noise_ref * (1 / v[0, 0] + 1 / v[0, 1]) / 2 if noise_ref else 1.0
    lp = (m.logamp[o] - 0.5 * m.strength[o] * m.prec[o] * 0.08**2 * factor) / temperature
    p = np.exp(lp - lp.max())
    p /= p.sum()
    T = _mirror_transitions(p)
    np.testing.assert_allclose(p @ T, p, atol=1e-12)
    live = p > 1e-9  # rarer components' shares are lost to rounding in the cumulative sums
    np.testing.assert_allclose(T[live].sum(axis=1), 1.0, atol=1e-9)
    draws = 6000
    rejected = []
    for c0 in np.argsort(p)[::-1][:3]:
        counts = _mirror_draws(m, 0.08, c0, temperature, draws, 79)
        e = T[c0] * draws
        keep = e >= 5  # expected counts of 5 or more (common practice)
        assert counts[~keep].sum() <= max(5 * e[~keep].sum(), 5)
        if keep.sum() > 1:
            chi2 = float(np.sum((counts[keep] - e[keep]) ** 2 / e[keep]))
            assert chi2 < chi2_dist.ppf(0.999, keep.sum() - 1), (c0, counts, e)
        else:
            assert counts[keep].sum() >= draws - max(5 * e[~keep].sum(), 5)
        fresh = p * draws  # what plain draws would give: the test tells the two apart
        kf = fresh >= 5
        rejected.append(float(np.sum((counts[kf] - fresh[kf]) ** 2 / fresh[kf]))
                        > chi2_dist.ppf(0.999, kf.sum() - 1))
    assert any(rejected)


def test_mirrored_far_tail_draws_follow_the_exact_transition_probabilities():
    """A far-tail clique (one-exp sum about 2e-116, below its floor, checked) of a 4-scale
    ladder prior whose amplitudes leave two live components there, p = (0.3, 0.7): the
    general path's mirror, inside the one-exp row pass, must give the exact transitions of
    :func:`_mirror_transitions`: 0 -> 1 always, 1 -> 0 with probability 3/7 (chi-square,
    failing by chance one time in 1000)."""
    prec = tuple(4.0**c for c in range(4))
    prior = GSMPrior((PriorGroup("two live", ((0, 1),), (-200.0 + np.log(3 / 7), 0.0, 0.0, 0.0),
                                 prec),))
    d = np.sqrt(400 / 3)  # exp(-d^2 / 2) cubed is e^-200
    m = GreyModel(np.array([[0.0, d]]), variance=1.0, prior=prior)
    amp = kernels._ladder_amplitudes(m.logamp, m.prec)
    assert amp.size and np.sum(amp[0] * np.exp(-0.5 * d * d * m.prec[0])) < 1e-100
    lp = m.logamp[0] - 0.5 * m.prec[0] * d * d
    p = np.exp(lp - lp.max())
    p /= p.sum()
    np.testing.assert_allclose(p[:2], [0.3, 0.7], rtol=1e-9)
    T = _mirror_transitions(p[:2] / p[:2].sum())
    draws = 4000
    for c0 in (0, 1):
        counts = _mirror_draws(m, d, c0, 1.0, draws, 80)
        assert counts[2:].sum() == 0
        e = T[c0] * draws
        if c0 == 0:
            assert counts[1] == draws
        else:
            chi2 = float(np.sum((counts[:2] - e) ** 2 / e))
            assert chi2 < chi2_dist.ppf(0.999, 1), (counts, e)


@pytest.mark.parametrize("temperature", [1.0, 0.5])
def test_mirror_of_a_negligible_component_lands_on_a_live_one(temperature):
    """A 4-scale ladder prior with amplitudes (e^-60, 1, 1, e^-200) at difference 0.3: the
    smallest component's share is about e^-60 of the whole, so its mirror lies inside the
    third component's share (the fourth has e^-140 of the first's weight).  Rounding
    must not carry the mirrored point onto the total, where the pick would take the last
    component whatever its weight: every draw from component 0 lands on component 2."""
    prior = GSMPrior((PriorGroup("tails", ((0, 1),), (-60.0, 0.0, 0.0, -200.0),
                                 tuple(4.0**c for c in range(4))),))
    m = GreyModel(np.array([[0.0, 0.3]]), variance=1.0, prior=prior)
    counts = _mirror_draws(m, 0.3, 0, temperature, 50, 82)
    assert counts[2] == 50, counts


def test_far_tail_draw_at_unit_temperature_takes_the_general_path():
    """A clique difference of 15 (prior units) at T = 1: the one-exp path's clique sum is below
    its floor (checked here), so the general path draws.  The exact probabilities (numpy, log
    space) put all but a negligible share on the smallest precision: every draw must take it."""
    prior = GSMPrior.load()
    d = 15.0
    y = np.array([[0.0, d]])
    m = GreyModel(y, variance=1.0, prior=prior)
    o = 0
    lp = m.logamp[o] - 0.5 * m.strength[o] * m.prec[o] * d * d
    assert np.sum(np.exp(m.logamp[o] - m.logamp[o].max() - 0.5 * m.strength[o] * m.prec[o] * d * d)) < 1e-100
    p = np.exp(lp - lp.max())
    p /= p.sum()
    assert p[np.argmin(m.prec[o])] > 1 - 1e-12
    comp = np.empty((len(m.offsets), 1, 1, 2), np.uint8)
    x = y.reshape(1, 1, 2)
    for k in range(300):
        kernels.gsm_draw_components(x, x, m.dw, m.offsets, m.logamp, m.prec, m.strength, 1.0,
                                    np.uint64(kernels.stream_key(78, 0, k)), comp)
        assert comp[o, 0, 0, 0] == np.argmin(m.prec[o])


@pytest.mark.parametrize("temperature, noise_ref", [(1.0, 0.0), (0.5, 0.0), (1.0, 0.4)])
def test_scale_draws_follow_their_conditional_probabilities(temperature, noise_ref):
    """Components drawn for one clique difference, many times, against the exact categorical
    probabilities ``(alpha_c exp(-lam m pi_c d^2 / 2))^(1/T)`` normalised (chi-square test),
    with ``m = noise_ref (1/v_1 + 1/v_2) / 2`` for a noise-stabilised prior, else 1.

    A 1 x 2 image has one horizontal clique; each draw uses a new stream key.  The
    half-quadratic weight of that clique (``gsm_mean_weights``) is checked against
    ``lam m E[pi | d]`` from the same probabilities at T = 1.
    """
    prior = GSMPrior.load().with_noise_ref(noise_ref)
    y = np.array([[0.0, 0.08]])
    v = np.array([[0.5, 2.0]])
    m = GreyModel(y, variance=v, prior=prior)
    o = 0  # the horizontal offset (0, 0, 1)
    assert tuple(m.offsets[o]) == (0, 0, 1)
    factor = noise_ref * (1 / v[0, 0] + 1 / v[0, 1]) / 2 if noise_ref else 1.0
    d2 = 0.08**2 * factor
    lp1 = m.logamp[o] - 0.5 * m.strength[o] * m.prec[o] * d2
    q = np.exp(lp1 - lp1.max())
    w = np.zeros((len(m.offsets), 1, 1, 2))
    kernels.gsm_mean_weights(y.reshape(1, 1, 2), m.offsets, m.logamp, m.prec, m.strength, w, m.gs)
    assert w[o, 0, 0, 0] == pytest.approx(m.strength[o] * factor * np.sum(q * m.prec[o]) / q.sum(),
                                            rel=1e-12)
    lp = lp1 / temperature
    p = np.exp(lp - lp.max())
    p /= p.sum()
    comp = np.empty((len(m.offsets), 1, 1, 2), np.uint8)
    draws = 20_000
    counts = np.zeros(len(p))
    x = y.reshape(1, 1, 2)
    for k in range(draws):
        kernels.gsm_draw_components(x, x, m.dw, m.offsets, m.logamp, m.prec, m.strength,
                                    temperature, np.uint64(kernels.stream_key(77, 0, k)), comp,
                                    m.gs)
        counts[comp[o, 0, 0, 0]] += 1
    keep = p * draws >= 5  # chi-square needs expected counts of 5 or more (common practice)
    expected = p[keep] * draws
    chi2 = float(np.sum((counts[keep] - expected) ** 2 / expected))
    # pooled tail: components too rare to test on their own must stay rare
    assert counts[~keep].sum() <= max(5 * p[~keep].sum() * draws, 5)
    # scipy's chi-square with keep.sum() - 1 degrees of freedom: a correct sampler fails
    # this one time in 1000 (the seeds are fixed, so the outcome is too)
    assert chi2 < chi2_dist.ppf(0.999, keep.sum() - 1)


def test_over_relaxed_draws_are_an_ar1_around_the_exact_gmrf(gmrf_case):
    """With one scale the scales never change, so the over-relaxed image update
    ``x' = mu + alpha (x - mu) + sqrt(1 - alpha^2) z`` makes ``x - mu`` an AR(1) process
    whose stationary law is the exact ``N(0, Q^-1)`` and whose lag-1 autocorrelation is
    ``alpha`` (Adler 1981; the AR(1) closed form).  Over S = 400 draws a pixel's lag-1
    sample autocorrelation has sd about sqrt((1 - alpha^2) / S) = 0.043, so the average
    over 1024 pixels is within 0.01 of alpha even with strong neighbour correlation
    (tolerance 0.03), and the average ratio of sampled to exact variance has sd
    sqrt(2 / S) / sqrt(1024) = 0.002 times a few, as in the plain test (0.03)."""
    model, mean, var = gmrf_case
    alpha = -0.5
    m = GreyModel(model.y, variance=1.0 / model.dw, prior=model.prior, tol=1e-9, relax=alpha,
                  single_solves=1)
    S = 400
    e = np.empty((S, mean.size))
    for st in sampler.iterate(m, sampler.Constant(1.0), sweeps=S + 5, chain=0, seed=13, burn_in=5):
        if st.sampling:
            np.testing.assert_allclose(st.state.mu.ravel(), mean, atol=1e-6)
            e[st.sweep - 5] = st.state.x.ravel() - mean
    r1 = (e[1:] * e[:-1]).sum(axis=0) / (e * e).sum(axis=0)
    assert abs(r1.mean() - alpha) < 0.03
    assert abs((e.var(axis=0) / var).mean() - 1) < 0.03
    # and the plain update is uncorrelated from draw to draw, so the check above can fail
    m0 = GreyModel(model.y, variance=1.0 / model.dw, prior=model.prior, tol=1e-9)
    e0 = np.array([st.state.x.ravel() - mean for st in sampler.iterate(
        m0, sampler.Constant(1.0), sweeps=S, chain=0, seed=13)])
    assert abs(((e0[1:] * e0[:-1]).sum(axis=0) / (e0 * e0).sum(axis=0)).mean()) < 0.03


def scale_enumeration(model):
    """Exact posterior mean and ``E[x^2]`` of a GSM-MRF on a tiny lattice, by summing over
    every configuration ``s`` of the clique scales: given ``s`` the posterior is the
    Gaussian ``N(Q_s^-1 b, Q_s^-1)`` and ``p(s | y)`` is proportional to
    ``prod_c exp(logamp_{s_c}) |Q_s|^{-1/2} exp(b' Q_s^-1 b / 2)`` (the Gaussian integral over
    ``x`` of the joint; Rue & Held 2005, ch. 2).  Also returns the conditional mean of the
    most probable configuration."""
    import itertools

    n = model.y.size
    idx = np.arange(n).reshape(model.grid.shape)
    cliques = []
    for o, (dz, di, dj) in enumerate(model.offsets):
        for z, i, j in np.ndindex(model.grid.shape):
            if z + dz < idx.shape[0] and i + di < idx.shape[1] and 0 <= j + dj < idx.shape[2]:
                cliques.append((idx[z, i, j], idx[z + dz, i + di, j + dj], o))
    K = model.prec.shape[1]
    combos = np.array(list(itertools.product(range(K), repeat=len(cliques))))
    Q = np.zeros((len(combos), n, n))
    Q[:, range(n), range(n)] = model.dw.ravel()
    logw = np.zeros(len(combos))
    for c, (p, q, o) in enumerate(cliques):
        w = model.strength[o] * model.prec[o][combos[:, c]]
        Q[:, p, p] += w
        Q[:, q, q] += w
        Q[:, p, q] -= w
        Q[:, q, p] -= w
        logw += model.logamp[o][combos[:, c]]
    return mixture_moments(Q, logw, model.b.ravel())


def mixture_moments(Q, logw, b):
    """Mean, ``E[x^2]`` and the most probable component's mean of the Gaussian mixture
    ``sum_s w_s N(Q_s^-1 b, Q_s^-1)`` with ``w_s`` proportional to
    ``exp(logw_s) |Q_s|^(-1/2) exp(b' Q_s^-1 b / 2)`` (the Gaussian integral over ``x`` of the
    joint of scales and image; Rue & Held 2005, ch. 2); ``Q`` of shape ``(S, n, n)``."""
    mu = np.linalg.solve(Q, np.broadcast_to(b, (len(Q), b.size))[..., None])[..., 0]
    logw = logw - np.log(np.diagonal(np.linalg.cholesky(Q), axis1=1, axis2=2)).sum(axis=1) + 0.5 * mu @ b
    p = np.exp(logw - logw.max())
    p /= p.sum()
    ex2 = p @ (np.diagonal(np.linalg.inv(Q), axis1=1, axis2=2) + mu * mu)
    return p @ mu, ex2, mu[np.argmax(p)]


def assert_sampled_moments_match(model, mean, ex2, mode_mean, *, C=8, S=2500, B=10, nb=20):
    """The sampler's Rao-Blackwellised mean and ``E[x^2]`` against exact values: ``C`` chains
    of ``B`` burn-in and ``S`` kept sweeps, cut into ``nb`` batches each; every moment must lie
    within 4 standard errors of the ``C nb`` batch means, and the most probable scale
    configuration's conditional mean ``mode_mean`` more than 20 away (so a sampler of the wrong
    mixture fails)."""
    n = model.y.size
    q1, q2 = np.empty((C, S, n)), np.empty((C, S, n))
    for c in range(C):
        for st in sampler.iterate(model, sampler.Constant(1.0), sweeps=S + B, chain=c, seed=12,
                                  burn_in=B):
            if st.sampling:
                mu, x = st.state.mu.ravel(), st.state.x.ravel()
                q1[c, st.sweep - B] = mu
                q2[c, st.sweep - B] = (x - mu) ** 2 + mu * mu
    for q, exact in ((q1, mean), (q2, ex2)):
        batches = q.reshape(C, nb, S // nb, n).mean(axis=2).reshape(-1, n)
        se = batches.std(axis=0, ddof=1) / np.sqrt(len(batches))
        assert np.all(np.abs(batches.mean(axis=0) - exact) < 4 * se), (batches.mean(axis=0), exact, se)
    se_mean = q1.reshape(C, nb, -1, n).mean(axis=2).reshape(-1, n).std(axis=0, ddof=1) / np.sqrt(C * nb)
    assert np.max(np.abs(mode_mean - mean)) > 20 * np.max(se_mean)


@pytest.mark.slow
@pytest.mark.parametrize("relax, reflect", [(0.0, False), (-0.5, True)])
def test_gsm_posterior_moments_match_exact_scale_enumeration(relax, reflect):
    """The whole sampler (scale draws, block draws, Rao-Blackwellised moments), plain and
    over-relaxed as the final chains run (image update at alpha = -0.5, scales mirrored),
    with the shipped 8-scale prior on a 2 x 2 image: its 6 cliques (rows,
    columns, both diagonals) have 8^6 = 262144 scale configurations, all summed exactly by
    :func:`scale_enumeration`.  The Monte-Carlo standard error of each moment comes from
    20 batch means in each of 8 chains of 2500 sweeps (160 batches of 125 sweeps, far
    longer than the chains' memory on 4 pixels); every moment must lie within 4 standard
    errors (with the standard errors from 160 batches, t with 159 degrees of freedom: each
    of the 8 checks fails by chance with probability 1e-4).  The errors are
    about 0.004 posterior sd, while the conditional mean of the single most probable
    configuration is over 20 standard errors away: a sampler of the wrong mixture fails."""
    prior = GSMPrior.load().with_strength(0.3)
    y = np.array([[0.0, 0.22], [0.04, 0.30]])
    model = GreyModel(y, variance=0.05**2, prior=prior, tol=1e-10, relax=relax,
                      reflect_scales=reflect, single_solves=1)
    assert len(model.offsets) == 4 and model.solver_dtype == np.float64
    assert_sampled_moments_match(model, *scale_enumeration(model))


def test_closing_mean_is_the_conditional_mean_of_the_last_scales():
    """A chain's closing mean (``closing_mean``) is ``Q^-1 b`` for the scales its last
    sweep drew, checked against scipy's sparse solve with ``Q`` assembled from those
    scales (:func:`sparse_precision`); it enters the tally's mean and the spread of the
    means, and not the conditional variance (law of total variance: ``sv / nx`` over the
    draws, ``s2 / n - m^2`` over the means).  The chains themselves are those of a run
    without it (same seed: the same draws)."""
    import skimage.data

    gen = np.random.default_rng(21)
    x = skimage.data.camera()[200:224, 240:264] / 255.0
    y = x + 0.1 * gen.standard_normal(x.shape)
    prior = GSMPrior.load().with_strength(0.5)
    runs = []
    for closing in (False, True):
        m = GreyModel(y, variance=0.01, prior=prior, tol=1e-10, single_solves=1, relax=-0.5,
                      reflect_scales=True, closing_mean=closing)
        runs.append((m, sampler.run(m, sweeps=4, burn_in=1, chains=2, seed=5, tally=True)))
    (_, plain), (m, run) = runs
    closing = []
    for st in run.states:
        w = np.zeros(m.w.shape)
        kernels.gsm_expand(st.comp, m.prec, m.strength, w, m.offsets, None)
        closing.append(sla.spsolve(sparse_precision(m, w), m.b.ravel()).reshape(m.y.shape))
    t, p = run.tally, plain.tally
    assert (t.n, t.nx, p.n, p.nx) == (8, 6, 6, 6)
    np.testing.assert_allclose(t.s1, p.s1 + closing[0] + closing[1], rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(t.s2, p.s2 + closing[0] ** 2 + closing[1] ** 2, rtol=1e-8,
                               atol=1e-8)
    np.testing.assert_array_equal(t.sv, p.sv)
    m8 = t.s1 / 8
    np.testing.assert_allclose(t.var64(), np.maximum(t.sv / 6 + t.s2 / 8 - m8 * m8, 0.0))
    assert t.mc_variance() is not None  # four means in each chain


def test_tallied_run_without_states_is_the_same_run(states_alive):
    """``keep_states=False`` (what ``sample_posterior`` asks for, so that a run holds one
    chain's state at a time instead of every chain's) changes no draw -- the tally and the
    energies equal those of a run that keeps the states, bit for bit -- and each chain's
    state is freed before the next chain starts (kept otherwise)."""
    gen = np.random.default_rng(4)
    y = 0.5 + 0.1 * gen.standard_normal((20, 24))
    prior = GSMPrior.load().with_strength(0.5)
    runs = []
    for keep in (True, False):
        m = GreyModel(y, variance=0.01, prior=prior, single_solves=1, relax=-0.5,
                      reflect_scales=True, closing_mean=True)
        runs.append(sampler.run(m, sweeps=3, burn_in=1, chains=3, seed=9, tally=True,
                                keep_states=keep))
    kept, freed = runs
    assert len(kept.states) == 3 and freed.states == []
    np.testing.assert_array_equal(kept.energies, freed.energies)
    for name in ("s1", "s2", "sv"):
        np.testing.assert_array_equal(getattr(kept.tally, name), getattr(freed.tally, name))
    for keep, expected in ((False, [[], [False], [False, False]]),
                           (True, [[], [True], [True, True]])):
        m = GreyModel(y, variance=0.01, prior=prior, single_solves=1)
        assert states_alive(m, sweeps=2, burn_in=1, chains=3, seed=9, tally=True,
                            keep_states=keep) == expected


@pytest.mark.slow
def test_closing_means_keep_the_exact_posterior_mean_of_scale_enumeration():
    """The closing mean is one more state of the chain of scales, so it has the posterior
    mean as its expectation: checked on the 2 x 2 GSM posterior of
    :func:`test_gsm_posterior_moments_match_exact_scale_enumeration` (exact by
    :func:`scale_enumeration`, 8^6 scale configurations), with the final chains'
    over-relaxation.  4000 independent chains (their own seeds) of 20 burn-in sweeps, one
    kept sweep and the closing mean; the closing means alone, and each chain's two-term
    mean, must lie within 4 standard errors of the exact mean (the standard errors from
    the 4000 independent values: each of the 8 checks fails by chance with probability
    6e-5).  A sampler of the wrong mixture fails: the conditional mean of the single most
    probable configuration lies over 8 standard errors away."""
    prior = GSMPrior.load().with_strength(0.3)
    y = np.array([[0.0, 0.22], [0.04, 0.30]])
    model = GreyModel(y, variance=0.05**2, prior=prior, tol=1e-10, relax=-0.5,
                      reflect_scales=True, single_solves=1, closing_mean=True)
    mean, _, mode_mean = scale_enumeration(model)
    C, B = 4000, 20
    close, both = np.empty((C, 4)), np.empty((C, 4))
    for c in range(C):
        run = sampler.run(model, sweeps=B + 1, burn_in=B, chains=1, seed=1000 + c, tally=True)
        assert run.tally.n == 2 and run.tally.nx == 1
        kept = run.states[0].mu.ravel()
        close[c] = run.tally.s1.ravel() - kept
        both[c] = run.tally.mean64().ravel()
    for q in (close, both):
        se = q.std(axis=0, ddof=1) / np.sqrt(C)
        assert np.all(np.abs(q.mean(axis=0) - mean) < 4 * se), (q.mean(axis=0), mean, se)
    se = close.std(axis=0, ddof=1) / np.sqrt(C)
    assert np.max(np.abs(mode_mean - mean) / se) > 8
