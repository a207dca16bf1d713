"""The curvature term's allowance in SURE's decision, measured against plain SURE.

``mrfclean.grey.CURVATURE_MARGIN`` lets the second-difference term in when its
first point's SURE is below the prior alone's plus that many noise variances
(short chains bias plain SURE against the term).  Near a tie the decision
flips with the random stream, so this script cleans each case with several
``rng`` values, once with the shipped allowance and once with none, and prints
every case whose decision differs, with the PSNR of both, then the mean
difference over all runs.  Only images "auto" gives the smooth prior are run
(the term is tried with no other prior).

Sets: ``heldout`` (the images of scripts/heldout_grey.py) and ``trainN`` (the
tuning cases of scripts/learn_grey_prior.py at 384^2 with seed N); never the
benchmark's images.  Runs go in parallel, one kernel thread per worker.

Since stop 26 a case the term leaves out may switch to the block prior
(``grey.BLOCK_SWITCH``); the cases run are those "auto" sends to the smooth
prior first, and a flip line names the prior each run ended on.
``--no-block-trial`` measures as stop 25 did.

Example
-------
    python scripts/curvature_allowance.py heldout --rng 1 2 3 4 5 6 --no-block-trial
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import warnings
from multiprocessing import Pool

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

_CASES = []


def load(which):
    """``[(label, clean, noisy)]`` of a set (see the module docstring)."""
    if which == "heldout":
        from heldout_grey import cases

        return cases(11)
    if which.startswith("train") and which[5:].isdigit():
        from learn_grey_prior import tuning_cases

        seed = int(which[5:])
        return [(f"{which}-{i}", x, y) for i, (x, y) in enumerate(tuning_cases(crop=384, seed=seed))]
    raise SystemExit(f"{which}: unknown set (heldout or trainN)")


def _start(cases, settings=None):
    """Worker set-up: one kernel thread, the cases, and ``settings`` (``{name: value}`` of
    ``mrfclean.grey`` constants) applied."""
    import numba

    import mrfclean.grey as grey

    numba.set_num_threads(1)  # one kernel thread per worker: the workers share the cores
    warnings.simplefilter("ignore")  # chains-disagree notes
    _CASES[:] = cases
    for name, value in (settings or {}).items():
        setattr(grey, name, value)


def paired_runs(cases, one, values, rngs, keep, workers=2, settings=None):
    """Clean every case with ``values[0]`` on the first stream (the routing pass), keep those
    whose result ``keep`` accepts, then run each kept case with both values on every stream.

    ``one((k, value, rng))`` cleans case ``k`` in a worker (see :func:`_start`).  Returns
    the kept case indices and ``{(k, value, rng): result}``.  ``settings``: see :func:`_start`.
    """
    with Pool(max(1, workers), initializer=_start, initargs=(cases, settings)) as pool:
        first = pool.map(one, [(k, values[0], rngs[0]) for k in range(len(cases))], chunksize=1)
        ks = [k for k, r in enumerate(first) if keep(r)]
        res = {(k, values[0], rngs[0]): first[k] for k in ks}  # the routing pass, reused
        jobs = [(k, v, r) for k in ks for v in values for r in rngs if (k, v, r) not in res]
        res.update(zip(jobs, pool.map(one, jobs, chunksize=1)))
    return ks, res


def mean_line(diffs):
    """``"mean +x dB (s.e. y)"`` of paired PSNR differences."""
    d = np.array(diffs)
    se = d.std(ddof=1) / math.sqrt(len(d)) if len(d) > 1 else float("nan")
    return f"mean {d.mean():+.4f} dB (s.e. {se:.4f})"


def _one(job):
    """``(PSNR, curvature, prior family, smooth-routed)`` of one case cleaned with one
    allowance and rng; smooth-routed: "auto" gave it the smooth prior first (it may have
    ended on the block prior by the block trial, ``grey.BLOCK_SWITCH``)."""
    import mrfclean.grey as grey
    from mrfclean.metrics import psnr

    k, margin, rng = job
    grey.CURVATURE_MARGIN = margin
    _, x, y = _CASES[k]
    r = grey.clean_grey(y, rng=rng)
    routed = r.params["prior_family"] == "smooth" or "sure_blocks" in r.params
    return (psnr(x, r.mean, data_range=1.0), r.params.get("curvature", 0.0),
            r.params["prior_family"], routed)


def main(argv=None) -> int:
    from mrfclean.grey import CURVATURE_MARGIN

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("set", help="heldout or trainN (N: the tuning cases' seed)")
    p.add_argument("--rng", type=int, nargs="+", default=[1, 2], help="random streams")
    p.add_argument("--margin", type=float, default=CURVATURE_MARGIN,
                   help=f"allowance to compare with none (default {CURVATURE_MARGIN:g})")
    p.add_argument("--no-block-trial", action="store_true",
                   help="turn off the block prior's trial after the smooth prior "
                        "(grey.BLOCK_SWITCH = 0, as before stop 26, when stop 25 measured this)")
    p.add_argument("--workers", type=int, default=2)
    args = p.parse_args(argv)
    cases = load(args.set)
    ks, res = paired_runs(cases, _one, (0.0, args.margin), args.rng, lambda r: r[3],
                          args.workers, {"BLOCK_SWITCH": 0.0} if args.no_block_trial else None)
    diffs, flips = [], []
    for k in ks:
        for r in args.rng:
            (p0, k0, f0, _), (p1, k1, f1, _) = res[k, 0.0, r], res[k, args.margin, r]
            diffs.append(p1 - p0)
            if k0 != k1 or f0 != f1:
                flips.append(p1 - p0)
                print(f"{cases[k][0]:24s} rng {r}: curvature {k0:.3g} ({f0}) -> {k1:.3g} ({f1}), "
                      f"{p0:.3f} -> {p1:.3f} dB ({p1 - p0:+.3f})")
    if not diffs:
        print(f"{args.set}: no case gets the smooth prior")
        return 0
    print(f"{args.set}: {len(ks)} smooth-prior cases x {len(args.rng)} streams, margin "
          f"{args.margin:g} against 0: {mean_line(diffs)}; "
          f"{len(flips)} decisions flipped, {sum(f > 0 for f in flips)} gained, "
          f"{sum(f < 0 for f in flips)} lost")
    return 0


if __name__ == "__main__":
    sys.exit(main())
