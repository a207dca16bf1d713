"""Batches and sweeps on a real Dask cluster (distributed.LocalCluster, 2 worker processes):
the same outputs as the local pool for the same seeds, and a worker killed mid-run is
retried by the scheduler or reported, never silently lost.

The reference for "same outputs" is the in-process run computed in the test.
"""

from __future__ import annotations

import os
import signal
import threading
import time

import numpy as np
import pytest
from PIL import Image
from skimage.data import binary_blobs

from mrfclean.batch import BatchOptions, run_batch
from mrfclean.clean import Settings
from mrfclean.manifest import Manifest

distributed = pytest.importorskip("distributed")

pytestmark = pytest.mark.slow

FAST = Settings(burn_in=20, samples=60)


def _inputs(root, n, size=64):
    for i in range(n):
        clean = binary_blobs(size, blob_size_fraction=0.25, volume_fraction=0.4, rng=i)
        noisy = clean ^ (np.random.default_rng(50 + i).random(clean.shape) < 0.1)
        sub = root / ("a" if i % 2 else "b")
        sub.mkdir(parents=True, exist_ok=True)
        Image.fromarray(noisy.astype(np.uint8) * 255).save(sub / f"im{i}.png")


def _pngs(out):
    return {p.relative_to(out).as_posix(): p.read_bytes() for p in out.rglob("*.png")}


@pytest.fixture(scope="module")
def client():
    import logging

    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=":0", silence_logs=logging.CRITICAL)
    c = distributed.Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


def test_dask_batch_equals_local_pool(tmp_path, client):
    from mrfclean.cluster import DaskExecutor

    _inputs(tmp_path / "in", 6)
    opts = BatchOptions(recursive=True, seed=9, maps=True, progress=False)
    local = run_batch([tmp_path / "in"], tmp_path / "local", settings=FAST,
                      options=opts.replace(workers=1))
    dask = run_batch([tmp_path / "in"], tmp_path / "dask", settings=FAST, options=opts,
                     executor=DaskExecutor(client=client))
    assert local.done == dask.done == 6
    a, b = _pngs(tmp_path / "local"), _pngs(tmp_path / "dask")
    assert len(a) == 6 and a == b
    tifs = sorted(p.relative_to(tmp_path / "local").as_posix() for p in (tmp_path / "local").rglob("*.tif"))
    assert len(tifs) == 12  # P(on) and std maps, compared byte for byte too
    for rel in tifs:
        assert (tmp_path / "local" / rel).read_bytes() == (tmp_path / "dask" / rel).read_bytes()
    # the work really ran on the cluster's worker processes
    pids = {int(e["worker"].rsplit(":", 1)[1]) for e in dask.entries}
    assert pids and pids <= set(client.run(os.getpid).values())


def test_dask_sweep_equals_local(tmp_path, client):
    from mrfclean.cluster import DaskExecutor
    from mrfclean.sweep import run_sweep

    _inputs(tmp_path / "in", 2, size=48)
    pairs = [(p, p) for p in sorted((tmp_path / "in").rglob("*.png"))]  # scored against the input itself
    grid = {"coupling": [0.5, 0.9]}
    local = run_sweep(pairs, grid=grid, base=FAST, workers=1, seed=2)
    remote = run_sweep(pairs, grid=grid, base=FAST, seed=2, executor=DaskExecutor(client=client))
    keys = ["setting", "image", "psnr", "error_rate", "final_energy"]
    assert [{k: r[k] for k in keys} for r in local.rows] == [{k: r[k] for k in keys} for r in remote.rows]


def test_killed_worker_is_retried_or_reported(tmp_path, client):
    from mrfclean.cluster import DaskExecutor

    n = 10
    _inputs(tmp_path / "in", n, size=128)
    settings = Settings(burn_in=60, samples=240)
    result = {}

    def batch():
        result["summary"] = run_batch([tmp_path / "in"], tmp_path / "out", settings=settings,
                                      options=BatchOptions(recursive=True, progress=False),
                                      executor=DaskExecutor(client=client))

    t = threading.Thread(target=batch)
    t.start()
    killed = None
    deadline = time.monotonic() + 60
    while killed is None and time.monotonic() < deadline and t.is_alive():
        busy = [w for w, tasks in client.processing().items()
                if any(str(k).startswith("mrfclean-") for k in tasks)]
        done = [e for e in Manifest(tmp_path / "out").read() if e.get("status") == "done"]
        if busy and done:  # mid-run: something finished, something is running
            pid = client.run(os.getpid, workers=[busy[0]])[busy[0]]
            os.kill(pid, signal.SIGKILL)
            killed = pid
        time.sleep(0.01)
    t.join(300)
    assert not t.is_alive()
    assert killed is not None, "the batch ended before a worker could be killed"
    summary = result["summary"]
    # every image is accounted for: done (rerun elsewhere by the scheduler) or failed with a reason
    assert summary.done + summary.failed == n
    assert all(msg for _, msg in summary.failures)
    settled = {e["relpath"]: e["status"] for e in Manifest(tmp_path / "out").read()
               if e.get("type") == "image" and e["status"] in ("done", "failed")}
    assert len(settled) == n
    # with the scheduler's default of 3 allowed failures one kill is retried, not lost
    assert summary.done == n
    assert len(_pngs(tmp_path / "out")) == n
    # the nanny brings the killed worker back for the next test
    client.wait_for_workers(2, timeout=60)


def test_cli_scheduler_and_local_cluster(tmp_path, client, capsys):
    from mrfclean.cli import main

    _inputs(tmp_path / "in", 3, size=48)
    flags = ["-r", "--seed", "4", "--burn-in", "20", "--samples", "60", "-q", "--no-progress"]
    assert main(["clean", str(tmp_path / "in"), "-o", str(tmp_path / "here"), "-j", "1", *flags]) == 0
    assert main(["clean", str(tmp_path / "in"), "-o", str(tmp_path / "sched"),
                 "--scheduler", client.scheduler.address, *flags]) == 0
    assert main(["clean", str(tmp_path / "in"), "-o", str(tmp_path / "lc"),
                 "--local-cluster", "2", *flags]) == 0
    here = _pngs(tmp_path / "here")
    assert len(here) == 3 and _pngs(tmp_path / "sched") == here and _pngs(tmp_path / "lc") == here
    assert main(["clean", str(tmp_path / "in"), "-o", str(tmp_path / "x"), "--scheduler", "tcp://a:1",
                 "--local-cluster", "2"]) == 2


def test_dask_runs_the_tiles_of_one_grey_image(client):
    """The tiles of one tiled greyscale image sent to the cluster come back with the bytes of
    tiles cleaned here (each tile's streams depend only on the seed and its position)."""
    from mrfclean.cluster import DaskExecutor
    from mrfclean.tiles import clean_grey_tiled

    gen = np.random.default_rng(3)
    y = (np.linspace(0, 100, 96)[None, :] * np.ones((96, 1)) + gen.normal(0, 10, (96, 96)))
    kw = dict(sigma=10.0, strength=1.0, burn_in=1, samples=2, chains=1, tile=48, rng=2)
    here = clean_grey_tiled(y.astype(np.float32), **kw)
    there = clean_grey_tiled(y.astype(np.float32), executor=DaskExecutor(client=client), **kw)
    assert np.array_equal(here.estimate, there.estimate) and np.array_equal(here.std, there.std)
    assert there.params["tiles"] == 4
