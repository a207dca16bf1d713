"""Tests for mrfclean.metrics.

Reference values come from scikit-image (``skimage.metrics``), from closed
forms worked by hand in comments, or from set formulas computed with numpy in
the test itself.
"""

import math

import numpy as np
import pytest
import skimage.data
from skimage.metrics import mean_squared_error as sk_mse
from skimage.metrics import peak_signal_noise_ratio as sk_psnr
from skimage.metrics import structural_similarity as sk_ssim

from mrfclean.metrics import dice, error_rate, format_table, iou, mse, psnr, score, ssim

# Our implementation and scikit-image's run the same float64 arithmetic
# (scipy.ndimage.gaussian_filter, reflect mode, truncate 3.5), so agreement is
# at rounding level; 1e-9 leaves room for summation-order differences while
# still catching any change of window, border crop or covariance convention
# (each of those moves SSIM by > 1e-4 on these images).
TOL = 1e-9


def sk_ssim_wang(ref, test, data_range, sigma=1.5, **kw):
    """scikit-image SSIM with the Wang et al. (2004) Gaussian-window settings."""
    return sk_ssim(ref, test, data_range=data_range, gaussian_weights=True,
                   sigma=sigma, use_sample_covariance=False, **kw)


@pytest.fixture(scope="module")
def camera():
    return skimage.data.camera()  # 512x512 uint8, bundled with scikit-image


@pytest.fixture(scope="module")
def noisy(camera):
    rng = np.random.default_rng(20240611)
    f = camera / 255.0
    g = np.clip(f + rng.normal(0.0, 0.08, f.shape), 0.0, 1.0)
    return f, g, np.round(g * 255).astype(np.uint8)


# ---------------------------------------------------------------------------
# MSE and PSNR
# ---------------------------------------------------------------------------

def test_mse_psnr_match_skimage_uint8(camera, noisy):
    _, _, g8 = noisy
    assert mse(camera, g8) == pytest.approx(sk_mse(camera, g8), rel=1e-12)
    # skimage's default data_range for uint8 is 255, as is ours.
    assert psnr(camera, g8) == pytest.approx(sk_psnr(camera, g8), rel=1e-12)


def test_mse_psnr_match_skimage_float(noisy):
    f, g, _ = noisy
    assert mse(f, g) == pytest.approx(sk_mse(f, g), rel=1e-12)
    for r in (1.0, 2.0):
        assert psnr(f, g, data_range=r) == pytest.approx(sk_psnr(f, g, data_range=r), rel=1e-12)


def test_psnr_matches_skimage_uint16(camera, noisy):
    _, _, g8 = noisy
    a = camera.astype(np.uint16) * 257
    b = g8.astype(np.uint16) * 257
    # skimage uses 65535 for uint16 (dtype max), as do we.
    assert psnr(a, b) == pytest.approx(sk_psnr(a, b), rel=1e-12)


def test_psnr_hand_worked():
    a = np.zeros((2, 2), np.uint8)
    b = a.copy()
    b[1, 1] = 255
    # Worked by hand: one of four pixels is off by 255, so
    # MSE = 255^2 / 4 = 16256.25 and PSNR = 10 log10(255^2 / (255^2 / 4))
    #     = 10 log10(4) = 6.0206 dB.
    assert mse(a, b) == 255.0**2 / 4
    assert psnr(a, b) == pytest.approx(10 * math.log10(4), rel=1e-12)
    assert psnr(a, b) == pytest.approx(6.0206, abs=5e-5)


def test_psnr_identical_is_inf(camera):
    assert psnr(camera, camera) == math.inf
    assert psnr(camera / 255.0, camera / 255.0, data_range=1.0) == math.inf


def test_psnr_signed_integer_uses_full_dtype_range():
    # Documented choice: integer range is iinfo.max - iinfo.min
    # (int16: 32767 - (-32768) = 65535). Computed by hand: MSE = 100^2 / 4.
    a = np.zeros((2, 2), np.int16)
    b = a.copy()
    b[0, 0] = -100
    expected = 10 * math.log10(65535.0**2 / (100.0**2 / 4))
    assert psnr(a, b) == pytest.approx(expected, rel=1e-12)


def test_psnr_bool_range_is_one():
    a = np.array([[True, False], [False, False]])
    b = np.zeros((2, 2), bool)
    # MSE = 1/4, data_range 1 -> PSNR = 10 log10(4), worked by hand.
    assert psnr(a, b) == pytest.approx(10 * math.log10(4), rel=1e-12)


def test_mse_no_integer_overflow():
    # (0 - 255)^2 would wrap in uint8 arithmetic; float64 gives 65025 exactly.
    assert mse(np.array([0], np.uint8), np.array([255], np.uint8)) == 65025.0


# ---------------------------------------------------------------------------
# SSIM
# ---------------------------------------------------------------------------

def test_ssim_matches_skimage_float(noisy):
    f, g, _ = noisy
    ours = ssim(f, g, data_range=1.0)
    assert ours == pytest.approx(sk_ssim_wang(f, g, 1.0), abs=TOL)
    assert 0.0 < ours < 0.9  # the noisy copy is visibly degraded


def test_ssim_matches_skimage_uint8(camera, noisy):
    _, _, g8 = noisy
    assert ssim(camera, g8) == pytest.approx(sk_ssim_wang(camera, g8, 255), abs=TOL)


@pytest.mark.parametrize("sigma", [1.0, 2.0])
def test_ssim_matches_skimage_other_sigma(noisy, sigma):
    f, g, _ = noisy
    assert ssim(f, g, data_range=1.0, sigma=sigma) == pytest.approx(
        sk_ssim_wang(f, g, 1.0, sigma=sigma), abs=TOL)


def test_ssim_matches_skimage_constants(noisy):
    f, g, _ = noisy
    assert ssim(f, g, data_range=1.0, k1=0.02, k2=0.05) == pytest.approx(
        sk_ssim_wang(f, g, 1.0, K1=0.02, K2=0.05), abs=TOL)


def test_ssim_not_the_sample_covariance_version(noisy):
    # Guards the documented choice: population moments (Wang et al. 2004),
    # not skimage's default N/(N-1) correction, which differs measurably here.
    f, g, _ = noisy
    sample = sk_ssim(f, g, data_range=1.0, gaussian_weights=True, sigma=1.5,
                     use_sample_covariance=True)
    assert abs(ssim(f, g, data_range=1.0) - sample) > 1e-4


def test_ssim_identical_is_one(camera, noisy):
    f, _, _ = noisy
    assert ssim(camera, camera) == pytest.approx(1.0, abs=1e-12)
    assert ssim(f, f, data_range=1.0) == pytest.approx(1.0, abs=1e-12)


def test_ssim_constant_images_closed_form():
    # For constant images the local variances and covariance are 0, so the
    # Wang et al. (2004) formula reduces to (2ab + C1) / (a^2 + b^2 + C1),
    # C1 = (0.01 R)^2 -- computed exactly here, no library involved.
    a, b, r = 0.3, 0.7, 1.0
    x = np.full((20, 24), a)
    y = np.full((20, 24), b)
    c1 = (0.01 * r) ** 2
    expected = (2 * a * b + c1) / (a * a + b * b + c1)
    assert ssim(x, y, data_range=r) == pytest.approx(expected, rel=1e-12)


def test_ssim_zstack_is_mean_of_planes(noisy):
    f, g, _ = noisy
    # 12 planes (enough for skimage's full 3-D 11-tap window below), each a
    # different 96x96 patch of the camera image
    corners = [(32 * i, 20 * i + 5) for i in range(12)]
    ref = np.stack([f[r:r + 96, c:c + 96] for r, c in corners])
    tst = np.stack([g[r:r + 96, c:c + 96] for r, c in corners])
    per_plane = [sk_ssim_wang(r, t, 1.0) for r, t in zip(ref, tst)]
    assert ssim(ref, tst, data_range=1.0) == pytest.approx(np.mean(per_plane), abs=TOL)
    # and it is not the full 3-D Gaussian SSIM (a different, documented-against choice)
    full3d = sk_ssim_wang(ref, tst, 1.0)
    assert abs(ssim(ref, tst, data_range=1.0) - full3d) > 1e-4


def test_ssim_rejects_bad_input():
    x = np.zeros((10, 10))
    with pytest.raises(ValueError, match="at least 11x11"):
        ssim(x, x, data_range=1.0)
    with pytest.raises(ValueError, match="2-D image or a 3-D"):
        ssim(np.zeros(50), np.zeros(50), data_range=1.0)
    y = np.zeros((16, 16))
    with pytest.raises(ValueError, match="sigma"):
        ssim(y, y, data_range=1.0, sigma=0)


# ---------------------------------------------------------------------------
# binary scores
# ---------------------------------------------------------------------------

def test_binary_hand_worked():
    ref = np.array([[0, 1, 1],
                    [0, 1, 0]], np.uint8)
    tst = np.array([[0, 1, 0],
                    [1, 1, 0]], np.uint8)
    # By hand: |A| = 3, |B| = 3, |A n B| = 2 (positions (0,1), (1,1)),
    # |A u B| = 4, disagreements at (0,2) and (1,0): 2 of 6 pixels.
    assert error_rate(ref, tst) == pytest.approx(2 / 6)
    assert dice(ref, tst) == pytest.approx(2 * 2 / (3 + 3))
    assert iou(ref, tst) == pytest.approx(2 / 4)


def test_binary_levels_do_not_matter():
    # the same masks written as bool, 0/255, -1/+1 spins and 3/7 labels give
    # identical scores: the upper of the two levels is "on"
    ref = np.array([[0, 1, 1], [0, 1, 0]], bool)
    tst = np.array([[0, 1, 0], [1, 1, 0]], bool)
    for conv in (lambda m: m, lambda m: m.astype(np.uint8) * 255,
                 lambda m: np.where(m, 1.0, -1.0), lambda m: np.where(m, 7, 3)):
        assert error_rate(conv(ref), conv(tst)) == pytest.approx(2 / 6)
        assert dice(conv(ref), conv(tst)) == pytest.approx(4 / 6)
        assert iou(conv(ref), conv(tst)) == pytest.approx(2 / 4)


def test_binary_empty_and_full():
    z = np.zeros((4, 4), np.uint8)
    full = np.full((4, 4), 255, np.uint8)
    assert dice(z, z) == 1.0 and iou(z, z) == 1.0 and error_rate(z, z) == 0.0
    assert dice(full, full) == 1.0 and iou(full, full) == 1.0
    # disjoint: nothing shared, every pixel wrong
    assert dice(z, full) == 0.0 and iou(z, full) == 0.0 and error_rate(z, full) == 1.0


def test_binary_against_set_formulas():
    rng = np.random.default_rng(7)
    for p in (0.05, 0.3, 0.6):
        a = rng.random((37, 41)) < p
        b = a ^ (rng.random(a.shape) < 0.1)
        # set formulas computed with numpy here
        inter = np.logical_and(a, b).sum()
        union = np.logical_or(a, b).sum()
        assert error_rate(a, b) == pytest.approx(np.mean(a != b), rel=1e-12)
        assert dice(a, b) == pytest.approx(2 * inter / (a.sum() + b.sum()), rel=1e-12)
        assert iou(a, b) == pytest.approx(inter / union, rel=1e-12)
        # identity D = 2J / (1 + J), from |A|+|B| = |A n B| + |A u B|
        j = iou(a, b)
        assert dice(a, b) == pytest.approx(2 * j / (1 + j), rel=1e-12)


def test_binary_threshold_and_too_many_levels():
    ref = np.array([[0, 100, 200]], np.uint8)
    tst = np.array([[0, 200, 200]], np.uint8)
    with pytest.raises(ValueError, match="3 distinct values"):
        dice(ref, tst)
    # with threshold 150, A = {2}, B = {1, 2}: D = 2/3, J = 1/2, error 1/3
    assert dice(ref, tst, threshold=150) == pytest.approx(2 / 3)
    assert iou(ref, tst, threshold=150) == pytest.approx(1 / 2)
    assert error_rate(ref, tst, threshold=150) == pytest.approx(1 / 3)


# ---------------------------------------------------------------------------
# score and errors
# ---------------------------------------------------------------------------

def test_score_kinds(camera, noisy):
    _, _, g8 = noisy
    grey = score(camera, g8)
    assert list(grey) == ["psnr", "ssim"]
    assert grey["psnr"] == psnr(camera, g8) and grey["ssim"] == ssim(camera, g8)

    ref = (camera > 128).astype(np.uint8) * 255
    tst = (g8 > 128).astype(np.uint8) * 255
    binary = score(ref, tst)
    assert list(binary) == ["psnr", "ssim", "error_rate", "dice", "iou"]
    assert binary["dice"] == dice(ref, tst) and binary["iou"] == iou(ref, tst)
    assert binary["error_rate"] == error_rate(ref, tst)
    assert list(score(ref, tst, kind="grey")) == ["psnr", "ssim"]
    with pytest.raises(ValueError, match="kind"):
        score(ref, tst, kind="colour")


@pytest.mark.parametrize("func", [mse, psnr, ssim, error_rate, dice, iou, score])
def test_shape_mismatch_raises(func):
    with pytest.raises(ValueError, match="same shape"):
        func(np.zeros((16, 16), np.uint8), np.zeros((16, 17), np.uint8))


@pytest.mark.parametrize("func", [psnr, ssim, score])
def test_float_without_data_range_raises(func):
    x = np.zeros((16, 16))
    with pytest.raises(ValueError, match="data_range"):
        func(x, x)
    with pytest.raises(ValueError, match="data_range"):
        func(x.astype(np.uint8), x)  # one float side is enough


def test_mixed_integer_dtypes_need_data_range():
    a = np.zeros((16, 16), np.uint8)
    with pytest.raises(ValueError, match="different dtypes"):
        psnr(a, a.astype(np.uint16))
    assert psnr(a, a.astype(np.uint16), data_range=255) == math.inf


def test_bad_data_range_raises():
    x = np.zeros((16, 16))
    for bad in (0, -1.0, math.inf):
        with pytest.raises(ValueError, match="positive"):
            psnr(x, x, data_range=bad)


def test_inputs_not_modified(noisy):
    f, g, _ = noisy
    f0, g0 = f.copy(), g.copy()
    for func in (mse, lambda a, b: psnr(a, b, data_range=1.0),
                 lambda a, b: ssim(a, b, data_range=1.0),
                 lambda a, b: score(a, b, data_range=1.0),
                 lambda a, b: dice(a, b, threshold=0.5)):
        func(f, g)
    np.testing.assert_array_equal(f, f0)
    np.testing.assert_array_equal(g, g0)


# ---------------------------------------------------------------------------
# format_table
# ---------------------------------------------------------------------------

def test_format_table_alignment():
    rows = [{"file": "a.tif", "psnr": 31.25, "n": 3},
            {"file": "long_name.tif", "psnr": math.inf},
            {"file": "c.tif", "psnr": 7.0, "n": 12}]
    text = format_table(rows, ["file", "psnr", "n"])
    lines = text.split("\n")
    assert len(lines) == 2 + len(rows)
    assert lines[0].split() == ["file", "psnr", "n"]
    assert set(lines[1].replace("  ", "")) == {"-"}
    # numbers right-aligned: every psnr cell ends in the same column
    # column widths: longest file name (13) and widest psnr cell "31.2500" (7),
    # joined by two spaces, so psnr cells end at column 13 + 2 + 7
    psnr_end = len("long_name.tif") + 2 + len("31.2500")
    for line, cell in zip(lines[2:], ["31.2500", "inf", "7.0000"]):
        assert line[:psnr_end].endswith(cell)
    assert lines[2].startswith("a.tif ")
    assert lines[3].rstrip().endswith("inf")  # missing "n" leaves an empty cell
    assert lines[4].endswith("12")


def test_format_table_default_columns():
    text = format_table([{"x": 1, "y": "b"}])
    assert text.split("\n")[0].split() == ["x", "y"]
    assert format_table([{"x": True, "y": None}]).split("\n")[2].split() == ["True"]
