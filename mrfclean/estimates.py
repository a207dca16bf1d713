"""Estimates from chains: annealed MAP, posterior marginals / mean / std, and the result type.

Every cleaner returns a :class:`CleanResult` whose fields are the same whatever
options were set; a field that was not computed is ``None``.
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass, field

import numpy as np

from . import sampler
from .diagnostics import RHAT_LIMIT, ChainsDisagree, rhat
from .schedules import Constant, Schedule


@dataclass
class Diagnostics:
    """How far to trust a result.

    Attributes
    ----------
    rhat : float
        Split R-hat of the chains' summary statistic (nan when not sampled).
    chains_agree : bool or None
        ``rhat <= RHAT_LIMIT``; None when there was nothing to compare.
    final_energy : float
        Posterior energy of the returned estimate (the MAP state, or the MPM image).
    exact_energy : float or None
        Exact minimum energy by minimum cut, when a certificate was asked for.
    energy_gap : float or None
        ``(final_energy - exact_energy) / |exact_energy|``.
    quench_passes : int
        Zero-temperature passes made after annealing.
    mc_error : float
        Greyscale only: the Monte-Carlo standard error of the temperature-1
        chains' mean (the ``mean`` and ``std`` maps, also with ``method="map"``)
        as a share of the posterior standard deviation (root-mean-square of
        each over the pixels), from the spread of the chains' own means; nan
        when not estimated (binary, or one chain).  For an image cleaned in
        parts (tiles, planes) the worst part's.  It measures the sampling noise
        that differs between chains, not a bias they share; more kept sweeps
        or chains shrink it roughly as one over their square root.
    notes : list of str
        Warnings and remarks in plain words.
    """

    rhat: float = float("nan")
    chains_agree: bool | None = None
    final_energy: float = float("nan")
    exact_energy: float | None = None
    energy_gap: float | None = None
    quench_passes: int = 0
    mc_error: float = float("nan")
    notes: list = field(default_factory=list)


def combine_diagnostics(parts, labels) -> Diagnostics:
    """One :class:`Diagnostics` for an image cleaned in parts (planes of a stack, tiles).

    The worst R-hat and Monte-Carlo error, agreement only if every part
    agrees, final (and exact) energies summed, the most quench passes, and
    each part's notes prefixed with its label.
    """
    parts = list(parts)
    diag = Diagnostics()
    rh = [d.rhat for d in parts if np.isfinite(d.rhat)]
    diag.rhat = float(max(rh)) if rh else float("nan")
    agree = [d.chains_agree for d in parts if d.chains_agree is not None]
    diag.chains_agree = all(agree) if agree else None
    diag.final_energy = float(sum(d.final_energy for d in parts))
    diag.quench_passes = int(max((d.quench_passes for d in parts), default=0))
    mc = [d.mc_error for d in parts if np.isfinite(d.mc_error)]
    diag.mc_error = float(max(mc)) if mc else float("nan")
    for label, d in zip(labels, parts):
        diag.notes.extend(f"{label}: {n}" for n in d.notes)
    if parts and all(d.exact_energy is not None for d in parts):
        diag.exact_energy = float(sum(d.exact_energy for d in parts))
        diag.energy_gap = float((diag.final_energy - diag.exact_energy)
                                / max(abs(diag.exact_energy), 1e-300))
    return diag


@dataclass
class CleanResult:
    """What every cleaner returns.

    Attributes
    ----------
    estimate : ndarray
        The cleaned image, same shape and dtype as the input.
    mean : ndarray of float32 or None
        Posterior mean: P(on) for binary images, intensity for greyscale.
    std : ndarray of float32 or None
        Per-pixel posterior standard deviation (same units as ``mean``).
    energy : ndarray, shape (chains, sweeps)
        Posterior energy after every sweep of every chain.
    temperatures : ndarray, shape (sweeps,)
        The temperature of each sweep.
    params : dict
        Every parameter actually used, given or estimated (JSON-ready).
    diagnostics : Diagnostics
    kind : str
        ``"binary"`` or ``"grey"``.
    method : str
        ``"map"``, ``"mpm"`` or ``"mean"``.
    """

    estimate: np.ndarray
    mean: np.ndarray | None
    std: np.ndarray | None
    energy: np.ndarray
    temperatures: np.ndarray
    params: dict
    diagnostics: Diagnostics
    kind: str
    method: str

    def summary(self) -> dict:
        """JSON-ready account of the run (parameters and diagnostics, no arrays)."""
        return {"kind": self.kind, "method": self.method, "params": dict(self.params),
                "diagnostics": asdict(self.diagnostics)}


@dataclass
class MapRun:
    """Annealing outcome: best state over chains after the zero-temperature pass."""

    state: object
    energy: float
    chain: int
    run: sampler.ChainRun


def anneal(model, *, schedule: Schedule, sweeps: int, chains: int, seed: int,
           progress: bool = False) -> MapRun:
    """Simulated annealing of ``chains`` chains, each ended by ICM; keep the lowest energy.

    References
    ----------
    .. [1] S. Kirkpatrick, C. D. Gelatt and M. P. Vecchi, Science 220 (1983) 671-680.
    .. [2] J. Besag, "On the statistical analysis of dirty pictures",
       J. R. Stat. Soc. B 48 (1986) 259-302 (iterated conditional modes).
    """
    run = sampler.run(model, schedule=schedule, sweeps=sweeps, chains=chains, seed=seed,
                      quench=True, progress=progress, label="annealing")
    best = int(np.argmin(run.final_energies))
    return MapRun(run.states[best], float(run.final_energies[best]), best, run)


@dataclass
class PosteriorRun:
    tally: sampler.Tally
    rhat: float
    run: sampler.ChainRun


def sample_posterior(model, *, burn_in: int, samples: int, chains: int, seed: int,
                     temperature: float = 1.0, progress: bool = False) -> PosteriorRun:
    """Temperature-1 chains: discard ``burn_in`` sweeps, tally ``samples`` sweeps per chain.

    R-hat is computed on the model's summary statistic over the kept sweeps;
    when it exceeds :data:`mrfclean.diagnostics.RHAT_LIMIT` a
    :class:`~mrfclean.diagnostics.ChainsDisagree` warning is issued.
    """
    if samples < 1:
        raise ValueError(f"samples must be at least 1, got {samples}")
    run = sampler.run(model, schedule=Constant(temperature), sweeps=burn_in + samples,
                      chains=chains, seed=seed, burn_in=burn_in, tally=True, progress=progress,
                      label="sampling", keep_states=False)
    r = rhat(run.summaries) if chains > 1 else float("nan")
    if r > RHAT_LIMIT:  # not when R-hat could not be computed (nan)
        warnings.warn(f"chains disagree (R-hat {r:.3f} > {RHAT_LIMIT}); "
                      "run longer or check the parameters", ChainsDisagree, stacklevel=2)
    return PosteriorRun(run.tally, r, run)


def record_posterior(diag: Diagnostics, post: PosteriorRun, detail: str = "") -> None:
    """Copy a posterior run's R-hat verdict into ``diag`` (``detail`` ends its note)."""
    diag.rhat = post.rhat
    if np.isfinite(post.rhat):
        diag.chains_agree = bool(post.rhat <= RHAT_LIMIT)
        if not diag.chains_agree:
            diag.notes.append(f"chains disagree: R-hat {post.rhat:.3f} > {RHAT_LIMIT}{detail}")
