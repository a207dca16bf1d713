"""The 2 x 2 block-filter prior against references built outside the package's kernels.

A block filter ``f`` (the non-constant 2 x 2 Haar filters) is a clique of four
pixels with response ``r = f . x``; given one scale per clique the prior is the
Gaussian MRF with precision ``sum_f F_f^T W_f F_f`` (Rue & Held 2005, ch. 2), which
the tests assemble with scipy.sparse from the filters' definition, and the
posterior of an image under Gaussian noise is ``N(Q^-1 b, Q^-1)``.  The scale
draws are categorical with the probabilities of the Gaussian scale mixture
(Schmidt, Gao & Roth 2010), checked by chi-square tests (scipy).
"""

import itertools

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla
from scipy import signal, special
from scipy.stats import chi2 as chi2_dist

from mrfclean import kernels, sampler
from mrfclean.fit.grey import BLOCK_FILTERS, filter_score_matching_loss, score_matching_loss
from mrfclean.models.grey import (BLOCK_FILTER_NAMES, BLOCK_PRIOR_FILE, BlockGroup, GreyModel,
                                  GSMPrior, PriorGroup)
from test_grey_gmrf import assert_sampled_moments_match, mixture_moments  # shared with the pair prior's

# the filters written out from their definition (the Haar basis: A. Haar, "Zur Theorie der
# orthogonalen Funktionensysteme", Mathematische Annalen 69 (1910) 331-371, from memory),
# independently of the package's
HAAR = {"columns": np.array([[1.0, -1.0], [1.0, -1.0]]) / 2,
        "rows": np.array([[1.0, 1.0], [-1.0, -1.0]]) / 2,
        "checker": np.array([[1.0, -1.0], [-1.0, 1.0]]) / 2}


def block_prior(*, scales=None):
    """The shipped block prior, or a one-scale (quadratic) one of precision ``scales``."""
    if scales is None:
        return GSMPrior.load(shipped=BLOCK_PRIOR_FILE)
    return GSMPrior((), blocks=(BlockGroup("all", BLOCK_FILTER_NAMES, (0.0,), (float(scales),)),))


def filter_matrix(shape, f):
    """Sparse ``F``: one row per 2 x 2 block of a ``(H, W)`` plane (row-major by its top-left
    corner), the filter's four coefficients at the block's pixels."""
    H, W = shape
    idx = np.arange(H * W).reshape(H, W)
    rows, cols, vals = [], [], []
    for r, (i, j) in enumerate(itertools.product(range(H - 1), range(W - 1))):
        for a, b in itertools.product(range(2), range(2)):
            rows.append(r)
            cols.append(idx[i + a, j + b])
            vals.append(f[a, b])
    return sp.csr_matrix((vals, (rows, cols)), shape=((H - 1) * (W - 1), H * W))


def sparse_precision(model):
    """``diag(1/v) + sum_f F_f^T diag(bw_f) F_f`` from the model's block-filter weights."""
    H, W = model.grid.shape[1:]
    Q = sp.diags(model.dw.ravel())
    for k, name in enumerate(BLOCK_FILTER_NAMES):
        F = filter_matrix((H, W), HAAR[name])
        Q = Q + F.T @ sp.diags(model.bw[k, 0, :H - 1, :W - 1].astype(np.float64).ravel()) @ F
    return Q.tocsc()


def drawn_model(noise_ref=0.0, shape=(9, 11), seed=0):
    """A block-prior model whose operator holds scales drawn from a random image."""
    gen = np.random.default_rng(seed)
    y = gen.normal(scale=0.1, size=shape)
    v = gen.uniform(0.5, 2.0, size=shape) * 0.01
    m = GreyModel(y, variance=v, prior=block_prior().with_noise_ref(noise_ref * 0.01), tol=1e-10)
    st = m.start(0, 0)
    m._draw_scales(st, 1.0, kernels.stream_key(5, 0, 0))
    m._set_scales(st.comp)
    return m, st


@pytest.mark.parametrize("noise_ref", [0.0, 1.0])
def test_block_weights_and_operator_match_the_sparse_filter_sum(noise_ref):
    """The blocks' weights are ``lam prec[comp]`` (times the mean of the four pixels'
    factors ``noise_ref / v`` for a noise-stabilised prior), and the operator the solver
    uses -- the blocks turned into pair weights -- is ``diag(1/v) + sum_f F_f^T W_f F_f``
    assembled from the filters (scipy.sparse): same products and same diagonal."""
    m, st = drawn_model(noise_ref)
    H, W = m.grid.shape[1:]
    la, pr, lam = m.blocks
    comp = st.comp[m.npair:]
    assert np.all(comp[:, :, -1, :] == kernels.NO_CLIQUE) and np.all(comp[:, :, :, -1] == kernels.NO_CLIQUE)
    inner = comp[:, :, :-1, :-1].astype(int)
    assert inner.max() < pr.shape[1]
    factor = np.ones((H - 1, W - 1))
    if noise_ref:
        g = m.prior.noise_ref * m.dw[0]
        factor = (g[:-1, :-1] + g[:-1, 1:] + g[1:, :-1] + g[1:, 1:]) / 4
    for k in range(3):
        np.testing.assert_allclose(m.bw[k, 0, :-1, :-1], lam[k] * pr[k][inner[k, 0]] * factor,
                                   rtol=1e-12)
    Q = sparse_precision(m)
    x = np.random.default_rng(1).normal(size=m.grid.shape)
    np.testing.assert_allclose(m.apply(x).ravel(), Q @ x.ravel(), rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(m._diag.ravel(), Q.diagonal(), rtol=1e-12)


def test_block_perturbation_is_the_transposed_filters_of_its_normals():
    """The blocks' share of a perturbation is ``sum_f F_f^T diag(bw_f)^(1/2) e_f`` for the
    standard normals ``e_f`` at counters ``first + f N + p`` (read back with
    ``kernels.normal_many``), with ``F_f`` from the filters' definition; so its covariance
    is the blocks' precision, as perturbation-optimisation needs (Papandreou & Yuille 2010)."""
    m, _ = drawn_model()
    H, W = m.grid.shape[1:]
    N = H * W
    key, first, scale = np.uint64(123), 7 * N, 0.8
    out = np.zeros(m.grid.shape)
    kernels.block_perturbation(m.bw.astype(np.float64), key, first, scale, out,
                               np.empty(m.bw.shape))
    want = np.zeros(N)
    for k, name in enumerate(BLOCK_FILTER_NAMES):
        e = kernels.normal_many(key, first + k * N, N).reshape(H, W)[:-1, :-1]
        w = m.bw[k, 0, :-1, :-1].astype(np.float64)
        want += filter_matrix((H, W), HAAR[name]).T @ (np.sqrt(w) * e).ravel()
    np.testing.assert_allclose(out.ravel(), scale * want, rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("noise_ref", [0.0, 1.0])
def test_block_energy_against_brute_force(noise_ref):
    """``E(x)`` of a block prior: ``-sum_blocks sum_f logsumexp_c(logamp - lam prec m r^2 / 2)``
    with the responses ``r`` from scipy.signal.correlate2d and ``m`` the blocks' mean
    factor, plus the data term; from the model's energy and from the scale draw's pass."""
    m, st = drawn_model(noise_ref, seed=3)
    H, W = m.grid.shape[1:]
    x = np.random.default_rng(4).normal(scale=0.05, size=(H, W))
    factor = np.ones((H - 1, W - 1))
    if noise_ref:
        g = m.prior.noise_ref * m.dw[0]
        factor = (g[:-1, :-1] + g[:-1, 1:] + g[1:, :-1] + g[1:, 1:]) / 4
    by = {f: b for b in m.prior.blocks for f in b.filters}
    e = 0.0
    for name in BLOCK_FILTER_NAMES:
        r = signal.correlate2d(x, HAAR[name], mode="valid")
        b = by[name]
        lp = (np.asarray(b.logamp)[:, None, None]
              - 0.5 * m.prior.strength * np.asarray(b.prec)[:, None, None] * (r * r * factor)[None])
        e -= special.logsumexp(lp, axis=0).sum()
    data = 0.5 * np.sum((x - m.y[0]) ** 2 * m.dw[0])
    assert m.energy_of(x) == pytest.approx(e + data, rel=1e-12)
    st.x[...] = x
    m._draw_scales(st, 1.0, kernels.stream_key(6, 0, 0))
    assert st.energy == pytest.approx(e + data, rel=1e-12)


@pytest.mark.parametrize("temperature, noise_ref", [(1.0, 0.0), (0.5, 0.0), (1.0, 0.6)])
def test_block_scale_draws_follow_their_conditional_probabilities(temperature, noise_ref):
    """A 2 x 2 image is one block; each of its three filters draws its component with
    probability proportional to ``(alpha_c exp(-lam m pi_c r^2 / 2))^(1/T)`` (chi-square
    test against those exact probabilities, as for the pair cliques), and its
    half-quadratic weight is ``lam m E[pi | r]`` at T = 1."""
    prior = block_prior().with_noise_ref(noise_ref)
    y = np.array([[0.0, 0.05], [0.02, 0.11]])
    v = np.array([[0.5, 2.0], [1.0, 1.5]])
    m = GreyModel(y, variance=v, prior=prior)
    la, pr, lam = m.blocks
    factor = noise_ref * np.mean(1 / v) if noise_ref else 1.0
    x = y.reshape(1, 2, 2)
    bw, w4 = np.zeros((3, 1, 2, 2)), np.zeros((4, 1, 2, 2))
    kernels.block_mean_weights(x, la, pr, lam, bw, w4, m.gs)
    draws = 20_000
    counts = np.zeros((3, pr.shape[1]))
    comp = np.empty((3, 1, 2, 2), np.uint8)
    for k in range(draws):
        kernels.block_draw_components(x, la, pr, lam, temperature,
                                      np.uint64(kernels.stream_key(78, 0, k)), comp, m.gs)
        for f in range(3):
            counts[f, comp[f, 0, 0, 0]] += 1
    assert np.all(comp[:, 0, 1, :] == kernels.NO_CLIQUE) and np.all(comp[:, 0, :, 1] == kernels.NO_CLIQUE)
    for f, name in enumerate(BLOCK_FILTER_NAMES):
        r = float(np.sum(HAAR[name] * y))
        lp1 = la[f] - 0.5 * lam[f] * pr[f] * r * r * factor
        q = np.exp(lp1 - lp1.max())
        assert bw[f, 0, 0, 0] == pytest.approx(lam[f] * factor * np.sum(q * pr[f]) / q.sum(), rel=1e-12)
        p = np.exp(lp1 / temperature - (lp1 / temperature).max())
        p /= p.sum()
        keep = p * draws >= 5  # expected counts of 5 or more (common practice)
        expected = p[keep] * draws
        chi2 = float(np.sum((counts[f, keep] - expected) ** 2 / expected))
        assert counts[f, ~keep].sum() <= max(5 * p[~keep].sum() * draws, 5)
        # fails one time in 1000 for a correct sampler, per filter (fixed seeds)
        assert chi2 < chi2_dist.ppf(0.999, keep.sum() - 1)


@pytest.fixture(scope="module")
def quadratic_block_case():
    gen = np.random.default_rng(2025)
    H, W, sigma2, lam = 24, 20, 0.5, 6.0
    y = gen.normal(size=(H, W))
    model = GreyModel(y, variance=sigma2, prior=block_prior(scales=lam), tol=1e-9)
    st = model.start(0, 0)
    model._draw_scales(st, 1.0, 1)
    model._set_scales(st.comp)
    Q = sparse_precision(model)
    return model, sla.spsolve(Q, y.ravel() / sigma2), np.diag(np.linalg.inv(Q.toarray()))


def test_quadratic_block_prior_posterior_matches_exact_gmrf(quadratic_block_case):
    """One scale: the posterior is ``N(Q^-1 b, Q^-1)`` with ``Q`` assembled from the filters
    (scipy).  The Rao-Blackwellised mean is ``Q^-1 b`` at every sweep (solver tolerance
    1e-9: 1e-6 absolute).  Variance over S = 300 kept exact draws: the average ratio of
    sampled to exact variance over 480 pixels has sd sqrt(2 / 300) / sqrt(480) = 0.0037,
    a few times that with neighbour correlation; tolerance 0.03."""
    model, mean, var = quadratic_block_case
    run = sampler.run(model, sweeps=305, burn_in=5, seed=8, tally=True)
    np.testing.assert_allclose(run.tally.mean64().ravel(), mean, atol=1e-6)
    assert abs((run.tally.var64().ravel() / var).mean() - 1) < 0.03


def block_scale_enumeration(model):
    """Exact posterior mean and ``E[x^2]`` of a block-prior model on a tiny plane, summing
    over every configuration ``s`` of the block filters' scales: ``p(s | y)`` is
    proportional to ``prod exp(logamp_s) |Q_s|^(-1/2) exp(b' Q_s^-1 b / 2)`` with
    ``Q_s = diag(1/v) + sum lam pi_s f f^T`` (Rue & Held 2005, ch. 2); also the
    conditional mean of the most probable configuration."""
    H, W = model.grid.shape[1:]
    n = H * W
    la, pr, lam = model.blocks
    cliques = [(f, HAAR[name], i, j) for f, name in enumerate(BLOCK_FILTER_NAMES)
               for i in range(H - 1) for j in range(W - 1)]
    K = pr.shape[1]
    combos = np.array(list(itertools.product(range(K), repeat=len(cliques))))
    Q = np.zeros((len(combos), n, n))
    Q[:, range(n), range(n)] = model.dw.ravel()
    logw = np.zeros(len(combos))
    for c, (f, filt, i, j) in enumerate(cliques):
        v = np.zeros((H, W))
        v[i:i + 2, j:j + 2] = filt
        v = v.ravel()
        Q += (lam[f] * pr[f][combos[:, c]])[:, None, None] * np.outer(v, v)[None]
        logw += la[f][combos[:, c]]
    return mixture_moments(Q, logw, model.b.ravel())


@pytest.mark.slow
def test_block_prior_moments_match_exact_scale_enumeration():
    """The whole sampler with the shipped 8-scale block prior on a 2 x 3 image: two blocks,
    six filter cliques, 8^6 = 262144 scale configurations summed exactly.  As for the pair
    prior's enumeration test: standard errors from 160 batch means (8 chains of 2500
    sweeps), every moment within 4 of them (t with 159 degrees of freedom: each of the 12
    checks fails by chance with probability 1e-4), and the single most probable
    configuration's conditional mean far outside, so a sampler of the wrong mixture fails."""
    prior = block_prior().with_strength(0.3)
    y = np.array([[0.0, 0.22, 0.25], [0.04, 0.30, 0.18]])
    model = GreyModel(y, variance=0.05**2, prior=prior, tol=1e-10, single_solves=1)
    assert model.solver_dtype == np.float64
    assert_sampled_moments_match(model, *block_scale_enumeration(model))


def test_filter_loss_on_difference_filters_is_the_pairwise_loss():
    """Neighbour differences are two-tap filters, so the filter score-matching loss on the
    8-neighbourhood's four differences equals the pairwise loss (two implementations of
    Hyvärinen 2005's objective: responses and their transposes against clique slices)."""
    gen = np.random.default_rng(3)
    images = [gen.random((14, 17)) * 0.4, gen.random((11, 9))]
    prec = 10 ** 0.5 * 4.0 ** np.arange(5)
    theta = gen.normal(size=2 * prec.size)
    diffs = [np.array([[-1.0, 1.0]]), np.array([[-1.0], [1.0]]),
             np.array([[-1.0, 0.0], [0.0, 1.0]]), np.array([[0.0, -1.0], [1.0, 0.0]])]
    a = filter_score_matching_loss(theta, images, diffs, [0, 0, 1, 1], prec)
    b = score_matching_loss(theta, images, [[(0, 1), (1, 0)], [(1, 1), (1, -1)]], prec)
    assert a[0] == pytest.approx(b[0], rel=1e-12)
    np.testing.assert_allclose(a[1], b[1], rtol=1e-10, atol=1e-12)
    # and the package's block filters are the Haar filters written out above
    np.testing.assert_array_equal(BLOCK_FILTERS, np.array([HAAR[n] for n in BLOCK_FILTER_NAMES]))


def test_block_prior_file_round_trip_and_format():
    """A block prior saves as format 2 (a format-1 reader would drop its blocks) and loads
    back equal; block groups must cover the three filters once each."""
    prior = block_prior()
    d = prior.to_dict()
    assert d["format"] == "mrfclean-gsm-prior/2" and "blocks" in d
    back = GSMPrior.from_dict(d)
    assert back.blocks == prior.blocks and back.groups == prior.groups == ()
    assert GSMPrior.load().to_dict()["format"] == "mrfclean-gsm-prior/1"
    b = prior.blocks[0]
    with pytest.raises(ValueError, match="once each"):
        GSMPrior((), blocks=(b,))
    with pytest.raises(ValueError, match="no potential along z"):
        GreyModel(np.zeros((2, 4, 4)), variance=1.0, prior=prior)


def test_mixed_prior_with_curvature_matches_exact_gmrf():
    """One scale everywhere, pair cliques (4-neighbourhood), block filters and the
    second-difference term together: the posterior is ``N(Q^-1 b, Q^-1)`` with ``Q`` the
    data precision plus ``D^T W D`` of the pairs, ``F^T W F`` of the blocks and
    ``kappa C^T C`` of the triples, all assembled here with scipy.sparse.  Every part
    draws its perturbation normals from its own counters, so a collision between
    two parts would correlate them and move the sampled variance.  Mean to the
    solver's tolerance (1e-6); variance ratio over 300 kept draws on 252 pixels
    (sd sqrt(2 / 300) / sqrt(252) = 0.005, a few times that with neighbour
    correlation): tolerance 0.03."""
    gen = np.random.default_rng(7)
    H, W, sigma2, lam_pair, lam_block, kappa = 14, 18, 0.5, 2.0, 5.0, 1.5
    y = gen.normal(size=(H, W))
    prior = GSMPrior((PriorGroup("pairs", ((0, 1), (1, 0)), (0.0,), (lam_pair,)),),
                     curvature=kappa,
                     blocks=(BlockGroup("all", BLOCK_FILTER_NAMES, (0.0,), (lam_block,)),))
    model = GreyModel(y, variance=sigma2, prior=prior, tol=1e-9)
    assert model.npair == 2 and len(model.op_offsets) == 6
    n = H * W
    idx = np.arange(n).reshape(H, W)
    Q = sp.identity(n) / sigma2
    for di, dj in ((0, 1), (1, 0)):  # pair differences
        p, q = idx[:H - di, :W - dj].ravel(), idx[di:, dj:].ravel()
        D = sp.csr_matrix((np.r_[np.ones(p.size), -np.ones(p.size)],
                           (np.r_[np.arange(p.size), np.arange(p.size)], np.r_[q, p])), shape=(p.size, n))
        Q = Q + lam_pair * (D.T @ D)
    for name in BLOCK_FILTER_NAMES:
        F = filter_matrix((H, W), HAAR[name])
        Q = Q + lam_block * (F.T @ F)
    d2 = sp.diags([1.0, -2.0, 1.0], [0, 1, 2], shape=(W - 2, W))
    e2 = sp.diags([1.0, -2.0, 1.0], [0, 1, 2], shape=(H - 2, H))
    C = sp.vstack([sp.kron(sp.identity(H), d2), sp.kron(e2, sp.identity(W))])
    Q = (Q + kappa * (C.T @ C)).tocsc()
    mean = sla.spsolve(Q, y.ravel() / sigma2)
    var = np.diag(np.linalg.inv(Q.toarray()))
    run = sampler.run(model, sweeps=305, burn_in=5, seed=9, tally=True)
    np.testing.assert_allclose(run.tally.mean64().ravel(), mean, atol=1e-6)
    assert abs((run.tally.var64().ravel() / var).mean() - 1) < 0.03


@pytest.mark.parametrize("which", ["pairs", "blocks"])
def test_half_quadratic_descent_in_single_precision(which):
    """MAP's descent (iteratively reweighted least squares with the half-quadratic weights)
    at the default tolerance, so with the solver in float32: each step of it cannot raise
    the energy of a Gaussian scale mixture (Geman & Reynolds 1992), so the image it ends
    on has an energy no higher than the noisy start's, and it stops by its own rule."""
    x = np.zeros((20, 24))
    x[:, 12:] = 0.6
    y = x + 0.1 * np.random.default_rng(2).standard_normal(x.shape)
    prior = (block_prior() if which == "blocks" else GSMPrior.load()).with_strength(0.5)
    m = GreyModel(y, variance=0.01, prior=prior)
    assert m.solver_dtype == np.float32
    st = m.start(0, 0)
    e0 = m.energy_of(st.x)
    passes = m.quench(st)
    assert 1 <= passes < 100
    assert m.energy_of(st.x) < e0


def test_bad_prior_descriptions_are_refused_with_one_line():
    """A prior description with a missing key, block groups under format 1, or no groups at
    all is refused with a ValueError (one line at the command line), not a KeyError."""
    d = block_prior().to_dict()
    broken = {**d, "blocks": [{"name": "edges", "logamp": [0.0] * 8}]}
    with pytest.raises(ValueError, match="not a valid mrfclean GSM prior"):
        GSMPrior.from_dict(broken)
    with pytest.raises(ValueError, match="format mrfclean-gsm-prior/2"):
        GSMPrior.from_dict({**d, "format": "mrfclean-gsm-prior/1"})
    with pytest.raises(ValueError, match="needs pair groups or block groups"):
        GSMPrior.from_dict({"format": "mrfclean-gsm-prior/1", "precisions": [1.0]})
    with pytest.raises(ValueError, match="not an mrfclean GSM prior"):
        GSMPrior.from_dict([1, 2])


def test_block_prior_on_a_volume_is_refused_before_any_work():
    """``grey_setup`` refuses a block prior for a volume up front, naming what to do."""
    from mrfclean.grey import NO_Z_POTENTIAL, grey_setup

    y = np.random.default_rng(0).normal(size=(2, 16, 16))
    with pytest.raises(ValueError, match="no potential along z") as e:
        grey_setup(y, prior="blocks", strength=0.5, curvature=0.0)
    assert str(e.value) == NO_Z_POTENTIAL and "planes" in str(e.value)
