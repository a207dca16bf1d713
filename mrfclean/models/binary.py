r"""Binary (bi-level) model: Ising prior plus a data term for the noise.

Convention
----------
Spins :math:`s_i \in \{-1, +1\}` on the 4-neighbour grid (6-neighbour for
stacks, with a separate coupling along z); +1 ("on") is the higher of the
image's two levels.  The posterior energy is

.. math::

    E(s) = -\beta \sum_{\langle ij \rangle} s_i s_j
           - \beta_z \sum_{\langle ij \rangle_z} s_i s_j
           - \sum_i h_i s_i ,
    \qquad p(s \mid y) \propto \exp(-E(s) / T),

with T = 1 for the posterior itself.  The data term enters only through the
local fields :math:`h_i`, half the log-likelihood ratio of "on" against "off":

* :class:`FlipNoise` — observed :math:`t_i \in \{-1,+1\}` flipped with
  probability p: :math:`h_i = \tfrac12 \ln\frac{1-p}{p}\, t_i`.
* :class:`TwoLevelGaussian` — intensities :math:`y_i \sim N(\mu_{on}, \sigma^2)`
  or :math:`N(\mu_{off}, \sigma^2)`:
  :math:`h_i = \frac{(y_i-\mu_{off})^2 - (y_i-\mu_{on})^2}{4\sigma^2}`.

References
----------
.. [1] S. Geman and D. Geman, "Stochastic relaxation, Gibbs distributions, and
   the Bayesian restoration of images", IEEE TPAMI 6 (1984) 721-741.
.. [2] D. M. Greig, B. T. Porteous and A. H. Seheult, "Exact maximum a
   posteriori estimation for binary images", J. R. Stat. Soc. B 51 (1989) 271-279.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .. import kernels
from ..lattice import Grid
from ..sampler import START_SWEEP, ChainModel, Tally


def neighbour_sums(spins, *, periodic=False):
    """In-plane and between-plane neighbour sums of a ``(Z, H, W)`` array (numpy, any dtype).

    Returns ``(n, nz)``: the sum over the 4 in-plane neighbours (wrapped when
    ``periodic``) and over the 2 z neighbours (free boundary), 0 outside.
    """
    s = np.asarray(spins)
    n = np.zeros_like(s)
    if periodic:
        for ax in (1, 2):
            n += np.roll(s, 1, axis=ax) + np.roll(s, -1, axis=ax)
    else:
        n[:, 1:, :] += s[:, :-1, :]
        n[:, :-1, :] += s[:, 1:, :]
        n[:, :, 1:] += s[:, :, :-1]
        n[:, :, :-1] += s[:, :, 1:]
    nz = np.zeros_like(s)
    nz[1:] += s[:-1]
    nz[:-1] += s[1:]
    return n, nz


def _check_rate(p):
    if not (isinstance(p, (int, float)) and 0.0 < p < 0.5):
        raise ValueError(f"flip rate must be in (0, 0.5), got {p!r}")


@dataclass(frozen=True)
class FlipNoise:
    """Each pixel of a bi-level image flipped independently with probability ``flip_rate``."""

    flip_rate: float

    def __post_init__(self):
        _check_rate(self.flip_rate)

    def field(self, observed):
        """Local fields ``h = 1/2 ln((1-p)/p) t`` for observed spins ``t``."""
        t = np.asarray(observed, dtype=np.float32)
        return np.float32(0.5 * math.log((1.0 - self.flip_rate) / self.flip_rate)) * t

    def log_likelihood(self, spins, observed):
        """``sum_i log P(t_i | s_i)``."""
        agree = np.count_nonzero(np.asarray(spins) == np.asarray(observed))
        n = np.size(observed)
        return agree * math.log1p(-self.flip_rate) + (n - agree) * math.log(self.flip_rate)

    def describe(self):
        return {"noise": "flip", "flip_rate": float(self.flip_rate)}


@dataclass(frozen=True)
class TwoLevelGaussian:
    """Intensities around two levels, ``N(low, sigma^2)`` off and ``N(high, sigma^2)`` on."""

    low: float
    high: float
    sigma: float

    def __post_init__(self):
        if not (math.isfinite(self.low) and math.isfinite(self.high) and self.high > self.low):
            raise ValueError(f"need finite levels with high > low, got {self.low!r}, {self.high!r}")
        if not (math.isfinite(self.sigma) and self.sigma > 0):
            raise ValueError(f"sigma must be positive, got {self.sigma!r}")

    def field(self, observed):
        """``h = ((y - low)^2 - (y - high)^2) / (4 sigma^2) = (high - low) (y - (low + high)/2) / (2 sigma^2)``.

        Returned as float32 (what the model stores), computed in the second,
        cancellation-free form.
        """
        y = np.asarray(observed, dtype=np.float32)
        slope = np.float32((self.high - self.low) / (2.0 * self.sigma**2))
        return slope * (y - np.float32(0.5 * (self.low + self.high)))

    def log_likelihood(self, spins, observed):
        """``sum_i log N(y_i; mu(s_i), sigma^2)``."""
        y = np.asarray(observed, dtype=np.float64)
        mu = np.where(np.asarray(spins) > 0, self.high, self.low)
        r = (y - mu) / self.sigma
        return float(-0.5 * np.sum(r * r) - y.size * (math.log(self.sigma) + 0.5 * math.log(2 * math.pi)))

    def describe(self):
        return {"noise": "gaussian", "low": float(self.low), "high": float(self.high),
                "sigma": float(self.sigma)}


def on_fraction(counts, n):
    """``counts / n`` as float32, in place when ``counts`` is float32 (one rule for all tallies)."""
    p = np.asarray(counts, dtype=np.float32)
    p /= np.float32(max(n, 1))
    return p


def bernoulli_std(p):
    """``sqrt(p (1 - p))`` in float32, the standard deviation of an indicator with mean ``p``."""
    q = np.array(p, dtype=np.float32)
    q *= np.float32(1.0) - q
    return np.sqrt(q, out=q)


class SpinTally(Tally):
    """Counts of "on" per site over kept sweeps: posterior marginals P(s_i = +1)."""

    def __init__(self, grid: Grid):
        self.grid = grid
        self.counts = np.zeros(grid.packed_shape, dtype=np.int32)
        self.n = 0

    def add(self, state):
        kernels.count_on(state, self.counts, self.grid.shape[2], self.grid.parity)
        self.n += 1

    def merge(self, other):
        self.counts += other.counts
        self.n += other.n

    def mean(self):
        """P(on) per pixel, float32 ``(Z, H, W)``."""
        return on_fraction(self.grid.unpack(self.counts, np.float32), self.n)

    def std(self):
        """Posterior standard deviation of the on-indicator, ``sqrt(p (1 - p))``."""
        return bernoulli_std(self.mean())


class BinaryModel(ChainModel):
    """Posterior of an Ising prior with local fields, ready for the shared sampler.

    Parameters
    ----------
    field : array_like
        Local fields ``h`` of shape ``(H, W)`` or ``(Z, H, W)``; stored as float32,
        and all energies use the stored values.
    coupling : float
        ``beta``, in-plane coupling.
    coupling_z : float, optional
        Coupling between planes of a stack; defaults to ``coupling``.
    boundary : {"free", "periodic"}
    start : array_like, optional
        Starting spins for even-numbered chains (odd chains start at random);
        default ``sign(h)`` (the maximum-likelihood image).

    Examples
    --------
    >>> import numpy as np
    >>> m = BinaryModel(np.zeros((2, 2)), coupling=1.0)
    >>> m.energy_of(np.ones((2, 2)))
    -4.0
    """

    def __init__(self, field, *, coupling, coupling_z=None, boundary="free", start=None,
                 grid: Grid | None = None):
        h = np.asarray(field, dtype=np.float32)
        self.grid = grid or Grid.for_image(h, boundary=boundary)
        self.set_field(h)
        self.coupling = float(coupling)
        self.coupling_z = self.coupling if coupling_z is None else float(coupling_z)
        for name, v in (("coupling", self.coupling), ("coupling_z", self.coupling_z)):
            if not math.isfinite(v):
                raise ValueError(f"{name} must be finite, got {v}")
        if start is None:
            start = np.where(h >= 0, np.int8(1), np.int8(-1))
        self.start_spins = np.asarray(start, dtype=np.int8).reshape(self.grid.shape)

    def set_field(self, field):
        """Replace the local fields (kept only in the kernels' packed layout, float32)."""
        h = np.asarray(field, dtype=np.float32)
        if h.size != self.grid.size:
            raise ValueError(f"field of shape {h.shape} does not fit a grid of shape {self.grid.shape}")
        if not np.all(np.isfinite(h)):
            raise ValueError("local fields must be finite")
        self.packed_field = self.grid.pack(h.reshape(self.grid.shape), np.float32)

    @property
    def h(self) -> np.ndarray:
        """Local fields in image layout ``(Z, H, W)``, float32 (a new array)."""
        return self.grid.unpack(self.packed_field)

    # --- ChainModel -----------------------------------------------------------------
    def start(self, chain, seed):
        if chain % 2 == 0:
            return self.grid.pack(self.start_spins, np.int8)
        state = self.grid.pack(np.ones(self.grid.shape), np.int8)
        key = int(kernels.stream_key(seed, chain, START_SWEEP))
        self.sweep(state, math.inf, key)  # T = inf: every spin +1 or -1 with probability 1/2
        return state

    def sweep(self, state, temperature, key):
        kernels.gibbs_sweep(state, self.packed_field, self.grid.shape[2], self.coupling,
                            self.coupling_z, temperature, np.uint64(key),
                            *self.grid.kernel_geometry(), self.grid.periodic)

    def energy(self, state):
        return float(kernels.ising_energy(state, self.packed_field, self.grid.shape[2],
                                          self.coupling, self.coupling_z, self.grid.parity))

    def quench(self, state, max_passes=1000):
        for k in range(1, max_passes + 1):
            if kernels.icm_sweep(state, self.packed_field, self.grid.shape[2], self.coupling,
                                 self.coupling_z, self.grid.parity, self.grid.periodic) == 0:
                return k
        return max_passes

    def summary(self, state):
        """Magnetisation (mean spin)."""
        return kernels.spin_sum(state, self.grid.shape[2], self.grid.parity) / self.grid.size

    def tally(self):
        return SpinTally(self.grid)

    def image(self, state):
        return self.grid.unpack(state, np.int8)

    # --- evaluation of any configuration ----------------------------------------------
    def _as_spins(self, spins):
        s = np.asarray(spins)
        if s.size != self.grid.size:
            raise ValueError(f"spins of shape {s.shape} do not fit a grid of shape {self.grid.shape}")
        s = s.reshape(self.grid.shape)
        if not np.all((s == 1) | (s == -1)):
            raise ValueError("spins must be -1 or +1")
        return s

    def energy_of(self, spins) -> float:
        """Energy of a configuration given in image layout (plain numpy, float64).

        A reference for tests; :meth:`energy_of_spins` computes the same with the
        kernel and little memory.
        """
        s = self._as_spins(spins).astype(np.float64)
        h = self.h.astype(np.float64)
        pair = np.sum(s[:, 1:, :] * s[:, :-1, :]) + np.sum(s[:, :, 1:] * s[:, :, :-1])
        if self.grid.periodic:
            pair += np.sum(s[:, 0, :] * s[:, -1, :]) + np.sum(s[:, :, 0] * s[:, :, -1])
        zpair = np.sum(s[1:] * s[:-1])
        return float(-self.coupling * pair - self.coupling_z * zpair - np.sum(h * s))

    def energy_of_spins(self, spins) -> float:
        """Energy of an image-layout configuration by the kernel (for large images)."""
        return self.energy(self.grid.pack(self._as_spins(spins), np.int8))

    def local_field_of(self, spins) -> np.ndarray:
        """``F_i = beta (neighbour sum) + beta_z (z neighbour sum) + h_i`` for every site."""
        n, nz = neighbour_sums(self._as_spins(spins).astype(np.float64), periodic=self.grid.periodic)
        return self.coupling * n + self.coupling_z * nz + self.h.astype(np.float64)

    def describe(self):
        return {"coupling": self.coupling, "coupling_z": self.coupling_z,
                "boundary": self.grid.boundary}
