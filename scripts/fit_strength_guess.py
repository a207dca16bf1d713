"""Fit the strength guesses of the SURE walk (``mrfclean.grey.STRENGTH_GUESS`` and ``STRENGTH_START``).

On the prior's training images (scripts/learn_grey_prior.py; never the
benchmark's), noised at sigma 0.05, 0.1 and 0.2, the strength SURE chooses from
a fixed start is regressed on the noise sd in the prior's units,
``log strength = a + b log(sigma / span)`` (``STRENGTH_GUESS``, the reference
of the curvature gate), and on that and the image's estimated roughness ``g``
(``mrfclean.fit.grey.signal_roughness``), ``log strength = a + b log(sigma /
span) + c log g`` (``STRENGTH_START``, where the walk starts).  Prints the
coefficients and residual sds of both lines.  ``--prior tuned`` fits them for
the tuned prior (``TUNED_STRENGTH_START``; its noise-only line is not used),
``--prior blocks`` for the block-filter prior (``BLOCK_STRENGTH_START``).

Example
-------
    python scripts/fit_strength_guess.py
"""

from __future__ import annotations

import argparse
import sys

import numpy as np

sys.path.insert(0, __file__.rsplit("/", 1)[0])
from learn_grey_prior import TRAINING, training_images  # noqa: E402

from mrfclean.fit.grey import choose_strength, signal_roughness  # noqa: E402
from mrfclean.grey import DEFAULT_TOL, grey_setup  # noqa: E402
from mrfclean.models.grey import BLOCK_PRIOR_FILE, PRIOR_FILE, TUNED_PRIOR_FILE, GSMPrior  # noqa: E402


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--crop", type=int, default=256)
    p.add_argument("--seed", type=int, default=3)
    p.add_argument("--prior", choices=["score-matching", "tuned", "blocks"], default="score-matching",
                   help="which shipped prior to fit the lines for")
    p.add_argument("--spread-share", type=float, default=0.0,
                   help="the walk's spread_share (the shipped lines were fitted with the plain "
                        "walk, 0; the cleaner walks with mrfclean.grey.SPREAD_SHARE, about 10%% "
                        "lower; the lines only set the walk's first point)")
    args = p.parse_args(argv)
    prior = GSMPrior.load(shipped={"tuned": TUNED_PRIOR_FILE, "blocks": BLOCK_PRIOR_FILE}
                          .get(args.prior, PRIOR_FILE))
    gen = np.random.default_rng(1)
    rows = []
    for name, x in zip(TRAINING, training_images(crop=args.crop, seed=args.seed)):
        for s in (0.05, 0.1, 0.2):
            y = (x + s * gen.standard_normal(x.shape))[None]
            st = grey_setup(y, noise="gaussian", strength=1.0, curvature=0.0, seed=1)
            u, var_u = st.observed(y)
            lam = choose_strength(u, var_u, prior, start=0.5, seed=1 ^ 0x3C3C3C3C,
                                  tol=DEFAULT_TOL, spread_share=args.spread_share).strength
            srel = st.term.sigma / st.span
            g = signal_roughness(u, var_u)
            rows.append((srel, g, lam))
            print(f"{name:22s} sigma {s:4.2f}  sigma/span {srel:.4f}  roughness {g:.3g}  "
                  f"strength {lam:.3f}", flush=True)
    r = np.log(np.array(rows))
    prefix = {"tuned": "TUNED_", "blocks": "BLOCK_"}.get(args.prior, "")
    for label, cols in ((prefix + "STRENGTH_GUESS", r[:, :1]), (prefix + "STRENGTH_START", r[:, :2])):
        A = np.hstack([np.ones((len(r), 1)), cols])
        coef = np.linalg.lstsq(A, r[:, 2], rcond=None)[0]
        resid = r[:, 2] - A @ coef
        print(f"{label} = ({', '.join(f'{c:.3f}' for c in coef)}), residual sd {np.std(resid):.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
