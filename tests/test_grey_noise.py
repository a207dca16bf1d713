"""Noise estimates of the greyscale fit against scikit-image and known synthetic truth."""

import numpy as np
import pytest
import skimage.data
from scipy import ndimage
from skimage.util import img_as_float

from mrfclean.fit.grey import estimate_poisson_gaussian, estimate_sigma, noise_gain, signal_roughness


@pytest.mark.parametrize("name", ["camera", "moon", "coins", "cell"])
@pytest.mark.parametrize("sigma", [0.02, 0.1, 0.2])
def test_sigma_agrees_with_skimage(name, sigma):
    """Same estimator (db2 diagonal detail, MAD / 0.6745; Donoho & Johnstone 1994) as
    skimage.restoration.estimate_sigma, so the two agree to 2% (the border
    handling and sub-sampling phase differ slightly; measured agreement is
    within 0.5%).  Both are also within 10% of the true sigma at sigma >= 0.1,
    where image detail adds little to the finest diagonal band."""
    pytest.importorskip("pywt", reason="skimage.restoration.estimate_sigma needs PyWavelets")
    from skimage.restoration import estimate_sigma as sk_estimate_sigma

    x = img_as_float(getattr(skimage.data, name)())
    y = x + sigma * np.random.default_rng(17).standard_normal(x.shape)
    ours, ref = estimate_sigma(y), sk_estimate_sigma(y)
    assert abs(ours / ref - 1) < 0.02
    if sigma >= 0.1:
        assert abs(ours / sigma - 1) < 0.1


def test_sigma_of_pure_noise_within_sampling_error():
    """White noise only: the MAD estimator has relative sd about 1.65 / sqrt(n)
    (asymptotic efficiency 37% of the sample sd; Hampel et al. 1986), here
    n = 128^2 = 16384 diagonal coefficients of a 256^2 image -> 0.013; tolerance 4 sd = 0.05."""
    y = np.random.default_rng(5).normal(3.0, 2.0, (256, 256))
    assert abs(estimate_sigma(y) / 2.0 - 1) < 0.05


def test_flattest_half_of_pure_noise_within_sampling_error():
    """With ``flattest=0.5`` half the coefficients remain (n = 8192): relative sd about
    1.65 / sqrt(8192) = 0.018, tolerance 4 sd = 0.075.  Ranking by the smoothed image's
    gradient must not pick quieter coefficients (the same rng as the plain check)."""
    y = np.random.default_rng(5).normal(3.0, 2.0, (256, 256))
    assert abs(estimate_sigma(y, flattest=0.5) / 2.0 - 1) < 0.075


@pytest.mark.parametrize("name", ["camera", "coins", "astronaut"])
@pytest.mark.parametrize("sigma", [0.02, 0.05])
def test_flattest_half_reads_closer_to_true_sigma_on_textured_images(name, sigma):
    """Known noise added to open images (skimage.data): at low noise their edges and
    texture make the plain MAD read high (up to 35% here); keeping the flattest half
    of the coefficients (edge exclusion, Tai & Yang 2008) must be closer to the truth
    and within 12% of it (measured: at most 10.4%)."""
    from skimage.color import rgb2gray

    x = img_as_float(getattr(skimage.data, name)())
    x = rgb2gray(x) if x.ndim == 3 else x
    y = x + sigma * np.random.default_rng(17).standard_normal(x.shape)
    plain, flat = estimate_sigma(y) / sigma, estimate_sigma(y, flattest=0.5) / sigma
    assert abs(flat - 1) < abs(plain - 1)
    assert abs(flat - 1) < 0.12


@pytest.mark.parametrize("sigma", [0.05, 0.1])
def test_flattest_half_leaves_out_a_clipped_background(sigma):
    """Half of camera (skimage.data) replaced by a black background, known noise added,
    then clipped to [0, 1] as a detector would: the clipped background is the flattest
    part but has lost half its noise.  Left out, the estimate is within 10% of the truth
    (measured 1.06 and 1.01); the plain MAD reads 0.75 and 0.72 here."""
    cam = img_as_float(skimage.data.camera())
    x = np.concatenate([np.zeros_like(cam[:, :256]), cam[:, 256:]], axis=1)
    y = np.clip(x + sigma * np.random.default_rng(1).standard_normal(x.shape), 0, 1)
    flat = estimate_sigma(y, flattest=0.5) / sigma
    assert abs(flat - 1) < 0.1
    assert abs(flat - 1) < abs(estimate_sigma(y) / sigma - 1)


def test_flattest_share_is_checked():
    with pytest.raises(ValueError, match="flattest"):
        estimate_sigma(np.zeros((16, 16)), flattest=0.0)


def test_stack_estimate_pools_planes():
    gen = np.random.default_rng(6)
    y = gen.normal(0, 0.5, (3, 96, 96))
    assert abs(estimate_sigma(y) / 0.5 - 1) < 0.05
    assert estimate_sigma(np.zeros((32, 32))) == 0.0


def smooth_scene(shape=(512, 512)):
    """Slowly varying positive intensities spanning 2..200 nearly uniformly (no edges)."""
    H, W = shape
    i, j = np.mgrid[0:H, 0:W] / np.array(shape).reshape(2, 1, 1)
    return 2 + 188 * j + 10 * (0.5 + 0.5 * np.sin(3 * np.pi * i))


@pytest.mark.parametrize("gain, read_var", [(0.5, 4.0), (2.0, 25.0), (0.1, 0.0)])
def test_poisson_gaussian_recovers_known_gain_and_offset(gain, read_var):
    """y = gain * Poisson(x / gain) + N(0, read_var): Var(y | x) = gain x + read_var exactly.

    The fit uses about 32000 smooth 2x2 blocks in 40 level sets of ~800; a MAD
    variance from 800 samples has relative sd about 2 * 1.65 / sqrt(800) = 0.12,
    and the weighted line through 40 such points determines the slope to about
    0.12 / sqrt(40) * (spread factor ~2) = 4%: tolerance 12% on ``a``.  The
    intercept is less well determined (it sits at the low end of the data):
    tolerance 15% of the variance at the lowest levels, 10 * a + b.
    """
    x = smooth_scene()
    gen = np.random.default_rng(99)
    y = gain * gen.poisson(x / gain) + np.sqrt(read_var) * gen.standard_normal(x.shape)
    c = estimate_poisson_gaussian(y)
    assert abs(c.a / gain - 1) < 0.12
    assert abs(c.b - read_var) < 0.15 * (10 * gain + read_var)


def test_poisson_gaussian_sees_no_slope_in_gaussian_noise():
    """Constant variance 9: the fitted slope contributes under 10% of the variance at the top."""
    x = smooth_scene()
    y = x + 3.0 * np.random.default_rng(3).standard_normal(x.shape)
    c = estimate_poisson_gaussian(y)
    assert c.a * 200 < 0.1 * (c.a * 200 + c.b)
    assert abs((c.b + c.a * 100) / 9.0 - 1) < 0.1


@pytest.mark.parametrize("width", [1.0, 2.0])
def test_noise_gain_matches_filtered_white_noise(width):
    """Linearly filtered white noise of variance 1 has variance ``sum h^2`` (the
    handbook formula for a linear filter's output power, e.g. Papoulis & Pillai,
    *Probability, Random Variables and Stochastic Processes*, 4th ed., ch. 9).
    scipy's own Gaussian filter and forward differences on 512^2 noise: the mean
    of the squared gradient has relative sd about 0.5% (w = 1) to 1% (w = 2),
    measured over seeds; tolerance 4%."""
    n = np.random.default_rng(23).standard_normal((512, 512))
    s = ndimage.gaussian_filter(n, width)
    m = np.mean(np.diff(s, axis=0) ** 2) + np.mean(np.diff(s, axis=1) ** 2)
    assert abs(m / noise_gain(width) - 1) < 0.04


def test_roughness_of_a_noisy_ramp_is_its_squared_slope():
    """A Gaussian preserves a linear ramp, so the smoothed clean image's squared
    gradient is the squared slope ``s^2`` away from the borders (reflection there
    lowers it by 0.6% at 256^2).  With noise of sigma 0.05, whose part (1.8 s^2)
    is subtracted, one 256^2 estimate has sd 2% of ``s^2`` and the borders add
    about 2% (measured over 20 seeds); tolerance 10%."""
    s = 0.01
    ramp = np.tile(np.arange(256.0) * s, (256, 1))
    assert signal_roughness(ramp, 0.0) == pytest.approx(s * s, rel=0.01)
    noisy = ramp + np.random.default_rng(4).normal(0.0, 0.05, ramp.shape)
    assert signal_roughness(noisy, 0.05**2) == pytest.approx(s * s, rel=0.1)
    # pure noise reads at the floor, not below zero
    flat = np.random.default_rng(5).normal(0.0, 0.05, ramp.shape)
    assert 0 < signal_roughness(flat, 0.05**2) <= 0.1 * 0.05**2 * noise_gain(1.0)
