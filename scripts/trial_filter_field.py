"""Trial: does a field of 3 x 3 filters beat the pairwise prior? (a measurement, not the cleaner)

The benchmark's must-target (mean PSNR at least oracle TV's) is still missed by
the pairwise grid prior, and the issue's route is to add couplings.  This
script measures the larger-clique route of Schmidt, Gao & Roth (2010) in its
simplest form, with everything else held equal:

* **Priors.**  Two Gaussian-scale-mixture fields on the same precision ladder
  as the shipped prior (``sqrt(10) 4^c``, eight scales; unnormalised
  components ``exp(beta_c - lambda prec_c r^2 / 2)`` as in
  :mod:`mrfclean.models.grey`):

  - ``pair``: the four neighbour differences of the 8-neighbourhood (axial and
    diagonal groups), the shipped prior's cliques;
  - ``field``: the eight non-constant 3 x 3 DCT-II basis filters (unit norm),
    one mixture per filter shape, ``(k, l)`` and ``(l, k)`` sharing one.

  Both mixtures are fitted by score matching (Hyvärinen 2005) on the prior's
  training images (``scripts/learn_grey_prior.py``: never the benchmark's), the
  loss generalised from :func:`mrfclean.fit.grey.score_matching_loss` to linear
  filter responses ``r = f * x``: the Laplacian term of a filter carries
  ``||f||^2`` where a difference carries 2.  ``--check`` compares the loss with
  a brute-force evaluation (finite differences of the log-density at every
  pixel) and its gradient with finite differences.

* **Sampler.**  The same for both: the auxiliary-variable Gibbs sampler of
  Schmidt, Gao & Roth (2010) (scales given the image by categorical draws, the
  image given the scales by perturbation-optimisation, Papandreou & Yuille
  2010, with Jacobi-preconditioned conjugate gradients), the mean
  Rao-Blackwellised over the conditional means, 2 chains of 3 + 8 sweeps from
  Gaussian-smoothed starts.  Gaussian noise of known sigma; the responses are
  those of filters wholly inside the image, so the score is taken on the
  interior (3 pixels in).

* **Strength.**  Each prior's strength ``lambda`` on a grid of factors of
  sqrt(2): the best by PSNR against the clean image ("oracle", an upper
  bound) and the least SURE (Stein 1981; divergence = summed posterior
  variance over sigma^2, the variance from the chains' draws).

* **Cases.**  128^2 centres of the benchmark's 256^2 crops (cell, camera,
  moon, coins at sigma 0.05, 0.1, 0.2) and of the training cases
  (``learn_grey_prior.tuning_cases(crop=384, seed=6)``, Gaussian ones), with
  oracle TV-Chambolle on the same interior for reference.

It prints one line per case and the means.  The stop-23 figures are in
DEVELOPERS.md ("A field of 3 x 3 filters"); the cost of a product by ``Q``
with eight 3 x 3 filters was measured there separately.

References
----------
U. Schmidt, Q. Gao and S. Roth, "A generative perspective on MRFs in low-level
vision", CVPR 2010.  A. Hyvärinen, "Estimation of non-normalized statistical
models by score matching", JMLR 6 (2005) 695-709.  G. Papandreou and A. Yuille,
"Gaussian sampling by local perturbations", NIPS 2010.  C. Stein, "Estimation
of the mean of a multivariate normal distribution", Ann. Statist. 9 (1981).

Example
-------
    python scripts/trial_filter_field.py --set bench > trial_bench.txt   # about 10 minutes
    python scripts/trial_filter_field.py --set train --every 3
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
from learn_grey_prior import training_images, tuning_cases  # noqa: E402

from mrfclean.fit.grey import _clique_terms  # noqa: E402
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


def respond(x, f):
    """Responses of filter ``f`` at every position where it lies wholly inside ``x``."""
    H, W = x.shape
    out = np.zeros((H - 2, W - 2))
    for a in range(3):
        for b in range(3):
            if f[a, b]:
                out += f[a, b] * x[a:a + H - 2, b:b + W - 2]
    return out


def respond_t(r, f, shape):
    """The transpose of :func:`respond`."""
    H, W = shape
    out = np.zeros(shape)
    for a in range(3):
        for b in range(3):
            if f[a, b]:
                out[a:a + H - 2, b:b + W - 2] += f[a, b] * r
    return out


def field_loss(theta, images, filters, groups, *, ridge=1e-4):
    """Score-matching loss and gradient of a GSM filter field (mixture log-weights ``theta``)."""
    K = PREC.size
    beta = theta.reshape(max(groups) + 1, K)
    total, grad, npix = 0.0, np.zeros_like(beta), 0
    for x in images:
        g = np.zeros_like(x)
        cache = []
        for j, f in enumerate(filters):
            d = respond(x, f).ravel()
            psi, dpsi, r, m1, m2 = _clique_terms(d, beta[groups[j]], PREC)
            nf2 = float((f * f).sum())
            total += nf2 * dpsi.sum()
            g += respond_t(psi.reshape(x.shape[0] - 2, x.shape[1] - 2), f, x.shape)
            cache.append((j, d, r, m1, m2, nf2))
        total += 0.5 * float((g * g).sum())
        for j, d, r, m1, m2, nf2 in cache:
            B = respond(g, filters[j]).ravel()
            dp = PREC[:, None] - m1[None, :]
            dd = d * d
            term = r * (nf2 * (-dp + dd[None, :] * (PREC[:, None] ** 2 - m2[None, :]
                                                     - 2.0 * m1[None, :] * dp))
                        - (d * B)[None, :] * dp)
            grad[groups[j]] += term.sum(axis=1)
        npix += x.size
    return total / npix + ridge * float((beta * beta).sum()), grad.ravel() / npix + 2 * ridge * theta


def training_set(seed=0, noise=0.01):
    """The prior's training images as ``learn_grey_prior.py`` prepares them (320^2, halved, noised)."""
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
    """``(mean, variance)`` of the field's posterior by Gibbs sampling (see the module docstring)."""
    gen = np.random.default_rng(seed)
    inv_var = 1.0 / sigma**2
    J = len(filters)
    m_sum = np.zeros_like(y)
    x_sum = np.zeros_like(y)
    x2_sum = np.zeros_like(y)
    n = 0
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
            b = y * inv_var
            pert = sum(respond_t(np.sqrt(w[j]) * gen.standard_normal(w[j].shape), filters[j], y.shape)
                       for j in range(J))
            x = _pcg(b + pert + math.sqrt(inv_var) * gen.standard_normal(y.shape), x, w, filters,
                     inv_var, dinv, 1e-2)  # the image given the scales
            if t >= burn_in:
                mean = _pcg(b, mean, w, filters, inv_var, dinv, 3e-3)
                m_sum += mean
                x_sum += x
                x2_sum += x * x
                n += 1
    return m_sum / n, np.maximum(x2_sum / n - (x_sum / n) ** 2, 0.0)


def cases(which, every):
    if which == "bench":
        sys.path.insert(0, __file__.rsplit("/", 1)[0])
        from bench_grey import IMAGES, SIGMAS, crop
        gen = np.random.default_rng(20260)
        out = []
        for name in IMAGES:
            for s in SIGMAS:
                x = crop(name, 256)
                out.append((f"{name} 256 s={s:g}", x, x + s * gen.standard_normal(x.shape), s))
        return out[::every]
    sig = (0.05, 0.1, 0.2)
    out = [(f"train6-{i}", x, y.astype(np.float64), sig[i % 4])
           for i, (x, y) in enumerate(tuning_cases(crop=384, seed=6)) if i % 4 != 3]
    return out[::every]


def strength_scan(x, y, s, filters, beta, grid):
    rows = []
    for lam in grid:
        m, v = posterior(y, s, filters, beta, lam)
        sure = float(np.mean((y[INTERIOR] - m[INTERIOR]) ** 2) - s * s + 2 * np.mean(v[INTERIOR]))
        rows.append((lam, psnr(x[INTERIOR], m[INTERIOR], data_range=1.0), sure))
        if len(rows) > 3 and rows[-1][1] < max(r[1] for r in rows) - 0.5 \
                and rows[-1][2] > min(r[2] for r in rows):
            break  # past both optima
    return max(rows, key=lambda r: r[1]), min(rows, key=lambda r: r[2])


def check():
    """The filter loss against a brute-force score-matching objective and its gradient against
    finite differences, on a small noisy image with the DCT filters."""
    x = training_set()[0][:10, :10]
    F, groups = dct_filters()
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

    h, total = 3e-5, 0.0
    for i in range(x.size):
        e = np.zeros(x.size)
        e[i] = h
        e = e.reshape(x.shape)
        up, mid, dn = logp(x + e), logp(x), logp(x - e)
        total += (up - 2 * mid + dn) / h**2 + 0.5 * ((up - dn) / (2 * h)) ** 2
    brute = total / x.size
    loss, grad = field_loss(theta, [x], F, groups, ridge=0.0)
    fd = np.array([(field_loss(theta + d, [x], F, groups, ridge=0.0)[0]
                    - field_loss(theta - d, [x], F, groups, ridge=0.0)[0]) / 2e-6
                   for d in np.eye(theta.size) * 1e-6])
    print(f"loss {loss:.6f}, brute force {brute:.6f}; gradient against finite differences: "
          f"max |difference| {np.abs(grad - fd).max():.2g} (max |gradient| {np.abs(grad).max():.2g})")
    return 0


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--set", choices=["bench", "train"], default="bench")
    p.add_argument("--every", type=int, default=1, help="take every n-th case")
    p.add_argument("--size", type=int, default=128, help="side of the centre crop scored")
    p.add_argument("--check", action="store_true", help="only check the loss and its gradient")
    args = p.parse_args(argv)
    if args.check:
        return check()
    from skimage.restoration import denoise_tv_chambolle

    imgs = training_set()
    models = {}
    for name, (F, groups) in (("pair", pair_filters()), ("field", dct_filters())):
        beta, loss = learn(F, groups, imgs)
        models[name] = (F, beta)
        print(f"# {name}: score-matching loss {loss:.2f}", flush=True)
    grid = np.geomspace(1 / 64, 8, 19)
    res = []
    for label, x, y, s in cases(args.set, args.every):
        H, W = x.shape
        o, q = (H - args.size) // 2, (W - args.size) // 2
        x, y = x[o:o + args.size, q:q + args.size], y[o:o + args.size, q:q + args.size]
        tv = max(psnr(x[INTERIOR], denoise_tv_chambolle(y, weight=w)[INTERIOR], data_range=1.0)
                 for w in np.geomspace(0.005, 0.6, 40))
        row = [tv]
        line = f"{label:22s} TV {tv:.3f}"
        for name, (F, beta) in models.items():
            best, least = strength_scan(x, y, s, F, beta, grid)
            row += [best[1], least[1]]
            line += f"  {name} oracle {best[1]:.3f} (x{best[0]:.3g}) SURE {least[1]:.3f} (x{least[0]:.3g})"
        res.append(row)
        print(line, flush=True)
    a = np.array(res)
    n = len(a)
    for k, lab in ((1, "pair oracle"), (2, "pair SURE"), (3, "field oracle"), (4, "field SURE")):
        print(f"{lab:13s} mean {a[:, k].mean():.3f} dB, minus TV oracle {np.mean(a[:, k] - a[:, 0]):+.3f}")
    for k, lab in ((3, "oracle"), (4, "SURE")):
        d = a[:, k] - a[:, k - 2]
        print(f"field - pair at {lab}: {d.mean():+.3f} dB (s.e. {d.std(ddof=1) / math.sqrt(n):.3f}, "
              f"{(d > 0).sum()} of {n} gain)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
