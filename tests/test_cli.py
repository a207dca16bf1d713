"""The command line: results written safely, bad input refused with one clear line.

Images here are built in the test (skimage.data.binary_blobs, which scikit-image
ships as a generator, plus seeded flips) or are malformed files made on purpose.
"""

from __future__ import annotations

import os
import sys

import numpy as np
import pytest
import tifffile
from PIL import Image
from skimage.data import binary_blobs

from mrfclean.cli import main

FAST = ["--burn-in", "10", "--samples", "30", "--sweeps", "40"]


def _noisy_blobs(n=64, rate=0.1, seed=0):
    clean = binary_blobs(n, blob_size_fraction=0.2, volume_fraction=0.4, rng=seed)
    flips = np.random.default_rng(seed).random(clean.shape) < rate
    return clean, clean ^ flips


@pytest.fixture
def noisy_png(tmp_path):
    clean, noisy = _noisy_blobs()
    path = tmp_path / "in" / "blobs.png"
    path.parent.mkdir()
    Image.fromarray(noisy.astype(np.uint8) * 255).save(path)
    return path


def _one_line_error(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert "Traceback" not in err[0]
    return err[0]


def test_clean_writes_result_with_same_dtype_and_levels(noisy_png, tmp_path, capsys):
    before = noisy_png.read_bytes()
    rc = main(["clean", str(noisy_png), "-o", str(tmp_path / "out"), *FAST])
    assert rc == 0
    out = tmp_path / "out" / "blobs.png"
    assert str(out) in capsys.readouterr().out
    a = np.array(Image.open(out))
    assert a.dtype == np.uint8 and set(np.unique(a)) <= {0, 255}
    assert noisy_png.read_bytes() == before  # input untouched


def test_maps_are_float32_tiffs(noisy_png, tmp_path):
    rc = main(["clean", str(noisy_png), "-o", str(tmp_path / "out"), "--maps", *FAST])
    assert rc == 0
    p = tifffile.imread(tmp_path / "out" / "blobs_p_on.tif")
    sd = tifffile.imread(tmp_path / "out" / "blobs_std.tif")
    assert p.dtype == np.float32 and sd.dtype == np.float32
    assert p.min() >= 0 and p.max() <= 1
    # std of a Bernoulli indicator: sqrt(p (1 - p)), a handbook identity
    np.testing.assert_allclose(sd, np.sqrt(p.astype(np.float64) * (1 - p)), atol=1e-6)


def test_same_seed_same_bytes(noisy_png, tmp_path):
    for name in ("a", "b"):
        assert main(["clean", str(noisy_png), "-o", str(tmp_path / name), "--seed", "5", *FAST]) == 0
    a = np.array(Image.open(tmp_path / "a" / "blobs.png"))
    b = np.array(Image.open(tmp_path / "b" / "blobs.png"))
    assert np.array_equal(a, b)


@pytest.mark.parametrize("prior", ["smooth", "textured", "blocks"])
def test_prior_flag_reaches_the_grey_cleaner_and_is_logged(tmp_path, prior):
    """``--prior`` picks the shipped grey prior; the manifest's parameters say which."""
    from mrfclean.manifest import read_manifest

    x = (np.random.default_rng(0).random((40, 40)) * 200).astype(np.uint8)
    (tmp_path / "in").mkdir()
    Image.fromarray(x).save(tmp_path / "in" / "g.png")
    rc = main(["clean", str(tmp_path / "in" / "g.png"), "-o", str(tmp_path / "out"),
               "--prior", prior, "--samples", "2"])
    assert rc == 0
    done = [e for e in read_manifest(tmp_path / "out" / "manifest.jsonl") if "params" in e]
    assert [e["params"]["prior_family"] for e in done] == [prior]
    assert done[0]["settings"]["prior"] == prior


def test_block_prior_on_a_volume_is_refused_with_one_line(tmp_path, capsys):
    """The block prior has no potential along z: a grey stack cleaned as a volume with it
    gets one line naming the file and a non-zero exit, and nothing is written."""
    import tifffile

    x = (np.random.default_rng(0).random((3, 24, 24)) * 4000).astype(np.uint16)
    src = tmp_path / "stack.tif"
    tifffile.imwrite(src, x, photometric="minisblack")
    rc = main(["clean", str(src), "-o", str(tmp_path / "out"), "--prior", "blocks",
               "--stack", "volume", "--samples", "2"])
    assert rc != 0
    line = _one_line_error(capsys)
    assert line.startswith(str(src)) and "no potential along z" in line
    assert not (tmp_path / "out" / "stack.tif").exists()


def test_refuses_to_overwrite_input(noisy_png, capsys):
    before = noisy_png.read_bytes()
    rc = main(["clean", str(noisy_png), "-o", str(noisy_png.parent), *FAST])
    assert rc != 0
    line = _one_line_error(capsys)
    assert line.startswith(str(noisy_png)) and "overwrite the input" in line
    assert noisy_png.read_bytes() == before


def test_refuses_to_replace_existing_output(noisy_png, tmp_path, capsys):
    out = tmp_path / "out"
    out.mkdir()
    (out / "blobs.png").write_bytes(b"user's own file")
    rc = main(["clean", str(noisy_png), "-o", str(out), *FAST])
    assert rc != 0
    assert "already exists" in _one_line_error(capsys)
    assert (out / "blobs.png").read_bytes() == b"user's own file"


def _write_bad(tmp_path, kind):
    p = tmp_path / f"bad_{kind}.tif"
    if kind == "nan":
        a = np.zeros((8, 8), np.float32)
        a[3, 3] = np.nan
        tifffile.imwrite(p, a)
    elif kind == "inf":
        a = np.zeros((8, 8), np.float32)
        a[0, 0] = np.inf
        tifffile.imwrite(p, a)
    elif kind == "rgb":
        p = tmp_path / "bad_rgb.png"
        Image.fromarray(np.zeros((8, 8, 3), np.uint8)).save(p)
    elif kind == "truncated":
        p = tmp_path / "bad_truncated.png"
        Image.fromarray((np.random.default_rng(0).random((64, 64)) * 255).astype(np.uint8)).save(p)
        p.write_bytes(p.read_bytes()[:200])
    elif kind == "garbage":
        p.write_bytes(b"this is not an image at all")
    elif kind == "empty":
        with pytest.warns(UserWarning, match="zero-size"):  # tifffile says the file is odd
            tifffile.imwrite(p, np.zeros((0, 5), np.uint8))
    elif kind == "missing":
        p = tmp_path / "nowhere.png"
    elif kind == "type":
        p = tmp_path / "notes.txt"
        p.write_text("hello")
    return p


@pytest.mark.parametrize("kind, words", [
    ("nan", "NaN or infinite"), ("inf", "NaN or infinite"), ("rgb", "colour image"),
    ("truncated", "cannot read"), ("garbage", "cannot read"), ("empty", "empty"),
    ("missing", "no such file"), ("type", "unsupported file type"),
])
def test_bad_input_gets_one_line_and_nonzero_exit(tmp_path, capsys, kind, words):
    p = _write_bad(tmp_path, kind)
    rc = main(["clean", str(p), "-o", str(tmp_path / "out"), *FAST])
    assert rc != 0
    line = _one_line_error(capsys)
    assert line.startswith(f"{p}: ") and words in line, line
    # nothing but the batch's record of the failure (manifest and summary)
    out = tmp_path / "out"
    assert not out.exists() or {q.name for q in out.iterdir()} <= {"manifest.jsonl", "summary.csv"}


def test_rgb_with_explicit_conversion_is_cleaned(tmp_path):
    _, noisy = _noisy_blobs()
    rgb = np.repeat((noisy.astype(np.uint8) * 255)[..., None], 3, axis=2)
    p = tmp_path / "rgb.png"
    Image.fromarray(rgb).save(p)
    assert main(["clean", str(p), "-o", str(tmp_path / "out"), "--colour", "luminance", *FAST]) == 0
    assert np.array(Image.open(tmp_path / "out" / "rgb.png")).ndim == 2


def test_batch_goes_on_after_a_failure(noisy_png, tmp_path, capsys):
    bad = _write_bad(tmp_path, "garbage")
    rc = main(["clean", str(bad), str(noisy_png), "-o", str(tmp_path / "out"), *FAST])
    assert rc != 0
    assert (tmp_path / "out" / "blobs.png").exists()


@pytest.mark.parametrize("shape", [(1, 1), (5, 7)])
def test_constant_and_tiny_images_work(tmp_path, shape):
    p = tmp_path / "flat.tif"
    tifffile.imwrite(p, np.full(shape, 7, np.uint16))
    assert main(["clean", str(p), "-o", str(tmp_path / "out"), *FAST]) == 0
    out = tifffile.imread(tmp_path / "out" / "flat.tif")
    assert out.dtype == np.uint16 and out.shape == shape and np.all(out == 7)


def test_score_prints_table(tmp_path, capsys):
    clean, noisy = _noisy_blobs()
    a, b = tmp_path / "a.png", tmp_path / "b.png"
    Image.fromarray(clean.astype(np.uint8) * 255).save(a)
    Image.fromarray(noisy.astype(np.uint8) * 255).save(b)
    assert main(["score", str(b), str(a)]) == 0
    out = capsys.readouterr().out
    assert "error_rate" in out and "dice" in out
    # error rate of the noisy image is the flip fraction, computed directly here
    assert f"{np.mean(clean != noisy):.4f}" in out


def test_score_shape_mismatch_is_one_line(tmp_path, capsys):
    a, b = tmp_path / "a.png", tmp_path / "b.png"
    Image.fromarray(np.zeros((8, 8), np.uint8)).save(a)
    Image.fromarray(np.zeros((8, 9), np.uint8)).save(b)
    assert main(["score", str(a), str(b)]) != 0
    assert "shape" in _one_line_error(capsys)


def test_usage_errors_exit_2(capsys):
    with pytest.raises(SystemExit) as e:
        main(["clean", "x.png", "-o", "out", "--chains", "0"])
    assert e.value.code == 2


def test_noise_model_that_does_not_fit_the_image_is_refused(noisy_png, tmp_path, capsys):
    rc = main(["clean", str(noisy_png), "-o", str(tmp_path / "out"), "--noise", "poisson-gaussian", *FAST])
    assert rc != 0
    line = _one_line_error(capsys)
    assert line.startswith(str(noisy_png)) and "does not fit the binary model" in line


def test_a_failed_map_write_leaves_no_result_behind(noisy_png, tmp_path, monkeypatch):
    from mrfclean import io as mio

    def broken(path, values, *, overwrite=False):
        raise OSError("disk full")

    monkeypatch.setattr(mio, "write_map", broken)
    rc = main(["clean", str(noisy_png), "-o", str(tmp_path / "out"), "--maps", "-j", "1", *FAST])
    assert rc != 0
    assert not (tmp_path / "out" / "blobs.png").exists()



class _ReaderGoneAfterOneLine:
    """Standard output whose reader goes away after the first printed line (``| head -1``):
    later writes fail as a closed pipe does."""

    def __init__(self):
        self.read_end, self.write_end = os.pipe()
        self.text = ""

    def write(self, text):
        if "\n" in self.text:
            raise BrokenPipeError(32, "Broken pipe")
        self.text += text
        return len(text)

    def flush(self):
        pass

    def fileno(self):
        return self.write_end


def test_summary_into_a_closed_pipe_ends_quietly(noisy_png, tmp_path, monkeypatch, capsys):
    """``mrfclean clean ... | head -1``: the reader has gone when the summary is printed
    (after the file's own line).  The cleaned image is written, the exit status is 1 and
    nothing is raised (the remedy of the Python documentation's note on SIGPIPE, module
    ``signal``)."""
    out = tmp_path / "out"
    stdout = _ReaderGoneAfterOneLine()
    monkeypatch.setattr(sys, "stdout", stdout)
    try:
        status = main(["clean", str(noisy_png), "-o", str(out), *FAST])
    finally:
        os.close(stdout.read_end)
        os.close(stdout.write_end)
    assert status == 1
    assert stdout.text.count("\n") == 1 and "->" in stdout.text
    assert "Traceback" not in capsys.readouterr().err
    assert (out / "blobs.png").exists()
