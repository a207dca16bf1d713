"""Checks of the numba kernels against numpy, published reference values and statistics.

Statistical tolerances: for n independent draws a sample mean is normal to
within the central limit theorem, so a check at ``Z_TOL = 4.5`` standard errors
fails by chance with probability 7e-6 per check.
"""

import numba
import numpy as np
import pytest
from scipy import special, stats

from mrfclean import kernels, sampler
from mrfclean.lattice import Grid
from mrfclean.models.binary import BinaryModel

Z_TOL = 4.5


@numba.njit(cache=False)
def _uniform_block(key, first, n):
    """``n`` consecutive variates of one stream, through the kernel's own generator."""
    out = np.empty(n)
    for k in range(n):
        out[k] = kernels.uniform(key, first + k)
    return out


# --- heat-bath decision ---------------------------------------------------------------
def _logistic_decision(x, u):
    """Reference ``u < 1 / (1 + exp(-x))`` in plain numpy float64."""
    with np.errstate(over="ignore"):  # exp(-x) = inf for x < -709 gives probability 0
        return u < 1.0 / (1.0 + np.exp(-x))


def test_heat_bath_matches_numpy_logistic():
    rng = np.random.default_rng(20240501)
    n = 1_000_000
    x = np.concatenate([
        rng.uniform(-60.0, 60.0, n),          # across the |x| = 40 clamp
        rng.normal(0.0, 3.0, n),              # where most decisions are close
        rng.uniform(-1e4, 1e4, n // 10),      # far beyond the clamp (exp overflows)
        np.zeros(n // 10),                    # x = 0: P = 1/2
        np.array([40.0, -40.0, np.nextafter(40.0, 0), np.nextafter(-40.0, 0), 41.0, -41.0]),
    ])
    u = rng.random(x.size)  # 53-bit uniforms on the same grid as the kernel's
    u[:1000] = 0.0
    u[np.flatnonzero(x == 0)[:1000]] = 0.5
    got = kernels.heat_bath_many(x, u)
    want = _logistic_decision(x, u)
    assert got.dtype == np.bool_
    assert np.array_equal(got, want), f"{np.count_nonzero(got != want)} decisions differ"


def test_heat_bath_is_accurate_next_to_the_threshold():
    # u just below / above the logistic probability (scipy.special.expit as the
    # reference) must be decided correctly: a relative error of 1e-12 is far
    # above the 1e-16 claimed for the kernel and far below any float32 shortcut.
    rng = np.random.default_rng(7)
    x = rng.uniform(-40.0, 40.0, 200_000)
    p = special.expit(x)
    below = p * (1.0 - 1e-12)
    above = p * (1.0 + 1e-12)
    ok = above < 1.0
    assert kernels.heat_bath_many(x, below).all()
    assert not kernels.heat_bath_many(x[ok], above[ok]).any()


def test_row_exponential_matches_numpy_exp():
    """The scale draw's vectorised ``exp(g d2)`` (``g <= 0 <= d2``) against numpy's ``exp``:
    within 2 units in the last place wherever the result is a normal double, down to
    ``exp(-708)``; 0 below (where numpy gives a subnormal number or 0; the draw sends such
    cliques down its general path, see ``_LADDER_TINY``).  The arguments span the
    reduction's whole range, its rounding boundaries (odd multiples of ln2 / 2) and the
    cut-off."""
    rng = np.random.default_rng(5)
    ln2 = np.log(2.0)
    y = np.concatenate([
        rng.exponential(3.0, 200_000),
        rng.uniform(0.0, 708.0, 200_000),
        (np.arange(1, 2042, 2) * ln2 / 2)[:, None] * (1 + np.array([-1e-15, 0.0, 1e-15])),
        np.array([0.0, 1e-300, 5e-324, 707.9, 708.0, np.nextafter(708.0, 709.0), 745.2, 1e4]),
    ], axis=None)
    for g, d2 in ((-1.0, y), (-0.37, y / 0.37), (-2.5e3, y / 2.5e3)):
        got = kernels.exp_decay_many(g, d2)
        arg = g * d2
        want = np.exp(arg)
        live = -arg <= 708.0
        assert np.all(got[~live] == 0.0)
        ulp = np.spacing(want[live])
        assert np.max(np.abs(got[live] - want[live]) / ulp) <= 2.0


# --- counter-based random numbers -------------------------------------------------------
def test_splitmix64_reference_values():
    # uniform(key=0, counter=k) is SplitMix64 (Steele, Lea & Flood 2014) seeded
    # with 0, whose first outputs are 0xe220a8397b1dcdaf, 0x6e789e6aa1b965f4,
    # 0x06c45d188009454f (reference values of the published splitmix64.c; from memory).
    reference = [0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4, 0x06C45D188009454F]
    got = _uniform_block(np.uint64(0), 1, 3)
    want = np.array([(r >> 11) * 2.0**-53 for r in reference])
    assert np.array_equal(got, want)


def test_uniform_moments_and_uniformity():
    n = 1 << 22
    key = np.uint64(kernels.stream_key(12345, 0, 0))
    u = _uniform_block(key, 0, n)
    assert u.min() >= 0.0 and u.max() < 1.0
    # U(0,1): mean 1/2, variance 1/12; the sample variance has variance
    # (mu4 - sigma^4)/n = (1/80 - 1/144)/n = 1/(180 n)  (handbook moments of U(0,1))
    assert abs(u.mean() - 0.5) < Z_TOL * np.sqrt(1.0 / 12.0 / n)
    assert abs(u.var() - 1.0 / 12.0) < Z_TOL * np.sqrt(1.0 / 180.0 / n)
    # chi-square over 1000 equal bins (scipy.stats.chisquare); p > 1e-3 fails by
    # chance with probability 1e-3 for this fixed seed
    counts = np.bincount((u * 1000).astype(np.int64), minlength=1000)
    assert stats.chisquare(counts).pvalue > 1e-3


@pytest.mark.parametrize("lag", [1, 2, 64])
def test_neighbouring_counters_are_uncorrelated(lag):
    # sites next to each other in a row use counters 1 apart, rows are W apart;
    # for independent draws the sample correlation is N(0, 1/n) (CLT)
    n = 1 << 21
    key = np.uint64(kernels.stream_key(99, 3, 17))
    u = _uniform_block(key, 0, n + lag)
    r = np.corrcoef(u[:-lag], u[lag:])[0, 1]
    assert abs(r) < Z_TOL / np.sqrt(n)


def test_streams_of_neighbouring_chains_and_sweeps_are_uncorrelated():
    n = 1 << 20
    seed = 2024
    base = _uniform_block(np.uint64(kernels.stream_key(seed, 0, 5)), 0, n)
    for chain, sweep in [(1, 5), (0, 6), (0, 4), (1, 6)]:
        other = _uniform_block(np.uint64(kernels.stream_key(seed, chain, sweep)), 0, n)
        r = np.corrcoef(base, other)[0, 1]
        assert abs(r) < Z_TOL / np.sqrt(n), (chain, sweep, r)


def test_stream_keys_differ_per_seed_chain_and_sweep():
    keys = [kernels.stream_key(seed, chain, sweep)
            for seed in (0, 1, 2**62 + 7) for chain in range(32) for sweep in range(512)]
    assert len(set(keys)) == len(keys)
    # the sweep number reserved for random starting states gives keys of its own
    start_keys = {kernels.stream_key(1, chain, sampler.START_SWEEP) for chain in range(32)}
    assert len(start_keys) == 32 and not start_keys & set(keys)


# --- packed layout ------------------------------------------------------------------------
@pytest.mark.parametrize("shape,boundary,origin", [
    ((1, 5, 7), "free", (0, 0, 0)),
    ((1, 5, 7), "free", (0, 0, 1)),
    ((3, 4, 9), "free", (0, 1, 0)),
    ((1, 6, 8), "periodic", (0, 0, 0)),
    ((3, 4, 6), "periodic", (0, 0, 1)),
    ((1, 1, 1), "free", (0, 0, 1)),
])
def test_pack_unpack_round_trip_and_colours(shape, boundary, origin):
    full = tuple(s + o for s, o in zip(shape, origin))
    grid = Grid(shape, boundary=boundary, origin=origin, full_shape=full)
    rng = np.random.default_rng(3)
    a = rng.integers(-100, 100, size=shape).astype(np.int16)
    packed = grid.pack(a, np.int16)
    assert packed.shape == grid.packed_shape
    assert np.array_equal(grid.unpack(packed), a)
    # colour of site (z, i, j) is (z + i + j + parity of the origin) & 1, so that
    # colours agree with the whole image (computed here from the definition)
    z, i, j = np.indices(shape)
    colour = (z + i + j + sum(origin)) & 1
    marks = grid.pack(colour + 1, np.int16)
    for c in range(2):
        interior = marks[c, :, 1:-1, 1:-1]
        assert set(np.unique(interior)) <= {0, c + 1}
        assert np.count_nonzero(interior) == np.count_nonzero(colour == c)


# --- energy: kernel against numpy -------------------------------------------------------
@pytest.mark.parametrize("shape,boundary,coupling_z", [
    ((7, 9), "free", None),
    ((8, 10), "periodic", None),
    ((2, 2), "periodic", None),
    ((4, 5, 7), "free", 0.3),
    ((3, 6, 4), "periodic", -0.7),
    ((1, 1), "free", None),
])
def test_kernel_energy_equals_numpy_energy(shape, boundary, coupling_z):
    rng = np.random.default_rng(11)
    model = BinaryModel(rng.normal(0.0, 1.0, shape), coupling=0.83, coupling_z=coupling_z,
                        boundary=boundary)
    for _ in range(20):
        s = np.where(rng.random(shape) < 0.5, 1, -1).astype(np.int8)
        state = model.grid.pack(s, np.int8)
        # both sum the same float32 fields in float64; they differ in summation order only
        assert model.energy(state) == pytest.approx(model.energy_of(s), rel=1e-12, abs=1e-9)


def test_local_field_is_half_the_energy_change_of_a_flip():
    # E(s with s_i flipped) - E(s) = 2 s_i F_i for E = -sum(pairs) - sum(h s)
    rng = np.random.default_rng(5)
    model = BinaryModel(rng.normal(size=(3, 4, 6)), coupling=0.6, coupling_z=0.2,
                        boundary="periodic")
    s = np.where(rng.random((3, 4, 6)) < 0.5, 1, -1)
    f = model.local_field_of(s)
    e0 = model.energy_of(s)
    for idx in [(0, 0, 0), (1, 2, 3), (2, 3, 5), (1, 0, 5)]:
        t = s.copy()
        t[idx] = -t[idx]
        assert model.energy_of(t) - e0 == pytest.approx(2 * s[idx] * f[idx], abs=1e-9)


# --- reproducibility ---------------------------------------------------------------------
def _sweeps(model, seed, n=6, chains=3):
    run = sampler.run(model, sweeps=n, chains=chains, seed=seed)
    return [model.image(s) for s in run.states], run.energies


@pytest.mark.parametrize("shape,boundary", [((2, 9, 11), "free"), ((3, 10, 12), "periodic"),
                                            ((33, 47), "free")])
def test_sweeps_do_not_depend_on_the_number_of_threads(shape, boundary, monkeypatch):
    # the driver runs small lattices on one thread; lift that so two threads are really used
    monkeypatch.setattr(sampler, "PARALLEL_MIN_SITES", 0)
    rng = np.random.default_rng(8)
    model = BinaryModel(rng.normal(0.0, 0.8, shape), coupling=0.5, coupling_z=0.35,
                        boundary=boundary)
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one, e_one = _sweeps(model, seed=77)
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        two, e_two = _sweeps(model, seed=77)
    finally:
        numba.set_num_threads(before)
    for a, b in zip(one, two):
        assert np.array_equal(a, b)
    assert np.array_equal(e_one, e_two)


def test_same_seed_same_output_other_seed_other_output():
    rng = np.random.default_rng(9)
    model = BinaryModel(rng.normal(0.0, 0.5, (20, 24)), coupling=0.4)
    a, ea = _sweeps(model, seed=5)
    b, eb = _sweeps(model, seed=5)
    c, _ = _sweeps(model, seed=6)
    assert all(np.array_equal(x, y) for x, y in zip(a, b)) and np.array_equal(ea, eb)
    assert not any(np.array_equal(x, y) for x, y in zip(a, c))


def test_sweep_at_infinite_temperature_gives_fair_coins():
    # T = inf: every spin is +1 with probability 1/2 whatever its neighbours (x = 0);
    # the count of +1 among n sites is Binomial(n, 1/2)
    model = BinaryModel(np.full((64, 64), 3.0), coupling=2.0)
    state = model.grid.pack(np.ones((64, 64)), np.int8)
    model.sweep(state, np.inf, kernels.stream_key(1, 0, 0))
    on = np.count_nonzero(model.image(state) > 0)
    n = 64 * 64
    assert abs(on - n / 2) < Z_TOL * np.sqrt(n / 4)
