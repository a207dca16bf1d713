"""Benchmark of the greyscale cleaner against scikit-image's denoisers.

Images shipped with scikit-image (cell, camera, moon, coins), central crops of
256^2 and 512^2 (coins: its full 303 x 384, resized crop where smaller), float
intensities in [0, 1] with Gaussian noise of sigma 0.05, 0.1 and 0.2 of the
range, plus one Poisson-Gaussian case.  Methods:

* mrfclean: ``clean_grey`` with every parameter on "auto" (posterior mean + std);
* TV (oracle): ``denoise_tv_chambolle`` at the weight that maximises PSNR against
  the clean image (searched on a grid, so it is an upper bound for TV);
* NL-means: ``denoise_nl_means`` with sigma from ``estimate_sigma`` and
  ``h = 0.8 sigma``, patch 5, distance 6, ``fast_mode=True`` (scikit-image gallery);
* BayesShrink: ``denoise_wavelet(method="BayesShrink", mode="soft", rescale_sigma=True)``;
* bilateral: ``denoise_bilateral(sigma_color=sigma, sigma_spatial=2)``... with sigma estimated;
* median 3x3: ``scipy.ndimage.median_filter(size=3)``.

Prints PSNR (dB), SSIM and seconds per case and method, the mean PSNR over the
set, the time ratio of mrfclean to NL-means on the 512^2 crops, and the
empirical coverage of mrfclean's 95% credible intervals.

Example
-------
    python scripts/bench_grey.py --sizes 256 512 > bench_grey.txt
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings

import numpy as np
import skimage.data
from scipy import ndimage
from skimage.restoration import (denoise_bilateral, denoise_nl_means, denoise_tv_chambolle,
                                 denoise_wavelet, estimate_sigma)
from skimage.transform import resize
from skimage.util import img_as_float

from mrfclean.diagnostics import ChainsDisagree
from mrfclean.grey import clean_grey, credible_interval
from mrfclean.metrics import format_table, psnr, ssim

IMAGES = ("cell", "camera", "moon", "coins")
SIGMAS = (0.05, 0.1, 0.2)
TV_WEIGHTS = np.geomspace(0.005, 0.6, 40)


def crop(name, size):
    a = img_as_float(getattr(skimage.data, name)())
    H, W = a.shape
    if min(H, W) < size:
        a = resize(a, (max(size, H * size // min(H, W)), max(size, W * size // min(H, W))),
                   anti_aliasing=True)
        H, W = a.shape
    i, j = (H - size) // 2, (W - size) // 2
    return np.ascontiguousarray(a[i:i + size, j:j + size])


def tv_oracle(x, y):
    """``(PSNR, weight)`` of TV-Chambolle on ``y`` at the weight in :data:`TV_WEIGHTS` that
    scores best against the clean ``x`` (an upper bound for TV on this grid)."""
    return max((psnr(x, denoise_tv_chambolle(y, weight=w), data_range=1.0), w) for w in TV_WEIGHTS)


def timed(f, *args, **kw):
    t = time.perf_counter()
    out = f(*args, **kw)
    return out, time.perf_counter() - t


def peers(y):
    s = float(estimate_sigma(y))
    return {
        "NL-means": lambda: denoise_nl_means(y, h=0.8 * s, sigma=s, fast_mode=True,
                                             patch_size=5, patch_distance=6),
        "BayesShrink": lambda: denoise_wavelet(y, method="BayesShrink", mode="soft",
                                               rescale_sigma=True),
        "bilateral": lambda: denoise_bilateral(y, sigma_color=2 * s, sigma_spatial=2),
        "median3": lambda: ndimage.median_filter(y, size=3),
    }


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                epilog="example: python scripts/bench_grey.py --sizes 256")
    p.add_argument("--sizes", type=int, nargs="+", default=[256, 512])
    p.add_argument("--images", nargs="+", default=list(IMAGES))
    p.add_argument("--sigmas", type=float, nargs="+", default=list(SIGMAS))
    p.add_argument("--no-poisson", action="store_true")
    p.add_argument("--seed", type=int, default=20260)
    p.add_argument("--prior", default="auto",
                   help="mrfclean's prior: a name from mrfclean.grey.PRIORS or a prior file "
                        "(default auto, as shipped)")
    args = p.parse_args(argv)
    gen = np.random.default_rng(args.seed)
    cases = [(n, sz, "gauss", s) for sz in args.sizes for n in args.images for s in args.sigmas]
    if not args.no_poisson:
        cases.append(("cell", max(args.sizes), "poisson-gaussian", 0.0))
    # warm up the compiled kernels so no timing includes compilation
    clean_grey(crop("camera", 64) + 0.1 * gen.standard_normal((64, 64)), rng=0)
    rows, summary = [], {}
    cover_hits = cover_n = 0
    for name, size, kind, sigma in cases:
        x = crop(name, size)
        if kind == "gauss":
            y = x + sigma * gen.standard_normal(x.shape)
            label = f"{name} {size} s={sigma:g}"
        else:  # gain 0.01 (a = 0.01: 100 photo-electrons at full scale), read noise 0.02
            a, b = 0.01, 0.02**2
            y = a * gen.poisson(x / a) + np.sqrt(b) * gen.standard_normal(x.shape)
            label = f"{name} {size} PG a={a:g} b={b:g}"
        y = y.astype(np.float32)
        res = {}
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ChainsDisagree)
            r, t = timed(clean_grey, y, rng=1, prior=args.prior)
        lo, hi = credible_interval(r, 0.95)
        inside = (x >= lo) & (x <= hi)
        cover_hits += int(inside.sum())
        cover_n += inside.size
        res["mrfclean"] = (r.mean, t)
        yd = y.astype(np.float64)
        tv, tt = timed(tv_oracle, x, yd)
        res["TV oracle"] = (denoise_tv_chambolle(yd, weight=tv[1]), tt / len(TV_WEIGHTS))
        for k, f in peers(yd).items():
            res[k] = timed(f)
        for k, (z, t) in res.items():
            q = psnr(x, np.clip(z, -1, 2), data_range=1.0)
            rows.append({"case": label, "method": k, "PSNR": q, "SSIM": ssim(x, z, data_range=1.0),
                         "seconds": t})
            summary.setdefault(k, []).append(q)
            if size == max(args.sizes):
                summary.setdefault(("time", k), []).append(t)
        rows[-len(res)]["extra"] = (f"lam={r.params['strength']:.3g} "
                                    f"kappa={r.params.get('curvature', 0.0):.3g} rhat={r.diagnostics.rhat:.2f} "
                                    f"cover95={inside.mean():.3f} noise={r.params['noise']}")
        print(format_table(rows[-len(res):], ["case", "method", "PSNR", "SSIM", "seconds", "extra"],
                           floatfmt=".3f"), flush=True)
    print()
    print("mean PSNR over the set:")
    for k in res:
        print(f"  {k:12s} {np.mean(summary[k]):.3f} dB")
    tm, tn = np.sum(summary[("time", "mrfclean")]), np.sum(summary[("time", "NL-means")])
    print(f"time mrfclean / NL-means on {max(args.sizes)}^2 crops: {tm / tn:.2f}x "
          f"({tm:.1f} s vs {tn:.1f} s)")
    print(f"empirical coverage of 95% intervals: {cover_hits / cover_n:.4f} over {cover_n} pixels")
    return 0


if __name__ == "__main__":
    sys.exit(main())
