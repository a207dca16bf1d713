"""How much of oracle TV's score comes from stopping Chambolle's iteration early.

The greyscale benchmark's "TV oracle" is scikit-image's ``denoise_tv_chambolle``
with its default stopping rule (200 iterations or ``eps=2e-4``) at the weight
that maximises PSNR against the clean image.  This script repeats that oracle
with the iteration run much closer to the TV minimiser, on 256^2 crops of the
benchmark images, and prints the best PSNR (and its weight) for each stopping
rule.  Same crops and weight grid as ``scripts/bench_grey.py``; the noise is
drawn afresh for each case (seed 5), not the benchmark's own draws.

Example
-------
    python scripts/tv_iterations.py --cases cell:0.05 cell:0.1 camera:0.1 moon:0.1
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import sys
import warnings

import numpy as np
from skimage.restoration import denoise_tv_chambolle

from mrfclean.metrics import psnr

RULES = ((200, 2e-4), (2000, 1e-6), (10000, 1e-8))


def _bench():
    """``scripts/bench_grey.py`` as a module (its crops and weight grid)."""
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "bench_grey.py")
    spec = importlib.util.spec_from_file_location("bench_grey", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cases", nargs="+", default=["cell:0.05", "cell:0.1", "camera:0.1", "moon:0.1"],
                   help="image:sigma pairs (256^2 crops)")
    args = p.parse_args(argv)
    bg = _bench()
    warnings.simplefilter("ignore")
    print(f"{'case':16s}" + "".join(f"  {f'{n} its, eps {e:g}':>26s}" for n, e in RULES))
    for case in args.cases:
        name, s = case.split(":")
        s = float(s)
        gen = np.random.default_rng(5)
        x = bg.crop(name, 256)
        y = (x + s * gen.standard_normal(x.shape)).astype(np.float32).astype(np.float64)
        line = f"{name + ' s=' + str(s):16s}"
        for n, e in RULES:
            q, w = max((psnr(x, denoise_tv_chambolle(y, weight=w, max_num_iter=n, eps=e),
                             data_range=1.0), w) for w in bg.TV_WEIGHTS)
            line += f"  {q:9.3f} dB at weight {w:.3f}"
        print(line, flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
