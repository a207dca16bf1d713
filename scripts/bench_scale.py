"""Scaling benchmark: cost per site-update against size and threads, peak memory, a 400-Mpx scan.

Run from the repository root::

    python scripts/bench_scale.py                 # everything (the big scan takes minutes)
    python scripts/bench_scale.py --skip-big      # no 20000 x 20000 scan
    python scripts/bench_scale.py --big-side 8000 # a smaller "big" scan

Parts
-----
1. ns per site-update of one Gibbs sweep, binary (Ising heat bath) and grey
   (GSM-MRF sweep: scale draws plus a perturbed conjugate-gradient solve), at
   256², 512², 1024², 2048², with 1 thread and with every numba thread; the
   spread (max / min over sizes) should stay within 20 % (linear cost).
   Also the tiled binary sweep, to show the overhead of tiling.
2. Peak RSS of an untiled binary clean (MPM, parameters estimated) and of an
   untiled greyscale clean (posterior mean and std, everything automatic),
   measured in a subprocess from /proc/self/status VmHWM after resetting it,
   compared with 8x the float32 image size.
3. A 20000 x 20000 bi-level scan: written band by band as an uncompressed TIFF
   in a temporary folder (the generator stays within memory), cleaned from the
   command line with --tile in a subprocess; wall time and the child's peak
   RSS (resource.getrusage RUSAGE_CHILDREN) are printed against 2 GB.
4. An 8000 x 8000 16-bit greyscale scan cleaned the same way (posterior mean
   and std map, short chains, tiles on 2 worker processes); wall time and the
   peak RSS of the whole process tree.

Grey sweeps are timed after two sweeps that allocate the buffers and move the
chain off its start; the CG iterations per solve are printed beside them,
since they, not the per-iteration cost, vary with the image.

Timings are the minimum over repeats (other processes share the machine).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SIZES = (256, 512, 1024, 2048)


def _sweep_ns_binary(n, threads, *, tiled=False, repeats=3):
    import numba

    from mrfclean import kernels
    from mrfclean.models.binary import BinaryModel, FlipNoise
    from mrfclean.tiles import RawField, TiledBinaryModel

    numba.set_num_threads(threads)
    rng = np.random.default_rng(0)
    img = (rng.random((n, n)) < 0.3).astype(np.uint8) * 255
    noise = FlipNoise(0.1)
    if tiled:
        model = TiledBinaryModel(img, RawField(noise, "flip", 255, np.uint8), coupling=0.8,
                                 tile=512, field_cache_bytes=0)
    else:
        t = np.where(img == 255, 1, -1)
        model = BinaryModel(noise.field(t), coupling=0.8, start=t)
    state = model.start(0, 1)
    sweeps = max(2, int(2e7 // (n * n)))
    model.sweep(state, 1.0, 7)  # compile and warm up
    best = np.inf
    for r in range(repeats):
        t0 = time.perf_counter()
        for k in range(sweeps):
            model.sweep(state, 1.0, int(kernels.stream_key(1, 0, k)))
            if tiled:
                model.energy(state)  # computed during the pass; free
        best = min(best, (time.perf_counter() - t0) / sweeps)
    return best / (n * n) * 1e9


def _sweep_ns_grey(n, threads, *, repeats=2):
    import numba

    from mrfclean import kernels
    from mrfclean.models.grey import GreyModel, GSMPrior

    numba.set_num_threads(threads)
    rng = np.random.default_rng(0)
    prior = GSMPrior.load()
    warm = GreyModel(rng.random((32, 32)), variance=0.04, prior=prior)
    warm.sweep(warm.start(0, 1), 1.0, 7)  # compile on a small image
    y = (rng.random((n, n)) < 0.3) * 1.0 + rng.normal(0, 0.2, (n, n))
    model = GreyModel(y, variance=0.04, prior=prior)
    state = model.start(0, 1)
    for k in range(2):  # buffers allocated and touched, chain away from its start
        model.sweep(state, 1.0, int(kernels.stream_key(2, 0, k)))
    sweeps = max(2, int(4e5 // (n * n)))  # a grey sweep costs ~1-3 us per pixel
    repeats = repeats if n <= 512 else 1
    best = np.inf
    for r in range(repeats):
        solves, its = model.stats.solves, model.stats.iterations
        t0 = time.perf_counter()
        for k in range(sweeps):
            model.sweep(state, 1.0, int(kernels.stream_key(1, r, k)))
        best = min(best, (time.perf_counter() - t0) / sweeps)
        per_solve = (model.stats.iterations - its) / max(model.stats.solves - solves, 1)
    _sweep_ns_grey.cg_iterations = per_solve
    return best / (n * n) * 1e9


def part_cost(threads_all):
    rows = []
    kinds = [("binary", _sweep_ns_binary), ("binary tiled 512", None), ("grey", _sweep_ns_grey)]
    for name, fn in kinds:
        for n in SIZES:
            row = {"model": name, "size": f"{n}x{n}"}
            for th in (1, threads_all):
                try:
                    if name.startswith("binary tiled"):
                        v = _sweep_ns_binary(n, th, tiled=True)
                    else:
                        v = fn(n, th)
                except Exception as exc:  # grey may not be available
                    print(f"{name} {n}: not measured ({type(exc).__name__}: {exc})")
                    v = float("nan")
                row[f"ns/site {th} thr"] = v
            rows.append(row)
            extra = (f"   CG iterations per solve {_sweep_ns_grey.cg_iterations:.1f}"
                     if name == "grey" else "")
            print(f"{name:18s} {n:5d}^2  1 thread {row['ns/site 1 thr']:7.2f} ns/site-update   "
                  f"{threads_all} threads {row[f'ns/site {threads_all} thr']:7.2f} ns/site-update"
                  + extra, flush=True)
    print()
    for name, _ in kinds:
        for th in (1, threads_all):
            v = np.array([r[f"ns/site {th} thr"] for r in rows if r["model"] == name])
            if np.all(np.isfinite(v)):
                spread = v.max() / v.min()
                print(f"{name:18s} {th} thread(s): spread max/min over sizes {spread:.3f} "
                      f"({'within' if spread <= 1.2 else 'OUTSIDE'} 20%)")
    return rows


RSS_CHILD = r"""
import json, sys, numpy as np, warnings
warnings.simplefilter("ignore")
from mrfclean.binary import clean_binary
from mrfclean.grey import clean_grey
kind, n = sys.argv[1], int(sys.argv[2])
def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key):
            return int(line.split()[1]) * 1024
rng = np.random.default_rng(1)
yy, xx = np.mgrid[0:n, 0:n]
pattern = (np.sin(xx / 37.0) + np.cos(yy / 23.0)) > 0.3
del yy, xx
if kind == "binary":
    small = (np.random.default_rng(0).random((64, 64)) < 0.3).astype(np.uint8)
    clean_binary(small, rng=0, burn_in=2, samples=2)   # compile everything first
    img = pattern.astype(np.uint8) * 255
    img = np.where(rng.random((n, n)) < 0.1, 255 - img, img).astype(np.uint8)
    run = lambda: clean_binary(img, rng=0, burn_in=5, samples=10)
else:
    clean_grey(np.random.default_rng(0).random((64, 64)).astype(np.float32), rng=0)
    img = (pattern * 0.6 + 0.2 + rng.normal(0, 0.1, (n, n))).astype(np.float32)
    run = lambda: clean_grey(img, rng=0)
del pattern
base = status("VmRSS")
open("/proc/self/clear_refs", "w").write("5")   # reset VmHWM to the current RSS
res = run()
peak = status("VmHWM")
print(json.dumps({"n": n, "base": base, "peak": peak, "float32_bytes": 4 * n * n}))
"""


def part_rss(n, kind="binary"):
    out = subprocess.run([sys.executable, "-c", RSS_CHILD, kind, str(n)], capture_output=True,
                         text=True, check=True)
    d = json.loads(out.stdout.strip().splitlines()[-1])
    extra = d["peak"] - d["base"]
    ratio = extra / d["float32_bytes"]
    what = ("binary MPM clean of {n}x{n} uint8" if kind == "binary"
            else "grey posterior mean + std of {n}x{n} float32").format(n=n)
    print(f"untiled {what}: peak RSS {d['peak'] / 2**20:.0f} MiB, "
          f"{extra / 2**20:.0f} MiB above the {d['base'] / 2**20:.0f} MiB before cleaning = "
          f"{ratio:.1f}x the float32 image ({'within' if ratio <= 8 else 'ABOVE'} 8x)")
    return d


def _write_bands(path, side, dtype, band_of, *, band=1000, seed=0):
    """A synthetic scan written band by band (peak memory: a few bands).

    ``band_of(xx, yy, rng)`` gives the pixels of rows ``yy`` (a column) at columns ``xx``.
    """
    from mrfclean import io

    rng = np.random.default_rng(seed)
    with io.tiff_band_writer(path, (side, side), dtype, overwrite=True) as w:
        xx = np.arange(side)[None, :]
        for r0 in range(0, side, band):
            w[r0:min(r0 + band, side)] = band_of(xx, np.arange(r0, min(r0 + band, side))[:, None], rng)


def write_big_scan(path, side, *, rate=0.1):
    """A bi-level scan: a smooth pattern thresholded, with a fraction ``rate`` of pixels flipped."""
    def band_of(xx, yy, rng):
        clean = ((np.sin(xx / 53.0) * np.cos(yy / 41.0) + np.sin((xx + yy) / 97.0)) > 0.2)
        flips = rng.random((yy.shape[0], xx.shape[1])) < rate
        return np.where(flips ^ clean, 255, 0).astype(np.uint8)

    _write_bands(path, side, np.uint8, band_of)


def part_big(side, tile, sweeps, keep):
    tmp = Path(tempfile.mkdtemp(prefix="mrfclean_big_"))
    src = tmp / "scan.tif"
    t0 = time.perf_counter()
    write_big_scan(src, side)
    t_gen = time.perf_counter() - t0
    print(f"wrote {side}x{side} uint8 scan ({src.stat().st_size / 2**20:.0f} MiB) in {t_gen:.1f} s")
    cmd = [sys.executable, "-m", "mrfclean.cli", "clean", str(src), "-o", str(tmp / "out"),
           "--tile", str(tile), "--estimate", "map", "--sweeps", str(sweeps), "--chains", "1",
           "-j", "1"]
    print("running:", " ".join(cmd[2:]), flush=True)
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    import resource

    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024  # kB on Linux
    print(proc.stdout.strip()[-2000:])
    if proc.returncode != 0:
        print(proc.stderr.strip()[-2000:])
    out = tmp / "out" / "scan.tif"
    ok = out.exists()
    print(f"{side}x{side} binary MAP, {sweeps} annealing sweeps, tile {tile}: "
          f"{wall:.0f} s wall, peak RSS {peak / 2**30:.2f} GiB "
          f"({'within' if peak <= 2 * 2**30 else 'ABOVE'} 2 GB); output written: {ok}")
    if not keep:
        shutil.rmtree(tmp)
    return wall, peak


def write_big_grey_scan(path, side):
    """A 16-bit greyscale scan: a smooth specimen plus Gaussian noise (sd 3000 counts)."""
    def band_of(xx, yy, rng):
        clean = 20000 + 15000 * np.tanh(4 * (np.sin(xx / 53.0) * np.cos(yy / 41.0)))
        noisy = clean + rng.normal(0, 3000, (yy.shape[0], xx.shape[1]))
        return np.clip(np.rint(noisy), 0, 65535).astype(np.uint16)

    _write_bands(path, side, np.uint16, band_of)


def _tree_rss(pid):
    """Resident memory of a process and all its descendants (bytes), from /proc."""
    total, todo = 0, [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/status") as f:
                for line in f:
                    if line.startswith("VmRSS"):
                        total += int(line.split()[1]) * 1024
            for t in os.listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{t}/children") as f:
                    todo.extend(int(c) for c in f.read().split())
        except (FileNotFoundError, ProcessLookupError, PermissionError):
            continue
    return total


def part_big_grey(side, tile, workers, keep):
    """A greyscale scan cleaned tiled from the command line; peak RSS of the whole process tree
    (the command and its tile workers, sampled every 0.2 s)."""
    import threading

    tmp = Path(tempfile.mkdtemp(prefix="mrfclean_biggrey_"))
    src = tmp / "scan.tif"
    t0 = time.perf_counter()
    write_big_grey_scan(src, side)
    print(f"wrote {side}x{side} uint16 grey scan ({src.stat().st_size / 2**20:.0f} MiB) in "
          f"{time.perf_counter() - t0:.1f} s")
    cmd = [sys.executable, "-m", "mrfclean.cli", "clean", str(src), "-o", str(tmp / "out"),
           "--tile", str(tile), "--burn-in", "1", "--samples", "2", "--chains", "1",
           "-j", str(workers)]
    print("running:", " ".join(cmd[2:]), flush=True)
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = [0]

    def watch():
        while proc.poll() is None:
            peak[0] = max(peak[0], _tree_rss(proc.pid))
            time.sleep(0.2)

    th = threading.Thread(target=watch, daemon=True)
    th.start()
    out, err = proc.communicate()
    th.join()
    wall = time.perf_counter() - t0
    print(out.strip()[-2000:])
    if proc.returncode != 0:
        print(err.strip()[-2000:])
    ok = (tmp / "out" / "scan.tif").exists() and (tmp / "out" / "scan_std.tif").exists()
    mpx = side * side / 1e6
    print(f"{side}x{side} grey posterior mean + std, 3 sweeps, 1 chain, tile {tile}, "
          f"{workers} workers: {wall:.0f} s wall ({wall / mpx:.2f} s per megapixel), peak RSS "
          f"(process tree) {peak[0] / 2**30:.2f} GiB; image + std map written: {ok}")
    if not keep:
        shutil.rmtree(tmp)
    return wall, peak[0]


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--skip-cost", action="store_true")
    p.add_argument("--skip-rss", action="store_true")
    p.add_argument("--skip-big", action="store_true")
    p.add_argument("--rss-side", type=int, default=4096)
    p.add_argument("--rss-grey-side", type=int, default=2048)
    p.add_argument("--big-side", type=int, default=20000)
    p.add_argument("--big-tile", type=int, default=1024)
    p.add_argument("--big-sweeps", type=int, default=20)
    p.add_argument("--skip-big-grey", action="store_true")
    p.add_argument("--big-grey-side", type=int, default=8000)
    p.add_argument("--big-grey-workers", type=int, default=2)
    p.add_argument("--keep", action="store_true", help="keep the big scans and their results")
    args = p.parse_args(argv)
    import numba

    threads = numba.config.NUMBA_NUM_THREADS
    print(f"numba threads available: {threads}; cores: {os.cpu_count()}")
    if not args.skip_cost:
        part_cost(threads)
    if not args.skip_rss:
        part_rss(args.rss_side)
        part_rss(args.rss_grey_side, "grey")
    if not args.skip_big:
        part_big(args.big_side, args.big_tile, args.big_sweeps, args.keep)
    if not args.skip_big_grey:
        part_big_grey(args.big_grey_side, args.big_tile, args.big_grey_workers, args.keep)
    return 0


if __name__ == "__main__":
    sys.exit(main())
