"""Stacks: 3-D volume against plane by plane, the z-coupling rule, plane independence."""

import warnings

import numpy as np
import pytest
import tifffile
from skimage.data import binary_blobs

from mrfclean import Settings, clean, clean_file
from mrfclean.diagnostics import ChainsDisagree
from mrfclean.stacks import clean_volume_binary, z_coupling_ratio

FAST = dict(method="map", sweeps=3, chains=1, flip_rate=0.1)


def _noisy_volume(length=48, planes=12, rate=0.25, seed=0):
    """Ground truth from scikit-image's seeded 3-D blobs, with seeded independent flips."""
    truth = binary_blobs(length, n_dim=3, blob_size_fraction=0.2, volume_fraction=0.4, rng=2)[:planes]
    flips = np.random.default_rng(seed).random(truth.shape) < rate
    return truth, np.where(flips, ~truth, truth)


@pytest.mark.slow
def test_volume_mode_beats_plane_by_plane_on_a_known_volume():
    truth, noisy = _noisy_volume()
    settings = dict(burn_in=20, samples=40, chains=1)  # parameters estimated in both modes
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ChainsDisagree)
        vol = clean(noisy, settings=Settings(stack="volume", **settings), rng=1)
        planes = clean(noisy, settings=Settings(stack="planes", **settings), rng=1)
    err_vol = np.mean(vol.estimate != truth)
    err_planes = np.mean(planes.estimate != truth)
    noisy_err = np.mean(noisy != truth)
    # N = 27648 voxels; an error rate near 0.1 has binomial sd sqrt(0.1*0.9/N) = 0.0018,
    # the difference of two at most 0.0026, so a 0.015 margin is about 6 sd of Monte-Carlo
    # (and flip) noise: the gain must come from the z coupling, not from luck.
    assert err_vol < err_planes - 0.015, (err_vol, err_planes)
    assert err_planes < noisy_err - 0.05  # both modes do clean (noisy error is 0.25)
    assert vol.params["coupling_z"] > 0.1  # the fitted z coupling is really used


def test_z_coupling_ratio_rule():
    # d_xy / d_z with d_xy the geometric mean of the in-plane sizes (mrfclean.stacks docs)
    assert z_coupling_ratio((2.0, 0.5, 0.5)) == pytest.approx(0.25)
    assert z_coupling_ratio((1.0, 0.5, 2.0)) == pytest.approx(1.0)
    assert z_coupling_ratio(None) is None
    with pytest.raises(ValueError):
        z_coupling_ratio((0.0, 1.0, 1.0))


@pytest.mark.parametrize("voxel, coupling_z, expected, rule", [
    ((3.0, 1.0, 1.0), "auto", 0.6 / 3.0, "d_xy / d_z"),
    (None, "auto", 0.6, "equal"),
    ((3.0, 1.0, 1.0), 0.05, 0.05, "given"),
])
def test_default_z_coupling_follows_the_voxel_size(voxel, coupling_z, expected, rule):
    _, noisy = _noisy_volume(length=16, planes=3)
    res = clean_volume_binary(noisy, voxel_size=voxel, coupling=0.6, coupling_z=coupling_z,
                              rng=0, **FAST)
    assert res.params["coupling_z"] == pytest.approx(expected)
    assert rule in res.params["coupling_z_rule"]


def test_estimated_coupling_is_tied_to_the_voxel_rule():
    _, noisy = _noisy_volume(length=16, planes=3)
    res = clean_volume_binary(noisy, voxel_size=(2.0, 1.0, 1.0), rng=0, **FAST)
    assert "coupling" in res.params["estimated"]
    assert res.params["coupling_z"] == pytest.approx(res.params["coupling"] / 2.0)


def test_planes_mode_keeps_planes_independent_and_input_untouched():
    _, noisy = _noisy_volume(length=20, planes=3)
    other = noisy.copy()
    other[2] = ~other[2]
    before = noisy.copy()
    s = Settings(stack="planes", coupling=0.7, flip_rate=0.1, method="map", sweeps=5, chains=1)
    a = clean(noisy, settings=s, rng=4)
    b = clean(other, settings=s, rng=4)
    assert np.array_equal(noisy, before)
    assert a.estimate.shape == noisy.shape and a.estimate.dtype == noisy.dtype
    assert np.array_equal(a.estimate[:2], b.estimate[:2])  # plane 2 does not reach planes 0, 1
    assert not np.array_equal(a.estimate[2], b.estimate[2])
    assert len(a.params["planes"]) == 3
    # the stack's energy is the sum of its planes' energies (no coupling between planes)
    assert a.energy.shape == (1, 5)


def test_volume_mode_couples_planes():
    _, noisy = _noisy_volume(length=20, planes=3)
    other = noisy.copy()
    other[2] = ~other[2]
    s = Settings(stack="volume", coupling=0.7, coupling_z=0.7, flip_rate=0.1, method="map",
                 sweeps=5, chains=1)
    a = clean(noisy, settings=s, rng=4)
    b = clean(other, settings=s, rng=4)
    assert not np.array_equal(a.estimate[:2], b.estimate[:2])


def test_settings_refuse_unknown_stack_mode_and_tiny_tiles():
    with pytest.raises(ValueError, match="stack"):
        Settings(stack="cube")
    with pytest.raises(ValueError, match="tile"):
        Settings(tile=3)


def test_stack_file_cleans_with_metadata_and_voxel_rule(tmp_path):
    truth, noisy = _noisy_volume(length=24, planes=4, rate=0.1)
    p = tmp_path / "stack.tif"
    tifffile.imwrite(p, noisy.astype(np.uint8) * 255, imagej=True, resolution=(1 / 0.2, 1 / 0.2),
                     metadata={"spacing": 0.8, "unit": "um", "axes": "ZYX"})
    s = Settings(coupling=0.5, flip_rate=0.1, method="map", sweeps=10, chains=1)
    outcome = clean_file(p, tmp_path / "out", settings=s, rng=0)
    assert outcome.result.params["coupling_z"] == pytest.approx(0.5 * 0.2 / 0.8)
    with tifffile.TiffFile(outcome.output) as t:
        assert t.series[0].axes == "ZYX" and t.series[0].shape == noisy.shape
        assert t.imagej_metadata["spacing"] == 0.8 and t.imagej_metadata["unit"] == "um"
        assert np.mean((t.asarray() > 0) != truth) < np.mean(noisy != truth)
