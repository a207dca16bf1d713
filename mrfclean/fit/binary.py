"""Estimating the binary model's parameters from the noisy image alone.

* Coupling: maximum pseudo-likelihood (Besag 1975) on posterior samples.
* Noise: flip rate, or the two Gaussian levels and their spread, from the same
  samples (the M-step of EM for the data term is exact given the spins).
* Both inside a stochastic EM loop in which the E-step is replaced by a short
  run of the Gibbs sampler at T = 1 (Chalmond 1989, "Gibbsian EM"; Younes 1989).
* Gaussian levels are started from a two-component mixture fitted by EM from
  Otsu's threshold (Otsu 1979; Dempster, Laird & Rubin 1977).

References
----------
.. [1] J. Besag, "Statistical analysis of non-lattice data", The Statistician 24
   (1975) 179-195.
.. [2] B. Chalmond, "An iterative Gibbsian technique for reconstruction of m-ary
   images", Pattern Recognition 22 (1989) 747-761.
.. [3] L. Younes, "Parametric inference for imperfectly observed Gibbsian fields",
   Probab. Theory Related Fields 82 (1989) 625-645.
.. [4] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Trans. SMC 9 (1979) 62-66.
.. [5] A. P. Dempster, N. M. Laird and D. B. Rubin, "Maximum likelihood from
   incomplete data via the EM algorithm", J. R. Stat. Soc. B 39 (1977) 1-38.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from .. import kernels
from ..sampler import kernel_threads
from ..models.binary import BinaryModel, FlipNoise, TwoLevelGaussian, neighbour_sums

#: Bounds of estimated parameters (an all-equal image would otherwise drive the
#: coupling to infinity and the flip rate to zero).
COUPLING_MAX = 3.0
FLIP_RATE_MIN = 1e-4
FLIP_RATE_MAX = 0.45
#: EM starts from this coupling.  EM moves slowly in the coupling; on the
#: specimens of scripts/bench_binary.py the fixed point lies near 1 and starting
#: from below took many more rounds to reach it (measured; see DEVELOPERS.md).
START_COUPLING = 1.0


class CouplingStats:
    """Pseudo-likelihood sufficient statistics of spin configurations.

    For each site the pair ``(s_i * in-plane neighbour sum, s_i * z neighbour
    sum)`` is counted; the log pseudo-likelihood of couplings ``(b, bz)`` is
    ``sum counts[a, c] * log sigmoid(2 (b a + bz c))``.
    """

    def __init__(self):
        self.counts = np.zeros((9, 5), dtype=np.int64)  # a in -4..4, c in -2..2

    def add(self, spins, boundary="free"):
        s = np.asarray(spins, dtype=np.int8)
        s = s.reshape((1, *s.shape)) if s.ndim == 2 else s
        s16 = s.astype(np.int16)
        n, m = neighbour_sums(s16, periodic=boundary == "periodic")
        a = (s16 * n + 4).ravel()
        c = (s16 * m + 2).ravel()
        self.counts += np.bincount(a * 5 + c, minlength=45).reshape(9, 5)
        return self

    def neg_log_pl(self, b, bz=0.0):
        a = np.arange(-4, 5)[:, None]
        c = np.arange(-2, 3)[None, :]
        x = 2.0 * (b * a + bz * c)
        return float(np.sum(self.counts * np.logaddexp(0.0, -x)))

    def fit(self, *, planes: bool) -> tuple[float, float]:
        """Maximum pseudo-likelihood couplings ``(beta, beta_z)`` within ``[0, COUPLING_MAX]``."""
        if not planes:
            r = optimize.minimize_scalar(lambda b: self.neg_log_pl(b), bounds=(0.0, COUPLING_MAX),
                                         method="bounded", options={"xatol": 1e-5})
            return float(r.x), float(r.x)
        r = optimize.minimize(lambda v: self.neg_log_pl(v[0], v[1]), x0=[0.5, 0.5],
                              bounds=[(0.0, COUPLING_MAX)] * 2, method="L-BFGS-B")
        return float(r.x[0]), float(r.x[1])


def pseudo_likelihood_coupling(spins, *, boundary="free"):
    """Maximum pseudo-likelihood coupling of one Ising configuration (Besag 1975).

    .. math:: \\hat\\beta = \\arg\\max_\\beta \\sum_i \\log
              \\sigma\\big(2 s_i \\beta \\textstyle\\sum_{j \\sim i} s_j\\big)

    Parameters
    ----------
    spins : array_like of {-1, +1}, shape (H, W) or (Z, H, W)
    boundary : {"free", "periodic"}

    Returns
    -------
    (beta, beta_z) : tuple of float
        ``beta_z`` equals ``beta`` for a single plane.

    Examples
    --------
    >>> import numpy as np
    >>> s = np.ones((8, 8), dtype=np.int8)
    >>> pseudo_likelihood_coupling(s)[0] > 2.9   # all equal: as large as allowed
    True
    """
    s = np.asarray(spins)
    planes = s.ndim == 3 and s.shape[0] > 1
    return CouplingStats().add(s, boundary).fit(planes=planes)


def fit_two_levels(values, *, iterations: int = 100, tol: float = 1e-7):
    """Two-component Gaussian mixture with a shared variance, by EM from Otsu's threshold.

    Returns
    -------
    (low, high, sigma, weight_high) : tuple of float
    """
    from skimage.filters import threshold_otsu

    y = np.asarray(values, dtype=np.float64).ravel()
    if y.size > 1_000_000:  # a systematic subsample is plenty for four numbers
        y = y[:: y.size // 1_000_000]
    lo_v, hi_v = float(y.min()), float(y.max())
    if hi_v == lo_v:
        spread = max(abs(lo_v), 1.0) * 1e-3
        return lo_v - spread, hi_v + spread, spread, 0.5
    thr = threshold_otsu(y)
    on = y > thr
    if on.all() or not on.any():
        on = y > np.median(y)
    low, high = y[~on].mean(), y[on].mean()
    sigma = math.sqrt(max(np.mean((y - np.where(on, high, low)) ** 2), 1e-12))
    w = on.mean()
    floor = (hi_v - lo_v) * 1e-4
    prev = -np.inf
    for _ in range(iterations):
        a = -0.5 * ((y - high) / sigma) ** 2 + math.log(max(w, 1e-12))
        b = -0.5 * ((y - low) / sigma) ** 2 + math.log(max(1 - w, 1e-12))
        mx = np.maximum(a, b)
        ll = mx + np.log(np.exp(a - mx) + np.exp(b - mx))
        r = np.exp(a - ll)
        w = float(r.mean())
        if w <= 0 or w >= 1:
            break
        high = float(np.sum(r * y) / np.sum(r))
        low = float(np.sum((1 - r) * y) / np.sum(1 - r))
        sigma = math.sqrt(max(float(np.mean(r * (y - high) ** 2 + (1 - r) * (y - low) ** 2)), floor**2))
        total = float(ll.sum()) - y.size * math.log(sigma)
        if abs(total - prev) < tol * abs(total):
            break
        prev = total
    if high < low:
        low, high, w = high, low, 1 - w
    return float(low), float(high), float(max(sigma, floor)), float(w)


@dataclass
class BinaryFit:
    """Estimated parameters of the binary model and how they evolved."""

    coupling: float
    coupling_z: float
    noise: object
    history: list = field(default_factory=list)

    def describe(self):
        d = {"coupling": self.coupling, "coupling_z": self.coupling_z}
        d.update(self.noise.describe())
        return d


def _noise_from_stats(kind, observed, spins_stack, fixed):
    """Exact M-step of the data term given sampled spins."""
    if kind == "flip":
        if fixed is not None:
            return fixed
        mismatch = np.mean([np.mean(s != observed) for s in spins_stack])
        return FlipNoise(float(np.clip(mismatch, FLIP_RATE_MIN, FLIP_RATE_MAX)))
    if fixed is not None:
        return fixed
    y = observed
    on_sum = off_sum = on_n = off_n = sq = 0.0
    for s in spins_stack:
        on = s > 0
        on_n += on.sum()
        off_n += (~on).sum()
        on_sum += y[on].sum()
        off_sum += y[~on].sum()
    if on_n == 0 or off_n == 0:
        return None
    high, low = on_sum / on_n, off_sum / off_n
    for s in spins_stack:
        mu = np.where(s > 0, high, low)
        sq += np.sum((y - mu) ** 2)
    sigma = math.sqrt(sq / (len(spins_stack) * y.size))
    if high <= low or sigma <= 0:
        return None
    return TwoLevelGaussian(float(low), float(high), float(sigma))


def _majority_flip_rate(spins):
    """Starting flip rate: how often a pixel disagrees with its 3x3 majority."""
    from scipy.ndimage import uniform_filter

    s = np.asarray(spins, dtype=np.float32)
    size = (1, 3, 3) if s.ndim == 3 else 3
    majority = np.where(uniform_filter(s, size=size, mode="nearest") >= 0, 1, -1)
    return float(np.clip(np.mean(majority != s), 0.01, FLIP_RATE_MAX))


def fit_binary(observed, *, noise: str, coupling="auto", coupling_z="auto", flip_rate="auto",
               levels="auto", boundary="free", rounds: int = 20, burn_in: int = 5,
               samples: int = 5, seed: int = 0) -> BinaryFit:
    """Estimate what is not given, by stochastic (Gibbsian) EM with pseudo-likelihood.

    Each round samples the posterior under the current parameters at T = 1
    (continuing the chain of the previous round), then sets the data-term
    parameters to their exact maximum-likelihood values given those samples and
    the couplings to the maximum pseudo-likelihood values (Chalmond 1989).

    Parameters
    ----------
    observed : ndarray
        Observed spins t in {-1, +1} (``noise="flip"``) or intensities
        (``noise="gaussian"``), shape ``(H, W)`` or ``(Z, H, W)``.
    noise : {"flip", "gaussian"}
    coupling, coupling_z : float or "auto"
    flip_rate : float or "auto"
        For ``noise="flip"``.
    levels : (low, high, sigma) or "auto"
        For ``noise="gaussian"``.
    rounds, burn_in, samples : int
        EM rounds; sweeps discarded and kept in each round.
    seed : int
        Kernel seed (from :func:`mrfclean.sampler.to_seed`).
    """
    y = np.asarray(observed)
    y = y.reshape((1, *y.shape)) if y.ndim == 2 else y
    planes = y.shape[0] > 1
    fixed = None
    if noise == "flip":
        if flip_rate != "auto":
            fixed = FlipNoise(float(flip_rate))
        term = fixed or FlipNoise(_majority_flip_rate(y))
    elif noise == "gaussian":
        if levels != "auto":
            fixed = TwoLevelGaussian(*map(float, levels))
            term = fixed
        else:
            low, high, sigma, _ = fit_two_levels(y)
            term = TwoLevelGaussian(low, high, sigma)
    else:
        raise ValueError(f"noise must be 'flip' or 'gaussian', got {noise!r}")
    beta_fixed = None if coupling == "auto" else float(coupling)
    betaz_fixed = None if coupling_z in ("auto", None) else float(coupling_z)
    beta = beta_fixed if beta_fixed is not None else START_COUPLING
    beta_z = betaz_fixed if betaz_fixed is not None else beta
    history = []
    state = None
    if beta_fixed is not None and fixed is not None and (betaz_fixed is not None or not planes):
        return BinaryFit(beta, beta_z, term, history)
    with kernel_threads(y.size):
        for r in range(rounds):
            model = BinaryModel(term.field(y), coupling=beta, coupling_z=beta_z, boundary=boundary)
            if state is None:
                state = model.start(0, seed)
            stack = []
            stats = CouplingStats()
            for k in range(burn_in + samples):
                model.sweep(state, 1.0, int(kernels.stream_key(seed, 0, r * 1000 + k)))
                if k >= burn_in:
                    s = model.image(state)
                    stack.append(s)
                    stats.add(s, boundary)
            new_term = _noise_from_stats(noise, y, stack, fixed)
            if new_term is not None:
                term = new_term
            b, bz = stats.fit(planes=planes)
            beta = beta_fixed if beta_fixed is not None else b
            beta_z = betaz_fixed if betaz_fixed is not None else (bz if planes else beta)
            history.append({"round": r, "coupling": beta, "coupling_z": beta_z, **term.describe()})
    return BinaryFit(beta, beta_z, term, history)
