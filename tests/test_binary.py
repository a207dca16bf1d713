"""The binary cleaner: dtype and level rules, reproducibility, properties of the estimates,
and parameter estimation against models with known answers."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from skimage.data import binary_blobs

from mrfclean import clean_binary
from mrfclean.fit.binary import fit_two_levels, pseudo_likelihood_coupling
from mrfclean.models.binary import BinaryModel, FlipNoise, TwoLevelGaussian
from mrfclean.sampler import iterate
from mrfclean.schedules import Constant

FAST = dict(burn_in=20, samples=60, sweeps=80)
# Short chains keep these tests quick; their R-hat verdict is not what is tested here.
pytestmark = pytest.mark.filterwarnings("ignore::mrfclean.diagnostics.ChainsDisagree")


def _pair(n=64, rate=0.12, seed=0):
    clean = binary_blobs(n, blob_size_fraction=0.2, volume_fraction=0.4, rng=seed)
    noisy = clean ^ (np.random.default_rng(seed + 100).random(clean.shape) < rate)
    return clean, noisy


@pytest.mark.parametrize("dtype, low, high", [
    (np.bool_, False, True), (np.uint8, 0, 255), (np.uint8, 0, 1), (np.uint16, 0, 65535),
    (np.int16, -5, 9), (np.float32, 0.0, 1.0), (np.float64, 0.25, 0.75),
])
@pytest.mark.parametrize("method", ["mpm", "map"])
def test_output_keeps_dtype_and_two_levels(dtype, low, high, method):
    _, noisy = _pair()
    img = np.where(noisy, high, low).astype(dtype)
    copy = img.copy()
    out = clean_binary(img, method=method, rng=3, **FAST)
    assert out.estimate.dtype == img.dtype and out.estimate.shape == img.shape
    assert set(np.unique(out.estimate).tolist()) <= {low, high}
    assert np.array_equal(img, copy)  # input untouched


def test_same_seed_bit_identical_and_other_seed_differs():
    _, noisy = _pair()
    a = clean_binary(noisy, rng=11, **FAST)
    b = clean_binary(noisy, rng=11, **FAST)
    c = clean_binary(noisy, rng=12, **FAST)
    assert np.array_equal(a.mean, b.mean) and np.array_equal(a.energy, b.energy)
    assert not np.array_equal(a.mean, c.mean)


def test_generator_is_accepted_and_consumed_once():
    _, noisy = _pair()
    a = clean_binary(noisy, rng=np.random.default_rng(4), **FAST)
    b = clean_binary(noisy, rng=np.random.default_rng(4), **FAST)
    assert np.array_equal(a.estimate, b.estimate)


def test_map_is_a_local_minimum_and_below_its_start():
    """After annealing and ICM no single flip lowers the energy: s_i F_i >= 0 everywhere."""
    _, noisy = _pair()
    t = np.where(noisy, 1, -1)
    out = clean_binary(noisy, method="map", coupling=0.8, flip_rate=0.12, rng=0, sweeps=100)
    model = BinaryModel(FlipNoise(0.12).field(t), coupling=0.8)
    s = np.where(out.estimate, 1, -1)
    assert np.all(s * model.local_field_of(s) >= 0)
    assert model.energy_of(s) <= model.energy_of(t)
    assert out.diagnostics.final_energy == pytest.approx(model.energy_of(s), rel=1e-9)


def test_mpm_is_thresholded_marginal_and_std_is_bernoulli():
    _, noisy = _pair()
    out = clean_binary(noisy, method="mpm", coupling=0.8, flip_rate=0.12, rng=0, **FAST)
    assert np.array_equal(out.estimate, out.mean > 0.5)
    p = out.mean.astype(np.float64)
    np.testing.assert_allclose(out.std, np.sqrt(p * (1 - p)), atol=1e-6)


def test_result_fields_do_not_change_with_flags():
    _, noisy = _pair()
    a = clean_binary(noisy, method="map", rng=0, **FAST)
    b = clean_binary(noisy, method="mpm", rng=0, **FAST)
    assert a.mean is None and b.mean is not None
    c = clean_binary(noisy, method="map", uncertainty=True, rng=0, **FAST)
    assert c.mean is not None and c.method == "map"


def test_cleaning_lowers_error_rate_on_open_image():
    """On skimage's binary_blobs with 12% flips the cleaned image is far better than the scan."""
    clean, noisy = _pair(n=128)
    out = clean_binary(noisy, rng=0)
    before = np.mean(noisy != clean)
    after = np.mean(out.estimate != clean)
    assert after < 0.25 * before, (before, after)


def test_gaussian_two_level_scan_is_segmented():
    clean, _ = _pair(n=96)
    rng = np.random.default_rng(1)
    scan = np.where(clean, 180.0, 70.0) + rng.normal(0, 45.0, clean.shape)
    img = np.clip(scan, 0, 255).astype(np.uint8)
    out = clean_binary(img, noise="gaussian", rng=0)
    assert set(np.unique(out.estimate).tolist()) <= {0, 255}
    # thresholding at the midpoint errs with probability Phi(-55/45) ~ 11% (normal table)
    assert np.mean((out.estimate > 0) != clean) < 0.03
    p = out.params
    assert p["low"] == pytest.approx(70, abs=6) and p["high"] == pytest.approx(180, abs=6)


def test_periodic_and_stack_run():
    _, noisy = _pair(n=32)
    out = clean_binary(noisy, boundary="periodic", rng=0, **FAST)
    assert out.estimate.shape == noisy.shape
    stack = np.stack([noisy, noisy, noisy])
    out3 = clean_binary(stack, rng=0, **FAST)
    assert out3.estimate.shape == stack.shape
    assert "coupling_z" in out3.params


def test_bad_arguments_raise_value_error():
    _, noisy = _pair(n=16)
    with pytest.raises(ValueError, match="method"):
        clean_binary(noisy, method="best")
    with pytest.raises(ValueError, match="flip rate"):
        clean_binary(noisy, flip_rate=0.7)
    with pytest.raises(ValueError, match="periodic"):
        clean_binary(noisy[:15], boundary="periodic")
    with pytest.raises(ValueError, match="NaN"):
        clean_binary(np.array([[0.0, np.nan]]))
    with pytest.raises(ValueError, match="bi-level"):
        clean_binary(np.arange(16).reshape(4, 4), noise="flip")


# --- parameter estimation against known answers -------------------------------------

@pytest.mark.slow
def test_pseudo_likelihood_recovers_coupling_of_ising_samples():
    """MPL is consistent for the Ising model (Besag 1975; Geman & Graffigne 1986, Proc. ICM).

    Configurations are drawn from the prior itself (periodic 64x64, K = 0.3,
    below K_c = 0.4407) by the sampler that tests/test_exact_enumeration.py
    checks against exact enumeration; 8 well-separated draws of 4096 sites each.
    The spread of the 8 estimates gives the standard error of their mean; the
    check is |mean - K| < 4 SE, with a floor of 0.01 for the small bias of MPL
    (common practice).
    """
    K = 0.3
    model = BinaryModel(np.zeros((64, 64)), coupling=K, boundary="periodic")
    est = []
    for st in iterate(model, Constant(1.0), sweeps=600, chain=0, seed=7, every=50):
        if st.sweep >= 200:
            est.append(pseudo_likelihood_coupling(model.image(st.state)[0], boundary="periodic")[0])
    est = np.array(est)
    se = est.std(ddof=1) / np.sqrt(est.size)
    assert abs(est.mean() - K) < 4 * se + 0.01, (est, se)


def test_two_level_em_recovers_mixture():
    """EM on a two-component mixture recovers its parameters (Dempster, Laird & Rubin 1977).

    n = 200000 draws; the CLT gives SE(mean) = sigma/sqrt(n w) ~ 0.05 for sigma = 12
    and w = 0.3, so 0.5 is a loose 10-SE bound; sigma's SE is ~0.03.
    """
    rng = np.random.default_rng(2)
    n = 200_000
    on = rng.random(n) < 0.3
    y = np.where(on, 140.0, 60.0) + rng.normal(0, 12.0, n)
    low, high, sigma, w = fit_two_levels(y)
    assert low == pytest.approx(60, abs=0.5) and high == pytest.approx(140, abs=0.5)
    assert sigma == pytest.approx(12, abs=0.3) and w == pytest.approx(0.3, abs=0.01)


def test_flip_rate_estimate_close_to_truth():
    clean, noisy = _pair(n=128, rate=0.15)
    out = clean_binary(noisy, rng=0)
    # 15% were flipped; the realised fraction has SD sqrt(.15 .85 / 16384) = 0.003
    # (binomial), and 0.02 allows for the bias of pseudo-likelihood EM (common practice).
    assert out.params["flip_rate"] == pytest.approx(0.15, abs=0.02)


def test_field_definitions_are_half_log_likelihood_ratios():
    """h = 1/2 log[p(y | on) / p(y | off)] for both data terms (definition, computed here)."""
    p = 0.2
    t = np.array([1, -1])
    np.testing.assert_allclose(FlipNoise(p).field(t), 0.5 * np.log(0.8 / 0.2) * t)
    g = TwoLevelGaussian(1.0, 3.0, 0.5)
    y = np.array([0.0, 2.0, 4.5])
    from scipy.stats import norm

    want = 0.5 * (norm.logpdf(y, 3.0, 0.5) - norm.logpdf(y, 1.0, 0.5))
    np.testing.assert_allclose(g.field(y), want)
    s = np.array([1, -1, 1])
    ll = norm.logpdf(y, np.where(s > 0, 3.0, 1.0), 0.5).sum()
    assert g.log_likelihood(s, y) == pytest.approx(ll)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert FlipNoise(p).log_likelihood(t, t) == pytest.approx(2 * np.log(0.8))
