"""Config files under flags, and the display options of a batch (bars on stderr only).

The expected values are the ones written into the TOML text in each test.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from PIL import Image
from skimage.data import binary_blobs

from mrfclean.batch import BatchOptions, run_batch
from mrfclean.clean import Settings
from mrfclean.cli import BATCH_FLAGS, build_parser, main
from mrfclean.config import BATCH_CHECKS, ConfigError, load_config, resolve


def test_every_batch_option_has_a_check_and_a_flag():
    fields = {f.name for f in dataclasses.fields(BatchOptions)}
    assert set(BATCH_CHECKS) == fields
    assert set(BATCH_FLAGS) == fields
    dests = {a.dest for a in build_parser()._subparsers._group_actions[0].choices["clean"]._actions}
    assert fields <= dests
    # every Settings field can be set on the command line too
    assert {f.name for f in dataclasses.fields(Settings)} - {"uncertainty"} <= dests


def test_file_values_flags_override_and_sources(tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[settings]\ncoupling = 0.8\nmethod = "map"\nlevels = [10, 200, 5.5]\n'
                   '[batch]\nworkers = 3\nreference = "refs"\nmaps = true\n')
    r = resolve({"method": "mpm", "seed": 5}, cfg)
    assert r.settings.coupling == 0.8 and r.settings.method == "mpm"
    assert r.settings.levels == (10.0, 200.0, 5.5)
    assert r.options.workers == 3 and r.options.seed == 5 and r.options.maps is True
    assert r.options.reference == str(tmp_path / "refs")  # relative to the file
    assert r.sources["settings.coupling"] == "file" and r.sources["settings.method"] == "flag"
    assert r.sources["batch.seed"] == "flag" and r.sources["batch.recursive"] == "default"
    eff = r.effective()
    assert eff["config_file"] == str(cfg) and eff["settings"]["coupling"] == 0.8


@pytest.mark.parametrize("text, words", [
    ("[settings]\nsweeps = 0\n", "at least 1"),
    ("[settings]\nchains = 1.5\n", "whole number"),
    ("[settings]\nlevels = [1, 2]\n", "low, high, sigma"),
    ("[batch]\nrecursive = \"yes\"\n", "true or false"),
    ("[setting]\ncoupling = 1\n", "unknown table"),
    ('[settings]\nkind = "colour"\n', "kind"),
    ('[settings]\nprior = "flat"\n', "auto, smooth, textured"),
])
def test_bad_values_name_the_key(tmp_path, text, words):
    cfg = tmp_path / "c.toml"
    cfg.write_text(text)
    with pytest.raises(ConfigError, match=words) as e:
        load_config(cfg) if "kind" not in text else resolve({}, cfg)
    assert str(e.value).startswith(str(cfg))


def test_missing_config_file(tmp_path):
    with pytest.raises(ConfigError, match="no such config file"):
        load_config(tmp_path / "none.toml")


def _one(tmp_path):
    clean = binary_blobs(32, blob_size_fraction=0.3, volume_fraction=0.4, rng=0)
    noisy = clean ^ (np.random.default_rng(0).random(clean.shape) < 0.1)
    (tmp_path / "in").mkdir()
    Image.fromarray(noisy.astype(np.uint8) * 255).save(tmp_path / "in" / "a.png")
    Image.fromarray(noisy.astype(np.uint8) * 255).save(tmp_path / "in" / "b.png")


def test_progress_bars_go_to_stderr_and_results_to_stdout(tmp_path, capsys):
    _one(tmp_path)
    rc = main(["clean", str(tmp_path / "in"), "-o", str(tmp_path / "out"), "-j", "1", "--progress",
               "--sweep-bar", "--sweeps", "20", "--burn-in", "5", "--samples", "10"])
    assert rc == 0
    out, err = capsys.readouterr()
    assert "images" in err  # the bar over images
    assert out.count(" -> ") == 2 and "done" in out  # one line per image, then the summary table
    r = run_batch([tmp_path / "in"], tmp_path / "out", settings=Settings(sweeps=20, burn_in=5, samples=10),
                  options=BatchOptions(workers=1, progress=True))
    assert r.skipped == 2
