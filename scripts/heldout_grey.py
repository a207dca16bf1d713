"""Held-out check of the greyscale cleaner on smooth and flat-region images.

The benchmark (scripts/bench_grey.py) has two smooth images (cell, moon) and
the priors were learned and tuned on textured ones (scripts/learn_grey_prior.py),
so a change tuned on either can overfit them.  This script scores the cleaner
on images shipped with scikit-image that neither uses:

* four 384^2 crops from inside the fundus of ``retina`` (grey, smooth background
  with thin vessels), each stretched to [0, 1];
* the Shepp-Logan phantom (``shepp_logan_phantom``, 384^2 centre): flat regions
  with sharp edges;
* ``microaneurysms`` (102^2, all of it), stretched to [0, 1];

with Gaussian noise of sigma 0.05, 0.1 and 0.2 of the range and Poisson-Gaussian
noise (gain 0.01, read noise 0.02) on the first two images.  Against each it
prints the PSNR of mrfclean (everything "auto") and of TV-Chambolle at its best
weight chosen with the clean image in hand (oracle, as in the benchmark), the
strength, curvature and prior the cleaner chose, and the means.  ``--prior``
passes the cleaner's prior option (to compare the shipped priors).  Cases run in
parallel, one kernel thread per worker.

Example
-------
    python scripts/heldout_grey.py --workers 2 > heldout_grey.txt
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from multiprocessing import Pool

import numpy as np
import skimage.data
from skimage.color import rgb2gray

from mrfclean.grey import PRIORS

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_grey import tv_oracle  # noqa: E402

#: Top-left corners of the retina crops: inside the fundus, away from the optic disc.
RETINA_CORNERS = ((450, 450), (650, 850), (850, 400), (350, 800))
SIGMAS = (0.05, 0.1, 0.2)


def _stretch(a):
    a = np.asarray(a, dtype=np.float64)
    return (a - a.min()) / (a.max() - a.min())


def images():
    """``[(name, clean image in [0, 1])]`` of the held-out set."""
    r = rgb2gray(skimage.data.retina())
    out = [(f"retina@{i},{j}", _stretch(r[i:i + 384, j:j + 384])) for i, j in RETINA_CORNERS]
    out.append(("phantom", skimage.data.shepp_logan_phantom()[8:392, 8:392].astype(np.float64)))
    out.append(("microaneurysms", _stretch(skimage.data.microaneurysms())))
    return out


def cases(seed):
    """``[(label, clean, noisy float32)]``: each image at each sigma, then Poisson-Gaussian
    noise on the first two."""
    gen = np.random.default_rng(seed)
    ims = images()
    out = []
    for name, x in ims:
        for s in SIGMAS:
            out.append((f"{name} s={s:g}", x, (x + s * gen.standard_normal(x.shape)).astype(np.float32)))
    a, b = 0.01, 0.02**2
    for name, x in ims[:2]:
        y = a * gen.poisson(x / a) + np.sqrt(b) * gen.standard_normal(x.shape)
        out.append((f"{name} PG", x, y.astype(np.float32)))
    return out


_CASES = []
_PRIOR = ["auto"]


def _start(c, prior):
    import numba

    numba.set_num_threads(1)
    warnings.simplefilter("ignore")  # chains-disagree notes
    _CASES[:] = c
    _PRIOR[:] = [prior]


def _one(k):
    from mrfclean.grey import clean_grey
    from mrfclean.metrics import psnr

    label, x, y = _CASES[k]
    r = clean_grey(y, rng=1, prior=_PRIOR[0])
    tv, _ = tv_oracle(x, y.astype(np.float64))
    p = r.params
    return (label, psnr(x, r.mean, data_range=1.0), tv, p["strength"], p.get("curvature", 0.0),
            p["prior_family"])


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                epilog="example: python scripts/heldout_grey.py --workers 2")
    p.add_argument("--seed", type=int, default=11)
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--prior", choices=PRIORS, default="auto",
                   help="the cleaner's prior option (default auto)")
    args = p.parse_args(argv)
    c = cases(args.seed)
    with Pool(max(1, args.workers), initializer=_start, initargs=(c, args.prior)) as pool:
        res = pool.map(_one, range(len(c)), chunksize=1)
    print(f"{'case':24s} {'mrfclean':>8s} {'TV oracle':>9s} {'diff':>6s}  chosen")
    for label, q, tv, lam, kap, prior in res:
        print(f"{label:24s} {q:8.3f} {tv:9.3f} {q - tv:+6.2f}  strength {lam:.3g}, curvature "
              f"{kap:.3g}, {prior} prior")
    q = np.array([r[1] for r in res])
    tv = np.array([r[2] for r in res])
    print(f"\nmean PSNR: mrfclean {q.mean():.3f} dB, TV oracle {tv.mean():.3f} dB "
          f"(difference {np.mean(q - tv):+.3f}, median {np.median(q - tv):+.3f}); "
          f"mrfclean ahead in {int(np.sum(q > tv))} of {len(q)} cases")
    return 0


if __name__ == "__main__":
    sys.exit(main())
