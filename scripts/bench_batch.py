"""Batch throughput: 16 sample-size images with 1 and 2 workers, and on a local Dask cluster.

usage: python scripts/bench_batch.py [--images 16] [--size 256] [--repeat 1]

The images are bi-level 256x256 scans like those in sample_images/ (blobs from
scikit-image's generator, 12% of pixels flipped, fixed seeds), cleaned with the
default settings.  Each worker runs numba on one thread (``--threads 1``), so
the figures measure how the batch scales with worker processes.  Timings are
wall-clock for the whole ``run_batch`` call: with a cold pool (what one
``mrfclean clean`` command does: worker start-up included) and with a warm pool
(workers started before timing, as in a long batch where start-up is spread over
hundreds of images); the Dask cluster is likewise started before timing and its
start-up is printed apart.  The
numba cache is warmed first so no compilation is timed.  Outputs of every run
are checked to be bit-identical.
"""

from __future__ import annotations

import argparse
import logging
import os
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image
from skimage.data import binary_blobs

from mrfclean.batch import BatchOptions, run_batch
from mrfclean.clean import Settings, clean
from mrfclean.pool import LocalPool, cpu_count


def make_images(folder: Path, n: int, size: int):
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(n):
        c = binary_blobs(size, blob_size_fraction=0.1, volume_fraction=0.35, rng=1000 + i)
        noisy = c ^ (np.random.default_rng(2000 + i).random(c.shape) < 0.12)
        Image.fromarray(noisy.astype(np.uint8) * 255).save(folder / f"scan{i:02d}.png")


def outputs(folder: Path) -> dict:
    return {p.name: p.read_bytes() for p in sorted(folder.glob("*.png"))}


def timed(label, inputs, out, settings, options, executor=None):
    t0 = time.perf_counter()
    r = run_batch([inputs], out, settings=settings, options=options, executor=executor)
    dt = time.perf_counter() - t0
    if r.done != len(list(inputs.glob("*.png"))):
        raise SystemExit(f"{label}: only {r.done} images done ({r.failures[:3]})")
    per_image = np.mean([e["seconds"] for e in r.entries])
    print(f"{label:<28} {dt:7.2f} s   ({per_image:.2f} s per image inside a worker)")
    return dt


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--images", type=int, default=16)
    p.add_argument("--size", type=int, default=256)
    p.add_argument("--no-dask", action="store_true")
    args = p.parse_args(argv)
    settings = Settings()
    print(f"{args.images} images of {args.size}x{args.size}, default settings, "
          f"{cpu_count()} cores available, numba threads per worker: 1")
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"load average before the runs: {load:.2f} (other work on the machine slows the "
          "parallel runs most)")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        inputs = tmp / "in"
        make_images(inputs, args.images, args.size)
        warm = np.array(Image.open(inputs / "scan00.png"))
        clean(warm, settings=settings, rng=0)  # compile / load the numba cache, untimed
        base = BatchOptions(threads=1, progress=False)
        t1 = timed("local, 1 worker", inputs, tmp / "w1", settings, base.replace(workers=1))
        t2 = timed("local, 2 workers (cold)", inputs, tmp / "w2", settings, base.replace(workers=2))
        print(f"{'speed-up, cold pool':<28} {t1 / t2:7.2f} x   (worker start-up included)")
        pool = LocalPool(2, threads=1)
        try:
            t0 = time.perf_counter()
            pool.warm()
            print(f"{'(pool start-up)':<28} {time.perf_counter() - t0:7.2f} s")
            t3 = timed("local, 2 workers (warm)", inputs, tmp / "w2warm", settings, base, executor=pool)
        finally:
            pool.close()
        print(f"{'speed-up, warm pool':<28} {t1 / t3:7.2f} x   (target >= 1.8)")
        same = outputs(tmp / "w1") == outputs(tmp / "w2") == outputs(tmp / "w2warm")
        if not args.no_dask:
            from distributed import Client, LocalCluster

            from mrfclean.cluster import DaskExecutor

            t0 = time.perf_counter()
            cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                   dashboard_address=":0", silence_logs=logging.ERROR)
            client = Client(cluster)
            print(f"{'(dask cluster start-up)':<28} {time.perf_counter() - t0:7.2f} s")
            try:
                ex = DaskExecutor(client=client, threads=1)
                ex.warm()  # load the compiled kernels on every worker, untimed
                td = timed("dask LocalCluster, 2 workers", inputs, tmp / "dask", settings, base,
                           executor=ex)
            finally:
                client.close()
                cluster.close()
            print(f"{'speed-up (dask vs 1 worker)':<28} {t1 / td:7.2f} x   (target >= 1.8)")
            same = same and outputs(tmp / "dask") == outputs(tmp / "w1")
        print(f"outputs bit-identical across runs: {same}")
        return 0 if same else 1


if __name__ == "__main__":
    raise SystemExit(main())
