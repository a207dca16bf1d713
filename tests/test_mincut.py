"""Exact MAP by minimum cut (Greig, Porteous & Seheult 1989) against enumeration and annealing.

References: D. M. Greig, B. T. Porteous and A. H. Seheult, "Exact maximum a
posteriori estimation for binary images", J. R. Stat. Soc. B 51 (1989)
271-279 (the graph construction and the comparison with simulated annealing);
exact minima computed in the tests by enumerating every configuration.
"""

import numpy as np
import pytest
from skimage.data import binary_blobs

from mrfclean import estimates
from mrfclean.exact import enumerate_posterior, exact_map
from mrfclean.models.binary import BinaryModel
from mrfclean.schedules import Geometric


# Results do not depend on the thread count (tests/test_kernels.py checks it); on
# these small lattices one thread is faster, and steadier when the machine is shared.
pytestmark = pytest.mark.usefixtures("one_numba_thread")


@pytest.mark.parametrize("shape,boundary", [((3, 4), "free"), ((4, 5), "free"),
                                            ((2, 3, 3), "free"), ((3, 2, 3), "free"),
                                            ((4, 4), "periodic"), ((2, 2, 4), "periodic")])
@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_min_cut_reaches_the_enumerated_minimum(shape, boundary, seed):
    rng = np.random.default_rng(100 * seed + len(shape))
    model = BinaryModel(rng.normal(0.0, 1.0, shape), coupling=rng.uniform(0.05, 1.2),
                        coupling_z=rng.uniform(0.0, 1.2), boundary=boundary)
    ex = enumerate_posterior(model)
    mc = exact_map(model)
    assert mc.spins.shape == model.grid.shape and mc.spins.dtype == np.int8
    assert mc.energy == pytest.approx(model.energy_of(mc.spins), abs=1e-12)
    # the labelling found is optimal up to the rounding bound it reports
    assert ex.min_energy - 1e-9 <= mc.energy <= ex.min_energy + mc.rounding_bound + 1e-9
    assert mc.rounding_bound < 1e-6


def test_rounding_bound_covers_the_integer_cut():
    # E(s) = -(sum of bond weights) - sum |h| + (real cut of s); the integer cut /
    # scale differs from the real cut by at most the reported bound
    rng = np.random.default_rng(42)
    model = BinaryModel(rng.normal(0.0, 1.0, (3, 17, 19)), coupling=0.7, coupling_z=0.4)
    mc = exact_map(model)
    Z, H, W = model.grid.shape
    bonds = 0.7 * (Z * (H - 1) * W + Z * H * (W - 1)) + 0.4 * (Z - 1) * H * W
    const = -bonds - np.abs(model.h.astype(np.float64)).sum()
    assert abs(mc.energy - (const + mc.cut_value / mc.scale)) <= mc.rounding_bound + 1e-9
    n_edges = model.grid.size + 2 * model.grid.size * 3
    assert 0 < mc.rounding_bound <= n_edges / (2 * mc.scale)


def test_zero_coupling_gives_the_sign_of_the_field():
    # beta = 0: sites are independent and the MAP is sign(h) (closed form)
    h = np.random.default_rng(3).normal(size=(9, 11))
    mc = exact_map(BinaryModel(h, coupling=0.0))
    np.testing.assert_array_equal(mc.spins[0], np.where(h > 0, 1, -1))


def test_min_cut_needs_non_negative_couplings():
    with pytest.raises(ValueError, match="non-negative"):
        exact_map(BinaryModel(np.zeros((3, 3)), coupling=-0.1))
    with pytest.raises(ValueError, match="non-negative"):
        exact_map(BinaryModel(np.zeros((2, 3, 3)), coupling=0.5, coupling_z=-0.5))


def test_min_cut_does_not_modify_the_model():
    h = np.random.default_rng(8).normal(size=(6, 7))
    model = BinaryModel(h, coupling=0.5)
    field = model.h.copy()
    exact_map(model)
    np.testing.assert_array_equal(model.h, field)


def noisy_test_image():
    """A 256 x 256 bi-level image (skimage's seeded binary_blobs) with 15% of pixels flipped."""
    truth = np.where(binary_blobs(length=256, blob_size_fraction=0.1, n_dim=2,
                                  volume_fraction=0.5, rng=1989), 1, -1)
    flips = np.random.default_rng(15).random(truth.shape) < 0.15
    return truth, np.where(flips, -truth, truth)


def test_annealing_approaches_the_min_cut_energy_from_above():
    # Greig et al. (1989) compare simulated annealing with the exact MAP of a
    # bi-level image under flip noise.  Here: flip rate 0.15, its true field
    # h = 1/2 ln(0.85/0.15) t, coupling 0.8.  Annealed MAPs (200 sweeps of a
    # geometric schedule from T = 3 to 0.05, then ICM) must come within 0.1% of the
    # min-cut energy and never below it beyond the rounding bound.
    truth, noisy = noisy_test_image()
    model = BinaryModel(0.5 * np.log(0.85 / 0.15) * noisy, coupling=0.8)
    mc = exact_map(model)
    for seed in (1, 2, 3):
        run = estimates.anneal(model, schedule=Geometric(3.0, 0.05), sweeps=200, chains=2,
                               seed=seed)
        assert run.energy == pytest.approx(model.energy_of(model.image(run.state)), abs=1e-6)
        assert run.energy >= mc.energy - mc.rounding_bound - 1e-6
        assert run.energy - mc.energy <= 1e-3 * abs(mc.energy)
    # the exact MAP cleans most of the noise (a sanity check of the labelling's sense)
    assert np.mean(mc.spins[0] != truth) < 0.05


def test_exact_map_is_a_local_minimum_on_a_large_image():
    # no single flip can lower the energy of an exact minimiser: s_i F_i >= 0 at every
    # site (flipping s_i changes E by 2 s_i F_i); 1024 x 1024 also exercises the
    # vectorised graph construction and scipy's maximum flow at full size
    rng = np.random.default_rng(1024)
    truth = np.where(binary_blobs(length=1024, blob_size_fraction=0.05, n_dim=2,
                                  rng=1024), 1, -1)
    noisy = np.where(rng.random(truth.shape) < 0.2, -truth, truth)
    model = BinaryModel(0.5 * np.log(0.8 / 0.2) * noisy, coupling=0.6)
    mc = exact_map(model)
    f = model.local_field_of(mc.spins)
    assert np.min(mc.spins * f) >= -mc.rounding_bound - 1e-6
    assert mc.rounding_bound < 1e-2
