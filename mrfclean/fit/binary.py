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
from ..lattice import Grid
from ..sampler import kernel_threads
from ..models.binary import BinaryModel, FlipNoise, TwoLevelGaussian

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
        """Count one configuration given in image layout ``(H, W)`` or ``(Z, H, W)``."""
        s = np.asarray(spins, dtype=np.int8)
        grid = Grid.for_image(s, boundary=boundary)
        return self.add_packed(grid.pack(s, np.int8), grid)

    def add_packed(self, state, grid):
        """Count one configuration in the kernels' packed layout (no image-sized temporaries)."""
        kernels.coupling_counts(state, grid.shape[2], grid.parity, self.counts)
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


class NoiseStats:
    """Sufficient statistics of the data term over sampled spins (streamed, no stored samples).

    Flip noise: the number of sites where the spins disagree with the observed
    ones.  Two-level Gaussian: count, sum and sum of squares of the intensities
    under "on" and under "off".
    """

    def __init__(self, kind, observed, grid):
        self.kind, self.grid, self.n = kind, grid, 0
        if kind == "flip":
            self.packed_observed = grid.pack(observed, np.int8)
            self.mismatch = 0
        else:
            self.y = np.asarray(observed, dtype=np.float32).reshape(grid.shape)
            self.moments = np.zeros((2, 3))  # [off, on] x [count, sum, sum of squares]

    def add(self, state, model):
        self.n += 1
        if self.kind == "flip":
            self.mismatch += int(kernels.count_mismatch(state, self.packed_observed,
                                                        self.grid.shape[2], self.grid.parity))
            return
        on = model.image(state) > 0
        for k, mask in ((1, on), (0, ~on)):
            self.moments[k] += (np.count_nonzero(mask), np.sum(self.y, where=mask, dtype=np.float64),
                                np.sum(np.square(self.y, dtype=np.float64), where=mask))

    def fit(self):
        """Exact M-step for the data term given the samples; ``None`` if degenerate."""
        if self.kind == "flip":
            rate = self.mismatch / (self.n * self.grid.size)
            return FlipNoise(float(np.clip(rate, FLIP_RATE_MIN, FLIP_RATE_MAX)))
        (n0, s0, q0), (n1, s1, q1) = self.moments
        if n0 == 0 or n1 == 0:
            return None
        low, high = s0 / n0, s1 / n1
        sse = (q0 - s0 * low) + (q1 - s1 * high)  # sum (y - mean)^2 within each class
        sigma = math.sqrt(max(sse, 0.0) / (n0 + n1))
        if high <= low or sigma <= 0:
            return None
        return TwoLevelGaussian(float(low), float(high), float(sigma))


def _majority_flip_rate(spins):
    """Starting flip rate: how often a pixel disagrees with its 3x3 majority."""
    from scipy.ndimage import uniform_filter

    s = np.asarray(spins, dtype=np.float32)
    size = (1, 3, 3) if s.ndim == 3 else 3
    disagree = (uniform_filter(s, size=size, mode="nearest") >= 0) != (s > 0)
    return float(np.clip(np.mean(disagree), 0.01, FLIP_RATE_MAX))


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
    if beta_fixed is not None and fixed is not None and (betaz_fixed is not None or not planes):
        return BinaryFit(beta, beta_z, term, history)
    grid = Grid.for_image(y, boundary=boundary)
    with kernel_threads(y.size):
        model = BinaryModel(term.field(y), coupling=beta, coupling_z=beta_z, grid=grid)
        state = model.start(0, seed)
        for r in range(rounds):
            if r:
                model.set_field(term.field(y))
                model.coupling, model.coupling_z = beta, beta_z
            stats = CouplingStats()
            noise_stats = NoiseStats(noise, y, grid)
            for k in range(burn_in + samples):
                model.sweep(state, 1.0, int(kernels.stream_key(seed, 0, r * 1000 + k)))
                if k >= burn_in:
                    stats.add_packed(state, grid)
                    noise_stats.add(state, model)
            new_term = fixed or noise_stats.fit()
            if new_term is not None:
                term = new_term
            b, bz = stats.fit(planes=planes)
            beta = beta_fixed if beta_fixed is not None else b
            beta_z = betaz_fixed if betaz_fixed is not None else (bz if planes else beta)
            history.append({"round": r, "coupling": beta, "coupling_z": beta_z, **term.describe()})
    return BinaryFit(beta, beta_z, term, history)
