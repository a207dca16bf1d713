"""Tiled cleaning against the whole-image sampler: bit-identical sweeps, seams, memory bookkeeping.

The reference is the untiled sampler of mrfclean itself (BinaryModel and
clean_binary), whose kernels are checked against numpy and exact enumeration in
tests/test_kernels.py.  A tiled sweep uses the same counter-based random
numbers (hashes of global site indices), so the strongest check applies:
equality bit for bit.  A naive tiling (tiles swept in place one after another)
is run as a control to show that the comparison does detect seams.
"""

import dataclasses
import math
import warnings

import numba
import numpy as np
import pytest
import tifffile
import skimage.data
from skimage.data import binary_blobs

from mrfclean import Settings, clean_file, cli, io, kernels
from mrfclean.binary import clean_binary
from mrfclean.grey import clean_grey
from mrfclean.diagnostics import ChainsDisagree
from mrfclean.lattice import Grid
from mrfclean.models.binary import BinaryModel, FlipNoise
from mrfclean.tiles import (DEFAULT_GREY_HALO, DEFAULT_TILE, RawField, TiledBinaryModel, band_bounds,
                            clean_binary_tiled, clean_grey_tiled)

SEED = 99
TEMPS = [1.0, 2.5, 0.6, math.inf, 0.3]


def _pair(shape, tile, *, rate=0.3, seed=1, noise=None):
    rng = np.random.default_rng(seed)
    img = (rng.random(shape) < rate).astype(np.uint8) * 255
    noise = noise or FlipNoise(0.15)
    t = np.where(img == 255, 1, -1).astype(np.int8)
    whole = BinaryModel(noise.field(t), coupling=0.7, coupling_z=0.4, start=t)
    tiled = TiledBinaryModel(img, RawField(noise, "flip", 255, np.uint8), coupling=0.7,
                             coupling_z=0.4, tile=tile)
    return whole, tiled


@pytest.mark.parametrize("shape, tile", [
    ((1, 37, 29), (8, 8)),      # odd sizes, last band and last tile ragged
    ((3, 21, 30), (5, 7)),      # a stack; odd tile width rounds to even columns
    ((2, 9, 11), (2, 2)),       # smallest tiles: every margin overlaps two tiles
    ((1, 17, 40), (40, 6)),     # one band, many tiles
])
@pytest.mark.parametrize("chain", [0, 1])
def test_tiled_sweeps_energy_and_quench_are_bit_identical(shape, tile, chain):
    whole, tiled = _pair(shape, tile)
    a, b = whole.start(chain, SEED), tiled.start(chain, SEED)
    assert np.array_equal(a, b)
    for k, temp in enumerate(TEMPS):
        key = int(kernels.stream_key(SEED, chain, k))
        whole.sweep(a, temp, key)
        tiled.sweep(b, temp, key)
        assert np.array_equal(a, b), f"sweep {k}"
        # same terms summed in another order: equal to rounding
        assert tiled.energy(b) == pytest.approx(whole.energy(a), rel=1e-12, abs=1e-9)
    assert whole.quench(a) == tiled.quench(b)
    assert np.array_equal(a, b)
    assert tiled.summary(b) == whole.summary(a)


def _naive_tiled_sweep(state, field, grid, tile, beta, beta_z, temp, key):
    """Control: each tile swept in place with the current spins of its neighbours as halo."""
    Z, H, W = grid.shape
    for i0 in range(0, H, tile):
        i1 = min(i0 + tile, H)
        for j0 in range(0, W, tile):
            j1 = min(j0 + tile, W)
            cols = slice(j0 // 2, j0 // 2 + (j1 - j0 + 1) // 2 + 2)
            block = np.ascontiguousarray(state[:, :, i0:i1 + 2, cols])
            hb = np.ascontiguousarray(field[:, :, i0:i1 + 2, cols])
            kernels.gibbs_sweep(block, hb, j1 - j0, beta, beta_z, temp, np.uint64(key),
                                (i0 + j0) & 1, 0, i0, j0, H, W, False)
            state[:, :, i0 + 1:i1 + 1, cols][..., 1:-1] = block[:, :, 1:-1, 1:-1]


def test_control_naive_tiling_is_not_the_whole_image_sweep():
    whole, _ = _pair((1, 32, 32), (8, 8))
    a = whole.start(0, SEED)
    b = a.copy()
    key = int(kernels.stream_key(SEED, 0, 0))
    whole.sweep(a, 1.0, key)
    _naive_tiled_sweep(b, whole.packed_field, whole.grid, 8, 0.7, 0.4, 1.0, key)
    assert not np.array_equal(a, b)  # stale halos give a different (non-Gibbs) update


def _noisy_blobs(n=72, rate=0.12, seed=5):
    img = binary_blobs(n, blob_size_fraction=0.1, rng=3).astype(np.uint8) * 255
    flips = np.random.default_rng(seed).random(img.shape) < rate
    return img, np.where(flips, 255 - img, img).astype(np.uint8)


@pytest.mark.parametrize("kw", [
    dict(method="map", sweeps=15, coupling=0.8, flip_rate=0.12),
    dict(method="mpm", burn_in=5, samples=15, coupling=0.8, flip_rate=0.12),
    dict(method="map", sweeps=8, uncertainty=True, burn_in=3, samples=6),  # estimated parameters
])
def test_tiled_clean_equals_whole_clean(kw):
    _, noisy = _noisy_blobs()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ChainsDisagree)
        a = clean_binary(noisy, rng=7, **kw)
        b = clean_binary_tiled(noisy, tile=20, rng=7, **kw)
    assert np.array_equal(a.estimate, b.estimate) and b.estimate.dtype == noisy.dtype
    assert b.diagnostics.final_energy == pytest.approx(a.diagnostics.final_energy, rel=1e-12)
    assert np.allclose(a.energy, b.energy, rtol=1e-12)
    assert a.params["coupling"] == b.params["coupling"]
    if a.mean is not None:
        assert np.array_equal(a.mean, b.mean) and np.array_equal(a.std, b.std)


def test_gaussian_data_term_float_and_uint16_tiled_equals_whole():
    img, noisy = _noisy_blobs(n=40)
    rng = np.random.default_rng(2)
    for y in (noisy.astype(np.float32) / 255 + rng.normal(0, 0.3, noisy.shape).astype(np.float32),
              (noisy.astype(np.uint16) * 100 + rng.integers(0, 9000, noisy.shape)).astype(np.uint16)):
        kw = dict(method="map", sweeps=6, chains=1, noise="gaussian", coupling=0.8)
        a = clean_binary(y, rng=3, **kw)
        b = clean_binary_tiled(y, tile=12, rng=3, **kw)
        assert np.array_equal(a.estimate, b.estimate) and b.estimate.dtype == y.dtype


def test_seam_region_agrees_like_the_interior():
    """Seam pixels (within 2 px of a tile edge) against the interior, relative to seed noise."""
    _, noisy = _noisy_blobs()
    tile = 16
    kw = dict(method="mpm", burn_in=5, samples=20, coupling=0.8, flip_rate=0.12, chains=1)
    whole = clean_binary(noisy, rng=11, **kw)
    tiled = clean_binary_tiled(noisy, tile=tile, rng=11, **kw)
    other_seed = clean_binary(noisy, rng=12, **kw)
    idx = np.arange(noisy.shape[0])
    near = np.minimum(idx % tile, (-idx) % tile) <= 2
    seam = near[:, None] | near[None, :]
    for region in (seam, ~seam):
        # tiled vs whole: no difference at all, in the seam as in the interior ...
        assert np.count_nonzero(tiled.estimate[region] != whole.estimate[region]) == 0
        assert np.max(np.abs(tiled.mean[region] - whole.mean[region])) == 0
        # ... while a change of seed alone moves marginals everywhere (so the check can fail)
        assert np.max(np.abs(other_seed.mean[region] - whole.mean[region])) > 0.1


def test_tiled_sweep_does_not_depend_on_thread_count():
    _, noisy = _noisy_blobs(n=48)
    kw = dict(method="mpm", burn_in=2, samples=4, coupling=0.8, flip_rate=0.12, chains=1)
    old = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        a = clean_binary_tiled(noisy, tile=16, rng=5, **kw)
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        b = clean_binary_tiled(noisy, tile=16, rng=5, **kw)
    finally:
        numba.set_num_threads(old)
    assert np.array_equal(a.mean, b.mean)


def test_memory_bookkeeping_is_bounded_by_the_band_not_the_image():
    peaks = []
    for height in (64, 256):
        _, tiled = _pair((1, height, 48), (16, 16))
        tiled.cache_all = False  # recompute fields band by band, as for a huge image
        s = tiled.start(0, SEED)
        tiled.sweep(s, 1.0, 1)
        tiled.quench(s)
        peaks.append(tiled.peak_band_bytes)
        assert tiled.peak_fields <= 3  # at most three bands' fields at once
    assert peaks[0] == peaks[1]  # four times the image, same working set
    # a band of 16 rows, 48 columns: spins 1 B + fields 4 B per packed site with halo,
    # blocks of 18 rows x 12 packed columns; bounded by 16 B per band pixel (with halos)
    band_sites = 2 * (16 + 4) * (48 // 2 + 2)
    assert peaks[0] <= 16 * band_sites


def test_band_bounds_never_leave_a_one_row_band():
    for h in range(2, 40):
        for size in range(2, 12):
            bands = band_bounds(h, size)
            assert bands[0][0] == 0 and bands[-1][1] == h
            assert all(b1 - b0 >= 2 for b0, b1 in bands)
            assert all(bands[k][1] == bands[k + 1][0] for k in range(len(bands) - 1))


def test_tiled_file_equals_untiled_file_and_keeps_metadata(tmp_path):
    _, noisy = _noisy_blobs(n=40)
    stack = np.stack([noisy, noisy[::-1], noisy[:, ::-1]])
    p = tmp_path / "scan.tif"
    tifffile.imwrite(p, stack, imagej=True, resolution=(2.0, 2.0),
                     metadata={"spacing": 1.5, "unit": "um", "axes": "ZYX"})
    assert isinstance(io.open_image(p).array, io.TiffRegions)  # read band by band
    s = Settings(coupling=0.8, flip_rate=0.12, method="mpm", burn_in=3, samples=6, chains=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ChainsDisagree)
        a = clean_file(p, tmp_path / "whole", settings=s, rng=0, maps=True)
        b = clean_file(p, tmp_path / "tiled", settings=s.replace(tile=16), rng=0, maps=True)
    assert np.array_equal(tifffile.imread(a.output), tifffile.imread(b.output))
    assert np.array_equal(tifffile.imread(a.maps["p_on"]), tifffile.imread(b.maps["p_on"]))
    with tifffile.TiffFile(b.output) as t:
        assert t.imagej_metadata["spacing"] == 1.5 and t.series[0].axes == "ZYX"
    assert b.result.params["coupling_z"] == pytest.approx(0.8 * 0.5 / 1.5)  # voxel rule


def _grey_scan():
    """A 128 x 128 crop of skimage's camera with seeded Gaussian noise (sd 20 grey levels)."""
    x = skimage.data.camera()[200:328, 150:278].astype(np.float32)
    return x, (x + 20 * np.random.default_rng(0).standard_normal(x.shape)).astype(np.float32)


GREY_FIXED = dict(sigma=20.0, strength=1.0, curvature=0.0, burn_in=3, samples=20)


def _seam_mask(n, cuts, width=3):
    m = np.zeros((n, n), bool)
    for c in cuts:
        m[c - width:c + width, :] = True
        m[:, c - width:c + width] = True
    return m


@pytest.mark.parametrize("halo, seam_limit", [(DEFAULT_GREY_HALO, (None, 1.5)), (0, (2.0, None))])
def test_grey_tiles_agree_with_the_whole_image_like_two_whole_runs(halo, seam_limit):
    """Greyscale tiles are not bit-identical (the block solve is global), so the check is
    statistical: tiled and whole posterior means differ no more than two whole runs with
    different seeds do, at the seams as in the interior.

    Statistic: mean squared difference to a whole run A, tiled T against a second whole run B,
    ``r = msd(T, A) / msd(B, A)``; without a tiling effect r ~ 1.  Each msd is over ~1500 seam
    pixels whose Monte-Carlo errors are correlated over a few pixels (n_eff of a few hundred),
    so r has a relative sd of about 0.15; 1.5 is over 3 of them.  Control: without a margin
    (halo 0) the seams must show (measured r = 4.5; the test asks for more than 2).
    """
    _, y = _grey_scan()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ChainsDisagree)
        A = clean_grey(y, rng=1, **GREY_FIXED).mean.astype(np.float64)
        B = clean_grey(y, rng=2, **GREY_FIXED).mean.astype(np.float64)
        T = clean_grey_tiled(y, tile=48, halo=halo, rng=1, fit_window=128,
                             **GREY_FIXED).mean.astype(np.float64)
    seam = _seam_mask(128, (48, 96))

    def ratio(mask):
        return float(np.mean((T - A)[mask] ** 2) / np.mean((B - A)[mask] ** 2))

    low, high = seam_limit
    if high is not None:
        assert ratio(seam) < high
        assert ratio(~seam) < 1.25  # interior: ~16000 pixels, relative sd a few per cent
    if low is not None:
        assert ratio(seam) > low


class _Reversed:
    """An executor that hands results back last task first, as a busy pool might."""

    def run(self, fn, items, on_start=None):
        items = list(items)
        for i in reversed(range(len(items))):
            yield i, fn(items[i])


def test_grey_tiles_do_not_depend_on_their_order_and_keep_the_dtype():
    """Each tile's random streams come from the seed and the tile's position: tiles finishing
    in reverse order give the same bytes, a one-plane stack gives the same image, and a uint16
    scan comes back as uint16 with a float32 std map."""
    _, y = _grey_scan()
    y16 = np.clip(np.rint(y * 100 + 5000), 0, 65535).astype(np.uint16)
    kw = dict(sigma=2000.0, strength=1.0, burn_in=1, samples=2, chains=1, tile=64, rng=4)
    a = clean_grey_tiled(y16, **kw)
    b = clean_grey_tiled(y16[None], **kw)  # the same scan as a one-plane stack
    c = clean_grey_tiled(y16, executor=_Reversed(), **kw)
    assert a.estimate.dtype == np.uint16 and a.std.dtype == np.float32
    assert np.array_equal(a.estimate, b.estimate[0])
    assert np.array_equal(a.estimate, c.estimate) and np.array_equal(a.std, c.std)
    assert np.array_equal(a.energy, c.energy)
    assert a.params["tiles"] == 4 and a.params["halo"] == DEFAULT_GREY_HALO


@pytest.mark.parametrize("prior", ["smooth", "textured"])
def test_grey_tiles_use_the_named_prior(prior):
    """``Settings(prior=...)`` reaches the tiled cleaner: every tile shares the one shipped
    prior that was asked for, and the parameters say which."""
    from mrfclean.clean import clean

    _, y = _grey_scan()
    res = clean(y.astype(np.float32), rng=4,
                settings=Settings(kind="grey", prior=prior, tile=64, burn_in=1, samples=2,
                                  chains=1))
    assert res.params["tiles"] == 4 and res.params["prior_family"] == prior


def test_grey_tiled_file_writes_result_and_std_map_band_by_band(tmp_path):
    """From the command line: a uint8 greyscale TIFF cleaned with --tile gives a uint8 result
    with the input's resolution and a float32 std map; the error against the clean crop falls."""
    x, y = _grey_scan()
    p = tmp_path / "grey.tif"
    tifffile.imwrite(p, np.clip(np.rint(y), 0, 255).astype(np.uint8), resolution=(3.0, 3.0))
    assert isinstance(io.open_image(p).array, io.TiffRegions)  # read band by band
    code = cli.main(["clean", str(p), "-o", str(tmp_path / "out"), "--tile", "64", "--seed", "1",
                     "--samples", "4", "--burn-in", "2"])
    assert code == 0
    out = tifffile.imread(tmp_path / "out" / "grey.tif")
    std = tifffile.imread(tmp_path / "out" / "grey_std.tif")
    assert out.dtype == np.uint8 and std.dtype == np.float32 and std.shape == out.shape
    assert np.abs(out - x).mean() < 0.7 * np.abs(np.clip(np.rint(y), 0, 255) - x).mean()  # 0.63 seen
    with tifffile.TiffFile(tmp_path / "out" / "grey.tif") as t:
        assert t.pages[0].tags["XResolution"].value == (3, 1)


def test_grid_of_tiled_model_matches_whole_packed_layout():
    whole, tiled = _pair((2, 10, 13), (4, 4))
    assert tiled.grid.packed_shape == whole.grid.packed_shape == Grid((2, 10, 13)).packed_shape


@pytest.mark.slow
def test_grey_tiles_on_a_worker_pool_give_the_same_bytes(tmp_path, monkeypatch):
    """Tiles sent to a local pool of two worker processes come back with exactly the bytes of
    tiles cleaned one after another here; and a batch of one tiled grey image really sends
    its tiles to the pool it makes (recorded), with the same output as a one-worker batch."""
    from mrfclean import batch
    from mrfclean.pool import LocalPool

    _, y = _grey_scan()
    kw = dict(sigma=20.0, strength=1.0, burn_in=1, samples=2, chains=1, tile=48, rng=6)
    here = clean_grey_tiled(y, **kw)
    pool = LocalPool(2, threads=1)
    try:
        there = clean_grey_tiled(y, executor=pool, **kw)
    finally:
        pool.close()
    assert np.array_equal(here.estimate, there.estimate) and np.array_equal(here.std, there.std)
    assert np.array_equal(here.energy, there.energy)

    ran = []

    class Recording(LocalPool):
        def run(self, fn, items, on_start=None):
            items = list(items)
            ran.append((fn.__name__, len(items)))
            yield from super().run(fn, items, on_start)

    def make(workers=None, threads=None, **_):
        return Recording(workers or 2, threads)

    p = tmp_path / "in" / "grey.tif"
    p.parent.mkdir()
    tifffile.imwrite(p, y)
    s = Settings(sigma=20.0, strength=1.0, burn_in=1, samples=2, chains=1, tile=48)
    monkeypatch.setattr(batch, "make_executor", make)
    batch.run_batch([p], tmp_path / "pooled", settings=s, options=batch.BatchOptions(workers=2, seed=6))
    assert ("sample_grey_tile", 3) in ran  # a band of three tiles went to the pool
    monkeypatch.undo()
    batch.run_batch([p], tmp_path / "here", settings=s, options=batch.BatchOptions(workers=1, seed=6))
    assert np.array_equal(tifffile.imread(tmp_path / "pooled" / "grey.tif"),
                          tifffile.imread(tmp_path / "here" / "grey.tif"))


def test_tiled_channel_stack_is_cleaned_plane_by_plane(tmp_path):
    """A TIFF whose first axis is channels (ImageJ 'CYX') is never cleaned as a volume: channels
    are not neighbours in space, with tiles as without."""
    _, y = _grey_scan()
    stack = np.clip(np.rint(np.stack([y[:64, :64], y[64:, 64:]])), 0, 255).astype(np.uint8)
    p = tmp_path / "channels.tif"
    tifffile.imwrite(p, stack, imagej=True, metadata={"axes": "CYX"})
    assert io.open_image(p).metadata.get("axes", "")[:1] == "C"
    s = Settings(sigma=20.0, strength=1.0, burn_in=1, samples=2, chains=1, tile=32)
    out = clean_file(p, tmp_path / "out", settings=s, rng=0)
    assert out.result.params["stack"] == "planes" and len(out.result.params["planes"]) == 2


def test_large_grey_files_are_tiled_unless_a_tile_is_set(tmp_path, monkeypatch):
    """``clean_file`` routes a greyscale file above ``AUTO_TILE_PIXELS`` to the tiled path
    (untiled, the posterior needs about 210 bytes a pixel), records the tiling in the
    parameters and on the command line's summary line, and leaves a given tile size,
    smaller files and binary files as they were."""
    import importlib

    from mrfclean import batch

    clean_mod = importlib.import_module("mrfclean.clean")  # the module, not the function

    _, y = _grey_scan()
    p = tmp_path / "scan.tif"
    tifffile.imwrite(p, np.clip(np.rint(y[:64, :64]), 0, 255).astype(np.uint8))
    b = tmp_path / "bilevel.tif"
    tifffile.imwrite(b, (binary_blobs(64, rng=1) * 255).astype(np.uint8))
    s = Settings(sigma=20.0, strength=1.0, burn_in=1, samples=2, chains=1)
    small = clean_file(p, tmp_path / "small", settings=s, rng=0)
    assert "tile" not in small.result.params
    monkeypatch.setattr(clean_mod, "AUTO_TILE_PIXELS", 63 * 63)
    auto = clean_file(p, tmp_path / "auto", settings=s, rng=0)
    assert auto.result.params["tile"] == [DEFAULT_TILE, DEFAULT_TILE]
    given = clean_file(p, tmp_path / "given", settings=s.replace(tile=32), rng=0)
    assert given.result.params["tile"] == [32, 32]
    binary = clean_file(b, tmp_path / "binary", settings=Settings(sweeps=4), rng=0)
    assert binary.result.params.get("tile") is None
    entry = {"input": str(p), "kind": "grey", "method": "mean", "seconds": 1.0,
             "params": auto.result.params, "diagnostics": {}, "outputs": {"image": "scan.tif"}}
    assert "tiles of 1024 px" in batch._describe(entry, tmp_path)
    # an exact output name and a PNG (plane size from Pillow's header)
    png = tmp_path / "scan.png"
    io.write_image(png, np.clip(np.rint(y[:64, :64]), 0, 255).astype(np.uint8))
    named = clean_file(png, tmp_path / "named", settings=s, rng=0, output=tmp_path / "mine.png")
    assert named.output == tmp_path / "mine.png" and named.result.params["tile"][0] == DEFAULT_TILE
    # a stack is measured by its planes: two 50 x 50 channels (5000 pixels in all) stay whole
    stack = tmp_path / "channels.tif"
    tifffile.imwrite(stack, np.clip(np.rint(np.stack([y[:50, :50], y[50:100, 50:100]])), 0,
                                    255).astype(np.uint8), imagej=True, metadata={"axes": "CYX"})
    assert io.plane_shape(stack) == (50, 50)
    whole = clean_file(stack, tmp_path / "stack", settings=s, rng=0)
    assert "tile" not in whole.result.params
    # the batch asks the same question of its one task, and a broken file is not tiled
    broken = tmp_path / "broken.tif"
    broken.write_bytes(b"not a tiff")
    assert io.plane_shape(broken) is None
    task = batch.Task(str(p), "scan.tif", str(tmp_path / "b"), s, 0, None, None,
                      io.DEFAULT_MAX_PIXELS, False, None, None)
    assert batch._tiles_automatically(task)
    assert not batch._tiles_automatically(dataclasses.replace(task, path=str(broken)))
    assert not batch._tiles_automatically(dataclasses.replace(task, settings=s.replace(tile=32)))


def test_tiled_binary_run_frees_each_chains_state(states_alive):
    """With ``keep_states=False`` (posterior runs) a chain's spins are freed once the next
    chain has started: the tiled model drops the last state it caches for its energy."""
    _, tiled = _pair((1, 37, 29), (8, 8))
    assert states_alive(tiled, sweeps=2, chains=3, seed=SEED,
                        keep_states=False) == [[], [False], [False, False]]
