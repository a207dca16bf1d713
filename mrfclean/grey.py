"""Cleaning greyscale images: the greyscale pipeline from pixels to a :class:`CleanResult`.

levels (float32 physical units) → noise model (given or estimated) → internal
intensity scale → prior strength (given or by SURE) → posterior mean with std
map (temperature-1 chains) or annealed MAP → the input's dtype out.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, special

from . import levels as lv
from .estimates import CleanResult, Diagnostics, anneal, record_posterior, sample_posterior
from .fit.grey import (FLATTEST_SHARE, choose_curvature, choose_strength, estimate_poisson_gaussian,
                       estimate_sigma, signal_roughness, sure_at)
from .lattice import Grid
from .models.grey import (BLOCK_PRIOR_FILE, PRIOR_FILE, TUNED_PRIOR_FILE, GaussianNoise, GreyModel,
                          GSMPrior, PoissonGaussianNoise)
from .sampler import to_seed
from .schedules import Geometric, Schedule

METHODS = ("mean", "map")
NOISES = ("auto", "gaussian", "poisson-gaussian")
#: Names of the shipped priors: ``"smooth"`` (score matching, :data:`mrfclean.models.grey.PRIOR_FILE`;
#: SURE may add the curvature term) and ``"textured"`` (tuned for PSNR on the training
#: images, :data:`mrfclean.models.grey.TUNED_PRIOR_FILE`) and ``"blocks"`` (score matching
#: on the 2 x 2 block filters, :data:`mrfclean.models.grey.BLOCK_PRIOR_FILE`; 2-D only);
#: ``"auto"`` picks "smooth" or :data:`ROUGH_PRIOR` ("blocks"; "textured" for a volume)
#: from the image's roughness, and after the smooth prior's trials may still take
#: "blocks" by SURE (:data:`BLOCK_SWITCH`; see :func:`grey_setup`).  Only "smooth" tries
#: the curvature term.
PRIORS = ("auto", "smooth", "textured", "blocks")

#: Defaults chosen with scripts/bench_grey.py (see README, "Benchmarks").  Chain
#: length per chain, burn-in + kept (scripts/chain_lengths.py, twelve 512^2
#: crops at fixed parameters): 1 + 7 scored 0.035 dB above 3 + 6 for one sweep
#: less; burn-in 0-3 moved the error by about 0.01 dB (the chains start near
#: equilibrium), each kept sweep gained about 0.02 dB.  Stop 14: 1 + 6, paying for the
#: mirrored scale draws (FINAL_REFLECT), whose slower draw and longer mean solves cost
#: 4-7% of the time: with them the seventh kept sweep gained 0.013-0.015 dB on the
#: benchmark (two noise draws) and 0.017 dB on 96 training-image cases, for 6-7%.
#: Stop 21: five chains of 1 + 2 sweeps (each with its closing mean, FINAL_CLOSING_MEAN)
#: instead of two of 1 + 6.  The kept sweeps of one chain are correlated (lag-1
#: autocorrelation of their conditional means +0.24 to +0.36, stop 19), so more, shorter
#: chains give a steadier mean for about the same sweeps; each chain also starts anew
#: from a smoothed image, whose pull after one burn-in sweep helps on average (see
#: DEVELOPERS.md, stop 21).  With the setup shared, on 48 training-image cases (384^2):
#: +0.072 dB (s.e. 0.011, 39 of 48 gain) on seed 6 and +0.074 (s.e. 0.012, 38 of 48) on
#: seed 8, worst case -0.13; held-out images (scripts/heldout_grey.py's 20) +0.044 (s.e.
#: 0.025); 12-13% more final-chain time.  4 x (1 + 3) gained +0.053/+0.057 at 17% more,
#: 7 x (1 + 1) +0.083/+0.084 but with single cases down 0.27 dB, 6 x (1 + 1) +0.053/+0.054
#: at 5% less.
DEFAULT_BURN_IN = 1
DEFAULT_SAMPLES = 2
DEFAULT_CHAINS = 5
#: Annealing (``method="map"``) keeps two chains unless ``chains`` is given: it needs
#: only the better mode of a few, and each annealing chain costs 30 sweeps.
DEFAULT_ANNEAL_CHAINS = 2
DEFAULT_ANNEAL_SWEEPS = 30
DEFAULT_LEVEL = 0.95
#: Chains start from the image smoothed by Gaussians of these widths (pixels).
#: From the noisy image itself the scales need 5-8 sweeps to leave the "every
#: difference is an edge" state; from a 1-pixel smoothing the energy is at its
#: stationary level from the first sweep (measured on camera, sigma 0.1).  Two
#: different widths keep R-hat a check that burn-in forgot the start.
START_WIDTHS = (1.0, 1.4)
#: Conjugate-gradient relative residuals: conditional mean, and perturbation
#: system of a draw (at 1e-2 the sampled std and 95% coverage matched those at
#: 1e-3 on the benchmark crops; 3e-2 lost about 1% of coverage; measured).
DEFAULT_TOL = 3e-3
DEFAULT_SAMPLE_TOL = 1e-2
#: Over-relaxation of the final chains' image updates (see ``GreyModel``'s ``relax``):
#: exact at any value, and a less noisy posterior mean for the same sweeps.  Measured on
#: the benchmark's 25 cases (stop 13): +0.014 dB mean PSNR at -0.5 and +0.017 dB at -0.7,
#: no extra time; coverage 0.952 -> 0.949 and 0.944, median R-hat 1.59 -> 1.57 and 2.16
#: (at -0.7 the chains' energies move more slowly), so -0.5.  SURE's short chains keep
#: plain draws: relaxed there, they start too close to their smoothed starts to read the
#: variance right (-0.16 dB).
FINAL_RELAX = -0.5
#: CDF-reflected (mirrored) scale draws in the final chains (see ``GreyModel``'s
#: ``reflect_scales``), beside the image's: measured on the benchmark's 25 cases (stop 14),
#: +0.028 dB mean PSNR, coverage 0.949 -> 0.951, median R-hat 1.57 -> 1.17 (with the
#: image at -0.7: +0.034 dB but coverage 0.946, R-hat 1.58).  It costs time: the draw
#: with a gather per clique (512^2: 7.2 ms against 5.8) and 3% more solver iterations
#: (successive conditional means lie further apart), 7% of the final chains' time.
#: With one kept sweep fewer (DEFAULT_SAMPLES) it is +0.015 dB at 2% less time than
#: plain draws with seven (paired, 11.1 s against 11.3 s).  SURE keeps plain draws
#: (see SURE_REFLECT).
FINAL_REFLECT = True
#: Each final chain ends with the conditional mean of the scales its last sweep drew
#: (``GreyModel``'s ``closing_mean``): one more term of the Rao-Blackwellised mean for a
#: mean solve alone.  Measured at stop 20 (the setup shared, default chains): +0.017 dB
#: (s.e. 0.002) on 48 training-image cases (384^2, seed 6) and on the benchmark's 25,
#: for 5.4-5.6% more final-chain time; a seventh kept sweep gave +0.013-0.017 dB for
#: about 14% (stop 14).
FINAL_CLOSING_MEAN = True
#: Whether SURE's strength walk mirrors its chains' scale draws (its curvature risks
#: then keep plain draws, beside a fresh plain risk of the prior alone).  Measured at
#: stop 14: +0.019 dB mean PSNR over the benchmark's 25 cases (22 of the 24 Gaussian
#: cases gain or tie) and +0.031 dB (s.e. 0.010) over 96 cases of the prior's training
#: images, but the fresh risk cost 6-9% of the 512^2 time in paired runs, and one kept
#: sweep fewer to pay for it left +0.004 dB on the benchmark: so off, while the speed
#: target has no margin on some machines (DEVELOPERS.md).  Mirrored everywhere in SURE
#: (no fresh risk), the Poisson-Gaussian case lost its curvature term on two noise draws.
SURE_REFLECT = False
#: SURE's strength walk minimises SURE less this multiple of the spread of its chains'
#: means (``choose_strength``'s ``spread_share``: the Monte-Carlo variance of the windows'
#: mean plus what is left of the chains' different starts).  An empirical correction, not
#: a bias correction: for chains at equilibrium plain SURE reads low by that variance
#: (the residual high by it, the pooled variance, counted twice, low by it), so theory
#: would add it.  Measured at stop 16 on held-out cases of the prior's training images
#: (384^2 crops, 48 cases per seed): subtracting it, +0.034 dB mean PSNR (s.e. 0.006, 40
#: of 48 gain) with seed 6 and +0.038 (s.e. 0.008, 37 of 48) with seed 8, the chosen
#: strengths about 10% lower; adding it (share -1), -0.052 dB; share 2, +0.047 but single
#: cases lost up to 0.35 dB.  The walk's 2 + 2-sweep chains are far from equilibrium
#: (DEVELOPERS.md).  The curvature risks keep plain SURE: with the correction there, the
#: stiffer curvature chains (smaller spread) lost their term on smooth images.
SPREAD_SHARE = 1.0
#: ``noise="auto"`` picks Poisson-Gaussian when the signal-dependent part of the
#: estimated variance at the image's 90th intensity percentile is at least this
#: share of the total (common practice: a clear, not a marginal, dependence).
AUTO_PG_SHARE = 0.5
#: ... and when the fitted slope is at least this many standard errors from 0.
AUTO_PG_SIGNIFICANCE = 4.0


#: The strength a typical image needs at a noise level: ``log strength = a + b
#: log(sigma / span)``, the least-squares line through the strengths SURE chose
#: on the prior's training images at sigma 0.05, 0.1 and 0.2
#: (scripts/fit_strength_guess.py; residual sd 1.15 in log strength).  Fitted to walks
#: with plain draws; refitted to the mirrored walk (stop 14: (-4.45, -1.20), sd 1.00, and
#: for STRENGTH_START (-8.41, -0.96, -0.77)) they scored -0.003 dB on the benchmark and
#: -0.009 dB (s.e. 0.009) on 96 training-image cases, so these stay.
STRENGTH_GUESS = (-4.140, -0.995)
#: ... and that residual sd: a strength predicted this far above the guess marks
#: an image smoother than the training images (see SMOOTH_PRIOR_GATE).
STRENGTH_GUESS_SD = 1.15
#: Where the SURE walk starts: ``log strength = a + b log(sigma / span) + c log g``
#: with ``g`` the image's estimated roughness in the prior's units
#: (:func:`mrfclean.fit.grey.signal_roughness`), fitted on the same runs
#: (residual sd 0.66).  On the benchmark crops, which it never saw, it starts
#: 0.5 doublings from SURE's choice on average where the noise-only line
#: started 2.05 away (measured), so the walk needs fewer risks.
STRENGTH_START = (-8.62, -0.724, -0.875)
#: The same line for the tuned prior (:data:`mrfclean.models.grey.TUNED_PRIOR_FILE`),
#: fitted on the same runs with it (scripts/fit_strength_guess.py --prior tuned;
#: residual sd 0.89): its strengths come out 2.5-4 times higher.
TUNED_STRENGTH_START = (-7.046, -0.371, -0.907)
#: The same line for the block-filter prior (:data:`mrfclean.models.grey.BLOCK_PRIOR_FILE`;
#: scripts/fit_strength_guess.py --prior blocks, residual sd 1.16).
BLOCK_STRENGTH_START = (-7.757, -0.169, -0.997)
#: Refusal of a block-only prior for a volume (it has no potential along z).
NO_Z_POTENTIAL = ("the block prior has no potential along z: clean the stack plane by plane "
                  "(stack \"planes\") or choose the smooth or textured prior")
#: The prior "auto" gives a 2-D image no smoother than the training images (see
#: :data:`SMOOTH_PRIOR_GATE`): "blocks" since stop 24, "textured" before.  Measured
#: by swapping it on the images "auto" routed to "textured" (DEVELOPERS.md, stop 24):
#: +0.198 dB on 40 training-image cases (crop 384, seed 8; 27 gain, 13 lose), +0.110
#: on the 12 held-out cases of scripts/heldout_grey.py (9 gain, 3 lose; the phantom at
#: sigma 0.2 loses 1.06), in 0.86-0.90 of the time.
ROUGH_PRIOR = "blocks"
#: First weight of the second-difference term tried by SURE, times the noise
#: precision (prototype runs put the best weight at 0.25-2.5 over sigma^2 on
#: smooth images; on textured ones none helps).
CURVATURE_GUESS = 2.0
#: ... tried at this share of the strength chosen without it; from there SURE
#: walks down the strength in factors of 3 and up the weight in factors of 4
#: while the risk falls (:func:`mrfclean.fit.grey.choose_curvature`).  On cell
#: at sigma 0.05 it settled 1-2 such steps further (weights 16-64 over sigma^2 at
#: 1/9-1/27 of the strength), 0.7-0.9 dB above this first point's own weight walk.
CURVATURE_STRENGTH = 1 / 3
#: ... and taken there when SURE at that first point is below the prior alone's plus this
#: many times the noise variance (per pixel, in the prior's units).  The walk's short
#: chains read the prior alone's posterior variance lowest, so plain SURE leans against
#: the term (stop 18 measured the bias with the final chains on cell 256^2 at sigma 0.1:
#: 2.5e-5 per pixel in the prior's units, 0.0013 times the noise variance there).  Near a
#: tie the decision flips with the random stream (over three SURE seeds the difference
#: moved by about 0.001 noise variances), and where it flipped the term mostly won.
#: Measured at stop 25 (DEVELOPERS.md): of 11 decisions this margin flipped (held-out,
#: training and benchmark images, several random streams) 10 gained (+0.05 to +1.55 dB)
#: and one lost 0.03; held-out cases the smooth prior serves +0.030 dB on average over
#: six streams; 0.002 lost 0.29 dB on a held-out case.
CURVATURE_MARGIN = 1e-3
#: With strength, curvature and prior on "auto", a 2-D image routed to the smooth prior
#: whose SURE leaves the curvature term out also gets one SURE risk of the block prior
#: at this many times the strength the smooth prior's walk chose, read on the same
#: windows, chains and seed (the two priors lay out their random numbers differently,
#: so the draws are not common); it takes the block prior at that strength when that
#: risk is below the prior alone's least risk.  One risk, not a walk: a walk from there
#: cost as much again as the whole setup, and the single point scored about as well.
#: Short chains bias SURE differently for different priors (stop 17), so this rests on
#: what it did, measured at stop 26 (DEVELOPERS.md) on the images "auto" sends to the
#: smooth prior: training crops (384^2, seeds 5, 6 and 8; no case took the term) the
#: block prior at 2x gained on all 24 (+0.44 to +1.11 dB) and SURE took it on 20 (all
#: gains); held-out images, where six of eight took the term, it took it on the other
#: two (+0.41, +0.14 dB); the benchmark (evidence only) +0.018 dB, moon +0.16 to
#: +0.34, cell at sigma 0.1-0.2 at 256^2 -0.39 and -0.17.  Time: the same within 0.3%
#: on seven 512^2 cell and moon cleans (the switched cases' chains are cheaper).
#: 0 turns the trial off.
BLOCK_SWITCH = 2.0
#: With strength, curvature and prior on "auto", :data:`ROUGH_PRIOR` (the block
#: prior; until stop 24 the prior tuned for denoising, "textured") serves images whose
#: roughness predicts a strength for the score-matching
#: prior below this many times the guess for the noise level (one residual sd in log
#: strength): no smoother than a typical training image.  Smoother images get the
#: "smooth" (score-matching) prior, which always tries the curvature term.  On the
#: benchmark crops the prediction is 0.55-2.3 times the guess for camera and coins,
#: 1.3-6.1 for moon (moon at sigma 0.2 gets the textured prior) and 9.8-24 for cell.
#: Until stop 17 a second gate skipped the curvature try unless SURE's strength, too,
#: came out above this ratio; dropping it gained 0.092 dB on the 20 held-out cases of
#: scripts/heldout_grey.py (the term taken on four retina cases, +0.26 to +0.51 dB
#: each) and changed nothing on 96 training-image cases or the benchmark.
SMOOTH_PRIOR_GATE = math.exp(STRENGTH_GUESS_SD)


def strength_guess(noise_sd):
    """Starting strength of the SURE walk with the score-matching prior (clipped to 1/16..4).

    Parameters
    ----------
    noise_sd : float
        Noise standard deviation in the prior's units (intensity / span).

    Returns
    -------
    float
        ``exp(a + b log noise_sd)`` with ``(a, b) =`` :data:`STRENGTH_GUESS`.

    Examples
    --------
    >>> round(strength_guess(0.1), 3)
    0.157
    """
    a, b = STRENGTH_GUESS
    return float(min(max(math.exp(a + b * math.log(max(noise_sd, 1e-12))), 1 / 16), 4.0))


def strength_start(noise_sd, roughness, coef=STRENGTH_START):
    """First strength of the SURE walk with a shipped prior (clipped to 2^-7..2^4).

    Parameters
    ----------
    noise_sd : float
        Noise standard deviation in the prior's units (intensity / span).
    roughness : float
        :func:`mrfclean.fit.grey.signal_roughness` of the image in those units.
    coef : (float, float, float)
        ``(a, b, c)``: :data:`STRENGTH_START` (the score-matching prior) or
        :data:`TUNED_STRENGTH_START`.

    Returns
    -------
    float
        ``exp(a + b log noise_sd + c log roughness)``.

    Examples
    --------
    >>> round(strength_start(0.1, 1e-3), 3)
    0.403
    """
    a, b, c = coef
    v = math.exp(a + b * math.log(max(noise_sd, 1e-12)) + c * math.log(max(roughness, 1e-30)))
    return float(min(max(v, 2.0**-7), 2.0**4))


def _smooth(u, s=1.5):
    return ndimage.gaussian_filter(u, (0.0, s, s), mode="reflect")


def intensity_frame(y, sigma, *, smooth=None):
    """``(low, span)`` that map the image to roughly [0, 1] for the prior.

    Robust extremes (0.5 and 99.5 percentiles) of a lightly smoothed image
    (``smooth``, computed when not given), so that noise does not widen the
    span; the span is at least ``sigma`` and never zero.
    """
    s = _smooth(y) if smooth is None else smooth
    lo, hi = np.percentile(s, [0.5, 99.5])
    span = float(hi - lo)
    span = max(span, float(sigma), 1e-12 * max(abs(float(lo)), 1.0), 1e-30)
    return float(lo), span


def credible_interval(result: CleanResult, level: float = DEFAULT_LEVEL):
    """Pointwise ``level`` credible bounds ``mean -+ z std`` (float32, physical units).

    The posterior marginals are taken as Gaussian with the sampled mean and
    standard deviation (``z`` is the normal quantile); scripts/bench_grey.py
    reports how often these bounds cover the clean image.
    """
    if result.mean is None or result.std is None:
        raise ValueError("this result has no posterior mean and std (run method='mean')")
    if not 0 < level < 1:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    z = float(special.ndtri(0.5 + level / 2))
    m = result.mean.astype(np.float64)
    s = result.std.astype(np.float64)
    return (m - z * s).astype(np.float32), (m + z * s).astype(np.float32)


def _number(name, v, *, positive=True):
    try:
        f = float(v)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number or 'auto', got {v!r}") from None
    if not math.isfinite(f) or (f <= 0 if positive else f < 0):
        raise ValueError(f"{name} must be {'positive' if positive else 'non-negative'} and finite, got {v!r}")
    return f


def check_prior(prior):
    """Refuse a ``prior`` that is neither a name in :data:`PRIORS`, a :class:`GSMPrior`
    nor an existing file, with one line naming the option (before any work is done)."""
    if prior is None or isinstance(prior, GSMPrior):
        return
    if isinstance(prior, str) and prior in PRIORS:
        return
    if isinstance(prior, (str, os.PathLike)) and str(prior) and os.path.isfile(prior):
        return
    raise ValueError(f"prior: expected one of {', '.join(PRIORS)}, a GSMPrior or a prior file, "
                     f"got {prior!r}")


def check_options(shape, *, method, chains):
    """Refuse a method, chain count or image size the greyscale cleaner cannot use."""
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")
    if chains is not None and int(chains) < 1:
        raise ValueError(f"chains must be at least 1, got {chains}")
    if min(shape[-2:]) < 8:
        raise ValueError(f"image too small for the greyscale cleaner: {tuple(shape)}")


def clean_grey(image, *, method="mean", noise="auto", sigma="auto", gain="auto",
               read_variance="auto", strength="auto", curvature="auto",
               prior: GSMPrior | str | None = None,
               schedule: Schedule | None = None, sweeps=None, burn_in=None, samples=None,
               chains=None, level=DEFAULT_LEVEL, tol=DEFAULT_TOL, rng=None,
               progress=False) -> CleanResult:
    r"""Clean a greyscale image (or stack) by sampling a GSM-MRF posterior.

    The prior is a Gaussian scale mixture over neighbour differences on the
    offsets of a learned neighbourhood (see :mod:`mrfclean.models.grey`); the
    noise is Gaussian or Poisson-Gaussian, ``Var(y | x) = gain * x + read_variance``.

    Parameters
    ----------
    image : ndarray, shape (H, W) or (Z, H, W)
        Integer or float pixels in physical units.  Not modified.
    method : {"mean", "map"}
        ``"mean"``: posterior mean (minimum mean-squared error) with a per-pixel
        posterior standard deviation, from temperature-1 chains after burn-in.
        ``"map"``: the most probable image, by annealing (shared schedules) and
        a final half-quadratic descent.
    noise : {"auto", "gaussian", "poisson-gaussian"}
        ``"auto"``: Poisson-Gaussian when the image shows a clearly
        signal-dependent variance, else Gaussian.
    sigma : float or "auto"
        Gaussian noise standard deviation (image units); ``"auto"``: wavelet MAD
        (Donoho & Johnstone 1994) over the flattest half of the image (see
        :func:`mrfclean.fit.grey.estimate_sigma`).
    gain, read_variance : float or "auto"
        ``a`` and ``b`` of ``Var(y | x) = a x + b`` (image units); ``"auto"``:
        fitted from the image (after Foi et al. 2008).
    strength : float or "auto"
        Multiplier of the learned prior's precisions; ``"auto"``: the minimiser
        of Stein's unbiased risk estimate (Stein 1981) less the spread of its
        chains' means (:data:`SPREAD_SHARE`), found by a walk over strengths in
        factors of 2 from short posterior runs on crops (see
        :func:`mrfclean.fit.grey.choose_strength`).
    curvature : float or "auto"
        Weight of the quadratic second-difference term (in the prior's units,
        see :mod:`mrfclean.models.grey`); ``"auto"``: SURE decides whether it
        helps, how much, and how far the strength then comes down (see
        :func:`mrfclean.fit.grey.choose_curvature`).
        It helps on smooth specimens (fluorescence-like, few sharp edges) and
        is left out (0) on textured ones.
    prior : {"auto", "smooth", "textured", "blocks"}, GSMPrior or path, optional
        Which pixel-coupling prior (None is ``"auto"``; a path names a prior
        file written by ``scripts/learn_grey_prior.py``).  The three shipped in
        ``mrfclean/data``:

        * ``"smooth"``: ``grey_prior.json``, learned by score matching on the
          training images' neighbour differences.  For regions of flat or
          slowly varying intensity between edges (cells, phantoms, fundus
          images); with curvature on "auto", SURE tries the second-difference
          term beside it.
        * ``"blocks"``: ``grey_prior_blocks.json``, learned by score matching
          on the responses of the 2 x 2 block filters (cliques of four pixels,
          see :mod:`mrfclean.models.grey`).  For texture and fine detail; the
          curvature term is not tried with it.  2-D images only (it has no
          potential along z).
        * ``"textured"``: ``grey_prior_tuned.json``, the smooth prior with its
          weights tuned for this cleaner's PSNR on noisy training images; the
          curvature term is not tried with it (SURE cannot judge it there).
          Until stop 24 the default for textured images.

        ``"auto"``, with strength and curvature on "auto" too, picks
        ``"blocks"`` (``"textured"`` for a volume) for an image no smoother
        than the training images (its roughness predicts a strength below
        :data:`SMOOTH_PRIOR_GATE` times the usual one) and ``"smooth"`` for
        a smoother one; a smoother 2-D image that SURE gives no curvature
        term then takes ``"blocks"`` if SURE prefers it (one risk, see
        :data:`BLOCK_SWITCH`, logged as ``sure_blocks``); ``prior`` is
        logged in ``estimated``; with a strength or curvature set by hand it
        is ``"smooth"``.  The rule can pick
        wrong: on the Shepp-Logan phantom (flat regions, sharp edges) it picks
        the rough-image prior, below ``"smooth"`` by 1.1-2.3 dB
        (``scripts/heldout_grey.py``, 384^2 crop, with ``"textured"``; the
        block prior gains 0.7 dB on it at sigma 0.05 and loses 1.1 at 0.2).
        ``prior_family`` in the parameters says which was used (``"given"``
        for another prior).
    schedule : Schedule, optional
        Annealing schedule for ``"map"``; default geometric 1.0 → 0.01.
    sweeps : int, optional
        Annealing sweeps per chain (``"map"``).
    burn_in, samples : int, optional
        Sweeps discarded and kept per temperature-1 chain.  A sweep is one
        auxiliary-variable Gibbs step: all clique scales, then the whole image.
    chains : int, optional
        Independent chains (R-hat needs at least 2); default
        :data:`DEFAULT_CHAINS` temperature-1 chains and, with ``"map"``,
        :data:`DEFAULT_ANNEAL_CHAINS` annealing chains.
    level : float
        Credible level recorded with the result; see :func:`credible_interval`.
    tol : float
        Relative residual of each conjugate-gradient solve.
    rng : int or numpy.random.Generator, optional
    progress : bool

    Returns
    -------
    CleanResult
        ``estimate``: input shape and dtype (integers rounded and clipped);
        ``mean`` and ``std``: float32 in the input's units (``std`` also with
        ``method="map"``, from a short temperature-1 run); ``params``: every
        parameter used, with ``estimated`` listing those set by ``"auto"``.

    References
    ----------
    .. [1] U. Schmidt, Q. Gao and S. Roth, "A generative perspective on MRFs in
       low-level vision", CVPR 2010.
    .. [2] G. Papandreou and A. Yuille, "Gaussian sampling by local
       perturbations", NIPS 2010.
    .. [3] D. L. Donoho and I. M. Johnstone, Biometrika 81 (1994) 425-455.
    .. [4] C. M. Stein, Annals of Statistics 9 (1981) 1135-1151.
    .. [5] A. Foi et al., IEEE TIP 17 (2008) 1737-1754.

    Examples
    --------
    >>> import numpy as np
    >>> clean = np.zeros((48, 48)); clean[:, 24:] = 100.0
    >>> noisy = clean + np.random.default_rng(0).normal(0, 10, clean.shape)
    >>> res = clean_grey(noisy.astype(np.float32), chains=1, rng=1)
    >>> bool(np.abs(res.estimate - clean).mean() < np.abs(noisy - clean).mean() / 2)
    True
    """
    a = np.asarray(image)
    lv.check_dtype(a.dtype)
    if a.ndim not in (2, 3) or a.size == 0:
        raise ValueError(f"expected a non-empty 2-D image or 3-D stack, got shape {a.shape}")
    check_options(a.shape, method=method, chains=chains)
    check_prior(prior)
    if a.dtype.kind == "f" and not np.all(np.isfinite(a)):
        raise ValueError("image contains NaN or infinite values")
    if not 0 < float(level) < 1:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    grid = Grid.for_image(a)
    seed = to_seed(rng)
    y = lv.to_work(a).astype(np.float64).reshape(grid.shape)
    setup = grey_setup(y, noise=noise, sigma=sigma, gain=gain, read_variance=read_variance,
                       strength=strength, curvature=curvature, prior=prior, seed=seed, tol=tol)
    block = sample_block(y, setup, method=method, schedule=schedule, sweeps=sweeps,
                         burn_in=burn_in, samples=samples, chains=chains, tol=tol, seed=seed,
                         progress=progress)
    params = {"method": method, "seed": seed, **setup.describe(), **block.params,
              "level": float(level)}  # block.params holds the chains run
    mean = (setup.low + setup.span * block.mean_u).astype(np.float32).reshape(a.shape)
    std = (setup.span * block.std_u).astype(np.float32).reshape(a.shape)
    estimate = lv.from_work(setup.low + setup.span * block.est_u, a.dtype).reshape(a.shape)
    return CleanResult(estimate=estimate, mean=mean, std=std, energy=block.energy,
                       temperatures=block.temperatures, params=params,
                       diagnostics=block.diagnostics, kind="grey", method=method)


@dataclass
class GreySetup:
    """What a greyscale posterior needs besides the pixels: given or estimated once.

    Tiles of one image share it, so that every tile has the same model.
    ``low`` and ``span`` map intensities to the prior's units, ``u = (y - low) / span``;
    ``sure_table`` (``[strength, SURE]``), ``sure_walk`` (``[strength, what the
    walk minimised]``, see :data:`SPREAD_SHARE`), ``curvature_table`` and
    ``noise_curve`` record how the strength, the curvature weight and the noise
    were chosen (None when given);
    ``sure_strength`` is the strength SURE chose before the curvature term was
    tried (the prior's own strength unless the term was taken or the block prior
    replaced it); ``block_trial`` is ``[strength, SURE]`` of the block prior's one
    risk after the smooth prior's trials (:data:`BLOCK_SWITCH`; then the other tables
    describe the smooth prior's trials); ``family`` is
    ``"smooth"``, ``"textured"`` or ``"blocks"`` (a shipped prior, see :data:`PRIORS`) or
    ``"given"``.
    """

    term: object  # GaussianNoise or PoissonGaussianNoise
    low: float
    span: float
    prior: GSMPrior  # with its strength
    estimated: list
    sure_table: list | None = None
    noise_curve: dict | None = None
    curvature_table: list | None = None
    sure_strength: float | None = None
    sure_walk: list | None = None
    block_trial: list | None = None
    family: str = "given"  # "smooth", "textured" or "blocks" (a shipped prior) or "given"

    def observed(self, y, smooth=None):
        """``(u, var_u)``: a block of physical intensities in the prior's units and its noise
        variance (evaluated at ``smooth``, default the block lightly smoothed)."""
        var_phys = self.term.variance(_smooth(y) if smooth is None else smooth)
        return (y - self.low) / self.span, var_phys / self.span**2

    def describe(self):
        """JSON-ready parameters: noise, prior, intensity frame, what was estimated and how."""
        d = {**self.term.describe(), **self.prior.describe(), "prior_family": self.family,
             "intensity_low": self.low,
             "intensity_span": self.span, "estimated": list(self.estimated)}
        if self.sure_table is not None:
            d["sure"] = self.sure_table
            d["sure_walk"] = self.sure_walk
            d["sure_strength"] = self.sure_strength
        if self.curvature_table is not None:
            d["sure_curvature"] = self.curvature_table
        if self.block_trial is not None:
            d["sure_blocks"] = self.block_trial
        if self.noise_curve is not None:
            d["noise_curve"] = self.noise_curve
        return d


def grey_setup(y, *, noise="auto", sigma="auto", gain="auto", read_variance="auto",
               strength="auto", curvature="auto", prior=None, seed=0, tol=DEFAULT_TOL) -> GreySetup:
    """Noise model, intensity frame, prior strength and curvature for an image, given or estimated.

    Parameters
    ----------
    y : ndarray, shape (Z, H, W)
        Physical intensities (float64).
    noise, sigma, gain, read_variance, strength, curvature, prior, tol
        As for :func:`clean_grey`; everything left ``"auto"`` is estimated
        from ``y`` and named in ``estimated``.
    seed : int
        Kernel seed (the strength runs use a stream derived from it).

    Returns
    -------
    GreySetup
    """
    if noise not in NOISES:
        raise ValueError(f"noise must be one of {NOISES}, got {noise!r}")
    estimated = []
    noise_curve = None
    curve = None
    if noise == "auto":
        if gain != "auto" or read_variance != "auto":
            noise = "poisson-gaussian"
        elif sigma != "auto":
            noise = "gaussian"
        else:
            try:
                curve = estimate_poisson_gaussian(y)
            except ValueError:  # too small or too textured to see a noise curve
                curve = None
            share = 0.0
            if curve is not None and curve.a > AUTO_PG_SIGNIFICANCE * curve.a_se:
                top = float(np.percentile(y, 90))
                share = curve.a * max(top, 0.0) / max(curve.a * max(top, 0.0) + curve.b, 1e-300)
            noise = "poisson-gaussian" if share >= AUTO_PG_SHARE else "gaussian"
            estimated.append("noise")
    if noise == "gaussian":
        if sigma == "auto":
            s = estimate_sigma(y, flattest=FLATTEST_SHARE)
            estimated.append("sigma")
        else:
            s = _number("sigma", sigma)
        if s <= 0:
            s = 1e-3 * max(float(np.ptp(y)), 1e-12)  # noise-free input: a token level
        term = GaussianNoise(float(s))
        if curve is not None:
            noise_curve = {"a": curve.a, "b": curve.b}
    else:
        if gain == "auto" or read_variance == "auto":
            curve = curve or estimate_poisson_gaussian(y)
        ga = curve.a if gain == "auto" else _number("gain", gain, positive=False)
        rb = curve.b if read_variance == "auto" else _number("read_variance", read_variance,
                                                             positive=False)
        estimated += [k for k, v in (("gain", gain), ("read_variance", read_variance)) if v == "auto"]
        if ga == 0 and rb == 0:
            rb = (1e-3 * max(float(np.ptp(y)), 1e-12)) ** 2
        term = PoissonGaussianNoise(float(ga), float(rb))
    pilot = _smooth(y)
    if isinstance(term, PoissonGaussianNoise) and term.b == 0:
        # without read noise the floor comes from the whole image, not from each tile
        term = PoissonGaussianNoise(term.a, 0.0, term.default_floor(pilot))
    low, span = intensity_frame(y, float(np.sqrt(np.mean(term.variance(pilot)))), smooth=pilot)
    setup = GreySetup(term, low, span, None, estimated, None, noise_curve)  # prior: below
    u, var_u = setup.observed(y, pilot)
    noise_sd = float(np.sqrt(np.mean(var_u)))
    # a shipped prior by name ("auto" for None), or None for a GSMPrior or a file
    choice = "auto" if prior is None else prior if isinstance(prior, str) and prior in PRIORS else None
    roughness = signal_roughness(u, var_u) if choice and strength == "auto" else None
    # With strength and curvature on "auto" and no prior named, an image no smoother
    # than the training images gets ROUGH_PRIOR (the block prior; a volume the prior
    # tuned for denoising on them, "textured");
    # a smoother one starts with the score-matching prior ("smooth"), with which SURE can
    # judge the curvature term (with the tuned one it cannot; measured at stop 15, see
    # TUNED_STRENGTH_START and DEVELOPERS.md), and may still end on the block prior
    # (BLOCK_SWITCH).  Smoother: the strength the image's roughness predicts for the
    # score-matching prior is above the gate.
    routed = False  # the prior was chosen here by roughness (see BLOCK_SWITCH)
    if choice == "auto":
        auto = strength == "auto" and curvature == "auto"
        routed = auto
        # a volume needs a z potential, which the block prior has not
        rough = ROUGH_PRIOR if y.shape[0] == 1 else "textured"
        choice = (rough if auto and strength_start(noise_sd, roughness)
                  < SMOOTH_PRIOR_GATE * strength_guess(noise_sd) else "smooth")
        if auto:
            estimated.append("prior")
    # the curvature term is tried only with the smooth prior (see SMOOTH_PRIOR_GATE)
    no_curvature = choice in ("textured", "blocks")
    if choice:
        base = GSMPrior.load(shipped={"textured": TUNED_PRIOR_FILE,
                                      "blocks": BLOCK_PRIOR_FILE}.get(choice, PRIOR_FILE))
    elif isinstance(prior, GSMPrior):
        base = prior
    else:
        base = GSMPrior.load(prior)
    if base.blocks and not base.groups and y.shape[0] > 1:
        raise ValueError(NO_Z_POTENTIAL)
    setup.family = choice or "given"
    # Under signal-dependent noise the prior acts on the noise-stabilised image (see
    # GSMPrior.noise_ref): over 18 Poisson-Gaussian draws on the benchmark's images
    # +0.34 dB on average (cell 512^2 +1.1 to +1.2, where SURE now takes the curvature
    # term; coins +0.25 to +0.34; camera and moon -0.04 to +0.01), measured at stop 12
    # (DEVELOPERS.md).  It belongs to this image's noise, so one carried by a given prior
    # (from another image) is replaced, and Gaussian noise has none.
    signal_dependent = isinstance(term, PoissonGaussianNoise) and term.a > 0
    base = base.with_noise_ref(float(np.mean(var_u)) if signal_dependent else 0.0)
    sseed = seed ^ 0x3C3C3C3C
    # a curvature carried by a given prior counts as given unless "auto" asks for SURE
    base = base.with_curvature(0.0 if curvature == "auto"
                               else _number("curvature", curvature, positive=False))
    if strength == "auto":
        # the guesses were fitted for the shipped priors; another prior starts at 0.5
        start = (0.5 if not choice else
                 strength_start(noise_sd, roughness, {"textured": TUNED_STRENGTH_START,
                                                      "blocks": BLOCK_STRENGTH_START}
                                .get(choice, STRENGTH_START)))
        fit = choose_strength(u, var_u, base, start=start, seed=sseed, tol=tol,
                              reflect=SURE_REFLECT, spread_share=SPREAD_SHARE)
        lam = fit.strength
        setup.sure_table = fit.sure
        setup.sure_walk = fit.table
        setup.sure_strength = lam
        estimated.append("strength")
    else:
        lam = _number("strength", strength, positive=False)
    if curvature == "auto" and no_curvature:
        setup.curvature_table = []  # not tried with the rough-image priors (SMOOTH_PRIOR_GATE)
        estimated.append("curvature")
    elif curvature == "auto":
        # the least plain SURE the walk found for the prior alone (the parabola's vertex
        # it settles on is not itself evaluated): one risk fewer than computing it afresh
        # (not when the walk's chains were mirrored: the curvature risks use plain draws)
        none_risk = (min((r for _, r in setup.sure_table), default=None)
                     if strength == "auto" and not SURE_REFLECT else None)
        cfit = choose_curvature(u, var_u, base.with_strength(lam), seed=sseed, tol=tol,
                                start=CURVATURE_GUESS / float(np.mean(var_u)), none_risk=none_risk,
                                strength_factor=CURVATURE_STRENGTH if strength == "auto" else 1.0,
                                margin=CURVATURE_MARGIN)
        setup.curvature_table = cfit.table
        estimated.append("curvature")
        if cfit.curvature > 0:
            base = base.with_curvature(cfit.curvature)
            lam = cfit.strength  # the term took over part of the smoothing
        elif routed and y.shape[0] == 1 and BLOCK_SWITCH > 0:
            # the term was not taken: one risk of the block prior against the prior alone's
            chosen = cfit.table[0][2]
            trial = BLOCK_SWITCH * setup.sure_strength
            bprior = (GSMPrior.load(shipped=BLOCK_PRIOR_FILE).with_noise_ref(base.noise_ref)
                      .with_curvature(0.0).with_strength(trial))
            brisk = sure_at(u, var_u, bprior, seed=sseed, tol=tol)  # plain, as the term's risks
            setup.block_trial = [float(trial), float(brisk)]
            if brisk < chosen:
                base, lam, setup.family = bprior, trial, "blocks"
    setup.prior = base.with_strength(lam)
    return setup


@dataclass
class Block:
    """The posterior of one block (a whole image or a tile) in the prior's units."""

    est_u: np.ndarray
    mean_u: np.ndarray
    std_u: np.ndarray
    energy: np.ndarray
    temperatures: np.ndarray
    diagnostics: Diagnostics
    params: dict


def sample_block(y, setup: GreySetup, *, method="mean", schedule=None, sweeps=None, burn_in=None,
                 samples=None, chains=None, tol=DEFAULT_TOL, seed=0,
                 progress=False) -> Block:
    """Posterior mean and std (and the annealed MAP for ``method="map"``) of ``y`` under ``setup``.

    Parameters
    ----------
    y : ndarray, shape (Z, H, W)
        Physical intensities (float64): a whole image or a tile with its margin.
    setup : GreySetup
    method, schedule, sweeps, burn_in, samples, chains, tol, progress
        As for :func:`clean_grey`.
    seed : int
        Kernel seed of this block.

    Returns
    -------
    Block
        Images in the prior's units, energy trace, diagnostics and the
        sampler's parameters.
    """
    u, var_u = setup.observed(y)
    grid = Grid.for_image(u)
    burn_in = int(DEFAULT_BURN_IN if burn_in is None else burn_in)
    model = GreyModel(u, variance=var_u, prior=setup.prior,
                      starts=[_smooth(u, w) for w in START_WIDTHS],
                      tol=tol, sample_tol=max(tol, DEFAULT_SAMPLE_TOL), grid=grid,
                      single_solves=burn_in, relax=FINAL_RELAX, reflect_scales=FINAL_REFLECT,
                      closing_mean=FINAL_CLOSING_MEAN)
    del var_u  # the model keeps its inverse; not held through the chains
    diag = Diagnostics()
    params = dict(model.describe())
    samples = int(samples or DEFAULT_SAMPLES)
    if method == "map":
        schedule = schedule or Geometric(1.0, 0.01)
        sweeps = int(sweeps or DEFAULT_ANNEAL_SWEEPS)
        model.relax, model.reflect_scales = 0.0, False  # annealing draws afresh
        anneal_chains = DEFAULT_ANNEAL_CHAINS if chains is None else int(chains)
        res = anneal(model, schedule=schedule, sweeps=sweeps, chains=anneal_chains, seed=seed,
                     progress=progress)
        model.relax, model.reflect_scales = FINAL_RELAX, FINAL_REFLECT
        est_u = res.state.x
        diag.final_energy = res.energy
        diag.quench_passes = int(res.run.quench_passes[res.chain])
        energy, temps = res.run.energies, res.run.temperatures
        params.update(schedule.describe(), sweeps=sweeps, anneal_chains=anneal_chains)
    chains = DEFAULT_CHAINS if chains is None else int(chains)
    post = sample_posterior(model, burn_in=burn_in, samples=samples, chains=chains,
                            seed=seed ^ 0x5A5A5A5A, progress=progress)
    mean_u, std_u = post.tally.mean64(), np.sqrt(post.tally.var64())
    mc_var = post.tally.mc_variance()
    if mc_var is not None:
        diag.mc_error = float(np.sqrt(mc_var / max(float(np.mean(std_u * std_u)), 1e-300)))
    record_posterior(diag, post, detail="" if mc_var is None else (
        f"; that R-hat is of the energy, and the mean's Monte-Carlo error is"
        f" {diag.mc_error:.2f} of its posterior sd"))
    params.update(burn_in=burn_in, samples=samples, chains=chains)
    if method == "mean":
        est_u = mean_u
        diag.final_energy = model.energy_of(mean_u)
        energy, temps = post.run.energies, post.run.temperatures
    st = model.stats
    params["cg_iterations_per_solve"] = round(st.iterations / max(st.solves, 1), 2)
    if st.worst_residual > 10 * tol:
        diag.notes.append(f"conjugate gradients stopped at relative residual {st.worst_residual:.2g}")
    return Block(est_u, mean_u, std_u, energy, temps, diag, params)
