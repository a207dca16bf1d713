"""The Gibbs sampler against exact enumeration of small lattices.

Reference values are computed exactly in the tests by
:func:`mrfclean.exact.enumerate_posterior` (all 2^N configurations), which is
itself checked against closed forms of the one-dimensional Ising model and of
independent spins, and against :meth:`BinaryModel.energy_of`.

Monte-Carlo tolerance
---------------------
Each estimate is repeated in ``BATCHES`` independent batches (distinct seeds
give distinct random streams).  A batch averages thousands of sweeps of chains
whose autocorrelation time on these lattices is a few sweeps, so by the Markov
chain central limit theorem its estimate is close to normal; the batch mean
``m`` and its standard error ``se`` (spread of the batches / sqrt(BATCHES)) give
``(m - exact) / se ~ Student t`` with ``BATCHES - 1`` degrees of freedom.  Every
quantity of a test (each site's P(on), each bond's correlation, the mean energy)
must lie within the t quantile of a two-sided level ``ALPHA / n_quantities``
(Bonferroni), so that a correct sampler fails a test with probability at most
``ALPHA = 1e-3``.
"""

import numpy as np
import pytest
from scipy import linalg, stats

from mrfclean import estimates, sampler
from mrfclean.exact import configuration_energies, configuration_index, enumerate_posterior
from mrfclean.models.binary import BinaryModel, SpinTally
from mrfclean.sampler import Tally
from mrfclean.schedules import Constant


# Results do not depend on the thread count (tests/test_kernels.py checks it); on
# these small lattices one thread is faster, and steadier when the machine is shared.
pytestmark = pytest.mark.usefixtures("one_numba_thread")


ALPHA = 1e-3
BATCHES = 20
BURN_IN = 200
SAMPLES = 1500  # kept sweeps per chain and batch; two chains per batch

CASES = {
    "3x3 free": dict(shape=(3, 3), boundary="free", coupling=0.4, coupling_z=None, seed=31),
    "4x4 free": dict(shape=(4, 4), boundary="free", coupling=0.3, coupling_z=None, seed=32),
    "4x4 periodic": dict(shape=(4, 4), boundary="periodic", coupling=0.3, coupling_z=None,
                         seed=33),
    "2x2x3 stack": dict(shape=(2, 2, 3), boundary="free", coupling=0.25, coupling_z=0.6,
                        seed=34),
}


def neighbour_pairs(shape, boundary):
    """Nearest-neighbour pairs (flat C-order indices) written out site by site.

    Independent of :mod:`mrfclean.exact`: for every site, its right and lower
    neighbour in the plane (wrapped for a periodic boundary) and the site in the
    next plane.
    """
    Z, H, W = shape if len(shape) == 3 else (1, *shape)
    flat = lambda z, i, j: (z * H + i) * W + j  # noqa: E731
    pairs = []
    for z in range(Z):
        for i in range(H):
            for j in range(W):
                if j + 1 < W or boundary == "periodic":
                    pairs.append((flat(z, i, j), flat(z, i, (j + 1) % W)))
                if i + 1 < H or boundary == "periodic":
                    pairs.append((flat(z, i, j), flat(z, (i + 1) % H, j)))
                if z + 1 < Z:
                    pairs.append((flat(z, i, j), flat(z + 1, i, j)))
    return np.array(pairs)


class PairTally(Tally):
    """The model's own spin tally plus running sums of s_i s_j over nearest-neighbour pairs."""

    def __init__(self, model):
        self.model = model
        self.spins = SpinTally(model.grid)
        self.pairs = model.pairs
        self.sums = np.zeros(len(self.pairs))
        self.n = 0

    def add(self, state):
        self.spins.add(state)
        s = self.model.image(state).ravel().astype(np.float64)
        self.sums += s[self.pairs[:, 0]] * s[self.pairs[:, 1]]
        self.n += 1

    def merge(self, other):
        self.spins.merge(other.spins)
        self.sums += other.sums
        self.n += other.n

    def mean(self):
        return self.spins.mean()

    def std(self):
        return self.spins.std()

    def pair_mean(self):
        return self.sums / self.n


class PairModel(BinaryModel):
    """BinaryModel whose tally also records nearest-neighbour pair correlations."""

    def __init__(self, field, *, pairs, **kw):
        super().__init__(field, **kw)
        self.pairs = pairs

    def tally(self):
        return PairTally(self)


def make_model(case, cls=BinaryModel):
    c = CASES[case]
    rng = np.random.default_rng(c["seed"])
    h = rng.normal(0.0, 0.5, c["shape"])
    kw = dict(coupling=c["coupling"], coupling_z=c["coupling_z"], boundary=c["boundary"])
    if cls is PairModel:
        kw["pairs"] = neighbour_pairs(c["shape"], c["boundary"])
    return cls(h, **kw)


def assert_within_mc_error(batches, exact, what):
    """Bonferroni t-test of batch means against exact values (see module docstring)."""
    batches = np.atleast_2d(np.asarray(batches, dtype=np.float64).reshape(len(batches), -1))
    exact = np.asarray(exact, dtype=np.float64).ravel()
    k = batches.shape[0]
    se = batches.std(axis=0, ddof=1) / np.sqrt(k)
    t = (batches.mean(axis=0) - exact) / se
    crit = stats.t.ppf(1.0 - ALPHA / (2 * exact.size), k - 1)
    worst = int(np.nanargmax(np.abs(t)))
    assert np.all(np.abs(t) < crit), (
        f"{what}: |t| = {abs(t[worst]):.2f} >= {crit:.2f} at {worst} "
        f"(estimate {batches.mean(axis=0)[worst]:.5f}, exact {exact[worst]:.5f}, "
        f"se {se[worst]:.1e})")


def posterior_batches(model, temperature):
    """Per-batch P(on), pair correlations and mean energy, from independent seeds."""
    on, pairs, energy = [], [], []
    for b in range(BATCHES):
        seed = 1000 * (b + 1) + 17
        if temperature == 1.0:
            post = estimates.sample_posterior(model, burn_in=BURN_IN, samples=SAMPLES, chains=2,
                                              seed=seed)
            tally, run = post.tally, post.run
        else:
            run = sampler.run(model, schedule=Constant(temperature), sweeps=BURN_IN + SAMPLES,
                              chains=2, seed=seed, burn_in=BURN_IN, tally=True)
            tally = run.tally
        on.append(tally.mean().ravel())
        pairs.append(tally.pair_mean())
        energy.append(run.energies[:, BURN_IN:].mean())
    return np.array(on), np.array(pairs), np.array(energy)


# --- the enumerator itself ---------------------------------------------------------------
@pytest.mark.parametrize("case", list(CASES))
def test_enumerated_energies_are_the_model_energies(case):
    model = make_model(case)
    energies = configuration_energies(model)
    rng = np.random.default_rng(0)
    n = model.grid.size
    codes = rng.choice(energies.size, size=min(energies.size, 3000), replace=False)
    for code in codes:
        s = np.where((code >> np.arange(n)) & 1, 1, -1).reshape(model.grid.shape)
        assert configuration_index(s) == code
        assert energies[code] == pytest.approx(model.energy_of(s), rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("temperature", [1.0, 0.7])
def test_enumeration_of_independent_spins(temperature):
    # beta = 0: the sites are independent with P(+1) = 1/(1 + exp(-2 h / T)) and
    # Z = prod 2 cosh(h / T)  (closed form)
    h = np.random.default_rng(4).normal(0.0, 1.0, (2, 3, 2))
    ex = enumerate_posterior(BinaryModel(h, coupling=0.0, coupling_z=0.0),
                             temperature=temperature)
    hf = h.astype(np.float32).astype(np.float64)  # the model stores float32 fields
    np.testing.assert_allclose(ex.log_partition, np.sum(np.log(2 * np.cosh(hf / temperature))),
                               rtol=1e-12)
    np.testing.assert_allclose(ex.marginals, 1.0 / (1.0 + np.exp(-2.0 * hf / temperature)),
                               rtol=1e-12)
    m = np.tanh(hf / temperature).ravel()
    want = np.outer(m, m)
    np.fill_diagonal(want, 1.0)
    np.testing.assert_allclose(ex.correlations, want, rtol=1e-10, atol=1e-12)
    np.testing.assert_array_equal(ex.minimiser, np.where(hf > 0, 1, -1))
    np.testing.assert_allclose(ex.min_energy, -np.abs(hf).sum(), rtol=1e-12)


@pytest.mark.parametrize("shape,along_z", [((1, 9), False), ((7, 1, 1), True)])
def test_enumeration_of_an_open_chain(shape, along_z):
    # one-dimensional Ising chain with free ends and h = 0 (Baxter, "Exactly Solved
    # Models in Statistical Mechanics" (1982), ch. 2): Z = 2 (2 cosh K)^(N-1),
    # E[s_i s_j] = tanh(K)^|i-j|, mean energy -(N-1) beta tanh K, with K = beta / T
    beta, temperature = 0.8, 1.3
    kw = dict(coupling=0.1, coupling_z=beta) if along_z else dict(coupling=beta)
    ex = enumerate_posterior(BinaryModel(np.zeros(shape), **kw), temperature=temperature)
    n = int(np.prod(shape))
    k = beta / temperature
    np.testing.assert_allclose(ex.log_partition, np.log(2) + (n - 1) * np.log(2 * np.cosh(k)),
                               rtol=1e-12)
    d = np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
    np.testing.assert_allclose(ex.correlations, np.tanh(k) ** d, rtol=1e-10)
    np.testing.assert_allclose(ex.marginals, 0.5, rtol=1e-12)
    np.testing.assert_allclose(ex.mean_energy, -(n - 1) * beta * np.tanh(k), rtol=1e-10)
    assert ex.min_energy == pytest.approx(-(n - 1) * beta)


def test_enumeration_refuses_large_lattices():
    with pytest.raises(ValueError, match="at most"):
        enumerate_posterior(BinaryModel(np.zeros((5, 5)), coupling=0.1))
    with pytest.raises(ValueError, match="temperature"):
        enumerate_posterior(BinaryModel(np.zeros((2, 2)), coupling=0.1), temperature=0.0)


# --- the sampler against enumeration -------------------------------------------------------
@pytest.mark.parametrize("case,temperature", [(c, 1.0) for c in CASES]
                         + [("4x4 free", 0.6), ("2x2x3 stack", 2.5)])
def test_sampler_marginals_and_pair_correlations_match_enumeration(case, temperature):
    model = make_model(case, PairModel)
    ex = enumerate_posterior(model, temperature=temperature)
    on, pairs, energy = posterior_batches(model, temperature)
    p = model.pairs
    assert_within_mc_error(on, ex.marginals, f"{case} T={temperature} P(on)")
    assert_within_mc_error(pairs, ex.correlations[p[:, 0], p[:, 1]],
                           f"{case} T={temperature} E[s_i s_j]")
    assert_within_mc_error(energy[:, None], [ex.mean_energy], f"{case} T={temperature} E[E]")


# --- the stationary law itself -------------------------------------------------------------
def sweep_matrix(model, temperature=1.0):
    """Exact transition matrix of one checkerboard heat-bath sweep (colour 0, then 1).

    Built from the definition of the heat-bath update (Geman & Geman 1984): the
    sites of one colour are redrawn independently with
    P(s_i = +1 | rest) = 1 / (1 + exp(-2 F_i / T)).
    """
    n = model.grid.size
    codes = np.arange(1 << n)
    s = np.where((codes[:, None] >> np.arange(n)) & 1, 1, -1)
    z, i, j = np.indices(model.grid.shape)
    colour = ((z + i + j) & 1).ravel()
    f = np.array([model.local_field_of(x.reshape(model.grid.shape)).ravel() for x in s])
    p_up = 1.0 / (1.0 + np.exp(-2.0 * f / temperature))  # (from state, site)
    halves = []
    for c in range(2):
        k = np.ones((s.shape[0], s.shape[0]))
        for site in range(n):
            if colour[site] == c:
                k *= np.where(s[None, :, site] > 0, p_up[:, site, None], 1 - p_up[:, site, None])
            else:
                k *= s[:, None, site] == s[None, :, site]
        halves.append(k)
    return halves[0] @ halves[1]


def maximal_correlation(P, pi, lag):
    """sup over functions f of corr(f(X_0), f(X_lag)) for the stationary chain.

    The norm of P^lag on mean-zero functions in L2(pi): the largest singular value
    of D^(1/2) (P^lag - 1 pi) D^(-1/2) with D = diag(pi).
    """
    d = np.sqrt(pi)
    A = np.linalg.matrix_power(P, lag) - np.outer(np.ones_like(pi), pi)
    return float(linalg.svdvals(d[:, None] * A / d[None, :])[0])


def test_visited_configurations_follow_the_boltzmann_law():
    rng = np.random.default_rng(23)
    model = BinaryModel(rng.uniform(-0.5, 0.5, (2, 3)), coupling=0.35)
    ex = enumerate_posterior(model)
    P = sweep_matrix(model)
    # the heat-bath sweep leaves exp(-E)/Z invariant (computed exactly)
    np.testing.assert_allclose(ex.probabilities @ P, ex.probabilities, atol=1e-14)
    # thin the chain until any function of two kept states has correlation <= 1%:
    # then the counts' covariance is at most (1 + 0.01) / (1 - 0.01) times the
    # multinomial one, so chi-square p-values are essentially exact
    lag = next(k for k in range(1, 50) if maximal_correlation(P, ex.probabilities, k) <= 0.01)
    n = 20_000
    states = sampler.iterate(model, Constant(1.0), sweeps=(n + 10) * lag, chain=0, seed=4242,
                             every=lag)
    codes = np.array([configuration_index(model.image(st.state)) for st in states])[10:]
    observed = np.bincount(codes, minlength=ex.probabilities.size)
    expected = n * ex.probabilities
    assert expected.min() >= 5  # chi-square approximation valid (Cochran's rule; common practice)
    # p > 1e-3: a correct sampler fails this fixed-seed test with probability 1e-3
    assert stats.chisquare(observed, expected).pvalue > 1e-3
    # the same histogram rejects the law of a slightly different coupling, so the
    # test has the power to see a wrong stationary distribution
    other = enumerate_posterior(BinaryModel(model.h, coupling=0.45))
    assert stats.chisquare(observed, n * other.probabilities).pvalue < 1e-3
