"""Parameter sweeps: the grid, the bookkeeping of every run, the best setting per metric,
CSV/JSON output, TOML specs and the ready script.

Every number in a sweep row is recomputed here independently: the image is
cleaned directly with :func:`mrfclean.clean` and the same seed, and scored with
scikit-image (PSNR) and numpy (error rate).
"""

from __future__ import annotations

import csv
import json
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from skimage.data import binary_blobs
from skimage.metrics import peak_signal_noise_ratio

from mrfclean.batch import image_seed
from mrfclean.clean import Settings, clean
from mrfclean.config import ConfigError
from mrfclean.diagnostics import ChainsDisagree
from mrfclean.sweep import SweepTable, expand_grid, load_spec, run_sweep, write_sweep

FAST = Settings(sweeps=30, burn_in=10, samples=30)
ROOT = Path(__file__).resolve().parents[1]


def _pair(seed, n=40, rate=0.12):
    c = binary_blobs(n, blob_size_fraction=0.25, volume_fraction=0.4, rng=seed)
    noisy = c ^ (np.random.default_rng(seed).random(c.shape) < rate)
    return noisy.astype(np.uint8) * 255, c.astype(np.uint8) * 255


def test_expand_grid_is_the_cartesian_product():
    g = expand_grid({"coupling": [0.5, 0.7, 0.9], "method": ["map", "mpm"]})
    assert len(g) == 3 * 2
    assert g[0] == {"coupling": 0.5, "method": "map"} and g[-1] == {"coupling": 0.9, "method": "mpm"}
    assert len({tuple(sorted(x.items())) for x in g}) == 6
    assert expand_grid({}) == [{}]
    with pytest.raises(ValueError, match="must be a list"):
        expand_grid({"coupling": 0.5})


def test_rows_match_direct_cleaning_and_scoring():
    pairs = {"p0": _pair(0), "p1": _pair(1)}
    grid = {"coupling": [0.5, 0.9], "method": ["map", "mpm"]}
    table = run_sweep(pairs, grid=grid, base=FAST, workers=1, seed=7)
    assert len(table.rows) == 4 * 2 and table.swept == ["coupling", "method"]
    for row in table.rows:
        noisy, ref = pairs[row["image"]]
        s = FAST.replace(coupling=row["coupling"], method=row["method"])
        # the image's seed is the same for every setting (common random numbers)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ChainsDisagree)  # short chains; recorded by the sweep
            out = clean(noisy, settings=s, rng=image_seed(7, row["image"])).estimate
        assert row["error_rate"] == pytest.approx(np.mean(out != ref), abs=0)
        expected = peak_signal_noise_ratio(ref, out, data_range=255)  # scikit-image reference
        assert row["psnr"] == pytest.approx(expected, rel=1e-12)
        assert row["status"] == "done" and row["seconds"] > 0


def test_grey_sweep_over_the_prior_says_which_one_auto_used():
    """Sweeping ``prior``: the rows left on "auto" name the shipped prior it picked
    (``used_prior``, as ``clean`` reports it), the rows that named one need not."""
    from skimage.data import camera

    x = camera()[200:248, 200:248].astype(np.float64)
    y = np.clip(x + 20 * np.random.default_rng(0).standard_normal(x.shape), 0, 255)
    pairs = {"g": (y.astype(np.uint8), x.astype(np.uint8))}
    base = Settings(kind="grey", burn_in=1, samples=2, chains=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ChainsDisagree)
        table = run_sweep(pairs, grid={"prior": ["auto", "smooth"]}, base=base, workers=1, seed=3)
        direct = clean(pairs["g"][0], settings=base, rng=image_seed(3, "g"))
    rows = {r["prior"]: r for r in table.rows}
    assert rows["auto"]["used_prior"] == direct.params["prior_family"]
    assert "used_prior" not in rows["smooth"]


def test_best_setting_per_metric_from_the_means():
    pairs = {"p0": _pair(2), "p1": _pair(3)}
    table = run_sweep(pairs, grid={"coupling": [0.3, 0.7, 1.2]}, base=FAST, workers=1)
    means = {}
    for r in table.rows:  # the mean over images, computed here from the rows
        means.setdefault(r["coupling"], []).append(r)
    avg = {c: {k: np.mean([r[k] for r in rs]) for k in ("psnr", "error_rate", "dice")}
           for c, rs in means.items()}
    best = table.best()
    assert best["psnr"]["setting"]["coupling"] == max(avg, key=lambda c: avg[c]["psnr"])
    assert best["error_rate"]["setting"]["coupling"] == min(avg, key=lambda c: avg[c]["error_rate"])
    assert best["dice"]["value"] == pytest.approx(max(a["dice"] for a in avg.values()))


def test_failed_run_is_recorded_and_not_best():
    noisy, ref = _pair(4)
    pairs = {"good": (noisy, ref), "bad": (noisy, ref[:-1])}  # shapes differ: that run fails
    table = run_sweep(pairs, settings=[{"coupling": 0.6}, {"coupling": 0.8}], base=FAST, workers=1)
    bad = [r for r in table.rows if r["image"] == "bad"]
    assert len(bad) == 2 and all(r["status"] == "failed" and "shape" in r["error"] for r in bad)
    assert all(m["failed"] == 1 and m["images"] == 1 for m in table.means())
    assert table.best() == {}  # every setting had a failed run


def test_unknown_setting_is_refused_before_running():
    with pytest.raises(ValueError, match="unknown setting"):
        run_sweep({"p": _pair(0)}, grid={"copling": [1.0]}, workers=1)
    with pytest.raises(ValueError, match="not both"):
        run_sweep({"p": _pair(0)}, grid={"coupling": [1.0]}, settings=[{}], workers=1)


@pytest.mark.slow
def test_parallel_sweep_equals_serial():
    pairs = {f"p{i}": _pair(10 + i) for i in range(3)}
    grid = {"coupling": [0.6, 0.9]}
    a = run_sweep(pairs, grid=grid, base=FAST, workers=1, seed=3)
    b = run_sweep(pairs, grid=grid, base=FAST, workers=2, threads=1, seed=3)
    strip = [{k: v for k, v in r.items() if k != "seconds"} for r in a.rows]
    assert strip == [{k: v for k, v in r.items() if k != "seconds"} for r in b.rows]


def test_csv_and_json_round_trip(tmp_path):
    table = run_sweep({"p": _pair(5)}, grid={"coupling": [0.6, 0.9]}, base=FAST, workers=1)
    files = write_sweep(table, tmp_path / "out")
    with open(files["csv"]) as fh:
        rows = list(csv.DictReader(fh))
    assert [float(r["psnr"]) for r in rows] == [r["psnr"] for r in table.rows]
    doc = json.loads(files["json"].read_text())
    assert doc["best"]["psnr"]["value"] == table.best()["psnr"]["value"]
    again = SweepTable.from_json(files["json"])
    assert again.best() == table.best()
    assert sorted(p.name for p in files["plots"]) == sorted(f"{m}_vs_coupling.png" for m in table.metrics)
    assert files["report"].is_file()


def _spec_files(tmp_path):
    (tmp_path / "scans").mkdir()
    (tmp_path / "refs").mkdir()
    for i in range(2):
        noisy, ref = _pair(20 + i)
        Image.fromarray(noisy).save(tmp_path / "scans" / f"s{i}_noisy.png")
        Image.fromarray(ref).save(tmp_path / "refs" / f"s{i}_clean.png")
    spec = tmp_path / "sweep.toml"
    spec.write_text('seed = 1\nworkers = 1\noutput = "result"\n'
                    "[base]\nsweeps = 30\nburn_in = 10\nsamples = 30\n"
                    "[grid]\ncoupling = [0.6, 0.9]\n"
                    '[[pairs]]\nnoisy = "scans/*_noisy.png"\nreference = "refs/{stem}.png"\n'
                    'replace = ["_noisy", "_clean"]\n')
    return spec


def test_load_spec_expands_pairs_relative_to_the_file(tmp_path):
    spec = load_spec(_spec_files(tmp_path))
    assert [(p.name, r.name) for p, r in spec.pairs] == [("s0_noisy.png", "s0_clean.png"),
                                                         ("s1_noisy.png", "s1_clean.png")]
    assert spec.output == tmp_path / "result" and spec.base.sweeps == 30 and spec.seed == 1


@pytest.mark.parametrize("text, words", [
    ("[grid]\ncoupling = [1.0]\n[[settings]]\ncoupling = 1.0\n", "not both"),
    ("colour_me = 1\n", "unknown key"),
    ("[base]\ncoupl = 1\n", "unknown setting"),
    ('[[pairs]]\nnoisy = "none*.png"\nreference = "x.png"\n', "no files match"),
    ("[grid]\nkind = [\"nonsense\"]\n[[pairs]]\nnoisy = \"a.png\"\nreference = \"b.png\"\n", "kind"),
])
def test_bad_spec_names_the_file(tmp_path, text, words):
    spec = tmp_path / "bad.toml"
    spec.write_text(text)
    with pytest.raises(ConfigError, match=words) as e:
        load_spec(spec)
    assert str(e.value).startswith(str(spec))


@pytest.mark.slow
def test_sweep_script_writes_table_plots_and_report(tmp_path):
    spec = _spec_files(tmp_path)
    done = subprocess.run([sys.executable, str(ROOT / "scripts" / "sweep.py"), str(spec), "--no-progress"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    out = tmp_path / "result"
    for name in ("sweep.csv", "sweep.json", "report.html", "psnr_vs_coupling.png"):
        assert (out / name).is_file(), name
    assert "best" in done.stdout and "error_rate" in done.stdout
