"""The block prior's one-risk trial after the smooth prior, measured against no trial.

``mrfclean.grey.BLOCK_SWITCH`` gives a 2-D image that "auto" sends to the smooth
prior, and where SURE leaves the curvature term out, one SURE risk of the block
prior at that many times the smooth strength, and takes the block prior there
when the risk is lower.  This script cleans each such case with the shipped
factor and with the trial off (``BLOCK_SWITCH = 0``), for each ``rng``, and
prints every case the trial switched, with the PSNR of both, then the mean
difference over all runs.  ``--factor`` tries another factor.

Sets: ``heldout`` (the images of scripts/heldout_grey.py) and ``trainN`` (the
tuning cases of scripts/learn_grey_prior.py at 384^2 with seed N); never the
benchmark's images.  Runs go in parallel, one kernel thread per worker.

Example
-------
    python scripts/block_trial.py heldout --rng 1 2
"""

from __future__ import annotations

import argparse
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from curvature_allowance import _CASES, load, mean_line, paired_runs  # noqa: E402  (same sets)


def _one(job):
    """``(PSNR, prior family, curvature)`` of one case cleaned with one factor and rng."""
    import mrfclean.grey as grey
    from mrfclean.metrics import psnr

    k, factor, rng = job
    grey.BLOCK_SWITCH = factor
    _, x, y = _CASES[k]
    r = grey.clean_grey(y, rng=rng)
    return psnr(x, r.mean, data_range=1.0), r.params["prior_family"], r.params.get("curvature", 0.0)


def main(argv=None) -> int:
    from mrfclean.grey import BLOCK_SWITCH

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("set", help="heldout or trainN (N: the tuning cases' seed)")
    p.add_argument("--rng", type=int, nargs="+", default=[1], help="random streams")
    p.add_argument("--factor", type=float, default=BLOCK_SWITCH,
                   help=f"the trial's strength over the smooth one (default {BLOCK_SWITCH:g})")
    p.add_argument("--workers", type=int, default=2)
    args = p.parse_args(argv)
    cases = load(args.set)
    # the cases the trial can touch: the smooth prior with the trial off
    ks, res = paired_runs(cases, _one, (0.0, args.factor), args.rng, lambda r: r[1] == "smooth",
                          args.workers)
    diffs, switched = [], []
    for k in ks:
        for r in args.rng:
            (p0, _, c0), (p1, f1, _) = res[k, 0.0, r], res[k, args.factor, r]
            diffs.append(p1 - p0)
            if f1 == "blocks":
                switched.append(p1 - p0)
                print(f"{cases[k][0]:24s} rng {r}: smooth (curvature {c0:.3g}) -> blocks, "
                      f"{p0:.3f} -> {p1:.3f} dB ({p1 - p0:+.3f})")
    if not diffs:
        print(f"{args.set}: no case gets the smooth prior")
        return 0
    print(f"{args.set}: {len(ks)} smooth-prior cases x {len(args.rng)} streams, trial at "
          f"{args.factor:g} x against none: {mean_line(diffs)}; "
          f"{len(switched)} switched to blocks, {sum(f > 0 for f in switched)} gained, "
          f"{sum(f < 0 for f in switched)} lost")
    return 0


if __name__ == "__main__":
    sys.exit(main())
