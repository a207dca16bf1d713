"""Trial: do fields of 2 x 2 or 3 x 3 filters beat the pairwise prior? (a measurement, not the cleaner)

The benchmark's must-target (mean PSNR at least oracle TV's) is still missed by
the pairwise grid prior, and the issue's route is to add couplings.  This
script measures the larger-clique route of Schmidt, Gao & Roth [1]_ in its
simplest form, with everything else held equal:

* **Priors.**  Three Gaussian-scale-mixture fields on the same precision ladder
  as the shipped prior (``sqrt(10) 4^c``, eight scales; unnormalised
  components ``exp(beta_c - lambda prec_c r^2 / 2)`` as in
  :mod:`mrfclean.models.grey`), each a mixture per filter shape:

  - ``pair``: the four neighbour differences of the 8-neighbourhood (axial and
    diagonal groups), today's clique shapes, refitted here and not tuned;
  - ``haar``: the three non-constant 2 x 2 Haar filters (the block's row and
    column differences, sharing a mixture, and the mixed one);
  - ``field``: the eight non-constant 3 x 3 DCT-II basis filters (unit norm),
    ``(k, l)`` and ``(l, k)`` sharing a mixture.

  The mixtures are fitted by score matching [2]_ on the prior's training
  images (``scripts/learn_grey_prior.py``, never the benchmark's; 320^2
  crops halved, Gaussian noise 0.01, no 1/255 dequantisation), the loss
  generalised from :func:`mrfclean.fit.grey.score_matching_loss` to linear
  filter responses ``r = f * x`` (:func:`mrfclean.fit.grey.filter_score_matching_loss`,
  first written here): the Laplacian term of a filter carries
  ``||f||^2`` where a difference carries 2.  ``--check`` tests the loss against
  a brute-force evaluation and its gradient against finite differences, for
  all three filter sets, and exits non-zero if either is off.

* **Sampler.**  The same for every prior: the auxiliary-variable Gibbs
  sampler of [1]_ (scales given the image by categorical draws, the image
  given the scales by perturbation-optimisation [3]_ with Jacobi-preconditioned
  conjugate gradients), the mean Rao-Blackwellised over the conditional means,
  2 chains of 3 + 8 sweeps from Gaussian-smoothed starts, Gaussian noise of
  known sigma.  Responses are taken where the whole 3 x 3 window lies inside
  the image (2 x 2 filters sit in its lower-right corner), so a few border
  pixels are in no clique; every pixel 3 or more in keeps all its cliques,
  and scores are taken there.

* **Strength.**  Each prior's strength ``lambda`` on a grid of factors of
  sqrt(2): the best by PSNR against the clean image ("oracle", an upper
  bound no cleaner can use) and the least SURE [4]_ (divergence = summed
  posterior variance over sigma^2, the variance from the chains' 16 draws
  with the n / (n - 1) correction).  A ``*`` marks a choice at the grid's end.

* **Cases.**  128^2 centres of the benchmark's 256^2 crops with the
  benchmark's own noise draw (``scripts/bench_grey.py``: cell, camera, moon,
  coins at sigma 0.05, 0.1, 0.2), or of the training cases
  (``learn_grey_prior.tuning_cases(crop=384, seed=6)``, the Gaussian ones).
  For reference, each line also has oracle TV-Chambolle and the cleaner as
  shipped (``clean_grey(y, rng=1)``: estimated noise, SURE, five chains),
  scored on the same interior.

It prints one line per case and the means.  The stop-23 figures are in
DEVELOPERS.md ("Fields of filters").  About 20 minutes for ``--set bench`` on
two cores, 15 for ``--set train --every 4``.

References
----------
.. [1] U. Schmidt, Q. Gao and S. Roth, "A generative perspective on MRFs in
   low-level vision", CVPR 2010.
.. [2] A. Hyvärinen, "Estimation of non-normalized statistical models by score
   matching", JMLR 6 (2005) 695-709.
.. [3] G. Papandreou and A. Yuille, "Gaussian sampling by local perturbations",
   NIPS 2010.
.. [4] C. Stein, "Estimation of the mean of a multivariate normal
   distribution", Annals of Statistics 9 (1981) 1135-1151.

Examples
--------
    python scripts/trial_filter_field.py --set bench > trial_bench.txt
    python scripts/trial_filter_field.py --set train --every 4
    python scripts/trial_filter_field.py --check
"""

from __future__ import annotations

import argparse
import math
import sys

import numpy as np
from scipy import ndimage
from scipy.optimize import minimize

sys.path.insert(0, __file__.rsplit("/", 1)[0])
from learn_grey_prior import TRAINING, training_images, tuning_cases  # noqa: E402

from mrfclean.fit.grey import filter_responses as respond  # noqa: E402
from mrfclean.fit.grey import filter_responses_t as respond_t  # noqa: E402
from mrfclean.fit.grey import filter_score_matching_loss  # noqa: E402
from mrfclean.metrics import psnr  # noqa: E402

PREC = 10 ** 0.5 * 4.0 ** np.arange(8)
INTERIOR = (slice(3, -3), slice(3, -3))


def pair_filters():
    """The 8-neighbourhood's four differences as 3 x 3 filters, and their groups (axial, diagonal)."""
    out = []
    for di, dj in ((0, 1), (1, 0), (1, 1), (1, -1)):
        f = np.zeros((3, 3))
        f[1, 1] = -1.0
        f[1 + di, 1 + dj] = 1.0
        out.append(f)
    return np.array(out), [0, 0, 1, 1]


def dct_filters():
    """The eight non-constant 3 x 3 DCT-II basis filters (unit norm) and their groups."""
    c = np.array([[math.cos(math.pi * (2 * n + 1) * k / 6) for n in range(3)] for k in range(3)])
    shapes = [(k, l) for k in range(3) for l in range(3) if (k, l) != (0, 0)]
    fs = np.array([np.outer(c[k], c[l]) for k, l in shapes])
    keys = sorted({tuple(sorted(s)) for s in shapes})
    return fs / np.sqrt((fs**2).sum(axis=(1, 2)))[:, None, None], [keys.index(tuple(sorted(s)))
                                                                    for s in shapes]


def haar_filters():
    """The three non-constant 2 x 2 Haar filters (row and column differences of the block's
    halves, and the mixed one), unit norm, placed in a 3 x 3 window, and their groups."""
    out = []
    for a in ([[1, -1], [1, -1]], [[1, 1], [-1, -1]], [[1, -1], [-1, 1]]):
        f = np.zeros((3, 3))
        f[1:, 1:] = a
        out.append(f / 2.0)
    return np.array(out), [0, 0, 1]


def field_loss(theta, images, filters, groups, *, ridge=1e-4):
    """:func:`mrfclean.fit.grey.filter_score_matching_loss` on :data:`PREC`."""
    return filter_score_matching_loss(theta, images, list(filters), groups, PREC, ridge=ridge)


def training_set(seed=0, noise=0.01):
    """The prior's training images (``learn_grey_prior.TRAINING``): 320^2 crops, halved, with
    Gaussian noise ``noise`` (``learn_grey_prior.py`` also dequantises; not done here)."""
    gen = np.random.default_rng(seed)
    out = []
    for x in training_images(crop=320, seed=seed):
        x = x[:x.shape[0] // 2 * 2, :x.shape[1] // 2 * 2]
        x = x.reshape(x.shape[0] // 2, 2, x.shape[1] // 2, 2).mean(axis=(1, 3))
        out.append(x + noise * gen.standard_normal(x.shape))
    return out


def learn(filters, groups, images, iterations=300):
    """Mixture log-weights per filter (``(J, K)``, each group's largest at 0) by score matching."""
    G = max(groups) + 1
    res = minimize(field_loss, np.zeros(G * PREC.size), args=(images, filters, groups), jac=True,
                   method="L-BFGS-B", options={"maxiter": iterations})
    beta = res.x.reshape(G, PREC.size)
    return (beta - beta.max(axis=1, keepdims=True))[groups], float(res.fun)


def _product(v, w, filters, inv_var):
    out = v * inv_var
    for j, f in enumerate(filters):
        out += respond_t(w[j] * respond(v, f), f, v.shape)
    return out


def _pcg(b, x, w, filters, inv_var, dinv, tol):
    r = b - _product(x, w, filters, inv_var)
    z = dinv * r
    p = z.copy()
    rz, bb = float((r * z).sum()), float((b * b).sum())
    while float((r * r).sum()) > tol * tol * bb:
        q = _product(p, w, filters, inv_var)
        a = rz / float((p * q).sum())
        x = x + a * p
        r = r - a * q
        z = dinv * r
        rz, rz_old = float((r * z).sum()), rz
        p = z + (rz / rz_old) * p
    return x


def posterior(y, sigma, filters, beta, strength, *, chains=2, burn_in=3, samples=8, seed=0):
    """Posterior mean and variance of a filter field under Gaussian noise, by Gibbs sampling.

    Parameters
    ----------
    y : ndarray, shape (H, W)
        Noisy image (float64).
    sigma : float
        Noise standard deviation.
    filters, beta : ndarray
        Filters ``(J, 3, 3)`` and each filter's mixture log-weights ``(J, 8)``.
    strength : float
        Multiplier of the precisions.
    chains, burn_in, samples : int
    seed : int

    Returns
    -------
    mean : ndarray
        Average of the conditional means given each kept sweep's scales.
    variance : ndarray
        Sample variance of the kept draws (``n / (n - 1)``).
    """
    gen = np.random.default_rng(seed)
    inv_var = 1.0 / sigma**2
    J = len(filters)
    m_sum = np.zeros_like(y)
    x_sum = np.zeros_like(y)
    x2_sum = np.zeros_like(y)
    n = 0
    b = y * inv_var
    for c in range(chains):
        x = ndimage.gaussian_filter(y, (1.0, 1.4)[c % 2])
        mean = x.copy()
        for t in range(burn_in + samples):
            w = np.empty((J, y.shape[0] - 2, y.shape[1] - 2))
            for j in range(J):  # scales given the image
                r = respond(x, filters[j]).ravel()
                lp = beta[j][:, None] - 0.5 * strength * PREC[:, None] * (r * r)[None, :]
                cdf = np.cumsum(np.exp(lp - lp.max(axis=0)), axis=0)
                k = (cdf < gen.random(r.size)[None, :] * cdf[-1]).sum(axis=0)
                w[j] = (strength * PREC[np.minimum(k, PREC.size - 1)]).reshape(w[j].shape)
            dinv = 1.0 / (inv_var + sum(respond_t(w[j], filters[j] ** 2, y.shape) for j in range(J)))
            pert = sum(respond_t(np.sqrt(w[j]) * gen.standard_normal(w[j].shape), filters[j], y.shape)
                       for j in range(J))
            # the image given the scales, solved as tightly as the mean: SURE reads its variance
            x = _pcg(b + pert + math.sqrt(inv_var) * gen.standard_normal(y.shape), x, w, filters,
                     inv_var, dinv, 3e-3)
            if t >= burn_in:
                mean = _pcg(b, mean, w, filters, inv_var, dinv, 3e-3)
                m_sum += mean
                x_sum += x
                x2_sum += x * x
                n += 1
    var = (x2_sum / n - (x_sum / n) ** 2) * n / (n - 1)
    return m_sum / n, np.maximum(var, 0.0)


def cases(which, every):
    """``[(label, clean, noisy float64, sigma)]``: the benchmark's 256^2 Gaussian cases with its own
    noise draw (``bench_grey.main``: a 64^2 warm-up draw first, float32 images), or the Gaussian
    training cases of seed 6 at 384^2; every ``every``-th."""
    if which == "bench":
        from bench_grey import IMAGES, SIGMAS, crop
        gen = np.random.default_rng(20260)
        gen.standard_normal((64, 64))  # bench_grey's warm-up image
        out = []
        for name in IMAGES:
            x = crop(name, 256)
            for s in SIGMAS:
                y = (x + s * gen.standard_normal(x.shape)).astype(np.float32)
                out.append((f"{name} s={s:g}", x, y.astype(np.float64), s))
        return out[::every]
    sig = (0.05, 0.1, 0.2)
    out = [(f"{TRAINING[i // 4]} s={sig[i % 4]:g}", x, y.astype(np.float64), sig[i % 4])
           for i, (x, y) in enumerate(tuning_cases(crop=384, seed=6)) if i % 4 != 3]
    return out[::every]


def strength_scan(x, y, s, filters, beta, grid):
    """``(oracle, sure)`` rows ``(strength, PSNR, SURE, at_grid_end)`` over ``grid``; the scan stops
    once PSNR is 0.5 dB below its best and SURE has risen twice in a row past its least value."""
    rows = []
    for lam in grid:
        m, v = posterior(y, s, filters, beta, lam)
        sure = float(np.mean((y[INTERIOR] - m[INTERIOR]) ** 2) - s * s + 2 * np.mean(v[INTERIOR]))
        rows.append((lam, psnr(x[INTERIOR], m[INTERIOR], data_range=1.0), sure))
        if len(rows) >= 3 and rows[-1][1] < max(r[1] for r in rows) - 0.5 \
                and rows[-1][2] > rows[-2][2] > rows[-3][2]:
            break  # past both optima: SURE rising twice in a row is past its least value

    def mark(r):  # at the grid's lower end, or its upper end when the scan reached it
        return (*r, bool(r[0] == grid[0] or (len(rows) == len(grid) and r[0] == grid[-1])))

    return mark(max(rows, key=lambda r: r[1])), mark(min(rows, key=lambda r: r[2]))


def check():
    """Test :func:`field_loss` for every filter set: its value against a brute-force evaluation
    (finite differences of the log-density at every pixel of a 10 x 10 image) and its gradient
    against finite differences.  Returns 1 if either is off."""
    x = training_set()[0][:10, :10]
    bad = 0
    for name, (F, groups) in (("pair", pair_filters()), ("haar", haar_filters()),
                              ("field", dct_filters())):
        G = max(groups) + 1
        theta = np.random.default_rng(1).normal(0, 1, G * PREC.size)
        beta = theta.reshape(G, PREC.size)[groups]

        def logp(z):
            tot = 0.0
            for j, f in enumerate(F):
                r = respond(z, f).ravel()
                lp = beta[j][:, None] - 0.5 * PREC[:, None] * (r * r)[None, :]
                m = lp.max(axis=0)
                tot += float((m + np.log(np.exp(lp - m).sum(axis=0))).sum())
            return tot

        h, total, mid = 3e-5, 0.0, logp(x)
        for i in range(x.size):
            e = np.zeros(x.size)
            e[i] = h
            e = e.reshape(x.shape)
            up, dn = logp(x + e), logp(x - e)
            total += (up - 2 * mid + dn) / h**2 + 0.5 * ((up - dn) / (2 * h)) ** 2
        brute = total / x.size
        loss, grad = field_loss(theta, [x], F, groups, ridge=0.0)
        fd = np.array([(field_loss(theta + d, [x], F, groups, ridge=0.0)[0]
                        - field_loss(theta - d, [x], F, groups, ridge=0.0)[0]) / 2e-6
                       for d in np.eye(theta.size) * 1e-6])
        rel = abs(loss - brute) / abs(brute)
        gerr = float(np.abs(grad - fd).max())
        # The brute-force second difference has error O(h^2): moving h from 1e-4 to 3e-5 to 1e-5
        # moved it by about 1e-5, 1e-6 and 3e-7 relative before roundoff, so 1e-5 relative is a
        # few times the method's error and far below a wrong term (without ||f||^2 the pair loss
        # changes sign).  The gradient's central difference (step 1e-6) has roundoff about
        # eps |J| / 1e-6 ~ 3e-7 here, so 1e-5 absolute, against gradients of order 1e2-1e3.
        ok = rel < 1e-5 and gerr < 1e-5
        bad += not ok
        print(f"{name:5s} loss {loss:.6f}, brute force {brute:.6f} (relative {rel:.1e}); gradient "
              f"max |error| {gerr:.1e} of max |gradient| {np.abs(grad).max():.1e}: "
              f"{'ok' if ok else 'FAILED'}")
    return 1 if bad else 0


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--set", choices=["bench", "train"], default="bench")
    p.add_argument("--every", type=int, default=1, help="take every n-th case")
    p.add_argument("--size", type=int, default=128, help="side of the centre crop scored")
    p.add_argument("--check", action="store_true", help="only check the loss and its gradient")
    args = p.parse_args(argv)
    if args.check:
        return check()
    import warnings

    from skimage.restoration import denoise_tv_chambolle

    from mrfclean.diagnostics import ChainsDisagree
    from mrfclean.grey import clean_grey

    imgs = training_set()
    models = {}
    for name, (F, groups) in (("pair", pair_filters()), ("haar", haar_filters()),
                              ("field", dct_filters())):
        beta, loss = learn(F, groups, imgs)
        models[name] = (F, beta)
        print(f"# {name}: score-matching loss {loss:.2f}", flush=True)
    grid = np.geomspace(1 / 64, 8, 19)
    res = []
    for label, x, y, s in cases(args.set, args.every):
        H, W = x.shape
        o, q = (H - args.size) // 2, (W - args.size) // 2
        x, y = x[o:o + args.size, q:q + args.size], y[o:o + args.size, q:q + args.size]

        def score(m):
            return psnr(x[INTERIOR], m[INTERIOR], data_range=1.0)

        tv = max(score(denoise_tv_chambolle(y, weight=w)) for w in np.geomspace(0.005, 0.6, 40))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ChainsDisagree)
            shipped = score(clean_grey(y.astype(np.float32), rng=1).mean)
        row = [tv, shipped]
        line = f"{label:18s} TV {tv:.3f} cleaner {shipped:.3f}"
        for name, (F, beta) in models.items():
            best, least = strength_scan(x, y, s, F, beta, grid)
            row += [best[1], least[1]]
            line += (f"  {name} oracle {best[1]:.3f} (x{best[0]:.3g}{'*' * best[3]})"
                     f" SURE {least[1]:.3f} (x{least[0]:.3g}{'*' * least[3]})")
        res.append(row)
        print(line, flush=True)
    a = np.array(res)
    n = len(a)
    print(f"cleaner as shipped   mean {a[:, 1].mean():.3f} dB, minus TV oracle "
          f"{np.mean(a[:, 1] - a[:, 0]):+.3f}")
    for m, name in enumerate(models):
        for k, how in ((0, "oracle"), (1, "SURE")):
            col = a[:, 2 + 2 * m + k]
            line = f"{name:5s} at {how:6s}  mean {col.mean():.3f} dB, minus TV oracle {np.mean(col - a[:, 0]):+.3f}"
            if m:
                d = col - a[:, 2 + k]
                se = d.std(ddof=1) / math.sqrt(n) if n > 1 else float("nan")
                line += f"; minus pair {d.mean():+.3f} (s.e. {se:.3f}, {(d > 0).sum()} of {n} gain)"
            print(line)
    return 0


if __name__ == "__main__":
    sys.exit(main())
