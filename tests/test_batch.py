"""Batch cleaning: inputs from folders and patterns, a mirrored tree, reproducible seeds,
a manifest that lets a rerun skip finished work, metrics against references.

Images are made in the test: scikit-image's ``binary_blobs`` generator plus
seeded flips.  Metric values are checked against scikit-image
(``skimage.metrics.peak_signal_noise_ratio``) and against the error rate
computed directly with numpy.
"""

from __future__ import annotations

import csv

import numpy as np
import pytest
from PIL import Image
from skimage.data import binary_blobs
from skimage.metrics import peak_signal_noise_ratio

from mrfclean.batch import (BatchOptions, collect_inputs, find_reference, image_seed,
                            run_batch)
from mrfclean.clean import Settings
from mrfclean.cli import main
from mrfclean.manifest import Manifest, file_hash

FAST = Settings(sweeps=30, burn_in=10, samples=20)
FAST_FLAGS = ["--sweeps", "30", "--burn-in", "10", "--samples", "20"]


def _blobs(seed, n=48, rate=0.1):
    clean = binary_blobs(n, blob_size_fraction=0.25, volume_fraction=0.4, rng=seed)
    flips = np.random.default_rng(seed).random(clean.shape) < rate
    return (clean * 255).astype(np.uint8), ((clean ^ flips) * 255).astype(np.uint8)


def _tree(root, names, *, refs=None):
    """Write noisy images at the given relative paths (and their clean versions under refs)."""
    for i, rel in enumerate(names):
        clean, noisy = _blobs(i + 1)
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        Image.fromarray(noisy).save(p)
        if refs is not None:
            q = refs / rel
            q.parent.mkdir(parents=True, exist_ok=True)
            Image.fromarray(clean).save(q)
    return root


def _quiet(**kw):
    return BatchOptions(progress=False, **kw)


# ---------------------------------------------------------------------------
# inputs
# ---------------------------------------------------------------------------
def test_collect_folders_recursive_and_patterns(tmp_path):
    names = ["a.png", "b.tif", "sub/c.png", "sub/deeper/d.png"]
    for rel in names:
        p = tmp_path / "in" / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(b"x")
    (tmp_path / "in" / "notes.txt").write_text("not an image")
    (tmp_path / "in" / ".a.png.part.png").write_bytes(b"x")  # a temporary file: never an input
    flat = collect_inputs([tmp_path / "in"])
    assert [i.relpath for i in flat.items] == ["a.png", "b.tif"]
    deep = collect_inputs([tmp_path / "in"], recursive=True)
    assert [i.relpath for i in deep.items] == sorted(names)
    pat = collect_inputs([str(tmp_path / "in" / "**" / "*.png")], recursive=True)
    assert [i.relpath for i in pat.items] == ["a.png", "sub/c.png", "sub/deeper/d.png"]
    one = collect_inputs([str(tmp_path / "in" / "sub" / "*.png")])
    assert [i.relpath for i in one.items] == ["c.png"]
    assert not flat.problems and not deep.problems


def test_collect_reports_nothing_found_and_collisions(tmp_path):
    (tmp_path / "x").mkdir()
    (tmp_path / "y").mkdir()
    (tmp_path / "x" / "a.png").write_bytes(b"x")
    (tmp_path / "y" / "a.png").write_bytes(b"x")
    (tmp_path / "empty").mkdir()
    c = collect_inputs([tmp_path / "x", tmp_path / "y", tmp_path / "empty",
                        str(tmp_path / "*.tif"), tmp_path / "missing.png"])
    assert [i.relpath for i in c.items] == ["a.png"]
    messages = " | ".join(m for _, m in c.problems)
    assert len(c.problems) == 4
    for words in ("outputs would collide", "holds no TIFF or PNG", "no TIFF or PNG files match",
                  "no such file"):
        assert words in messages


def test_output_folder_inside_input_tree_is_not_an_input(tmp_path):
    _tree(tmp_path / "in", ["a.png"])
    r = run_batch([tmp_path / "in"], tmp_path / "in" / "out", settings=FAST,
                  options=_quiet(workers=1, recursive=True))
    assert r.done == 1
    again = run_batch([tmp_path / "in"], tmp_path / "in" / "out", settings=FAST,
                      options=_quiet(workers=1, recursive=True))
    assert (again.done, again.skipped, again.failed) == (0, 1, 0)


def test_image_seed_depends_on_run_seed_and_path_only():
    assert image_seed(3, "a/b.png") == image_seed(3, "a/b.png")
    seeds = {image_seed(s, p) for s in (0, 1) for p in ("a.png", "b.png", "sub/a.png")}
    assert len(seeds) == 6
    assert all(0 <= s < 2**63 for s in seeds)


def test_find_reference_by_relative_path_or_unique_name(tmp_path):
    (tmp_path / "r" / "sub").mkdir(parents=True)
    (tmp_path / "r" / "sub" / "a.png").write_bytes(b"x")
    (tmp_path / "r" / "b.tif").write_bytes(b"x")
    assert find_reference(tmp_path / "r", "sub/a.png") == tmp_path / "r" / "sub" / "a.png"
    assert find_reference(tmp_path / "r", "b.png") == tmp_path / "r" / "b.tif"
    assert find_reference(tmp_path / "r", "other/a.png") == tmp_path / "r" / "sub" / "a.png"
    assert find_reference(tmp_path / "r", "c.png") is None


# ---------------------------------------------------------------------------
# the batch
# ---------------------------------------------------------------------------
def _snapshot(folder):
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file() and p.suffix in (".png", ".tif")}


@pytest.mark.slow
def test_same_seed_bit_identical_whatever_the_workers_and_order(tmp_path):
    names = ["a.png", "b.png", "sub/c.png", "sub/d.png", "e.png"]
    _tree(tmp_path / "in", names)
    before = _snapshot(tmp_path / "in")
    r1 = run_batch([tmp_path / "in"], tmp_path / "w1", settings=FAST,
                   options=_quiet(workers=1, recursive=True, seed=11, maps=True))
    items = list(reversed(collect_inputs([tmp_path / "in"], recursive=True).items))
    r2 = run_batch(items, tmp_path / "w2", settings=FAST,
                   options=_quiet(workers=2, threads=1, recursive=True, seed=11, maps=True))
    assert r1.done == r2.done == len(names)
    a, b = _snapshot(tmp_path / "w1"), _snapshot(tmp_path / "w2")
    assert len(a) == 3 * len(names)  # image, P(on), std
    assert a == b
    assert _snapshot(tmp_path / "in") == before  # inputs never modified
    r3 = run_batch([tmp_path / "in"], tmp_path / "w3", settings=FAST,
                   options=_quiet(workers=1, recursive=True, seed=12, maps=True))
    assert r3.done == len(names) and _snapshot(tmp_path / "w3") != a  # the seed matters


def test_mirrored_tree_manifest_and_rerun_skips(tmp_path):
    names = ["a.png", "sub/b.png"]
    _tree(tmp_path / "in", names)
    r = run_batch([tmp_path / "in"], tmp_path / "out", settings=FAST,
                  options=_quiet(workers=1, recursive=True))
    assert (r.done, r.skipped, r.failed) == (2, 0, 0)
    for rel in names:
        assert (tmp_path / "out" / rel).is_file()
    entries = Manifest(tmp_path / "out").read()
    runs = [e for e in entries if e["type"] == "run"]
    done = [e for e in entries if e.get("status") == "done"]
    assert len(runs) == 1 and runs[0]["config"]["settings"]["sweeps"] == 30
    assert sorted(e["relpath"] for e in done) == names
    for e in done:
        assert e["input_hash"] == file_hash(tmp_path / "in" / e["relpath"])
        assert e["output_hashes"]["image"] == file_hash(tmp_path / "out" / e["outputs"]["image"])
        assert e["image_seed"] == image_seed(0, e["relpath"])
        assert e["settings"]["sweeps"] == 30 and "coupling" in e["params"]
        assert isinstance(e["diagnostics"]["final_energy"], float)
        assert len(e["energy_trace"]["energy"]) == 2  # two chains
        assert e["seconds"] > 0
    stamps = {rel: (tmp_path / "out" / rel).stat().st_mtime_ns for rel in names}
    again = run_batch([tmp_path / "in"], tmp_path / "out", settings=FAST,
                      options=_quiet(workers=1, recursive=True))
    assert (again.done, again.skipped, again.failed) == (0, 2, 0)
    assert stamps == {rel: (tmp_path / "out" / rel).stat().st_mtime_ns for rel in names}


def test_changed_settings_need_overwrite_and_damaged_output_is_redone(tmp_path):
    _tree(tmp_path / "in", ["a.png", "b.png"])
    run_batch([tmp_path / "in"], tmp_path / "out", settings=FAST, options=_quiet(workers=1))
    other = FAST.replace(coupling=0.7)
    r = run_batch([tmp_path / "in"], tmp_path / "out", settings=other, options=_quiet(workers=1))
    assert r.failed == 2 and all("already exists" in m for _, m in r.failures)
    r = run_batch([tmp_path / "in"], tmp_path / "out", settings=other,
                  options=_quiet(workers=1, overwrite=True))
    assert r.done == 2
    # a damaged output (hash no longer matches) is cleaned again without asking
    target = tmp_path / "out" / "a.png"
    good = target.read_bytes()
    target.write_bytes(good[:50])
    r = run_batch([tmp_path / "in"], tmp_path / "out", settings=other, options=_quiet(workers=1))
    assert (r.done, r.skipped) == (1, 1)
    assert target.read_bytes() == good


def test_reference_metrics_match_scikit_image_and_csv(tmp_path):
    _tree(tmp_path / "in", ["a.png", "sub/b.png"], refs=tmp_path / "ref")
    r = run_batch([tmp_path / "in"], tmp_path / "out", settings=FAST,
                  options=_quiet(workers=1, recursive=True, reference=str(tmp_path / "ref")))
    assert r.done == 2
    with open(tmp_path / "out" / "summary.csv") as fh:
        rows = {row["relpath"]: row for row in csv.DictReader(fh)}
    for e in r.entries:
        out = np.array(Image.open(tmp_path / "out" / e["relpath"]))
        ref = np.array(Image.open(tmp_path / "ref" / e["relpath"]))
        expected_psnr = peak_signal_noise_ratio(ref, out, data_range=255)  # scikit-image reference
        if np.isfinite(expected_psnr):
            assert e["metrics"]["psnr"] == pytest.approx(expected_psnr, rel=1e-12)
        assert e["metrics"]["error_rate"] == pytest.approx(np.mean(ref != out), abs=0)
        assert float(rows[e["relpath"]]["error_rate"]) == pytest.approx(np.mean(ref != out))
    # adding a reference later re-scores without cleaning again
    run_batch([tmp_path / "in"], tmp_path / "out2", settings=FAST,
              options=_quiet(workers=1, recursive=True))
    later = run_batch([tmp_path / "in"], tmp_path / "out2", settings=FAST,
                      options=_quiet(workers=1, recursive=True, reference=str(tmp_path / "ref")))
    assert later.skipped == 2 and all("error_rate" in e["metrics"] for e in later.entries)


def test_failures_one_line_each_batch_goes_on(tmp_path, capsys):
    _tree(tmp_path / "in", ["good.png"])
    (tmp_path / "in" / "garbage.png").write_bytes(b"not an image")
    Image.fromarray(np.zeros((8, 8, 3), np.uint8)).save(tmp_path / "in" / "rgb.png")
    rc = main(["clean", str(tmp_path / "in"), "-o", str(tmp_path / "out"), "-j", "2", *FAST_FLAGS])
    assert rc == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 2 and all(": " in line and "Traceback" not in line for line in err)
    assert any(line.startswith(str(tmp_path / "in" / "garbage.png") + ": cannot read") for line in err)
    assert any(line.startswith(str(tmp_path / "in" / "rgb.png") + ": colour image") for line in err)
    assert (tmp_path / "out" / "good.png").is_file()
    status = {e["relpath"]: e["status"] for e in Manifest(tmp_path / "out").read()
              if e["type"] == "image" and e["status"] != "started"}
    assert status == {"good.png": "done", "garbage.png": "failed", "rgb.png": "failed"}


def test_config_file_and_flags_recorded(tmp_path, capsys):
    _tree(tmp_path / "in", ["a.png"])
    cfg = tmp_path / "run.toml"
    cfg.write_text('[settings]\ncoupling = 0.7\nsweeps = 30\nburn_in = 10\nsamples = 20\n'
                   '[batch]\nseed = 4\nworkers = 1\n')
    rc = main(["clean", str(tmp_path / "in"), "-o", str(tmp_path / "out"), "--config", str(cfg),
               "--coupling", "0.9", "-q"])
    assert rc == 0
    entries = Manifest(tmp_path / "out").read()
    run = entries[0]
    assert run["type"] == "run"
    assert run["config"]["settings"]["coupling"] == 0.9 and run["config"]["batch"]["seed"] == 4
    assert run["config"]["sources"]["settings.coupling"] == "flag"
    assert run["config"]["sources"]["settings.sweeps"] == "file"
    assert run["config"]["sources"]["settings.chains"] == "default"
    done = [e for e in entries if e.get("status") == "done"][0]
    assert done["params"]["coupling"] == 0.9 and done["image_seed"] == image_seed(4, "a.png")


@pytest.mark.parametrize("text, words", [
    ("[settings]\ncoupling = 'strong'\n", "coupling"),
    ("[settings]\ncoupl = 1.0\n", "unknown key"),
    ("[batch]\nworkers = 0\n", "workers"),
    ("[settings\n", "not valid TOML"),
])
def test_bad_config_is_one_line_usage_error(tmp_path, capsys, text, words):
    cfg = tmp_path / "bad.toml"
    cfg.write_text(text)
    rc = main(["clean", str(tmp_path), "-o", str(tmp_path / "out"), "--config", str(cfg)])
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith(str(cfg)) and words in err[0]


def test_score_folders(tmp_path, capsys):
    _tree(tmp_path / "noisy", ["a.png", "sub/b.png"], refs=tmp_path / "ref")
    rc = main(["score", str(tmp_path / "noisy"), str(tmp_path / "ref"), "-r",
               "--csv", str(tmp_path / "s.csv")])
    assert rc == 0
    with open(tmp_path / "s.csv") as fh:
        rows = {row["image"]: row for row in csv.DictReader(fh)}
    assert set(rows) == {"a.png", "sub/b.png", "(mean)"}
    rates = []
    for rel in ("a.png", "sub/b.png"):
        a = np.array(Image.open(tmp_path / "noisy" / rel))
        b = np.array(Image.open(tmp_path / "ref" / rel))
        rates.append(np.mean(a != b))  # the flip fraction, computed directly
        assert float(rows[rel]["error_rate"]) == pytest.approx(rates[-1])
    assert float(rows["(mean)"]["error_rate"]) == pytest.approx(np.mean(rates))
    (tmp_path / "noisy" / "lonely.png").write_bytes((tmp_path / "noisy" / "a.png").read_bytes())
    rc = main(["score", str(tmp_path / "noisy"), str(tmp_path / "ref")])
    assert rc == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"{tmp_path / 'noisy' / 'lonely.png'}: no reference in {tmp_path / 'ref'}"]



def test_second_batch_into_the_same_folder_is_refused(tmp_path, capsys):
    import subprocess
    import sys
    import time

    _tree(tmp_path / "in", ["a.png"])
    (tmp_path / "out").mkdir()
    # another process holds the folder (as a running batch does) ...
    holder = subprocess.Popen([sys.executable, "-c", (
        "import fcntl, sys, time\n"
        f"fh = open({str(tmp_path / 'out' / 'manifest.jsonl')!r}, 'ab')\n"
        "fcntl.flock(fh.fileno(), fcntl.LOCK_EX)\n"
        "print('locked', flush=True)\n"
        "time.sleep(60)\n")], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        rc = main(["clean", str(tmp_path / "in"), "-o", str(tmp_path / "out"), *FAST_FLAGS])
    finally:
        holder.kill()
        holder.wait()
        holder.stdout.close()
    assert rc == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "another mrfclean batch is writing to this folder" in err[0]
    assert not (tmp_path / "out" / "a.png").exists()
    # ... and once it has gone, the batch runs
    t0 = time.monotonic()
    assert main(["clean", str(tmp_path / "in"), "-o", str(tmp_path / "out"), *FAST_FLAGS]) == 0
    assert time.monotonic() - t0 < 60 and (tmp_path / "out" / "a.png").is_file()


def test_retried_task_accepts_its_own_earlier_outputs_and_nothing_else(tmp_path):
    """A worker can die after writing an image's outputs but before its result comes back;
    the retried task must then report the image done (its outputs are byte-identical to what
    the retry makes with the same seed), never overwrite a different file, and fill in an
    output the dead attempt had not written yet."""
    import dataclasses

    from mrfclean.batch import Task, clean_task

    _tree(tmp_path / "in", ["a.png"])
    out = tmp_path / "out"
    task = Task(str(tmp_path / "in" / "a.png"), "a.png", str(out), FAST, 7, True, None,
                10**8, False, None, None, fresh=True)
    first = clean_task(task)
    assert first["status"] == "done"
    snapshot = {p.name: p.read_bytes() for p in out.iterdir()}
    again = clean_task(task)  # the retry: outputs already there, written by "itself"
    assert again["status"] == "done" and again["output_hashes"] == first["output_hashes"]
    assert {p.name: p.read_bytes() for p in out.iterdir()} == snapshot  # no scratch left
    (out / "a_std.tif").unlink()  # the dead attempt got no further than the image
    assert clean_task(task)["status"] == "done"
    assert (out / "a_std.tif").read_bytes() == snapshot["a_std.tif"]
    # a different file under the same name is not this task's: refused, left as it was
    (out / "a.png").write_bytes(b"somebody else's result")
    clash = clean_task(task)
    assert clash["status"] == "failed" and "already exists" in clash["error"]
    assert (out / "a.png").read_bytes() == b"somebody else's result"
    # without the run's word that the outputs were absent when it planned, no retry logic
    (out / "a.png").write_bytes(snapshot["a.png"])
    assert clean_task(dataclasses.replace(task, fresh=False))["status"] == "failed"
