r"""Estimating the greyscale model's parameters without the clean image.

* Noise level: median absolute deviation of the finest diagonal wavelet
  coefficients (Donoho & Johnstone 1994), :func:`estimate_sigma`.
* Poisson-Gaussian variance ``a x + b``: local mean/variance pairs from the
  smooth parts of the image, collected by intensity level and fitted by a
  straight line (a simplified form of Foi et al. 2008), :func:`estimate_poisson_gaussian`.
* Prior shape: score matching (Hyvärinen 2005), which needs no normalising
  constant, so the mixture weights of the Gaussian scale mixture are learned
  without the collapse of naive EM, :func:`learn_prior`.
* Prior strength per image: Stein's unbiased risk estimate of the posterior mean
  (Stein 1981), whose divergence for a Gaussian likelihood is the summed
  posterior variance over the noise variance, :func:`sure` and
  :func:`choose_strength`.

References
----------
.. [1] D. L. Donoho and I. M. Johnstone, "Ideal spatial adaptation by wavelet
   shrinkage", Biometrika 81 (1994) 425-455.
.. [2] A. Foi, M. Trimeche, V. Katkovnik and K. Egiazarian, "Practical
   Poissonian-Gaussian noise modeling and fitting for single-image raw-data",
   IEEE TIP 17 (2008) 1737-1754.
.. [3] A. Hyvärinen, "Estimation of non-normalized statistical models by score
   matching", JMLR 6 (2005) 695-709.
.. [4] C. M. Stein, "Estimation of the mean of a multivariate normal
   distribution", Annals of Statistics 9 (1981) 1135-1151.
.. [5] I. Daubechies, *Ten Lectures on Wavelets*, SIAM (1992), table 6.1 (the
   4-tap filter, "db2").
"""

from __future__ import annotations

import math
import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, optimize

from ..models.grey import BLOCK_FILTER_NAMES, NEIGHBOURHOODS, BlockGroup, GSMPrior, PriorGroup

#: 0.6744897501960817 = Phi^-1(3/4): MAD / this is sigma for Gaussian data.
MAD_TO_SIGMA = 0.6744897501960817

_SQ3 = math.sqrt(3.0)
#: Daubechies 4-tap low-pass filter [5] and its quadrature-mirror high-pass.
DB2_LOW = np.array([1 + _SQ3, 3 + _SQ3, 3 - _SQ3, 1 - _SQ3]) / (4 * math.sqrt(2.0))
DB2_HIGH = DB2_LOW[::-1] * np.array([1.0, -1.0, 1.0, -1.0])


def _planes(image):
    a = np.asarray(image, dtype=np.float64)
    if a.ndim == 2:
        return a[None]
    if a.ndim == 3:
        return a
    raise ValueError(f"expected a 2-D image or a 3-D stack, got shape {a.shape}")


def diagonal_detail(plane):
    """Finest-level diagonal (high-high) db2 wavelet coefficients of a 2-D array.

    Symmetric extension at the borders, filtering along both axes and keeping
    every second sample, as an orthonormal discrete wavelet transform does; for
    white noise of variance ``sigma^2`` the coefficients have variance ``sigma^2``.
    """
    a = np.asarray(plane, dtype=np.float64)
    if min(a.shape) < 4:
        raise ValueError(f"image too small for a wavelet noise estimate: {a.shape}")
    pad = len(DB2_HIGH) - 1
    a = np.pad(a, pad, mode="symmetric")
    k = DB2_HIGH[::-1]
    rows = ndimage.convolve1d(a, k, axis=1, mode="nearest")[:, pad:-pad][:, 1::2]
    both = ndimage.convolve1d(rows, k, axis=0, mode="nearest")[pad:-pad][1::2]
    return both


#: Share of wavelet coefficients the cleaner's noise estimate keeps (the flattest
#: ones).  Chosen on the prior's training images (scripts/learn_grey_prior.py,
#: never the benchmark's): at sigma 0.02-0.2 it brought the mean |log2(estimate
#: / sigma)| from 0.138 to 0.108 there, with no bias on pure noise (measured).
FLATTEST_SHARE = 0.5
#: Width (pixels) of the Gaussian smoothing before the gradient that ranks flatness.
FLATNESS_SMOOTHING = 2.0


def _flattest(p, d, share):
    """Coefficients ``d`` of plane ``p`` where its smoothed copy is flattest (a ``share`` of them).

    Where the plane sits at its minimum or maximum over more than 1% of its
    pixels (a clipped background or saturation), coefficients whose smoothed
    value is within three plain-MAD sigmas of that level are left out first:
    clipping removes part of their noise, and they are the flattest of all.
    """
    sm = ndimage.gaussian_filter(p, FLATNESS_SMOOTHING, mode="reflect")
    g = np.hypot(ndimage.sobel(sm, 0), ndimage.sobel(sm, 1))
    g = g[1::2, 1::2][:d.shape[0], :d.shape[1]]  # coefficient (i, j) sits at (2i+1, 2j+1)
    d = d[:g.shape[0], :g.shape[1]]
    ok = np.ones(d.shape, bool)
    lo, hi = float(p.min()), float(p.max())
    margin = 3.0 * float(np.median(np.abs(d))) / MAD_TO_SIGMA
    level = sm[1::2, 1::2][:d.shape[0], :d.shape[1]]
    if np.mean(p == lo) > 0.01:
        ok &= level > lo + margin
    if np.mean(p == hi) > 0.01:
        ok &= level < hi - margin
    if ok.sum() < 0.05 * ok.size:  # nearly all clipped: nothing better to go on
        ok[...] = True
    g, d = g[ok], d[ok]
    return d[g <= np.quantile(g, share)]


def estimate_sigma(image, *, flattest=1.0) -> float:
    r"""Standard deviation of additive white Gaussian noise, by wavelet MAD.

    .. math:: \hat\sigma = \operatorname{median}(|w_{HH}|) / 0.6745

    over the finest diagonal db2 coefficients of every plane [1]_.  Exact zeros
    (clipped or flat, noise-free regions) are left out.

    Parameters
    ----------
    image : array_like, shape (H, W) or (Z, H, W)
    flattest : float in (0, 1]
        Keep only this share of each plane's coefficients: those where the
        gradient magnitude (Sobel) of the plane smoothed by a Gaussian of
        :data:`FLATNESS_SMOOTHING` pixels is smallest.  Edges and texture leak
        into the diagonal band and make the plain MAD read high at low noise;
        leaving them out is the edge exclusion of [2]_, here applied to the
        wavelet estimator.  Near a level where many pixels sit (clipped
        background, saturation) nothing is kept.  1 (default): every
        coefficient, as ``skimage.restoration.estimate_sigma``.

    Returns
    -------
    float
        In the image's own units; 0 for a noise-free (piecewise constant) image.

    References
    ----------
    .. [1] D. L. Donoho and I. M. Johnstone, Biometrika 81 (1994) 425-455.
    .. [2] S.-C. Tai and S.-M. Yang, "A fast method for image noise estimation
       using Laplacian operator and adaptive edge detection", ISCCSP 2008.

    Examples
    --------
    >>> import numpy as np
    >>> y = np.random.default_rng(0).normal(0.5, 0.1, (256, 256))
    >>> round(estimate_sigma(y), 2), round(estimate_sigma(y, flattest=0.5), 2)
    (0.1, 0.1)
    """
    if not 0 < flattest <= 1:
        raise ValueError(f"flattest must be in (0, 1], got {flattest!r}")
    parts = []
    for p in _planes(image):
        d = diagonal_detail(p)
        if flattest < 1:
            d = _flattest(p, d, flattest)
        parts.append(d.ravel())
    det = np.concatenate(parts)
    det = det[det != 0]
    if det.size == 0:
        return 0.0
    return float(np.median(np.abs(det)) / MAD_TO_SIGMA)


@dataclass(frozen=True)
class NoiseCurve:
    """Estimated ``Var(y | x) = a x + b`` and the level-set points it was fitted to."""

    a: float
    b: float
    levels: np.ndarray
    variances: np.ndarray
    counts: np.ndarray
    a_se: float = float("nan")  # standard error of the fitted slope (from the fit's residuals)


def estimate_poisson_gaussian(image, *, bins: int = 40, smooth_quantile: float = 0.5) -> NoiseCurve:
    r"""Poisson-Gaussian noise parameters ``(a, b)`` of ``Var(y | x) = a x + b`` from one image.

    Following Foi et al. (2008) [1]_: a non-overlapping 2x2 Haar transform gives
    for each block a local mean (low-pass / 2) and a noise sample (the diagonal
    coefficient, whose variance is the noise variance there); blocks on edges
    and texture are dropped (the gradient of a smoothed image above its
    ``smooth_quantile`` quantile); the rest are grouped into ``bins`` level sets
    of equal size by local mean, each giving a robust (MAD) variance; a straight
    line ``a x + b`` is fitted to those points by weighted least squares with
    weights ``n_i / sigma_i^4`` (inverse variance of a variance estimate).  Foi
    et al. fit by maximum likelihood and model clipping; this simplified form
    does neither, so heavily clipped images bias it.

    Returns
    -------
    NoiseCurve
        ``a`` and ``b`` in the image's units (``a`` clipped at 0, ``b`` at 0).

    References
    ----------
    .. [1] A. Foi, M. Trimeche, V. Katkovnik and K. Egiazarian, IEEE TIP 17
       (2008) 1737-1754.
    """
    means, dets, grads = [], [], []
    for p in _planes(image):
        H, W = (p.shape[0] // 2) * 2, (p.shape[1] // 2) * 2
        if H < 8 or W < 8:
            raise ValueError(f"image too small for a noise-curve estimate: {p.shape}")
        q = p[:H, :W]
        a, b, c, d = q[0::2, 0::2], q[0::2, 1::2], q[1::2, 0::2], q[1::2, 1::2]
        means.append(((a + b + c + d) / 4.0).ravel())
        dets.append(((a - b - c + d) / 2.0).ravel())
        s = ndimage.gaussian_filter(q, 2.0)
        g = np.hypot(ndimage.sobel(s, 0), ndimage.sobel(s, 1))
        grads.append(g[0::2, 0::2].ravel())
    m, w, g = np.concatenate(means), np.concatenate(dets), np.concatenate(grads)
    keep = g <= np.quantile(g, smooth_quantile)
    m, w = m[keep], w[keep]
    order = np.argsort(m, kind="stable")
    groups = np.array_split(order, max(2, min(bins, m.size // 32)))
    lv, var, cnt = [], [], []
    for idx in groups:
        if idx.size < 16:
            continue
        sd = np.median(np.abs(w[idx] - np.median(w[idx]))) / MAD_TO_SIGMA
        lv.append(m[idx].mean())
        var.append(sd * sd)
        cnt.append(idx.size)
    lv, var, cnt = np.array(lv), np.array(var), np.array(cnt, dtype=np.float64)
    if lv.size < 2:
        raise ValueError("not enough smooth image area to estimate a noise curve")
    floor = max(float(np.max(var)) * 1e-6, 1e-150)
    wts = cnt / np.maximum(var, floor) ** 2
    A = np.stack([lv, np.ones_like(lv)], axis=1)
    sol, *_ = np.linalg.lstsq(A * np.sqrt(wts)[:, None], var * np.sqrt(wts), rcond=None)
    a, b = float(sol[0]), float(sol[1])
    res = (var - A @ sol) * np.sqrt(wts)
    dof = max(lv.size - 2, 1)
    cov = np.linalg.pinv((A * wts[:, None]).T @ A) * float(res @ res) / dof
    a_se = float(np.sqrt(max(cov[0, 0], 0.0)))
    if a < 0:  # no signal dependence visible: constant variance
        a, b = 0.0, float(np.sum(wts * var) / np.sum(wts))
    if b < 0:  # pure Poisson-like: refit through the origin
        b = 0.0
        a = float(np.sum(wts * lv * var) / np.sum(wts * lv * lv))
    return NoiseCurve(a, b, lv, var, cnt, a_se)


#: Width (pixels) of the Gaussian smoothing in :func:`signal_roughness`.  Of
#: widths 1, 2 and 3 it predicted SURE's strength best on the prior's training
#: images (scripts/fit_strength_guess.py).
ROUGHNESS_SMOOTHING = 1.0
#: :func:`signal_roughness` never reads below this share of the noise's part.
ROUGHNESS_FLOOR = 0.05


def noise_gain(width):
    r"""Share of white noise's variance in the squared gradient of its Gaussian smoothing.

    For white noise ``n`` of variance ``v``, ``E[(d_x G n)^2 + (d_y G n)^2] =
    v sum_k (h_x[k]^2 + h_y[k]^2)``, where ``h`` are the coefficients of the
    linear filter "smooth by a Gaussian of ``width`` pixels, then take the
    forward difference" along each axis; they are read off its response to a
    single impulse.

    Examples
    --------
    >>> round(noise_gain(1.0), 4)
    0.0705
    """
    r = int(4.0 * width + 0.5) + 2
    d = np.zeros((2 * r + 1, 2 * r + 1))
    d[r, r] = 1.0
    g = ndimage.gaussian_filter(d, width, mode="constant")
    return float(np.sum(np.diff(g, axis=0) ** 2) + np.sum(np.diff(g, axis=1) ** 2))


def signal_roughness(observed, variance, *, width=ROUGHNESS_SMOOTHING) -> float:
    r"""Mean squared gradient of the clean image at a light smoothing, estimated from the noisy one.

    .. math:: \hat g = \overline{(\partial_x G y)^2 + (\partial_y G y)^2}
              - \bar v \, \mathrm{noise\_gain}(w)

    ``G`` is an in-plane Gaussian of ``width`` pixels and ``partial`` a
    forward difference.  With additive noise independent of the image, the
    noise adds ``v * noise_gain(w)`` to the expected squared gradient (exactly
    for constant ``v``; its mean for a variance that changes slowly), so the
    difference is an unbiased estimate of the smoothed clean image's squared
    gradient, up to the borders.  It is floored at :data:`ROUGHNESS_FLOOR`
    times the noise's part (a flat image).

    Parameters
    ----------
    observed : ndarray, shape (H, W) or (Z, H, W)
    variance : float or ndarray
        Noise variance per pixel, same units.
    width : float

    Returns
    -------
    float
        In the image's units squared per pixel squared.

    Examples
    --------
    >>> import numpy as np
    >>> ramp = np.tile(np.arange(64.0) * 0.01, (64, 1))
    >>> noisy = ramp + np.random.default_rng(0).normal(0, 0.1, ramp.shape)
    >>> round(signal_roughness(ramp, 0.0) * 1e4, 2), round(signal_roughness(noisy, 0.01) * 1e4, 2)
    (0.98, 1.04)
    """
    y = _planes(observed)
    s = ndimage.gaussian_filter(y, (0.0, width, width), mode="reflect")
    m = float(np.mean(np.diff(s, axis=1) ** 2) + np.mean(np.diff(s, axis=2) ** 2))
    share = float(np.mean(variance)) * noise_gain(width)
    return max(m - share, ROUGHNESS_FLOOR * share)


# ---------------------------------------------------------------------------------------
# score matching for the GSM prior
# ---------------------------------------------------------------------------------------
def _clique_terms(d, beta, prec):
    """Per-clique ``psi = (log phi)'``, ``psi'`` and what their gradients need.

    ``phi(d) = sum_c exp(beta_c - prec_c d^2 / 2)``; with responsibilities
    ``r_c``, ``m1 = E_r[prec]`` and ``m2 = E_r[prec^2]``:
    ``psi = -d m1`` and ``psi' = -m1 + d^2 (m2 - m1^2)``.
    """
    lp = beta[:, None] - 0.5 * prec[:, None] * (d * d)[None, :]
    lp -= lp.max(axis=0)
    r = np.exp(lp)
    r /= r.sum(axis=0)
    m1 = prec @ r
    m2 = (prec * prec) @ r
    psi = -d * m1
    dpsi = -m1 + d * d * (m2 - m1 * m1)
    return psi, dpsi, r, m1, m2


def _clique_gradient(d, B, r, m1, m2, prec, norm2):
    """Gradient in the mixture log-weights ``beta`` of one clique set's share of the
    score-matching loss, summed over its cliques (shape ``(K,)``).

    ``d`` are the cliques' responses, ``B`` the loss's score ``g`` mapped through the
    same response (``g[h] - g[t]`` for a difference), ``r, m1, m2`` from
    :func:`_clique_terms`, and ``norm2`` the response's squared norm (2 for a
    difference), which weights the Laplacian term:
    ``d psi / d beta_l = -d r_l (prec_l - m1)`` and
    ``d psi' / d beta_l = -r_l (prec_l - m1) + d^2 r_l (prec_l^2 - m2 - 2 m1 (prec_l - m1))``.
    """
    dp = prec[:, None] - m1[None, :]  # prec_l - m1
    dd = d * d
    term = r * (norm2 * (-dp + dd[None, :] * (prec[:, None] ** 2 - m2[None, :] - 2.0 * m1[None, :] * dp))
                - (d * B)[None, :] * dp)
    return term.sum(axis=1)


def _pairs(shape, off):
    """Slices ``(tail, head)`` of a 2-D array for the cliques of in-plane offset ``off``."""
    di, dj = off
    H, W = shape
    ti = slice(0, H - di)
    hi = slice(di, H)
    if dj >= 0:
        tj, hj = slice(0, W - dj), slice(dj, W)
    else:
        tj, hj = slice(-dj, W), slice(0, W + dj)
    return (ti, tj), (hi, hj)


def score_matching_loss(theta, images, groups_offsets, prec, *, ridge=1e-4):
    r"""Score-matching objective of a GSM-MRF and its gradient (Hyvärinen 2005).

    .. math:: J(\theta) = \frac1N \sum_i \Big[\partial_i^2 \log p(x)
              + \tfrac12 (\partial_i \log p(x))^2\Big]

    For a pairwise prior ``log p = sum_c log phi(d_c)``, ``d_c = x_j - x_i``, the
    per-pixel score is ``g_i = sum_c (+-) psi(d_c)`` and
    ``sum_i partial_i^2 log p = 2 sum_c psi'(d_c)``.

    Parameters
    ----------
    theta : ndarray, shape (groups * K,)
        Log-amplitudes ``beta`` of every group's mixture (precisions fixed).
    images : list of 2-D arrays
    groups_offsets : list of list of (di, dj)
    prec : ndarray, shape (K,)
    ridge : float
        Small penalty on ``beta`` fixing its free additive constant.
    """
    K = prec.size
    beta = theta.reshape(len(groups_offsets), K)
    total = 0.0
    grad = np.zeros_like(beta)
    npix = 0
    for x in images:
        g = np.zeros_like(x)
        cache = []
        for gi, offs in enumerate(groups_offsets):
            for off in offs:
                t, h = _pairs(x.shape, off)
                d = (x[h] - x[t]).ravel()
                psi, dpsi, r, m1, m2 = _clique_terms(d, beta[gi], prec)
                total += 2.0 * dpsi.sum()
                ps = psi.reshape(x[t].shape)
                g[h] += ps
                g[t] -= ps
                cache.append((gi, t, h, d, r, m1, m2))
        total += 0.5 * np.sum(g * g)
        for gi, t, h, d, r, m1, m2 in cache:
            grad[gi] += _clique_gradient(d, (g[h] - g[t]).ravel(), r, m1, m2, prec, 2.0)
        npix += x.size
    loss = total / npix + ridge * np.sum(beta * beta)
    return loss, grad.ravel() / npix + 2.0 * ridge * theta


def filter_responses(x, f):
    """Responses ``sum_ab f[a, b] x[i + a, j + b]`` of filter ``f`` wherever it lies wholly
    inside the 2-D image ``x`` (shape ``(H - h + 1, W - w + 1)`` for an ``h x w`` filter)."""
    H, W = x.shape
    h, w = f.shape
    out = np.zeros((H - h + 1, W - w + 1))
    for a in range(h):
        for b in range(w):
            if f[a, b]:
                out += f[a, b] * x[a:a + H - h + 1, b:b + W - w + 1]
    return out


def filter_responses_t(r, f, shape):
    """The transpose of :func:`filter_responses`: ``r`` spread back onto an image of ``shape``."""
    H, W = shape
    h, w = f.shape
    out = np.zeros(shape)
    for a in range(h):
        for b in range(w):
            if f[a, b]:
                out[a:a + H - h + 1, b:b + W - w + 1] += f[a, b] * r
    return out


def filter_score_matching_loss(theta, images, filters, groups, prec, *, ridge=1e-4):
    r"""Score-matching objective of a GSM field of linear filters and its gradient.

    .. math:: J = \frac1N \sum_i \Big[\partial_i^2 \log p(x)
              + \tfrac12 (\partial_i \log p(x))^2\Big],
              \qquad \log p = \sum_j \sum_q \log \phi_{g(j)}((f_j * x)_q),

    (Hyvärinen 2005): the score is ``g = sum_j F_j^T psi(F_j x)`` and the Laplacian
    ``sum_j ||f_j||^2 sum_q psi'``, where a neighbour difference (the pairwise
    :func:`score_matching_loss`) has ``||f||^2 = 2``.  ``psi`` and ``psi'`` come from
    :func:`_clique_terms` and the gradient from :func:`_clique_gradient`, as in the
    pairwise loss.

    Parameters
    ----------
    theta : ndarray, shape (G * K,)
        Log-weights of every group's mixture on ``prec``.
    images : list of 2-D arrays
    filters : sequence of 2-D arrays
        Filters of any (small) shape; responses are taken where a filter lies
        wholly inside an image (:func:`filter_responses`).
    groups : list of int
        The mixture (group) of each filter.
    prec : ndarray, shape (K,)
    ridge : float
        Small penalty fixing the log-weights' free additive constant.

    Returns
    -------
    loss : float
    grad : ndarray, shape like ``theta``
    """
    K = prec.size
    beta = theta.reshape(max(groups) + 1, K)
    total, grad, npix = 0.0, np.zeros_like(beta), 0
    for x in images:
        g = np.zeros_like(x)
        cache = []
        for j, f in enumerate(filters):
            resp = filter_responses(x, f)
            d = resp.ravel()
            psi, dpsi, r, m1, m2 = _clique_terms(d, beta[groups[j]], prec)
            nf2 = float((f * f).sum())
            total += nf2 * dpsi.sum()
            g += filter_responses_t(psi.reshape(resp.shape), f, x.shape)
            cache.append((j, d, r, m1, m2, nf2))
        total += 0.5 * float((g * g).sum())
        for j, d, r, m1, m2, nf2 in cache:
            grad[groups[j]] += _clique_gradient(d, filter_responses(g, filters[j]).ravel(),
                                                r, m1, m2, prec, nf2)
        npix += x.size
    return total / npix + ridge * float((beta * beta).sum()), grad.ravel() / npix + 2 * ridge * theta


#: The 2 x 2 block filters of :data:`mrfclean.models.grey.BLOCK_FILTER_NAMES`, unit norm.
BLOCK_FILTERS = np.array([[[1, -1], [1, -1]], [[1, 1], [-1, -1]], [[1, -1], [-1, 1]]]) / 2.0
#: Block groups sharing a potential: the row and column differences (one shape turned
#: by 90 degrees), and the checker.
BLOCK_GROUPS = (("edges", ("columns", "rows")), ("checker", ("checker",)))


def learn_prior(images, *, neighbourhood="8", precisions=None, iterations=300,
                dequantise=1.0 / 255.0, smoothing=0.0, seed=0, progress=None,
                blocks=False) -> GSMPrior:
    """Learn the mixture weights of a GSM-MRF prior by score matching on clean images.

    Offsets are grouped by symmetry (horizontal and vertical share a potential,
    the two diagonals share one, and so on), and each group's log-amplitudes on
    a fixed geometric grid of precisions are fitted jointly by L-BFGS on the
    exact score-matching objective :func:`score_matching_loss` [1]_.  Integer
    images are first spread by uniform dequantisation noise of width
    ``dequantise`` (score matching needs a density, not a histogram of exact
    repeats).  ``smoothing > 0`` adds Gaussian noise of that standard
    deviation as well: score matching then fits the density of slightly noisy
    images, which is the score-matching objective of Gaussian-smoothed data
    (Vincent 2011) and keeps the prior from spending its sharpest scales on
    quantisation and compression artefacts.

    Parameters
    ----------
    images : list of 2-D arrays in [0, 1]
    neighbourhood : {"4", "8", "12", "20"}
    precisions : array_like, optional
        Precision grid ``pi_c``; default ``10 ** linspace(0.5, 5.3, 9)``.
    blocks : bool
        Learn a prior on the 2 x 2 block filters instead (:data:`BLOCK_GROUPS`, with
        :func:`filter_score_matching_loss`); ``neighbourhood`` is then unused.

    References
    ----------
    .. [1] A. Hyvärinen, JMLR 6 (2005) 695-709.
    .. [2] P. Vincent, "A connection between score matching and denoising
       autoencoders", Neural Computation 23 (2011) 1661-1674.
    """
    prec = np.asarray(precisions if precisions is not None else 10 ** np.linspace(0.5, 5.3, 9),
                      dtype=np.float64)
    offs = NEIGHBOURHOODS[str(neighbourhood)]
    groups = _symmetry_groups(offs)
    gen = np.random.default_rng(seed)
    data = [np.asarray(x, dtype=np.float64) + dequantise * (gen.random(np.shape(x)) - 0.5)
            + smoothing * gen.standard_normal(np.shape(x)) for x in images]
    if blocks:
        groups = BLOCK_GROUPS
        names = list(BLOCK_FILTER_NAMES)
        which = [next(k for k, (_, fs) in enumerate(groups) if n in fs) for n in names]
        loss, args = filter_score_matching_loss, (data, list(BLOCK_FILTERS), which, prec)
    else:
        loss, args = score_matching_loss, (data, [g[1] for g in groups], prec)
    theta0 = np.zeros(len(groups) * prec.size)
    res = optimize.minimize(loss, theta0, args=args, jac=True, method="L-BFGS-B",
                            options={"maxiter": iterations}, callback=progress)
    beta = res.x.reshape(len(groups), prec.size)
    beta = beta - beta.max(axis=1, keepdims=True)
    made = tuple((BlockGroup if blocks else PriorGroup)(name, tuple(o), tuple(float(v) for v in b),
                                                        tuple(float(p) for p in prec))
                 for (name, o), b in zip(groups, beta))
    meta = {"source": "score matching (Hyvarinen 2005)",
            "neighbourhood": "2x2 blocks" if blocks else str(neighbourhood),
            "loss": float(res.fun), "iterations": int(res.nit), "units": "intensity range [0, 1]",
            "dequantise": float(dequantise), "smoothing": float(smoothing)}
    return GSMPrior((), meta=meta, blocks=made) if blocks else GSMPrior(made, meta=meta)


def coordinate_search(score, x0, steps=(1.0, 0.5, 0.25), *, min_gain=0.0, max_rounds=6,
                      progress=None):
    """Maximise ``score`` by moving one coordinate at a time by plus or minus a step.

    The exploratory moves of Hooke & Jeeves' pattern search [1]_: each round
    tries every coordinate in turn, first up then down by the current step,
    and keeps a move when it raises the score by more than ``min_gain``; when
    a round keeps nothing (or after ``max_rounds``) the next, smaller step
    takes over.  It needs no gradient, so it suits a score that is a
    deterministic but non-smooth function of its arguments, such as a
    denoiser's PSNR with fixed random streams and data-dependent choices
    inside.

    Parameters
    ----------
    score : callable
        ``score(x) -> float`` for a 1-D float array ``x``.
    x0 : array_like
        Starting point.
    steps : sequence of float
        Step lengths, used in turn.
    min_gain : float
        A move is kept only if it gains more than this.
    max_rounds : int
        Rounds per step at most.
    progress : callable, optional
        ``progress(x, value)`` after each evaluation.

    Returns
    -------
    x : ndarray
        The best point found.
    value : float
        Its score.
    evaluations : int
        Calls of ``score``.

    References
    ----------
    .. [1] R. Hooke and T. A. Jeeves, "'Direct search' solution of numerical
       and statistical problems", Journal of the ACM 8 (1961) 212-229.

    Examples
    --------
    >>> x, v, n = coordinate_search(lambda x: -((x[0] - 2) ** 2 + (x[1] + 1) ** 2), [0.0, 0.0])
    >>> x.tolist(), v
    ([2.0, -1.0], -0.0)
    """
    x = np.array(x0, dtype=np.float64)
    best = float(score(x))
    n = 1
    if progress:
        progress(x, best)
    for h in steps:
        for _ in range(max_rounds):
            moved = False
            for i in range(x.size):
                for s in (h, -h):
                    t = x.copy()
                    t[i] += s
                    f = float(score(t))
                    n += 1
                    if progress:
                        progress(t, f)
                    if f > best + min_gain:
                        x, best, moved = t, f, True
                        break
            if not moved:
                break
    return x, best, n


#: Mixture components below this log-amplitude (relative to their group's
#: largest) stay as learned when a prior is tuned: at e^-6 of the largest
#: weight they change no posterior mean measurably (moving such a weight by
#: a factor e changed the training images' mean PSNR by at most 0.003 dB).
LIVE_LOGAMP = -6.0


def live_components(prior: GSMPrior, *, floor=LIVE_LOGAMP):
    """``[(group, component)]`` of the mixture weights a tuning moves.

    Groups are numbered over the pair groups, then the block groups.  Each
    group's largest weight is its reference (a group's weights matter only
    relative to each other), and weights below ``floor`` relative to it are
    left alone.

    Examples
    --------
    >>> live_components(GSMPrior((PriorGroup("axial", ((0, 1),), (0.0, -1.0, -9.0), (1.0, 4.0, 16.0)),)))
    [(0, 1)]
    """
    out = []
    for gi, g in enumerate(prior.groups + prior.blocks):
        ref = int(np.argmax(g.logamp))
        out += [(gi, c) for c, a in enumerate(g.logamp) if c != ref and a - g.logamp[ref] >= floor]
    return out


def with_logamps(prior: GSMPrior, components, values) -> GSMPrior:
    """``prior`` with the log-amplitudes of ``components`` (from :func:`live_components`) set."""
    every = prior.groups + prior.blocks
    la = [list(g.logamp) for g in every]
    for (gi, c), v in zip(components, values):
        la[gi][c] = float(v)
    made = [dataclasses.replace(g, logamp=tuple(a)) for g, a in zip(every, la)]
    n = len(prior.groups)
    return GSMPrior(tuple(made[:n]), prior.strength, prior.strength_z, prior.curvature,
                    dict(prior.meta), prior.noise_ref, tuple(made[n:]))


def _symmetry_groups(offsets):
    """Group in-plane offsets that are equal up to a 90-degree rotation or a mirror."""
    groups = {}
    for di, dj in offsets:
        key = tuple(sorted((abs(di), abs(dj))))
        name = {(0, 1): "axial", (1, 1): "diagonal", (0, 2): "axial2", (1, 2): "knight"}.get(key, f"o{key}")
        groups.setdefault(name, []).append((di, dj))
    return list(groups.items())


# ---------------------------------------------------------------------------------------
# SURE
# ---------------------------------------------------------------------------------------
def sure(observed, mean, variance, noise_variance) -> float:
    r"""Stein's unbiased risk estimate of the posterior mean, per pixel.

    .. math:: \mathrm{SURE} = \frac1N\Big[\|y - \hat x\|^2 - \sum_i v_i
              + 2 \sum_i v_i \frac{\partial \hat x_i}{\partial y_i}\Big],
              \qquad \frac{\partial \hat x_i}{\partial y_i} = \frac{\mathrm{Var}(x_i \mid y)}{v_i}

    The divergence identity holds for the posterior mean under any prior when
    ``y | x`` is Gaussian with known variance ``v`` [1]_, so the posterior
    variances a sampler already reports give the estimate at no extra cost.

    References
    ----------
    .. [1] C. M. Stein, Annals of Statistics 9 (1981) 1135-1151.
    """
    y = np.asarray(observed, dtype=np.float64)
    r = y - np.asarray(mean, dtype=np.float64)
    v = np.broadcast_to(np.asarray(noise_variance, dtype=np.float64), y.shape)
    return float((np.sum(r * r) - np.sum(v) + 2.0 * np.sum(variance)) / y.size)


@dataclass
class StrengthFit:
    """Strength chosen by SURE and the ``[strength, risk]`` pairs tried.

    ``risk`` is what the walk minimised (SURE per pixel less ``spread_share``
    times the spread of the chains' means, see :func:`choose_strength`);
    ``sure`` holds the plain SURE of the same strengths, in the same order.
    """

    strength: float
    table: list
    sure: list | None = None


def _crop_windows(shape, size, count):
    """Up to ``count`` windows of ``size`` x ``size`` spread evenly over an ``(H, W)`` plane."""
    H, W = shape
    if H <= size * 1.5 and W <= size * 1.5:
        return [(slice(0, H), slice(0, W))]
    n = max(1, int(round(math.sqrt(count))))
    out = []
    for a in range(n):
        for b in range(n):
            i = int(round((H - size) * (a + 0.5) / n)) if H > size else 0
            j = int(round((W - size) * (b + 0.5) / n)) if W > size else 0
            out.append((slice(i, min(i + size, H)), slice(j, min(j + size, W))))
    return out


#: Smoothing widths of the starting images of the SURE chains: chains from
#: different starts see the slow drift of the scales that one chain's spread
#: misses (with one chain the summed variance, so the risk, read low at high
#: strength: 9.7e-5 against a true 15.9e-5 on cell at 512^2, sigma 0.05).
SURE_START_WIDTHS = (1.0, 1.4, 2.0, 0.7)


def sure_window(shape):
    """Side of the SURE windows for an ``(H, W)`` plane: 3/16 of its shorter side, in 64..128.

    Parameters
    ----------
    shape : (int, int)
        ``(H, W)`` of the plane.

    Returns
    -------
    int
        Window side in pixels (a multiple of 8).

    Four such windows cover about 1/7 of a 512^2 image (with 64^2 windows they
    covered 1/16, and the chosen strength was 1.5x the oracle's on average;
    measured on the benchmark crops, where 96^2 gained 0.1 dB at 512^2 and
    nothing at 256^2, for 12% more time).

    Examples
    --------
    >>> sure_window((512, 512)), sure_window((256, 256)), sure_window((2048, 2048))
    (96, 64, 128)
    """
    side = 8 * round(3 / 16 * min(shape) / 8)
    return int(min(128, max(64, side)))


def choose_strength(observed, variance, prior: GSMPrior, *, start=0.5, step=2.0,
                    bounds=(2.0**-8, 2.0**5), crop="auto", crops=4, burn_in=2, samples=2, chains=3,
                    refine=True, seed=0, tol=1e-3, reflect=False, spread_share=0.0) -> StrengthFit:
    r"""Prior strength minimising Stein's unbiased risk estimate of the posterior mean.

    Starting at ``start``, the strength is multiplied (or divided) by ``step``
    while the risk falls, so that the minimum is bracketed by its neighbours on
    a geometric grid within ``bounds``; with ``refine`` the answer is the
    vertex of the parabola through the best point and its neighbours in log
    strength (not itself evaluated).  Each risk is from ``chains`` short temperature-1 chains
    (``burn_in + samples`` sweeps each, started from differently smoothed
    images, :data:`SURE_START_WIDTHS`) on ``crops`` windows of ``crop`` x
    ``crop`` pixels, whose Rao-Blackwellised mean and summed posterior
    variance give :func:`sure`.  All strengths use the same
    random numbers (common random numbers), so their comparison is not blurred
    by Monte-Carlo noise.  A walk from the usual range (0.1-2 on the benchmark
    crops) needs 3-5 risks, where a fixed grid over the same range needed 8.

    Parameters
    ----------
    observed : ndarray, shape (Z, H, W)
        Noisy image in the prior's units.
    variance : ndarray or float
        Noise variance per pixel, same units.
    prior : GSMPrior
        Learned prior (its own strength is replaced).
    start, step : float
        First strength and the ratio between neighbouring strengths.
    bounds : (float, float)
        The walk stops at these strengths.
    crop : int or "auto"
        Window side; ``"auto"``: :func:`sure_window` of the plane.
    crops : int
        Number of windows, spread evenly over the plane.
    burn_in, samples, chains : int
        Sweeps discarded and kept per chain, and chains per risk (at most
        ``len(SURE_START_WIDTHS)``).
    reflect : bool
        The chains mirror their scale draws (reflected through their CDF, see
        ``GreyModel``'s ``reflect_scales``) instead of drawing them afresh.
    spread_share : float
        The walk minimises SURE less this multiple of the spread of the
        chains' means (``sum_c (m_c - m)^2 / (C (C - 1))`` per pixel: the
        Monte-Carlo variance of the windows' mean, plus what is left of the
        chains' different starts).  An empirical correction, not a bias
        correction (at equilibrium plain SURE reads low by that variance);
        ``mrfclean.grey`` passes :data:`mrfclean.grey.SPREAD_SHARE` (see there
        for what was measured).

    Returns
    -------
    StrengthFit
        The strength of least risk, every ``(strength, risk)`` tried (``table``,
        what the walk minimised) and their plain SURE (``sure``).
    """
    if not (step > 1 and 0 < bounds[0] <= start <= bounds[1]):
        raise ValueError(f"need step > 1 and bounds[0] <= start <= bounds[1], got {step}, {bounds}, {start}")
    blocks = _sure_blocks(observed, variance, crop, crops, chains)

    plain = {}

    def risk(lam):
        r, mc = _sure_risk(blocks, prior.with_strength(float(lam), blocks[0][2]), seed=seed,
                           burn_in=burn_in, samples=samples, chains=chains, tol=tol,
                           reflect=reflect, spread=True)
        plain[float(lam)] = r
        return r - spread_share * mc

    best, table = _geometric_walk(risk, start, step, bounds, refine)
    return StrengthFit(best, table, [[v, plain[v]] for v, _ in table])


def sure_at(observed, variance, prior: GSMPrior, *, crop="auto", crops=4, burn_in=2, samples=2,
            chains=3, seed=0, tol=1e-3, reflect=False) -> float:
    """Plain SURE per pixel of ``prior`` as it is, read as :func:`choose_strength` reads each risk.

    Windows, chains, sweeps and seeds are those of :func:`choose_strength`, so
    the value is comparable with its ``sure`` table (and with
    :func:`choose_curvature`'s risks) for the same image and ``seed``, whatever
    the prior.

    Parameters
    ----------
    observed, variance, crop, crops, burn_in, samples, chains, seed, tol, reflect
        As for :func:`choose_strength`.
    prior : GSMPrior
        Prior at the strength to read (its own strength and curvature are used).

    Returns
    -------
    float
        SURE per pixel over the windows (:func:`sure`).

    References
    ----------
    .. [1] C. M. Stein, Annals of Statistics 9 (1981) 1135-1151.
    """
    blocks = _sure_blocks(observed, variance, crop, crops, chains)
    return _sure_risk(blocks, prior.with_strength(float(prior.strength), blocks[0][2]), seed=seed,
                      burn_in=burn_in, samples=samples, chains=chains, tol=tol, reflect=reflect)


def _sure_blocks(observed, variance, crop, crops, chains):
    """The SURE windows of an image: ``[(y, v, strength_z, starts)]`` (see :func:`choose_strength`).

    ``starts`` are the windows smoothed by the first ``chains`` of
    :data:`SURE_START_WIDTHS` (one start per chain), made once here for every
    risk of a search.
    """
    if not 1 <= chains <= len(SURE_START_WIDTHS):
        raise ValueError(f"chains must be in 1..{len(SURE_START_WIDTHS)}, got {chains}")
    y = np.asarray(observed, dtype=np.float64)
    y = y[None] if y.ndim == 2 else y
    v = np.broadcast_to(np.asarray(variance, dtype=np.float64), y.shape)
    z = min(y.shape[0], 3)
    zs = slice((y.shape[0] - z) // 2, (y.shape[0] - z) // 2 + z)
    wins = _crop_windows(y.shape[1:], sure_window(y.shape[1:]) if crop == "auto" else int(crop),
                         crops)
    if y.shape[0] == 1 and len(wins) > 1:
        # the windows of a 2-D image side by side as planes of one lattice without z
        # cliques: independent posteriors, sampled in one run on every thread
        blocks = [(np.stack([y[0, si, sj] for si, sj in wins]),
                   np.stack([v[0, si, sj] for si, sj in wins]), 0.0)]
    else:
        blocks = [(y[zs, si, sj], v[zs, si, sj], None) for si, sj in wins]
    return [(yc, vc, sz, [ndimage.gaussian_filter(yc, (0.0, w, w))
                          for w in SURE_START_WIDTHS[:chains]])
            for yc, vc, sz in blocks]


def _sure_risk(blocks, prior, *, seed, burn_in, samples, chains, tol, reflect=False,
               spread=False):
    """SURE per pixel of the posterior mean under ``prior``, over the windows ``blocks``.

    ``reflect``: the chains mirror their scale draws (``GreyModel``'s ``reflect_scales``).
    ``spread``: also return the spread of the chains' own means per pixel,
    ``sum_c (m_c - m)^2 / (C (C - 1))`` (0 with one chain): ``(risk, spread)``
    (see ``GreyTally.mc_variance``; from the windows' different starts it also
    holds what is left of the starts after the burn-in).
    """
    from .. import sampler
    from ..models.grey import GreyModel

    tot, mc, n = 0.0, 0.0, 0
    for k, (yc, vc, _, starts) in enumerate(blocks):
        if len(starts) < chains:
            raise ValueError(f"windows made for {len(starts)} chains, asked for {chains}")
        # The draws solve to ``tol`` too, not to the final chains' looser 1e-2: conjugate
        # gradients from zero stop short of the draw's full spread, so a loose solve reads the
        # posterior variance, hence the divergence, low, and most so for stiff priors.  On cell
        # 256^2 at sigma 0.05 that bias ranked a weight-12800 curvature term first where it was
        # 0.4 dB worse; at 3e-3 the ranking matched the windows' true errors (measured).
        m = GreyModel(yc, variance=vc, prior=prior, tol=tol, sample_tol=tol,
                      starts=starts[:chains], single_solves=burn_in, reflect_scales=reflect)
        run = sampler.run(m, sweeps=burn_in + samples, burn_in=burn_in, chains=chains,
                          seed=seed + k, tally=True, keep_states=False)
        tot += sure(yc, run.tally.mean64(), run.tally.var64(), vc) * yc.size
        mc += (run.tally.mc_variance() or 0.0) * yc.size
        n += yc.size
    return (tot / n, mc / n) if spread else tot / n


def _geometric_walk(risk, start, step, bounds, refine, known=None):
    """Minimise ``risk`` over ``start * step**k`` within ``bounds`` by walking downhill.

    The walk goes up while the risk falls, else down; with ``refine`` the
    answer is the vertex of the parabola through the best point and its
    neighbours (in log scale), when that parabola opens upwards.  The vertex
    is taken without computing its risk: checking it against the grid's best
    cost a risk evaluation (a fifth of the search) and chose no better
    (48 cases, measured; see DEVELOPERS.md).  ``known`` may hold risks already
    computed, keyed by ``k``.  Returns the chosen value and the sorted
    ``[value, risk]`` table of the risks computed.
    """
    known = dict(known or {})

    def at(k):
        """Risk at ``start * step**k`` (computed once)."""
        if k not in known:
            known[k] = risk(start * step**k)
        return known[k]

    kmin = math.ceil(math.log(bounds[0] / start, step) - 1e-9)
    kmax = math.floor(math.log(bounds[1] / start, step) + 1e-9)
    k = 0
    direction = 1 if kmax > 0 and at(1) < at(0) else -1
    while kmin <= k + direction <= kmax and at(k + direction) < at(k):
        k += direction
    best = float(start * step**k)
    if refine and kmin < k < kmax:
        (l0, r0), (l1, r1), (l2, r2) = [(math.log(start * step ** (k + d)), at(k + d))
                                        for d in (-1, 0, 1)]
        den = (l0 - l1) * (l0 - l2) * (l1 - l2)
        A = (l2 * (r1 - r0) + l1 * (r0 - r2) + l0 * (r2 - r1)) / den
        B = (l2 * l2 * (r0 - r1) + l1 * l1 * (r2 - r0) + l0 * l0 * (r1 - r2)) / den
        if A > 0:
            best = float(math.exp(min(max(-B / (2 * A), l0), l2)))
    table = sorted((float(start * step**j), r) for j, r in known.items())
    return best, [[v, r] for v, r in table]


@dataclass
class CurvatureFit:
    """Curvature weight chosen by SURE (0: none), the strength it goes with, and the
    ``[strength, weight, SURE per pixel]`` triples tried (weight 0: the prior alone).

    With a ``margin`` (:func:`choose_curvature`) the term may be taken at a risk up to
    that allowance above the prior alone's.
    """

    curvature: float
    strength: float
    table: list


def choose_curvature(observed, variance, prior: GSMPrior, *, start, step=4.0, shift=3.0,
                     none_risk=None, strength_factor=1 / 3, margin=0.0, crop="auto", crops=4,
                     burn_in=2, samples=2, chains=3, seed=0, tol=1e-3,
                     reflect=False) -> CurvatureFit:
    r"""Weight of the second-difference term, and the strength beside it, minimising SURE.

    The term takes over part of the smoothing, so it is tried at lower
    strengths: on the lattice of points ``(i, j)`` with strength
    ``prior.strength * strength_factor / shift**i`` and weight
    ``start * step**j``.  The first point ``(0, 0)`` is compared with the risk
    of the prior alone (``none_risk``, or computed) plus ``margin`` times the
    mean noise variance; if it does no better the term is left out (on the
    benchmark crops, a second try one diagonal step further never did better
    where the first did not; at stop 25 a second try took the term on one
    held-out crop, which lost 0.16 dB).  Otherwise the walk
    moves along the diagonal (less strength, more weight: smoothing handed
    from the edge-preserving differences to the curvature) while the risk
    falls.  If it did not move, the weight alone is walked at the first
    point's strength (on the benchmark's smooth crops, a weight walk after a
    diagonal move never moved, and it cost two risks).  Weights stay within
    ``start / step**3`` to ``start * step**4``, strengths within
    ``shift**-3`` of the first: the stiffest points are where the draws' solves
    lose most of the posterior variance, so SURE reads them low (with a
    variant risk tried at stop 11 an unbounded walk reached a 243rd of the
    strength on a training image, 4.9 dB worse).  The benchmark's choices lie
    within two steps.  Windows, chains and seeds are those of
    :func:`choose_strength`, so the risks are comparable with the plain SURE
    of its walk (``StrengthFit.sure``).

    On the smooth benchmark crops the risk's minimum sits 1-2 diagonal steps
    from the first point (cell at sigma 0.05: +0.7 to +0.9 dB over the first
    point's weight walk, measured with ``scripts/bench_grey.py``).

    Parameters
    ----------
    observed, variance
        As for :func:`choose_strength`.
    prior : GSMPrior
        Prior at the strength chosen without the term (its curvature is replaced).
    start, step : float
        First weight tried and the ratio between neighbouring weights.
    shift : float
        Ratio between neighbouring strengths (1: the strength stays at
        ``prior.strength * strength_factor`` and only the weight is walked).
    none_risk : float, optional
        Risk without the term to compare with (``mrfclean.grey.grey_setup``
        passes the least plain SURE its strength walk evaluated, at one of the
        walk's grid strengths; the prior's strength is the walk's answer,
        which may lie between them).  Default: computed for ``prior`` as it is.
    strength_factor : float
        The first point's strength is ``prior.strength * strength_factor``.
    margin : float, optional
        Allowance for the term, in units of the mean noise variance over the
        SURE windows: the first point is taken when its risk is below
        ``none_risk + margin * mean(variance)``.  Default 0 (plain SURE).
        Short chains read the posterior variance (the risk's divergence)
        low, lowest for the prior alone, whose heavy-tailed scales drift
        slowest, which biases the comparison against the term;
        ``mrfclean.grey.CURVATURE_MARGIN`` has the figures.
    crop, crops, burn_in, samples, chains, seed, tol, reflect
        As for :func:`choose_strength` (``none_risk``, when given, must come
        from chains of the same kind).

    Returns
    -------
    CurvatureFit
        The weight (0: none), the strength it was chosen at, and every
        ``[strength, weight, risk]`` tried (weight 0 at the prior's own strength).
    """
    if not (step > 1 and shift >= 1):
        raise ValueError(f"need step > 1 and shift >= 1, got {step}, {shift}")
    if not (math.isfinite(margin) and margin >= 0):
        raise ValueError(f"margin must be a finite number >= 0, got {margin}")
    blocks = _sure_blocks(observed, variance, crop, crops, chains)
    sz = blocks[0][2]
    # the noise variance over the windows' pixels, where the risks are read
    noise_var = (sum(float(np.sum(vc)) for _, vc, _, _ in blocks)
                 / sum(vc.size for _, vc, _, _ in blocks))
    prior = prior.with_curvature(0.0)
    lam0 = float(prior.strength)
    if none_risk is None:
        none_risk = _sure_risk(blocks, prior.with_strength(lam0, sz), seed=seed,
                               burn_in=burn_in, samples=samples, chains=chains, tol=tol,
                               reflect=reflect)
    known = {}

    def point(i, j):
        return lam0 * strength_factor / shift**i, start * step**j

    def risk(i, j):
        """SURE at lattice point ``(i, j)`` (computed once)."""
        if (i, j) not in known:
            lam, kappa = point(i, j)
            known[i, j] = _sure_risk(blocks, prior.with_strength(lam, sz).with_curvature(kappa),
                                     seed=seed, burn_in=burn_in, samples=samples, chains=chains,
                                     tol=tol, reflect=reflect)
        return known[i, j]

    def fit(best):
        table = [[lam0, 0.0, float(none_risk)]] + [[*point(i, j), r] for (i, j), r in known.items()]
        if best is None:
            return CurvatureFit(0.0, lam0, table)
        lam, kappa = point(*best)
        return CurvatureFit(float(kappa), float(lam), table)

    imax = 3 if shift > 1 else 0
    jmin, jmax = -3, 4
    cur = (0, 0)
    if not risk(*cur) < none_risk + margin * noise_var:
        return fit(None)
    while cur[0] + (shift > 1) <= imax and cur[1] + 1 <= jmax:
        nxt = (cur[0] + (shift > 1), cur[1] + 1)
        if not risk(*nxt) < risk(*cur):
            break
        cur = nxt
    if cur == (0, 0):  # the weight alone, as choose_strength walks the strength
        kappa, _ = _geometric_walk(lambda v: risk(0, round(math.log(v / start, step))), start,
                                   step, (start * step**jmin, start * step**jmax), False)
        cur = (0, round(math.log(kappa / start, step)))
    return fit(cur)
