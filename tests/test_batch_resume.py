"""Killed, interrupted and crashing runs, for real: a subprocess batch is killed with
SIGKILL part-way, interrupted with Ctrl-C, or loses a worker process; the rerun (or
the run itself) ends with every output present, valid and bit-identical to an
uninterrupted run, and no finished image is cleaned twice.

"Valid" is checked against an uninterrupted in-process run with the same seed,
computed in the test.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from skimage.data import binary_blobs

from mrfclean.batch import BatchOptions, run_batch
from mrfclean.clean import Settings
from mrfclean.manifest import Manifest, outputs_valid

pytestmark = pytest.mark.slow

N_IMAGES = 8
FLAGS = ["--burn-in", "60", "--samples", "240", "--seed", "3"]
SETTINGS = Settings(burn_in=60, samples=240)


def _make_inputs(root: Path):
    for i in range(N_IMAGES):
        clean = binary_blobs(128, blob_size_fraction=0.2, volume_fraction=0.4, rng=i)
        noisy = clean ^ (np.random.default_rng(100 + i).random(clean.shape) < 0.12)
        sub = root / ("even" if i % 2 == 0 else "odd")
        sub.mkdir(parents=True, exist_ok=True)
        Image.fromarray(noisy.astype(np.uint8) * 255).save(sub / f"scan{i:02d}.png")


def _default_sigint():
    # A shell that runs a command in the background without job control starts it with
    # Ctrl-C ignored, and that carries over to every process it starts (this suite run
    # that way once, and the batch then never saw the Ctrl-C below). The batch is run as
    # from a terminal, where Ctrl-C has its default action.
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _start(inp, out, *extra):
    cmd = [sys.executable, "-m", "mrfclean.cli", "clean", str(inp), "-o", str(out), "-r",
           "-j", "2", "--threads", "1", "-q", "--no-progress", *FLAGS, *extra]
    return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True, preexec_fn=_default_sigint)


def _done(out):
    return {e["relpath"] for e in Manifest(out).read()
            if e.get("type") == "image" and e.get("status") == "done"}


def _wait_for_done(proc, out, n, timeout=120):
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if len(_done(out)) >= n:
            return
        if proc.poll() is not None:
            pytest.fail(f"batch ended before {n} images were done: {proc.communicate()}")
        time.sleep(0.02)
    pytest.fail("batch too slow")


def _uninterrupted(inp, out):
    r = run_batch([inp], out, settings=SETTINGS,
                  options=BatchOptions(workers=1, recursive=True, seed=3, progress=False))
    assert r.done == N_IMAGES
    return {p.relative_to(out).as_posix(): p.read_bytes() for p in out.rglob("*.png")}


def _pngs(out):
    return {p.relative_to(out).as_posix(): p.read_bytes() for p in out.rglob("*.png")
            if not p.name.startswith(".")}


def _group_gone(pgid, timeout=20):
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        try:
            os.killpg(pgid, 0)
        except ProcessLookupError:
            return True
        time.sleep(0.05)
    return False


def test_sigkill_then_rerun_loses_nothing_and_redoes_nothing(tmp_path):
    inp, out = tmp_path / "in", tmp_path / "out"
    _make_inputs(inp)
    expected = _uninterrupted(inp, tmp_path / "reference_run")

    proc = _start(inp, out)
    _wait_for_done(proc, out, 3)
    os.killpg(proc.pid, signal.SIGKILL)  # the parent and its workers, mid-run
    proc.communicate()
    assert _group_gone(proc.pid)
    finished = _done(out)
    assert 3 <= len(finished) < N_IMAGES, "the kill should land part-way"
    stamps = {rel: os.stat(out / rel).st_mtime_ns for rel in finished}

    rerun = _start(inp, out)
    stdout, stderr = rerun.communicate(timeout=300)
    assert rerun.returncode == 0, stderr
    assert stderr == ""

    assert _pngs(out) == expected  # every output present and bit-identical to an uninterrupted run
    entries = [e for e in Manifest(out).read() if e.get("type") == "image"]
    done_lines = [e["relpath"] for e in entries if e["status"] == "done"]
    assert sorted(done_lines) == sorted(expected)  # each image finished exactly once
    skipped = {e["relpath"] for e in entries if e["status"] == "skipped"}
    assert skipped == finished
    assert stamps == {rel: os.stat(out / rel).st_mtime_ns for rel in finished}  # not rewritten
    for e in entries:
        if e["status"] == "done":
            assert outputs_valid(e, out)
    assert not [p for p in out.rglob(".*") if ".part" in p.name]  # no temporary files left


def test_ctrl_c_stops_cleanly_and_rerun_completes(tmp_path):
    inp, out = tmp_path / "in", tmp_path / "out"
    _make_inputs(inp)
    proc = _start(inp, out)
    _wait_for_done(proc, out, 2)
    os.killpg(proc.pid, signal.SIGINT)  # what a terminal's Ctrl-C sends
    stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130
    assert "interrupted" in stderr and "Traceback" not in stderr
    assert _group_gone(proc.pid)  # no worker process left behind
    finished = _done(out)
    assert len(finished) >= 2
    rerun = _start(inp, out)
    stdout, stderr = rerun.communicate(timeout=300)
    assert rerun.returncode == 0, stderr
    entries = [e for e in Manifest(out).read() if e.get("type") == "image"]
    assert {e["relpath"] for e in entries if e["status"] == "skipped"} == finished
    assert len(_pngs(out)) == N_IMAGES


def _workers_of(pid):
    """Process ids of the pool workers started by ``pid`` (from /proc): its descendants
    that have no children of their own, less multiprocessing's resource tracker (the
    workers are children of ``pid`` with spawn, grandchildren through a fork server)."""
    parent, cmd = {}, {}
    for d in Path("/proc").iterdir():
        if not d.name.isdigit():
            continue
        try:
            stat = (d / "stat").read_text()
            parent[int(d.name)] = int(stat.rsplit(")", 1)[1].split()[1])
            cmd[int(d.name)] = (d / "cmdline").read_bytes().replace(b"\0", b" ").decode()
        except (OSError, ValueError, IndexError):
            continue
    descendants, frontier = set(), {pid}
    while frontier:
        frontier = {p for p, pp in parent.items() if pp in frontier} - descendants
        descendants |= frontier
    has_children = {pp for pp in parent.values()}
    return [p for p in descendants if p not in has_children and "resource_tracker" not in cmd.get(p, "")]


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs /proc to find the workers")
def test_dead_worker_is_replaced_and_its_image_retried(tmp_path):
    inp, out = tmp_path / "in", tmp_path / "out"
    _make_inputs(inp)
    proc = _start(inp, out)
    _wait_for_done(proc, out, 1)
    workers = _workers_of(proc.pid)
    assert workers, "no pool worker found"
    os.kill(workers[0], signal.SIGKILL)  # as the kernel's out-of-memory killer would
    stdout, stderr = proc.communicate(timeout=300)
    assert proc.returncode == 0, stderr
    entries = [e for e in Manifest(out).read() if e.get("type") == "image"]
    assert sorted(e["relpath"] for e in entries if e["status"] == "done") == sorted(_pngs(out))
    assert len(_pngs(out)) == N_IMAGES
