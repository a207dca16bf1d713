"""How the greyscale posterior mean's error depends on burn-in and kept sweeps.

For each benchmark image and noise level (512^2 crops of ``scripts/bench_grey.py``,
Gaussian noise drawn afresh, seed 5), the noise model, strength and curvature
are estimated once (``grey_setup``, everything on "auto"); then the posterior
is sampled with each ``burn-in + kept`` chain length (2 chains unless a length
reads ``CxB+K``: C chains; same seed) and the PSNR of the mean and the coverage of
the 95% intervals are printed, with their averages over the cases.  Only the
chains change between columns, so their differences are the chains' effect
alone.  Long chains (``4x3+30``) give the posterior mean nearly without
Monte-Carlo error: the model's own score once the parameters are chosen.
``--tv`` adds oracle-tuned TV (``bench_grey.tv_oracle``) for comparison.

Example
-------
    python scripts/chain_lengths.py --lengths 3+6 2+6 1+7 1+6 0+8
    python scripts/chain_lengths.py --lengths 1+6 4x3+30 --tv
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from bench_grey import crop, tv_oracle  # noqa: E402

from mrfclean.grey import grey_setup, sample_block  # noqa: E402
from mrfclean.metrics import psnr  # noqa: E402


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--lengths", nargs="+", default=["3+6", "1+7"],
                   help="burn-in+kept per chain, or CxB+K for C chains (default 2)")
    p.add_argument("--images", nargs="+", default=["cell", "camera", "moon", "coins"])
    p.add_argument("--sigmas", type=float, nargs="+", default=[0.05, 0.1, 0.2])
    p.add_argument("--size", type=int, default=512)
    p.add_argument("--tv", action="store_true", help="also print oracle-tuned TV")
    args = p.parse_args(argv)

    def length(text):
        chains, _, rest = text.rpartition("x")
        b, k = rest.split("+")
        return int(chains or 2), int(b), int(k)

    lengths = [length(s) for s in args.lengths]
    warnings.simplefilter("ignore")
    gen = np.random.default_rng(5)
    scores = {c: [] for c in lengths}
    print(f"{'case':14s}" + "".join(f"  {f'{c}x{b}+{k}: dB, cover':>20s}" for c, b, k in lengths)
          + ("  TV oracle dB" if args.tv else ""))
    tv = []
    for name in args.images:
        for s in args.sigmas:
            x = crop(name, args.size)
            y = (x + s * gen.standard_normal(x.shape))[None]
            st = grey_setup(y, seed=1)
            line = f"{name + ' s=' + str(s):14s}"
            for c, b, k in lengths:
                blk = sample_block(y, st, burn_in=b, samples=k, chains=c, seed=7)
                m = (st.low + st.span * blk.mean_u)[0]
                sd = (st.span * blk.std_u)[0]
                q = psnr(x, m, data_range=1.0)
                cover = float(np.mean(np.abs(m - x) <= 1.959964 * sd))
                scores[(c, b, k)].append((q, cover))
                line += f"  {q:9.3f} {cover:9.4f}"
            if args.tv:
                tv.append(tv_oracle(x, y[0].astype(np.float32))[0])
                line += f"  {tv[-1]:13.3f}"
            print(line, flush=True)
    line = f"{'mean':14s}"
    for c in lengths:
        a = np.array(scores[c])
        line += f"  {a[:, 0].mean():9.3f} {a[:, 1].mean():9.4f}"
    print(line + (f"  {np.mean(tv):13.3f}" if args.tv else ""))
    return 0


if __name__ == "__main__":
    sys.exit(main())
