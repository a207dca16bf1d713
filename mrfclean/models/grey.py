r"""Greyscale model: Gaussian-scale-mixture MRF prior on neighbour differences plus a noise term.

Convention
----------
Intensities :math:`x` on a ``(Z, H, W)`` lattice (2-D images have ``Z = 1``).
Cliques are pairs :math:`(p, p + o)` for offsets :math:`o` in a half
neighbourhood (4-neighbour, diagonals, wider in-plane offsets and, for stacks,
``(1, 0, 0)`` along z with its own strength).  Each clique difference
:math:`d = x_{p+o} - x_p` has the edge-preserving potential of a Gaussian scale
mixture,

.. math::

    \phi_o(d) = \sum_{c=1}^{K} \alpha_{oc}\,
                \exp\!\big(-\tfrac12 \lambda_o \pi_c d^2\big),

and the posterior energy of an image (scales summed out) is

.. math::

    E(x) = -\sum_{o,p} \log \phi_o(x_{p+o} - x_p)
           + \frac{\kappa}{2} \|C x\|^2
           + \sum_p \frac{(x_p - y_p)^2}{2 v_p},
    \qquad p(x \mid y) \propto \exp(-E(x) / T),

where the optional curvature term (weight :math:`\kappa \ge 0`, 0 by default)
stacks the in-plane second differences :math:`x_p - 2 x_{p+e} + x_{p+2e}` along
rows and columns in :math:`C`: a quadratic prior of the kind used for smooth
surfaces (Rue & Held 2005, ch. 3), which favours smooth ramps over flat steps.

A prior may instead (or as well) put its potentials on the responses
:math:`r = f \cdot x_B` of the three non-constant 2 x 2 Haar filters at every
2 x 2 block :math:`B` of a plane (``GSMPrior.blocks``): cliques of four pixels,
as in the fields of experts of Roth & Black (2009), sampled with the same
auxiliary variables (Schmidt, Gao & Roth 2010).  Each filter sums to zero, so
:math:`f f^\top = \sum_{a<b} (-f_a f_b)(e_a - e_b)(e_a - e_b)^\top` and given the
scales the blocks' precision is a pairwise one on the 8-neighbourhood (with
weights of either sign): the solver's operator is unchanged.

Under signal-dependent noise the prior can act on the noise-stabilised image
(``GSMPrior.noise_ref`` :math:`= r > 0`): clique :math:`(p, q)` then has
precisions :math:`\lambda_o \pi_c\, r (v_p^{-1} + v_q^{-1}) / 2` and the triple
centred at :math:`m` the weight :math:`\kappa\, r / v_m`, the linearisation
at the noise variance :math:`v` of a prior on a variance-stabilised image
:math:`f(x)` with :math:`f' = v^{-1/2}` (Anscombe 1948; Makitalo & Foi 2013).
Given the scales the posterior is still a Gaussian MRF, so the updates below
stay exact.

Given one scale per clique the prior is a Gaussian MRF with precision
:math:`\sum_o D_o^\top \mathrm{diag}(\lambda_o \pi_{c}) D_o + \kappa C^\top C`
(Rue & Held 2005), so the posterior of the image is Gaussian with precision
:math:`Q = V^{-1} + \sum_o D_o^\top \Lambda_o D_o + \kappa C^\top C` (with a
noise-stabilised prior, :math:`\Lambda_o` includes the cliques' factors and the
last term is :math:`\kappa C^\top S C`, :math:`S` the triples' factors) and mean
:math:`Q^{-1} V^{-1} y`;
given the image the scales are independent categorical draws.  This is the
auxiliary-variable Gibbs sampler of Schmidt, Gao & Roth (2010).  The image
block is drawn exactly by perturbation-optimisation (Papandreou & Yuille 2010):
``x = Q^{-1}(V^{-1} y + sqrt(T) eta)`` with ``eta ~ N(0, Q)``, solved by
conjugate gradients preconditioned with a four-colour symmetric Gauss-Seidel
sweep of ``Q`` (in-plane 8-neighbourhoods, every shipped 2-D prior; Saad 2003)
or with its diagonal (volumes).

Noise terms give the per-pixel variance ``v``: :class:`GaussianNoise` (a
constant ``sigma^2``) and :class:`PoissonGaussianNoise` (``a x + b``, evaluated
at a pilot estimate of ``x`` so that the image update stays an exact Gaussian
draw; Foi et al. 2008 for the variance model).

References
----------
.. [1] U. Schmidt, Q. Gao and S. Roth, "A generative perspective on MRFs in
   low-level vision", CVPR 2010.
.. [2] H. Rue and L. Held, *Gaussian Markov Random Fields: Theory and
   Applications*, Chapman & Hall/CRC (2005).
.. [3] G. Papandreou and A. Yuille, "Gaussian sampling by local perturbations",
   NIPS 2010.
.. [4] D. Geman and C. Yang, "Nonlinear image recovery with half-quadratic
   regularization", IEEE TIP 4 (1995) 932-946.
.. [5] A. Foi, M. Trimeche, V. Katkovnik and K. Egiazarian, "Practical
   Poissonian-Gaussian noise modeling and fitting for single-image raw-data",
   IEEE TIP 17 (2008) 1737-1754.
.. [6] F. J. Anscombe, "The transformation of Poisson, binomial and
   negative-binomial data", Biometrika 35 (1948) 246-254.
.. [7] M. Makitalo and A. Foi, "Optimal inversion of the generalized Anscombe
   transformation for Poisson-Gaussian noise", IEEE TIP 22 (2013) 91-103.
.. [8] S. Roth and M. J. Black, "Fields of experts", International Journal of
   Computer Vision 82 (2009) 205-229.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from importlib import resources

import numpy as np

from .. import kernels
from ..lattice import Grid
from ..sampler import ChainModel, Tally

#: In-plane offsets ``(di, dj)`` of the named neighbourhoods (one half of each).
NEIGHBOURHOODS = {
    "4": ((0, 1), (1, 0)),
    "8": ((0, 1), (1, 0), (1, 1), (1, -1)),
    "12": ((0, 1), (1, 0), (1, 1), (1, -1), (0, 2), (2, 0)),
    "20": ((0, 1), (1, 0), (1, 1), (1, -1), (0, 2), (2, 0), (1, 2), (2, 1), (1, -2), (2, -1)),
}

#: File name of the learned prior shipped in ``mrfclean/data``.
PRIOR_FILE = "grey_prior.json"
#: A fresh score-matching fit of the same form (its weights differ from
#: PRIOR_FILE's: a rerun with today's libraries), its live weights then tuned for
#: the cleaner's PSNR on noisy copies of the training images
#: (scripts/learn_grey_prior.py --tune); the cleaner uses it for images no
#: smoother than those (see mrfclean.grey.grey_setup).
TUNED_PRIOR_FILE = "grey_prior_tuned.json"
#: A score-matching fit of potentials on the 2 x 2 block filters instead of neighbour
#: differences (scripts/learn_grey_prior.py --blocks); since stop 24 the cleaner's prior
#: for rough 2-D images (see mrfclean.grey.ROUGH_PRIOR and DEVELOPERS.md).
BLOCK_PRIOR_FILE = "grey_prior_blocks.json"
#: Conjugate gradients run in float32 when both tolerances are at least this
#: (float32 resolves 6e-8, so the recursion's rounding stays far below them);
#: tighter solves, as in the exact-posterior tests, run in float64.
SINGLE_PRECISION_TOL = 1e-4
#: The conditional-mean system is solved until the bound on its error,
#: ``||x - x*|| <= v ||r||`` (constant noise variance ``v``, as ``Q >= V^-1``),
#: is at most this share of the noise's root-sum-square ``sqrt(N v)``: a loose
#: relative residual leaves an error proportional to the signal, which at very
#: low noise is as large as the posterior's own spread and makes chains disagree.
MEAN_ERROR_SHARE = 0.03
#: Smallest relative residual asked of a solve.
MIN_TOL = 1e-10


@dataclass(frozen=True)
class PriorGroup:
    """Offsets sharing one potential: log-amplitudes ``logamp[c]`` of precisions ``prec[c]``."""

    name: str
    offsets: tuple
    logamp: tuple
    prec: tuple

    def __post_init__(self):
        if len(self.logamp) != len(self.prec) or not self.prec:
            raise ValueError("a prior group needs as many log-amplitudes as precisions")
        if not all(p > 0 and math.isfinite(p) for p in self.prec):
            raise ValueError("precisions must be positive and finite")
        if not all(math.isfinite(a) for a in self.logamp):
            raise ValueError("log-amplitudes must be finite")


#: Names of the 2 x 2 block filters, in the kernels' order (:data:`mrfclean.kernels.BLOCK_FILTERS`):
#: the block's left column less its right, its top row less its bottom, and the checker.
BLOCK_FILTER_NAMES = ("columns", "rows", "checker")


@dataclass(frozen=True)
class BlockGroup:
    """Block filters (names from :data:`BLOCK_FILTER_NAMES`) sharing one potential."""

    name: str
    filters: tuple
    logamp: tuple
    prec: tuple

    def __post_init__(self):
        PriorGroup.__post_init__(self)
        if not self.filters or any(f not in BLOCK_FILTER_NAMES for f in self.filters):
            raise ValueError(f"block filters are named from {BLOCK_FILTER_NAMES}, got {self.filters!r}")


@dataclass(frozen=True)
class GSMPrior:
    """Gaussian-scale-mixture MRF prior over several offsets.

    Parameters
    ----------
    groups : tuple of PriorGroup
        In-plane groups; offsets are ``(di, dj)`` pairs.
    blocks : tuple of BlockGroup
        Potentials on the responses of the 2 x 2 block filters at every block of
        the plane (empty: none).  Together they must cover the three filters of
        :data:`BLOCK_FILTER_NAMES` once each.  A block filter ``f`` is a clique of
        four pixels with response ``r = f . x``; its potential is a Gaussian scale
        mixture of ``r`` as above, so given the scales the prior stays a Gaussian
        MRF (a field of experts in the sense of Roth & Black 2009, sampled as in
        Schmidt, Gao & Roth 2010).
    strength : float
        ``lambda``: multiplies every precision (1 = as learned).
    strength_z : float
        Extra factor for the z clique ``(1, 0, 0)`` of a stack, which uses the
        potential of the first group.
    curvature : float
        ``kappa``: weight of a quadratic term on the in-plane second differences,
        ``kappa / 2 sum (x[p] - 2 x[p + e] + x[p + 2 e])^2`` along rows and
        columns (0 = none).  It favours smooth ramps over flat steps; the
        cleaner chooses it per image (see :func:`mrfclean.fit.grey.choose_curvature`).
    noise_ref : float
        0 (default): the precisions are the same at every pixel.  ``> 0``: the
        prior acts on the noise-stabilised image, linearised at the noise
        variance ``v`` the data term uses: a clique's precisions are multiplied
        by ``noise_ref / v`` (the mean of that factor at its two pixels) and a
        second-difference triple's weight by ``noise_ref / v`` at its middle
        pixel, so that under signal-dependent noise the prior smooths each
        region in proportion to its own noise, as a prior on the
        variance-stabilised image ``f(x)``, ``f' = 1 / sqrt(v)``, would to
        first order (Anscombe 1948; Makitalo & Foi 2013).  The mean of
        ``1 / v`` over a clique is that transform's factor
        ``4 / (sqrt(v_p) + sqrt(v_q))^2`` where ``v`` changes little across
        the clique, as it does for a variance evaluated at a smoothed pilot;
        at a sharp change of variance it ties the pair more strongly.  With a
        constant ``v = noise_ref`` nothing changes.  The cleaner sets it per
        image (:func:`mrfclean.grey.grey_setup`); it is not saved with a prior.
    units : float
        Intensity span the potentials were learned for (differences are
        measured in units of the image's range divided by this).
    """

    groups: tuple
    strength: float = 1.0
    strength_z: float = 1.0
    curvature: float = 0.0
    meta: dict = field(default_factory=dict, compare=False)
    noise_ref: float = 0.0
    blocks: tuple = ()

    def __post_init__(self):
        for name in ("strength", "strength_z", "curvature", "noise_ref"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= 0):
                raise ValueError(f"{name} must be a non-negative finite number, got {v!r}")
        every = self.groups + self.blocks
        if len({len(g.prec) for g in every}) != 1:
            raise ValueError("all prior groups must have the same number of scales")
        if self.blocks and sorted(f for b in self.blocks for f in b.filters) != sorted(BLOCK_FILTER_NAMES):
            raise ValueError(f"the block groups must cover the filters {BLOCK_FILTER_NAMES} once each")
        if len(every[0].prec) >= kernels.NO_CLIQUE:
            raise ValueError(f"a prior has at most {kernels.NO_CLIQUE - 1} scales")

    # --- construction -----------------------------------------------------------
    @classmethod
    def quadratic(cls, weight, *, neighbourhood="4", strength_z=1.0):
        """Plain quadratic prior ``weight/2 * sum d^2``: the one-scale special case."""
        offs = NEIGHBOURHOODS[str(neighbourhood)]
        return cls((PriorGroup("quadratic", offs, (0.0,), (float(weight),)),),
                   strength=1.0, strength_z=strength_z)

    @classmethod
    def from_dict(cls, d):
        # format 2 adds block groups (a reader of format 1 would drop them silently)
        fmt = d.get("format") if isinstance(d, dict) else None
        if fmt not in ("mrfclean-gsm-prior/1", "mrfclean-gsm-prior/2"):
            raise ValueError("not an mrfclean GSM prior description")
        if d.get("blocks") and fmt != "mrfclean-gsm-prior/2":
            raise ValueError("a prior with block groups must be of format mrfclean-gsm-prior/2")
        try:
            prec = tuple(float(p) for p in d["precisions"])
            groups = tuple(PriorGroup(g["name"], tuple(tuple(int(v) for v in o) for o in g["offsets"]),
                                      tuple(float(a) for a in g["logamp"]), prec)
                           for g in d.get("groups", ()))
            blocks = tuple(BlockGroup(g["name"], tuple(str(f) for f in g["filters"]),
                                      tuple(float(a) for a in g["logamp"]), prec)
                           for g in d.get("blocks", ()))
        except (KeyError, TypeError, ValueError) as e:
            raise ValueError(f"not a valid mrfclean GSM prior description ({type(e).__name__}: {e})") from None
        if not groups and not blocks:
            raise ValueError("a GSM prior description needs pair groups or block groups")
        # noise_ref belongs to an image's noise (set by the cleaner), not to a saved prior
        meta = {k: v for k, v in d.items()
                if k not in ("groups", "blocks", "precisions", "curvature", "noise_ref")}
        return cls(groups, curvature=float(d.get("curvature", 0.0)), meta=meta, blocks=blocks)

    @classmethod
    def load(cls, path=None, *, shipped=PRIOR_FILE):
        """A prior shipped with the package (or one saved at ``path``).

        ``shipped`` names the package's file: :data:`PRIOR_FILE` (score
        matching, the default), :data:`TUNED_PRIOR_FILE` or :data:`BLOCK_PRIOR_FILE`.
        """
        if shipped not in (PRIOR_FILE, TUNED_PRIOR_FILE, BLOCK_PRIOR_FILE):
            raise ValueError(f"no shipped prior named {shipped!r}")
        if path is None:
            # one part per step: a package seen through two folders (a leftover folder of
            # numba cache files after an uninstall) is a MultiplexedPath, whose joinpath
            # takes a single part on Python 3.11
            text = (resources.files("mrfclean") / "data" / shipped).read_text()
        else:
            with open(path) as f:
                text = f.read()
        return cls.from_dict(json.loads(text))

    def to_dict(self):
        meta = {k: v for k, v in self.meta.items() if k != "format"}
        blocks = ({"blocks": [{"name": b.name, "filters": list(b.filters), "logamp": list(b.logamp)}
                              for b in self.blocks]} if self.blocks else {})
        return {"format": "mrfclean-gsm-prior/2" if self.blocks else "mrfclean-gsm-prior/1", **meta,
                "precisions": list((self.groups + self.blocks)[0].prec),
                "groups": [{"name": g.name, "offsets": [list(o) for o in g.offsets],
                            "logamp": list(g.logamp)} for g in self.groups],
                **blocks, **({"curvature": self.curvature} if self.curvature else {})}

    def with_strength(self, strength, strength_z=None):
        return GSMPrior(self.groups, float(strength),
                        self.strength_z if strength_z is None else float(strength_z),
                        self.curvature, self.meta, self.noise_ref, self.blocks)

    def with_curvature(self, curvature):
        return GSMPrior(self.groups, self.strength, self.strength_z, float(curvature), self.meta,
                        self.noise_ref, self.blocks)

    def with_noise_ref(self, noise_ref):
        return GSMPrior(self.groups, self.strength, self.strength_z, self.curvature, self.meta,
                        float(noise_ref), self.blocks)

    # --- kernel arrays -------------------------------------------------------------
    def arrays(self, planes: int):
        """``(offsets (n, 3) int64, logamp (n, K), prec (n, K), strength (n,))`` for a lattice
        (the pair cliques; see :meth:`block_arrays` for the blocks)."""
        if planes > 1 and self.strength_z > 0 and not self.groups:
            raise ValueError("the block prior has no potential along z: clean the stack plane "
                             "by plane or use a prior with pair groups")
        K = len((self.groups + self.blocks)[0].prec)
        offs, la, pr, st = [], [], [], []
        for g in self.groups:
            for di, dj in g.offsets:
                offs.append((0, di, dj))
                la.append(g.logamp)
                pr.append(g.prec)
                st.append(self.strength)
        if planes > 1 and self.strength_z > 0:
            g = self.groups[0]
            offs.append((1, 0, 0))
            la.append(g.logamp)
            pr.append(g.prec)
            st.append(self.strength * self.strength_z)
        return (np.array(offs, dtype=np.int64).reshape(-1, 3),
                np.array(la, dtype=np.float64).reshape(-1, K),
                np.array(pr, dtype=np.float64).reshape(-1, K), np.array(st, dtype=np.float64))

    def block_arrays(self):
        """``(logamp (3, K), prec (3, K), strength (3,))`` of the block filters in the kernels'
        order, or None without block groups."""
        if not self.blocks:
            return None
        by = {f: b for b in self.blocks for f in b.filters}
        bs = [by[f] for f in BLOCK_FILTER_NAMES]
        return (np.array([b.logamp for b in bs], dtype=np.float64),
                np.array([b.prec for b in bs], dtype=np.float64),
                np.full(len(bs), float(self.strength)))

    def potential(self, d, group=0):
        """``-log phi(d)`` of one group at differences ``d`` (numpy, for plots and tests);
        block groups are numbered after the pair groups."""
        g = (self.groups + self.blocks)[group]
        d = np.asarray(d, dtype=np.float64)[..., None]
        lp = np.asarray(g.logamp) - 0.5 * self.strength * np.asarray(g.prec) * d * d
        m = lp.max(axis=-1)
        return -(m + np.log(np.exp(lp - m[..., None]).sum(axis=-1)))

    def describe(self):
        return {"prior": "gsm", "strength": float(self.strength),
                "strength_z": float(self.strength_z), "curvature": float(self.curvature),
                "offsets": [list(o) for g in self.groups for o in g.offsets],
                **({"block_filters": [f for b in self.blocks for f in b.filters]} if self.blocks else {}),
                "scales": len((self.groups + self.blocks)[0].prec),
                "prior_source": self.meta.get("source", "given"),
                **({"noise_ref": float(self.noise_ref)} if self.noise_ref else {})}


# ---------------------------------------------------------------------------------------
# noise terms
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class GaussianNoise:
    """``y = x + N(0, sigma^2)`` independently per pixel."""

    sigma: float

    def __post_init__(self):
        if not (math.isfinite(self.sigma) and self.sigma > 0):
            raise ValueError(f"noise sigma must be positive and finite, got {self.sigma!r}")

    def variance(self, pilot):
        return np.full(np.shape(pilot), self.sigma**2, dtype=np.float64)

    def describe(self):
        return {"noise": "gaussian", "sigma": float(self.sigma)}


@dataclass(frozen=True)
class PoissonGaussianNoise:
    """``Var(y | x) = a x + b``: gain ``a`` times signal (Poisson part) plus read-noise ``b``.

    The variance is evaluated at a pilot estimate of ``x`` and floored, so that
    it stays positive where the pilot is below the offset: at ``b`` itself when
    ``b > 0``; when ``b`` is 0, at ``floor`` if given, else at a thousandth of
    the mean variance of the pilot passed.  The cleaner sets ``floor`` once per
    image (:func:`mrfclean.grey.grey_setup`), so that the tiles of one image
    share one noise model.
    """

    a: float
    b: float
    floor: float = 0.0

    def __post_init__(self):
        if not (math.isfinite(self.a) and self.a >= 0 and math.isfinite(self.b) and self.b >= 0):
            raise ValueError(f"need a >= 0 and b >= 0, got a={self.a!r}, b={self.b!r}")
        if self.a == 0 and self.b == 0:
            raise ValueError("a and b cannot both be zero")
        if not (math.isfinite(self.floor) and self.floor >= 0):
            raise ValueError(f"floor must be a non-negative finite number, got {self.floor!r}")

    def default_floor(self, pilot) -> float:
        """The floor for a read variance of 0: a thousandth of the mean ``a x`` over ``pilot``."""
        v = self.a * np.maximum(np.asarray(pilot, dtype=np.float64), 0.0)
        return 1e-3 * max(float(np.mean(v)), 1e-300)

    def variance(self, pilot):
        v = self.a * np.maximum(np.asarray(pilot, dtype=np.float64), 0.0) + self.b
        floor = self.b if self.b > 0 else (self.floor or self.default_floor(pilot))
        return np.maximum(v, max(floor, 1e-300))

    def describe(self):
        d = {"noise": "poisson-gaussian", "a": float(self.a), "b": float(self.b)}
        return {**d, "variance_floor": float(self.floor)} if self.floor else d


# ---------------------------------------------------------------------------------------
# chain state and tally
# ---------------------------------------------------------------------------------------
class GreyState:
    """One chain's position: the sampled image ``x``, its conditional mean ``mu``, the scales.

    ``mu = E[x | scales, y]`` for the scales the last image update used;
    averaging it over sweeps is the Rao-Blackwellised posterior mean.  ``comp``
    holds the scale components drawn from ``x`` (for the next image update)
    and ``energy`` the energy of ``x``, computed in the same pass.
    """

    __slots__ = ("x", "mu", "energy", "iterations", "comp", "draws")

    def __init__(self, x, mu=None):
        self.x = np.ascontiguousarray(x, dtype=np.float64)
        self.mu = self.x.copy() if mu is None else np.ascontiguousarray(mu, dtype=np.float64)
        self.energy = None
        self.iterations = 0
        self.comp = None
        self.draws = 0  # image updates at temperature > 0 so far


class GreyTally(Tally):
    r"""Rao-Blackwellised posterior moments.

    Mean: the average of the conditional means :math:`\mu_t = E[x \mid z_t, y]`.
    Variance (law of total variance): the average of :math:`(x_t - \mu_t)^2`, an
    unbiased one-draw estimate of :math:`\mathrm{Var}(x \mid z_t, y)`, plus the
    spread of the :math:`\mu_t` over sweeps.  ``n`` counts the conditional means
    and ``nx`` the draws; they differ by the closing means
    (:meth:`add_mean`), which come without a draw.
    """

    def __init__(self, shape):
        self.s1 = np.zeros(shape)
        self.s2 = np.zeros(shape)
        self.sv = np.zeros(shape)
        self.n = 0
        self.nx = 0
        self._prev = None  # s1 at the end of the previous chain
        self._n_prev = 0
        self._sq = 0.0  # sum over chains and pixels of the chain's own mean squared
        self._counts = []  # kept sweeps of each chain; None once merged

    def add(self, state):
        kernels.tally_moments(self.s1, self.s2, self.sv, state.mu, state.x)
        self.n += 1
        self.nx += 1

    def add_mean(self, mu):
        """A conditional mean without its draw (a chain's closing mean): into the mean
        and the spread of the means, not into the conditional variance (``x = mu``
        adds 0 there)."""
        kernels.tally_moments(self.s1, self.s2, self.sv, mu, mu)
        self.n += 1

    def merge(self, other):
        self.s1 += other.s1
        self.s2 += other.s2
        self.sv += other.sv
        self.n += other.n
        self.nx += other.nx
        self._counts = None  # the chains of a merged tally are not told apart

    def end_chain(self):
        if self._counts is None or self.n == self._n_prev:
            return
        n = self.n - self._n_prev
        own = self.s1 / n if self._prev is None else (self.s1 - self._prev) / n
        self._sq += float(np.sum(own * own))
        self._counts.append(n)
        if self._prev is None:
            self._prev = self.s1.copy()
        else:
            self._prev[...] = self.s1
        self._n_prev = self.n

    def mc_variance(self):
        r"""Monte-Carlo variance of the pooled mean, per pixel (averaged over pixels).

        From the chains' own means :math:`m_c`:
        :math:`\sum_c (m_c - \bar m)^2 / (C (C - 1))`, the squared standard error
        of a mean of :math:`C` independent replicates, summed in the form
        :math:`\sum_c m_c^2 - C \bar m^2` so that no chain's mean is kept.
        Chains from different starts add what is left of the starts.  None with
        fewer than two chains, chains of unequal length, or a merged tally.
        """
        counts = self._counts
        if not counts or len(counts) < 2 or len(set(counts)) != 1 or sum(counts) != self.n:
            return None
        C = len(counts)
        m = self.mean64()
        spread = max(self._sq - C * float(np.sum(m * m)), 0.0)
        return spread / (C * (C - 1)) / m.size

    def mean64(self):
        return self.s1 / max(self.n, 1)

    def var64(self):
        n = max(self.n, 1)
        m = self.s1 / n
        return np.maximum(self.sv / max(self.nx, 1) + self.s2 / n - m * m, 0.0)

    def mean(self):
        return self.mean64().astype(np.float32)

    def std(self):
        return np.sqrt(self.var64()).astype(np.float32)


# ---------------------------------------------------------------------------------------
# the model
# ---------------------------------------------------------------------------------------
@dataclass
class SolverStats:
    """Conjugate-gradient work done so far (iterations summed over solves)."""

    solves: int = 0
    iterations: int = 0
    worst_residual: float = 0.0


class GreyModel(ChainModel):
    """Posterior of a GSM-MRF prior and a Gaussian (possibly heteroscedastic) noise term.

    Parameters
    ----------
    observed : array_like, shape (H, W) or (Z, H, W)
        Noisy intensities ``y``.
    variance : float or array_like
        Noise variance ``v`` per pixel (or one value).
    prior : GSMPrior
    starts : sequence of array_like, optional
        Starting images; chain ``c`` starts from ``starts[c % len(starts)]``.
        Default: the observed image.
    tol : float
        Conjugate gradients for the conditional mean stop when
        ``||r|| <= tol * ||b||``, or tighter at low noise (see
        :data:`MEAN_ERROR_SHARE` and :attr:`mean_tol`).
    sample_tol : float, optional
        The same for the perturbation system of a draw (default ``tol``).
    max_iter : int
        Iteration cap per solve (reported in :attr:`stats`).
    single_solves : int
        The first ``single_solves`` temperature > 0 sweeps of each chain (its
        burn-in: nothing tallies them) draw the image from the one system
        ``Q x = b + eta``, started at the current image, to ``sample_tol``,
        and skip the conditional mean; later sweeps solve the mean and the
        perturbation separately, as the Rao-Blackwellised tally needs.  Solved
        exactly, the draws have the same distribution; such a sweep ran 6-19%
        faster on SURE's windows (measured on camera and cell at 512^2).
    relax : float
        Over-relaxation ``alpha`` of the image update, in ``(-1, 1)``; 0
        (default) draws the image afresh.  Otherwise a sweep that solves the
        mean and the perturbation separately, in a chain that has drawn an
        image before, moves to ``mu + alpha (x - mu) + sqrt(1 - alpha^2) z``,
        where ``x`` is the chain's last image, ``mu`` the new conditional mean
        and ``z ~ N(0, T Q^-1)`` the new perturbation.  That map leaves the
        conditional ``N(mu, T Q^-1)`` invariant for any ``x`` (Adler 1981), so
        the chain keeps the posterior exactly; with ``alpha < 0`` successive
        images lie on opposite sides of ``mu``, which damps the random walk of
        the scales (Neal 1998).  And as the last image given the new scales is
        itself a posterior draw, ``(x - mu)^2`` still estimates the conditional
        variance without bias once the chain is in equilibrium.
    reflect_scales : bool
        Scale draws reflected through their conditional CDF (default False: afresh).
        Each clique's new component is the mirror image, within its new
        conditional distribution, of a point drawn uniformly within its current
        component's share (see :func:`mrfclean.kernels.gsm_draw_components`);
        a clique whose component sat low in its distribution moves high.  The
        move leaves every conditional invariant, so the chain keeps the
        posterior exactly, and it anticorrelates successive scales and with
        them the conditional means a Rao-Blackwellised average sums (Neal
        1998).  A chain's first draw, from its starting image, is plain.
    preconditioner : {"sgs", "jacobi"}
        Of the conjugate gradients (default "sgs"): a four-colour symmetric
        Gauss-Seidel sweep over the in-plane 8-neighbourhood where the
        operator has exactly that layout (every shipped 2-D prior; see
        :func:`mrfclean.kernels.gmrf_cg`), else the diagonal of ``Q``
        (Jacobi), which "jacobi" forces.  Both stop at the same relative
        residual; the sweep needs about half the iterations.
    closing_mean : bool
        End each tallied chain with one more conditional mean (default False).
        A sweep draws the scales last, so a chain's final sweep leaves scales
        ``z_{T+1} | x_T`` that no image update used; :meth:`close_chain` solves
        ``mu(z_{T+1}) = Q^-1 b`` for them (warm from the last mean, to
        :attr:`mean_tol`) and adds it to the tally's mean (not to its
        conditional variance: it has no draw).  ``z_{T+1}`` is one more state
        of the same chain of scales, so the average stays a consistent estimate
        of the posterior mean; the solve costs about a third of a sweep.

    Notes
    -----
    Memory per pixel and offset ``n``: the clique weights and the clique
    normals of a perturbation (one solver word each: 4 bytes in float32, see
    :attr:`solver_dtype`, 8 in float64) and each chain's drawn scale
    components (1 byte), plus fourteen solver-word images (two
    conjugate-gradient systems of five vectors, two right-hand sides, the
    diagonal and its inverse; two more for the triple normals when the
    curvature term is on, four more for the Gauss-Seidel sweep's weights when
    the curvature term is on with an 8-neighbourhood prior, and one for the
    triples' factors when the prior is noise-stabilised) and the float64 data, chain states and tallies (plus
    the float64 factor image of a noise-stabilised prior).  A prior with block
    filters counts four pair offsets in ``n`` for the blocks' pair weights
    (three components per pixel) and adds six solver-word images: the three
    filter weights and their normals.

    References
    ----------
    .. [1] S. L. Adler, "Over-relaxation method for the Monte Carlo evaluation
       of the partition function for multiquadratic actions", Physical Review D
       23 (1981) 2901-2904.
    .. [2] R. M. Neal, "Suppressing random walks in Markov chain Monte Carlo
       using ordered overrelaxation", in Learning in Graphical Models (1998)
       205-228.
    .. [3] Y. Saad, Iterative Methods for Sparse Linear Systems, 2nd ed., SIAM
       (2003), sections 10.2 (SSOR preconditioning) and 12.4 (multicolour
       orderings; section numbers from memory).

    Examples
    --------
    >>> import numpy as np
    >>> y = np.zeros((8, 8)); y[:, 4:] = 1.0
    >>> m = GreyModel(y, variance=0.01, prior=GSMPrior.quadratic(1.0))
    >>> round(m.energy_of(y), 6)   # 8 horizontal unit steps, weight 1/2 each
    4.0
    """

    def __init__(self, observed, *, variance, prior: GSMPrior, starts=None, tol=1e-3,
                 sample_tol=None, max_iter=500, grid: Grid | None = None, single_solves=0,
                 relax=0.0, reflect_scales=False, closing_mean=False, preconditioner="sgs"):
        y = np.asarray(observed, dtype=np.float64)
        self.grid = grid or Grid.for_image(y)
        if self.grid.periodic:
            raise ValueError("the greyscale model supports a free boundary only")
        self.y = np.ascontiguousarray(y.reshape(self.grid.shape))
        if not np.all(np.isfinite(self.y)):
            raise ValueError("observed image must be finite")
        v = np.broadcast_to(np.asarray(variance, dtype=np.float64), self.y.shape)
        if not np.all(np.isfinite(v)) or np.any(v <= 0):
            raise ValueError("noise variance must be positive and finite everywhere")
        self.dw = np.ascontiguousarray(1.0 / v)
        self.b = self.dw * self.y
        # per-pixel factor on the prior's precisions (see GSMPrior.noise_ref)
        self.gs = prior.noise_ref * self.dw if prior.noise_ref > 0 else None
        self.prior = prior
        Z = self.grid.shape[0]
        self.offsets, self.logamp, self.prec, self.strength = prior.arrays(Z)
        #: pair cliques: rows ``[:npair]`` of :attr:`w` and of a state's ``comp``; a prior with
        #: block filters adds the blocks' pair weights (offsets ``kernels.BLOCK_OFFSETS``) to
        #: ``w`` and their components (one row per filter) to ``comp``
        self.npair = len(self.offsets)
        self.blocks = prior.block_arrays()
        #: offsets of the rows of :attr:`w` (the solver's operator): the pair cliques', then
        #: with block filters ``kernels.BLOCK_OFFSETS`` for the blocks' pair weights
        self.op_offsets = (np.concatenate([self.offsets, kernels.BLOCK_OFFSETS])
                           if self.blocks is not None else self.offsets)
        self.curv = float(prior.curvature)
        self.tol = float(tol)
        self.sample_tol = self.tol if sample_tol is None else float(sample_tol)
        for name, t in (("tol", self.tol), ("sample_tol", self.sample_tol)):
            if not (0 < t < 1):
                raise ValueError(f"{name} must be in (0, 1), got {t!r}")
        # not np.linalg.norm: its BLAS dot wakes OpenBLAS's threads, which then spin on the
        # cores the kernels use (SURE's search ran 1.4-2x slower on two cores, measured)
        bnorm = math.sqrt(float(np.sum(np.square(self.b))))
        #: relative residual of the conditional-mean solves
        self.mean_tol = self.tol if bnorm == 0 else max(MIN_TOL, min(
            self.tol, MEAN_ERROR_SHARE * math.sqrt(float(self.dw.sum())) / bnorm))
        self.max_iter = int(max_iter)
        self.single_solves = int(single_solves)
        self.relax = float(relax)
        if not -1 < self.relax < 1:
            raise ValueError(f"relax must be in (-1, 1), got {relax!r}")
        self.reflect_scales = bool(reflect_scales)
        self.closing_mean = bool(closing_mean)
        if preconditioner not in ("sgs", "jacobi"):
            raise ValueError(f"preconditioner must be 'sgs' or 'jacobi', got {preconditioner!r}")
        self.starts = [np.asarray(s, dtype=np.float64).reshape(self.grid.shape)
                       for s in (starts if starts is not None else [self.y])]
        n = len(self.op_offsets)
        shape = self.grid.shape
        self.ncomp = self.npair + (kernels.BLOCK_FILTERS if self.blocks is not None else 0)
        # The solver works in single precision when both tolerances are far above
        # its resolution (6e-8): half the memory traffic and twice the vector width.
        ft = np.float32 if min(self.mean_tol, self.sample_tol) >= SINGLE_PRECISION_TOL else np.float64
        self.solver_dtype = np.dtype(ft)
        self._dw_s = self.dw.astype(ft)
        # the second-difference triples' factors (noise_ref / v at their middles), if any
        self._cs = (self.gs.astype(ft) if self.gs is not None and self.curv > 0
                    else np.zeros((0, 0, 0), ft))
        self.w = np.zeros((n, *shape), ft)
        #: the block filters' weights (their pair weights are ``w[npair:]``)
        self.bw = np.zeros((kernels.BLOCK_FILTERS if self.blocks is not None else 0, *shape), ft)
        self._buf = {k: np.zeros((2, *shape), ft) for k in ("x", "r", "p", "q", "z")}
        self._diag = np.zeros(shape, ft)
        self._minv = np.zeros(shape, ft)
        #: the Gauss-Seidel sweep's weights (kernels.sgs_weights): the clique weights
        #: themselves without the curvature term, with it the clique weights plus the
        #: triples' entries between neighbours (refilled by _set_operator); None for Jacobi
        self._pw = None
        if preconditioner == "sgs" and kernels.is_grid8(self.op_offsets):
            self._pw = self.w if self.curv == 0 else np.zeros((4, *shape), ft)
        self._rhs = np.zeros((2, *shape), ft)  # [b, perturbation] of a temperature > 0 update
        self._rhs[0] = self.b
        self._pbuf = None  # clique normals of a perturbation, allocated at the first draw
        self._bbuf = None  # and the block filters' normals
        self._cbuf = None  # and those of the second-difference triples
        self.stats = SolverStats()

    # --- linear algebra -------------------------------------------------------------
    def _set_operator(self):
        kernels.gmrf_diagonal(self.w, self.op_offsets, self._dw_s, self.curv, self._cs, self._diag)
        np.divide(1.0, self._diag, out=self._minv)
        if self._pw is not None and self.curv > 0:
            kernels.sgs_weights(self.w, self.curv, self._cs, self._pw)

    def _set_scales(self, comp):
        """The operator ``Q`` for the drawn components ``comp``: clique weights, then diagonal."""
        npair = self.npair
        kernels.gsm_expand(comp[:npair], self.prec, self.strength, self.w[:npair], self.offsets,
                           self.gs)
        if self.blocks is not None:
            kernels.block_expand(comp[npair:], self.blocks[1], self.blocks[2], self.bw,
                                 self.w[npair:], self.gs)
        self._set_operator()

    def apply(self, x, weights=None):
        """``Q x`` for the current (or given) clique weights (one row per :attr:`op_offsets`,
        the blocks' pair weights included); ``x`` of shape ``(Z, H, W)``."""
        w = np.ascontiguousarray(self.w if weights is None else weights, dtype=np.float64)
        xs = np.ascontiguousarray(np.asarray(x, dtype=np.float64).reshape(1, *self.grid.shape))
        out = np.empty_like(xs)
        cs = self.gs if self._cs.size else np.zeros((0, 0, 0))  # float64 twin of _cs
        kernels.gmrf_matvec(xs, w, self.op_offsets, self.dw, self.curv, cs, out,
                            np.empty((1, self.grid.shape[0] * self.grid.shape[1])))
        return out[0]

    def solve(self, rhs, x0, tols=None):
        """Solve ``Q x = rhs[s]`` for every row ``s`` by preconditioned CG from ``x0``.

        ``rhs`` has shape ``(R, Z, H, W)`` with ``R <= 2`` and ``x0`` holds ``R``
        starting images (or scalars); ``tols`` gives each system's relative
        residual (default :attr:`mean_tol`).  Returns the
        solutions (a view into a work buffer) and the iterations made.
        """
        R = rhs.shape[0]
        X, Rr, P, Qp, Zr = (self._buf[k][:R] for k in ("x", "r", "p", "q", "z"))
        for k in range(R):
            X[k] = x0[k]
        tols = np.full(R, self.mean_tol) if tols is None else np.asarray(tols, dtype=np.float64)
        B = np.ascontiguousarray(rhs, dtype=self.solver_dtype)
        it, worst = kernels.gmrf_cg(X, B, self.w, self.op_offsets, self._dw_s, self.curv, self._cs,
                                    self._minv, tols, self.max_iter, Rr, P, Qp, Zr,
                                    self.w[:0] if self._pw is None else self._pw)
        self.stats.solves += 1
        self.stats.iterations += int(it)
        self.stats.worst_residual = max(self.stats.worst_residual, float(worst))
        return X, it

    # --- ChainModel -------------------------------------------------------------------
    def start(self, chain, seed):
        return GreyState(self.starts[chain % len(self.starts)].copy())

    def _draw_scales(self, state, temperature, key):
        """Scales | image: components into ``state.comp``; the energy of ``x`` comes with them."""
        reflect = self.reflect_scales and state.comp is not None  # a chain's first draw: plain
        if state.comp is None:
            state.comp = np.empty((self.ncomp, *self.grid.shape), np.uint8)
        npair = self.npair
        state.energy = float(kernels.gsm_draw_components(
            state.x, self.y, self.dw, self.offsets, self.logamp, self.prec, self.strength,
            float(temperature), np.uint64(key), state.comp[:npair], self.gs, reflect)
        ) + self._curv_energy(state.x)
        if self.blocks is not None:
            la, pr, st = self.blocks
            state.energy += float(kernels.block_draw_components(
                state.x, la, pr, st, float(temperature),
                kernels.derive_key(np.uint64(key), kernels._GREY_BLOCK_SALT), state.comp[npair:],
                self.gs, reflect))

    def _curv_energy(self, x):
        """``kappa / 2`` times the summed squared in-plane second differences of ``x``."""
        if self.curv == 0:
            return 0.0
        dxx = x[:, :, :-2] - 2.0 * x[:, :, 1:-1] + x[:, :, 2:]
        dyy = x[:, :-2, :] - 2.0 * x[:, 1:-1, :] + x[:, 2:, :]
        if self.gs is not None:  # each triple weighted at its middle pixel
            return 0.5 * self.curv * float(np.sum(self.gs[:, :, 1:-1] * dxx * dxx)
                                           + np.sum(self.gs[:, 1:-1, :] * dyy * dyy))
        return 0.5 * self.curv * float(np.sum(dxx * dxx) + np.sum(dyy * dyy))

    def sweep(self, state, temperature, key):
        """Image | scales (one exact Gaussian block), then scales | image (categorical draws).

        The scales drawn at the end of a sweep serve the image update of the
        next one; a fresh state first draws them from its starting image (with
        a stream of its own).  Drawing them last gives the energy of the new
        image from the same pass over the cliques.
        """
        if state.comp is None:
            self._draw_scales(state, temperature,
                              kernels.derive_key(np.uint64(key), kernels._GREY_START_SALT))
        self._set_scales(state.comp)
        if temperature > 0:
            npair = self.npair
            if self._pbuf is None:
                self._pbuf = np.empty_like(self.w[:npair])
                self._bbuf = np.empty_like(self.bw)
                if self.curv > 0:
                    self._cbuf = np.empty((2, *self.grid.shape), self.solver_dtype)
            noise_key = kernels.derive_key(np.uint64(key), kernels._GREY_NOISE_SALT)
            kernels.gmrf_perturbation(self.w[:npair], self.offsets, self._dw_s, noise_key,
                                      math.sqrt(temperature), self._rhs[1], self._pbuf,
                                      self.curv, self._cbuf, self._cs)
            if self.blocks is not None:  # counters after the pairs', data's and triples'
                kernels.block_perturbation(self.bw, noise_key, (npair + 3) * self.grid.size,
                                           math.sqrt(temperature), self._rhs[1], self._bbuf)
            if state.draws < self.single_solves:
                np.add(self._rhs[0], self._rhs[1], out=self._rhs[1])
                X, it = self.solve(self._rhs[1:], (state.x,), (self.sample_tol,))
                state.x[...] = X[0]
                state.mu[...] = X[0]  # not a conditional mean: only the next solve's start
            else:
                X, it = self.solve(self._rhs, (state.mu, 0.0), (self.mean_tol, self.sample_tol))
                state.mu[...] = X[0]
                if self.relax and state.draws > 0:  # from a draw, never from a start image
                    a = self.relax
                    state.x[...] = X[0] + a * (state.x - X[0]) + math.sqrt(1 - a * a) * X[1]
                else:
                    np.add(X[0], X[1], out=state.x)
            state.draws += 1
        else:
            X, it = self.solve(self.b[None], state.mu[None])
            state.mu[...] = X[0]
            state.x[...] = X[0]
        state.iterations = it
        self._draw_scales(state, temperature, key)

    def energy(self, state):
        if state.energy is None:
            state.energy = self.energy_of(state.x)
        return state.energy

    def quench(self, state, max_passes=100, rtol=1e-7):
        """Half-quadratic (iteratively reweighted least-squares) descent of ``E(x)`` at T = 0."""
        e_old = self.energy_of(state.x)
        state.mu[...] = state.x
        for k in range(1, max_passes + 1):
            npair = self.npair
            kernels.gsm_mean_weights(state.x, self.offsets, self.logamp, self.prec,
                                     self.strength, self.w[:npair], self.gs)
            if self.blocks is not None:
                la, pr, st = self.blocks
                kernels.block_mean_weights(state.x, la, pr, st, self.bw, self.w[npair:], self.gs)
            self._set_operator()
            X, _ = self.solve(self.b[None], state.x[None])
            e_new = self.energy_of(X[0])
            if e_new > e_old:  # inexact solve overshot: keep the better image
                break
            state.x[...] = X[0]
            state.mu[...] = X[0]
            done = e_old - e_new <= rtol * abs(e_old)
            e_old = e_new
            if done:
                break
        state.energy = None
        state.comp = None  # the image moved: scales are drawn afresh from it
        return k

    def summary(self, state):
        """Energy per pixel (prior plus data) of the sampled image."""
        return self.energy(state) / self.grid.size

    def tally(self):
        return GreyTally(self.grid.shape)

    def close_chain(self, state, tally):
        """With :attr:`closing_mean`: the conditional mean of the scales the chain's last
        sweep drew, into ``tally`` (see the class's ``closing_mean``).

        Only after a kept image update (``state.mu`` then holds a conditional
        mean, the solve's start) at temperature > 0.  The mean does not depend
        on the temperature (``Q`` and ``b`` are both divided by it).
        """
        if not self.closing_mean or state.comp is None or state.draws <= self.single_solves:
            return
        self._set_scales(state.comp)
        X, _ = self.solve(self._rhs[:1], state.mu[None])
        tally.add_mean(X[0].astype(np.float64))

    def image(self, state):
        return state.x.astype(np.float32)

    # --- any image --------------------------------------------------------------------
    def _as_image(self, x):
        a = np.asarray(x, dtype=np.float64)
        if a.size != self.grid.size:
            raise ValueError(f"image of shape {a.shape} does not fit a grid of shape {self.grid.shape}")
        return np.ascontiguousarray(a.reshape(self.grid.shape))

    def prior_energy_of(self, x) -> float:
        x = self._as_image(x)
        e = float(kernels.gsm_prior_energy(x, self.offsets, self.logamp, self.prec,
                                           self.strength, self.gs)) + self._curv_energy(x)
        if self.blocks is not None:
            e += float(kernels.block_prior_energy(x, *self.blocks, self.gs))
        return e

    def data_energy_of(self, x) -> float:
        r = self._as_image(x) - self.y
        return float(0.5 * np.sum(r * r * self.dw))

    def energy_of(self, x) -> float:
        """``E(x)``: prior (scales summed out) plus data energy of any image."""
        return self.prior_energy_of(x) + self.data_energy_of(x)

    def conditional_mean(self, weights):
        """``E[x | scales, y] = Q^-1 V^-1 y`` for clique weights of shape ``(n, Z, H, W)``, one
        row per :attr:`op_offsets` (the blocks' pair weights included)."""
        self.w[...] = weights
        self._set_operator()
        X, _ = self.solve(self.b[None], self.y[None])
        return X[0].astype(np.float64)

    def describe(self):
        return {**self.prior.describe(), "cg_tol": self.tol, "cg_mean_tol": self.mean_tol,
                "cg_sample_tol": self.sample_tol, "relax": self.relax,
                "reflect_scales": self.reflect_scales, "closing_mean": self.closing_mean,
                "cg_preconditioner": "jacobi" if self._pw is None else "sgs"}
