"""Multi-page TIFF in, same layout and metadata out; lazy reading and band-wise writing.

The reference for every value is the file as written by tifffile in the test
(tifffile is the reference TIFF library); nothing is read back through the
code under test alone.
"""

import numpy as np
import pytest
import tifffile

from mrfclean import io
from mrfclean.stacks import z_coupling_ratio


def _stack(shape=(4, 12, 10), dtype=np.uint8, seed=0):
    return (np.random.default_rng(seed).random(shape) * 200).astype(dtype)


def _imagej(path, a, *, px=0.25, spacing=0.8, unit="um", axes="ZYX", **extra):
    tifffile.imwrite(path, a, imagej=True, resolution=(1 / px, 1 / px),
                     metadata={"spacing": spacing, "unit": unit, "axes": axes, **extra})


def test_imagej_stack_round_trip_keeps_scale_unit_spacing_axes(tmp_path):
    a = _stack()
    src, dst = tmp_path / "in.tif", tmp_path / "out.tif"
    _imagej(src, a, Info="specimen 7")
    loaded = io.read_image(src)
    assert loaded.array.shape == a.shape and np.array_equal(loaded.array, a)
    io.write_image(dst, loaded.array, metadata=loaded.metadata)
    with tifffile.TiffFile(src) as t0, tifffile.TiffFile(dst) as t1:
        assert t1.is_imagej and t1.series[0].axes == t0.series[0].axes == "ZYX"
        assert t1.series[0].shape == a.shape
        for key in ("spacing", "unit", "Info"):
            assert t1.imagej_metadata[key] == t0.imagej_metadata[key]
        for tag in ("XResolution", "YResolution", "ResolutionUnit"):
            assert t1.pages[0].tags[tag].value == t0.pages[0].tags[tag].value
        assert np.array_equal(t1.asarray(), a)


def test_time_series_axis_is_kept(tmp_path):
    a = _stack((3, 8, 9))
    src, dst = tmp_path / "t.tif", tmp_path / "o.tif"
    tifffile.imwrite(src, a, imagej=True, metadata={"axes": "TYX", "finterval": 2.5})
    loaded = io.read_image(src)
    assert loaded.metadata["axes"] == "TYX"
    io.write_image(dst, loaded.array, metadata=loaded.metadata)
    with tifffile.TiffFile(dst) as t:
        assert t.series[0].axes == "TYX" and t.imagej_metadata["finterval"] == 2.5


def test_ome_physical_sizes_round_trip(tmp_path):
    a = _stack((3, 8, 9), np.uint16)
    src, dst = tmp_path / "o.ome.tif", tmp_path / "r.ome.tif"
    tifffile.imwrite(src, a, ome=True, photometric="minisblack",
                     metadata={"axes": "ZYX", "PhysicalSizeX": 0.1, "PhysicalSizeY": 0.1,
                               "PhysicalSizeZ": 0.4, "PhysicalSizeZUnit": "µm"})
    loaded = io.read_image(src)
    assert io.voxel_size(loaded.metadata) == pytest.approx((0.4, 0.1, 0.1))
    io.write_image(dst, loaded.array, metadata=loaded.metadata)
    with tifffile.TiffFile(dst) as t:
        px = tifffile.xml2dict(t.ome_metadata)["OME"]["Image"]["Pixels"]
        assert (px["PhysicalSizeX"], px["PhysicalSizeZ"]) == (0.1, 0.4)
        assert np.array_equal(t.asarray(), a)


def test_voxel_size_and_z_coupling_ratio_from_imagej(tmp_path):
    p = tmp_path / "s.tif"
    _imagej(p, _stack(), px=0.2, spacing=0.6)
    vs = io.voxel_size(io.read_image(p).metadata)
    assert vs == pytest.approx((0.6, 0.2, 0.2))
    # the rule of mrfclean.stacks: beta_z / beta = d_xy / d_z, here 0.2 / 0.6
    assert z_coupling_ratio(vs) == pytest.approx(1 / 3)


def test_plain_tiff_has_no_voxel_size(tmp_path):
    p = tmp_path / "plain.tif"
    tifffile.imwrite(p, _stack(), photometric="minisblack", resolution=(4, 4))
    assert io.voxel_size(io.read_image(p).metadata) is None


def test_two_plane_axes_are_refused_in_one_line(tmp_path):
    p = tmp_path / "tz.tif"
    tifffile.imwrite(p, _stack((2, 3, 6, 5)), imagej=True, metadata={"axes": "TZYX"})
    with pytest.raises(io.InputError) as err:
        io.read_image(p)
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith(str(p)) and "TZYX" in msg


@pytest.mark.parametrize("byteorder", ["<", ">"])
def test_lazy_regions_match_tifffile(tmp_path, byteorder):
    a = _stack((3, 20, 17), np.uint16, seed=2)
    p = tmp_path / "big.tif"
    tifffile.imwrite(p, a, byteorder=byteorder, photometric="minisblack")
    loaded = io.open_image(p)
    assert isinstance(loaded.array, io.TiffRegions)
    assert loaded.array.shape == a.shape and loaded.array.dtype == np.uint16
    ref = tifffile.imread(p)
    assert np.array_equal(loaded.array[1:3, 4:11, 2:9], ref[1:3, 4:11, 2:9])
    assert np.array_equal(np.asarray(loaded.array), ref)


def test_compressed_tiff_is_read_whole(tmp_path):
    a = _stack((2, 9, 8))
    p = tmp_path / "z.tif"
    tifffile.imwrite(p, a, compression="zlib", photometric="minisblack")
    loaded = io.open_image(p)
    assert isinstance(loaded.array, np.ndarray) and np.array_equal(loaded.array, a)


def test_truncated_uncompressed_tiff_is_an_input_error(tmp_path):
    p = tmp_path / "cut.tif"
    tifffile.imwrite(p, _stack((3, 40, 40)), photometric="minisblack")
    p.write_bytes(p.read_bytes()[:2000])
    with pytest.raises(io.InputError):
        io.open_image(p)


def test_band_writer_gives_the_same_file_content_and_tags(tmp_path):
    a = _stack((3, 11, 7))
    src = tmp_path / "in.tif"
    _imagej(src, a)
    meta = io.read_image(src).metadata
    dst = tmp_path / "bands.tif"
    with io.tiff_band_writer(dst, a.shape, a.dtype, metadata=meta) as w:
        for r0, r1 in ((0, 4), (4, 9), (9, 11)):
            w[:, r0:r1] = a[:, r0:r1]
        assert not dst.exists()  # appears only when complete
    with tifffile.TiffFile(dst) as t, tifffile.TiffFile(src) as t0:
        assert np.array_equal(t.asarray(), a)
        assert t.imagej_metadata["spacing"] == t0.imagej_metadata["spacing"]
        assert t.pages[0].tags["XResolution"].value == t0.pages[0].tags["XResolution"].value


def test_band_writer_leaves_nothing_on_error(tmp_path):
    dst = tmp_path / "never.tif"
    with pytest.raises(RuntimeError):
        with io.tiff_band_writer(dst, (5, 6), np.uint8) as w:
            w[0:2] = np.ones((2, 6), np.uint8)
            raise RuntimeError("stop")
    assert not dst.exists() and not any(tmp_path.iterdir())


def test_luminance_conversion_matches_skimage_rgb2gray(tmp_path):
    """A colour TIFF read with ``colour="luminance"`` against scikit-image's ``rgb2gray``
    (the same weights) on its shipped astronaut picture: within one grey level of 8 bits
    after rounding back to the input's dtype."""
    import skimage.data
    from skimage.color import rgb2gray

    rgb = skimage.data.astronaut()[100:164, 150:230]
    p = tmp_path / "colour.tif"
    tifffile.imwrite(p, rgb, photometric="rgb")
    grey = io.read_image(p, colour="luminance").array
    assert grey.dtype == np.uint8 and grey.shape == rgb.shape[:2]
    assert np.abs(grey.astype(float) - 255 * rgb2gray(rgb)).max() <= 1.0
