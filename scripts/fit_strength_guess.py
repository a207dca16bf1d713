"""Fit the starting point of the SURE strength walk (``mrfclean.grey.STRENGTH_GUESS``).

On the prior's training images (scripts/learn_grey_prior.py; never the
benchmark's), noised at sigma 0.05, 0.1 and 0.2, the strength SURE chooses from
the default start is regressed on the noise sd in the prior's units:
``log strength = a + b log(sigma / span)``.  Prints ``a``, ``b`` and the
residual sd.

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

from mrfclean.fit.grey import choose_strength  # noqa: E402
from mrfclean.grey import DEFAULT_TOL, grey_setup  # noqa: E402


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--crop", type=int, default=256)
    p.add_argument("--seed", type=int, default=3)
    args = p.parse_args(argv)
    gen = np.random.default_rng(1)
    rows = []
    for name, x in zip(TRAINING, training_images(crop=args.crop, seed=args.seed)):
        for s in (0.05, 0.1, 0.2):
            y = (x + s * gen.standard_normal(x.shape))[None]
            st = grey_setup(y, noise="gaussian", strength=1.0, curvature=0.0, seed=1)
            u, var_u = st.observed(y)
            lam = choose_strength(u, var_u, st.prior, start=0.5, seed=1 ^ 0x3C3C3C3C,
                                  tol=DEFAULT_TOL).strength
            srel = st.term.sigma / st.span
            rows.append((srel, lam))
            print(f"{name:22s} sigma {s:4.2f}  sigma/span {srel:.4f}  strength {lam:.3f}", flush=True)
    r = np.array(rows)
    A = np.vstack([np.ones(len(r)), np.log(r[:, 0])]).T
    coef = np.linalg.lstsq(A, np.log(r[:, 1]), rcond=None)[0]
    resid = np.log(r[:, 1]) - A @ coef
    print(f"a = {coef[0]:.3f}, b = {coef[1]:.3f}, residual sd {np.std(resid):.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
