"""Learn the greyscale GSM-MRF priors shipped in mrfclean/data (grey_prior*.json).

Two stages, both on clean images that scikit-image ships, converted to grey in
[0, 1]; the benchmark images (cell, camera, moon, coins) are never used here.

1. Score matching (Hyvärinen 2005) fits the mixture weights to the images'
   neighbour differences.  It needs no normalising constant, but it fits a
   density, not a denoiser.  This stage made ``grey_prior.json``.  A rerun
   with today's libraries lands on other weights where the fit is flat (the
   diagonal weight at precision 809 is e^-2.1 of its group's largest, not
   e^-8.7; DEVELOPERS.md, stop 15), so that file is kept as it was made.
2. ``--tune``: the live mixture weights of the fresh fit are then moved, one at a time, to
   raise the mean PSNR of the cleaner itself (``clean_grey(y, prior=...,
   rng=1)``) on noisy copies of the training images, by the exploratory moves
   of Hooke & Jeeves' pattern search
   (:func:`mrfclean.fit.grey.coordinate_search`).  Fitting a model's
   parameters to the loss of the estimate it is used for is loss-based
   (discriminative) training of a random field (Barbu 2009, IEEE Trans. Image
   Processing 18: 2451-2462); the posterior mean does not depend on the
   prior's normalising constant, so this stage needs none either.  About 20
   minutes on two cores.  Its output is ``grey_prior_tuned.json``, which the
   cleaner uses for images no smoother than the training images (with it,
   SURE cannot judge the curvature term that smoother images need; see
   DEVELOPERS.md, stop 15).

``--blocks`` fits, by the same score matching, a prior on the 2 x 2 block
filters instead of neighbour differences (``grey_prior_blocks.json``, the
cleaner's prior for rough 2-D images since stop 24; DEVELOPERS.md).  With
``--tune`` it is tuned the same way, on the cases the cleaner gives it.

Example
-------
    python scripts/learn_grey_prior.py --out mrfclean/data/grey_prior.json
    python scripts/learn_grey_prior.py --blocks --out mrfclean/data/grey_prior_blocks.json
    python scripts/learn_grey_prior.py --tune --out mrfclean/data/grey_prior_tuned.json
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
import warnings
from multiprocessing import Pool

import numpy as np
import skimage.data
from skimage.color import rgb2gray
from skimage.util import img_as_float

from mrfclean.fit.grey import coordinate_search, learn_prior, live_components, with_logamps

#: Training images (shipped with scikit-image); the benchmark set is excluded.
TRAINING = ("astronaut", "chelsea", "coffee", "rocket", "brick", "grass", "gravel", "text",
            "page", "clock", "immunohistochemistry", "hubble_deep_field")
BENCHMARK = ("cell", "camera", "moon", "coins")


def training_images(names=TRAINING, *, crop=256, seed=0):
    """Grey float images in [0, 1], each cut to at most ``crop`` x ``crop`` (random position)."""
    if set(names) & set(BENCHMARK):
        raise ValueError("benchmark images must not be used for training")
    gen = np.random.default_rng(seed)
    out = []
    for name in names:
        a = getattr(skimage.data, name)()
        a = img_as_float(rgb2gray(a[..., :3]) if a.ndim == 3 else a)
        H, W = a.shape
        i = int(gen.integers(0, max(H - crop, 0) + 1))
        j = int(gen.integers(0, max(W - crop, 0) + 1))
        out.append(np.ascontiguousarray(a[i:i + crop, j:j + crop]))
    return out


def tuning_cases(*, crop=256, seed=5, sigmas=(0.05, 0.1, 0.2), poisson=(0.01, 0.02**2)):
    """``[(clean, noisy)]``: each training image with Gaussian noise of each sigma, then
    Poisson-Gaussian noise of gain ``poisson[0]`` and read variance ``poisson[1]``."""
    gen = np.random.default_rng(seed + 100)
    out = []
    for x in training_images(crop=crop, seed=seed):
        for s in sigmas:
            out.append((x, (x + s * gen.standard_normal(x.shape)).astype(np.float32)))
        if poisson:
            a, b = poisson
            y = a * gen.poisson(x / a) + np.sqrt(b) * gen.standard_normal(x.shape)
            out.append((x, y.astype(np.float32)))
    return out


_CASES = []


def _worker_start(cases):
    import numba

    numba.set_num_threads(1)  # one kernel thread per worker: the workers share the cores
    warnings.simplefilter("ignore")  # chains-disagree notes of short chains
    _CASES[:] = cases


def _case_psnr(job):
    from mrfclean.grey import clean_grey
    from mrfclean.metrics import psnr
    from mrfclean.models.grey import GSMPrior

    k, d, kw = job
    x, y = _CASES[k]
    return psnr(x, clean_grey(y, prior=GSMPrior.from_dict(d), rng=1, **kw).mean, data_range=1.0)


def _case_family(k):
    from mrfclean.grey import clean_grey

    return clean_grey(_CASES[k][1], rng=1).params["prior_family"]


def routed(cases, family, workers):
    """The cases for which the cleaner, everything on "auto", picks the prior ``family``."""
    with Pool(workers, initializer=_worker_start, initargs=(cases,)) as pool:
        got = pool.map(_case_family, range(len(cases)), chunksize=1)
    return [c for c, f in zip(cases, got) if f == family]


def tune(prior, cases, *, steps, min_gain, workers, clean_kw=None, log=sys.stderr):
    """Move the live mixture weights of ``prior`` to raise the cleaner's mean PSNR on ``cases``
    (``clean_grey(y, prior=..., rng=1, **clean_kw)``)."""
    comps = live_components(prior)
    every = prior.groups + prior.blocks
    x0 = [every[g].logamp[c] for g, c in comps]
    kw = dict(clean_kw or {})
    with Pool(workers, initializer=_worker_start, initargs=(cases,)) as pool:
        def score(v):
            d = with_logamps(prior, comps, v).to_dict()
            return float(np.mean(pool.map(_case_psnr, [(k, d, kw) for k in range(len(cases))],
                                          chunksize=1)))

        seen = []

        def progress(v, f):
            seen.append(f)
            print(f"  {f:.4f} dB at " + " ".join(f"{a:+.2f}" for a in v), file=log, flush=True)

        x, best, n = coordinate_search(score, x0, steps, min_gain=min_gain, progress=progress)
    tuned = with_logamps(prior, comps, x)
    return tuned, {"start_psnr": round(seen[0], 4), "psnr": round(best, 4), "evaluations": n,
                   "live": [[(tuned.groups + tuned.blocks)[g].name, c] for g, c in comps]}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                epilog="example: python scripts/learn_grey_prior.py --neighbourhood 8")
    p.add_argument("--neighbourhood", default="8", choices=["4", "8", "12", "20"])
    p.add_argument("--blocks", action="store_true",
                   help="learn the 2 x 2 block-filter prior (grey_prior_blocks.json) instead")
    p.add_argument("--crop", type=int, default=160)
    p.add_argument("--iterations", type=int, default=300)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--smoothing", type=float, default=0.01,
                   help="std of Gaussian noise added before score matching (default 0.01)")
    p.add_argument("--downsample", type=int, default=2, help="block-average training images by this")
    p.add_argument("--ratio", type=float, default=4.0,
                   help="ratio of neighbouring precisions, from 10**0.5 up (default 4: the "
                        "ladder the sampler draws with one exp per clique)")
    p.add_argument("--scales", type=int, default=8, help="number of mixture scales")
    p.add_argument("--tune", action="store_true",
                   help="then tune the weights for the cleaner's PSNR (grey_prior_tuned.json)")
    p.add_argument("--tune-crop", type=int, default=256)
    p.add_argument("--tune-seed", type=int, default=5)
    p.add_argument("--tune-steps", type=float, nargs="+", default=[1.0, 0.5, 0.25])
    p.add_argument("--min-gain", type=float, default=0.005,
                   help="a tuning move is kept only if it gains more than this (dB)")
    p.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    p.add_argument("--out", default="-")
    args = p.parse_args(argv)
    imgs = training_images(crop=args.crop * args.downsample, seed=args.seed)
    if args.downsample > 1:
        f = args.downsample
        imgs = [x[:x.shape[0] // f * f, :x.shape[1] // f * f]
                .reshape(x.shape[0] // f, f, x.shape[1] // f, f).mean(axis=(1, 3)) for x in imgs]
    t0 = time.perf_counter()
    prec = 10 ** 0.5 * args.ratio ** np.arange(args.scales)
    prior = learn_prior(imgs, neighbourhood=args.neighbourhood, iterations=args.iterations,
                        seed=args.seed, precisions=prec, smoothing=args.smoothing,
                        blocks=args.blocks)
    d = prior.to_dict()
    if args.tune:
        cases = tuning_cases(crop=args.tune_crop, seed=args.tune_seed)
        kw = {}
        if args.blocks:  # the cases the cleaner gives the block prior, as it runs it there
            cases = routed(cases, "blocks", args.workers)
            kw = {"curvature": 0.0}
            print(f"{len(cases)} tuning cases routed to the block prior", file=sys.stderr)
        prior, record = tune(prior, cases, steps=args.tune_steps, min_gain=args.min_gain,
                             workers=args.workers, clean_kw=kw)
        d = prior.to_dict()
        d["source"] = ("score matching (Hyvarinen 2005), then weights tuned for the cleaner's "
                       "PSNR on the training images (pattern search, Hooke & Jeeves 1961)")
        d["tuning"] = {"crop": args.tune_crop, "seed": args.tune_seed,
                       "cases": "each image + Gaussian sigma 0.05, 0.1, 0.2 and Poisson-Gaussian "
                                "(gain 0.01, read variance 4e-4)",
                       "steps": args.tune_steps, "min_gain_db": args.min_gain, **record}
        if args.blocks:
            d["tuning"]["cases"] += (f"; only the {len(cases)} the cleaner gives the block prior, "
                                     "cleaned with curvature 0 from SURE's default start")
    d["training"] = {"images": [f"skimage.data.{n}" for n in TRAINING], "crop": args.crop,
                     "seed": args.seed, "downsample": args.downsample, "script": "scripts/learn_grey_prior.py",
                     "seconds": round(time.perf_counter() - t0, 1)}
    text = json.dumps(d, indent=1)
    if args.out == "-":
        sys.stdout.write(text + "\n")
    else:
        with open(args.out, "w") as f:
            f.write(text + "\n")
    print(f"loss {d['loss']:.6g} after {d['iterations']} iterations", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
