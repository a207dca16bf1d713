"""Learn the greyscale GSM-MRF prior shipped in mrfclean/data/grey_prior.json.

Score matching (Hyvärinen 2005) on clean images that scikit-image ships,
converted to grey in [0, 1].  The benchmark images (cell, camera, moon, coins)
are never used here.

Example
-------
    python scripts/learn_grey_prior.py --out mrfclean/data/grey_prior.json
"""

from __future__ import annotations

import argparse
import json
import sys
import time

import numpy as np
import skimage.data
from skimage.color import rgb2gray
from skimage.util import img_as_float

from mrfclean.fit.grey import learn_prior

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


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                epilog="example: python scripts/learn_grey_prior.py --neighbourhood 8")
    p.add_argument("--neighbourhood", default="8", choices=["4", "8", "12", "20"])
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
                        seed=args.seed, precisions=prec, smoothing=args.smoothing)
    d = prior.to_dict()
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
