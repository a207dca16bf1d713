"""Chains: the generator core shared by every model, and the driver around it.

A model plugs in through :class:`ChainModel` (how to start a chain, do one
sweep at a temperature, measure energy, quench at zero temperature, summarise a
state, and tally posterior moments).  Everything else — temperature schedules,
burn-in, several chains, energy traces, summaries for R-hat, progress — is
written once here, for binary and greyscale models alike.

Randomness: the caller's ``rng`` (int or :class:`numpy.random.Generator`) is
converted once with :func:`numpy.random.default_rng` and one 63-bit seed is
drawn from it.  Kernels derive the stream of each chain and sweep from that
seed (:func:`mrfclean.kernels.stream_key`), so one seed fixes everything.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass, field

import numba
import numpy as np

from . import kernels
from .progress import progress_bar
from .schedules import Constant, Schedule

#: sweep number reserved for drawing a chain's random starting state
START_SWEEP = (1 << 32) - 1

#: Lattices smaller than this run their kernels on one thread: below it the cost
#: of starting and joining threads twice a sweep outweighs the work, and on a
#: busy machine two threads ran small lattices 5-15x slower than one (measured).
PARALLEL_MIN_SITES = 128 * 128


@contextlib.contextmanager
def kernel_threads(n_sites: int):
    """Run the enclosed kernel calls on one thread when the lattice is small.

    Results do not depend on the thread count (counter-based random numbers,
    per-row sums added in order), so this changes speed only.
    """
    if n_sites >= PARALLEL_MIN_SITES:
        yield
        return
    old = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        yield
    finally:
        numba.set_num_threads(old)


class ChainModel:
    """What a model must provide to be sampled.  See :class:`mrfclean.models.binary.BinaryModel`."""

    def start(self, chain: int, seed: int):  # pragma: no cover - interface
        """A fresh state for ``chain`` (a new array the chain may modify)."""
        raise NotImplementedError

    def sweep(self, state, temperature: float, key: int) -> None:  # pragma: no cover
        """One full update of ``state`` in place at ``temperature`` with stream ``key``."""
        raise NotImplementedError

    def energy(self, state) -> float:  # pragma: no cover
        """Posterior energy of ``state`` (``-log`` posterior up to a constant)."""
        raise NotImplementedError

    def quench(self, state, max_passes: int = 1000) -> int:  # pragma: no cover
        """Zero-temperature descent to a local minimum in place; returns passes made."""
        raise NotImplementedError

    def summary(self, state) -> float:  # pragma: no cover
        """A scalar summary of ``state`` whose between-chain spread R-hat judges."""
        raise NotImplementedError

    def tally(self):  # pragma: no cover
        """A new :class:`Tally` that accumulates posterior moments."""
        raise NotImplementedError

    def close_chain(self, state, tally) -> None:
        """Called by :func:`run` after a tallied chain's last sweep, before ``tally.end_chain``.

        A model may add to ``tally`` what the chain's final state still offers
        (the greyscale model: the conditional mean of the scales the last sweep
        drew, see :class:`mrfclean.models.grey.GreyModel`'s ``closing_mean``).
        Nothing by default.
        """

    def image(self, state) -> np.ndarray:  # pragma: no cover
        """``state`` in image layout ``(Z, H, W)``."""
        raise NotImplementedError


class Tally:
    """Running posterior moments; models subclass it (see :class:`SpinTally`)."""

    def add(self, state) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    def merge(self, other: "Tally") -> None:  # pragma: no cover
        """Add the tally of another, independent run (the driver itself keeps one tally)."""
        raise NotImplementedError

    def end_chain(self) -> None:
        """Called by :func:`run` after each chain's last sweep (nothing by default)."""

    def mean(self) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def std(self) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError


@dataclass
class ChainState:
    """Where one chain is: kept apart from the sampler so it can be inspected."""

    chain: int
    sweep: int
    temperature: float
    energy: float
    state: object = field(repr=False)
    sampling: bool = False


def to_seed(rng) -> int:
    """One 63-bit kernel seed from an int, ``None`` or a numpy Generator."""
    gen = np.random.default_rng(rng)
    return int(gen.integers(0, 2**63 - 1, dtype=np.int64))


def iterate(model: ChainModel, schedule: Schedule, *, sweeps: int, chain: int, seed: int,
            burn_in: int = 0, state=None, every: int = 1):
    """Run one chain, yielding a :class:`ChainState` every ``every`` sweeps.

    Sweep ``k`` runs at ``schedule.temperature(k, sweeps)``; sweeps from
    ``burn_in`` on are flagged ``sampling``.  ``state`` (modified in place)
    defaults to ``model.start(chain, seed)``.
    """
    if state is None:
        state = model.start(chain, seed)
    temps = schedule.temperatures(sweeps)
    for k in range(sweeps):
        key = int(kernels.stream_key(seed, chain, k))
        model.sweep(state, float(temps[k]), key)
        if (k + 1) % every == 0 or k == sweeps - 1:
            yield ChainState(chain, k, float(temps[k]), model.energy(state), state, k >= burn_in)


@dataclass
class ChainRun:
    """What :func:`run` returns: final states and the bookkeeping of every chain."""

    states: list
    energies: np.ndarray  # (chains, sweeps)
    temperatures: np.ndarray  # (sweeps,)
    summaries: np.ndarray  # (chains, sweeps - burn_in)
    tally: Tally | None
    quench_passes: list
    final_energies: np.ndarray  # after quenching, when asked


def run(model: ChainModel, *, schedule: Schedule | None = None, sweeps: int, chains: int = 1,
        seed: int, burn_in: int = 0, tally: bool = False, quench: bool = False,
        progress: bool = False, label: str = "sweeps", keep_states: bool = True) -> ChainRun:
    """Drive ``chains`` independent chains of ``model`` and keep their records.

    Parameters
    ----------
    schedule : Schedule, optional
        Temperatures; default T = 1 (posterior sampling).
    sweeps, burn_in : int
        Sweeps per chain, and how many of the first are discarded from tallies
        and summaries.
    tally : bool
        Accumulate posterior moments over the kept sweeps of all chains.
    quench : bool
        End every chain with a zero-temperature descent (ICM) until no change.
    keep_states : bool
        Keep every chain's final state in ``ChainRun.states``.  ``False`` (a
        tallied run that needs only its tally) frees each chain's state before
        the next chain starts, so the memory of states is that of one chain.
    """
    schedule = schedule or Constant(1.0)
    if sweeps < 1:
        raise ValueError(f"sweeps must be at least 1, got {sweeps}")
    if not 0 <= burn_in < sweeps:
        raise ValueError(f"burn-in must be in [0, sweeps), got {burn_in} of {sweeps}")
    if chains < 1:
        raise ValueError(f"chains must be at least 1, got {chains}")
    energies = np.empty((chains, sweeps))
    summaries = np.empty((chains, sweeps - burn_in))
    total = model.tally() if tally else None  # one tally for all chains: memory of one
    states, passes, finals = [], [], []
    with progress_bar(total=chains * sweeps, enabled=progress, desc=label) as bar, \
            kernel_threads(model.grid.size):
        for c in range(chains):
            last = state = st = None  # the previous chain's state is not held during this one
            for st in iterate(model, schedule, sweeps=sweeps, chain=c, seed=seed, burn_in=burn_in):
                energies[c, st.sweep] = st.energy
                if st.sampling:
                    summaries[c, st.sweep - burn_in] = model.summary(st.state)
                    if total is not None:
                        total.add(st.state)
                last = st
                bar.update(1)
            if total is not None:
                model.close_chain(last.state, total)
                total.end_chain()
            state = last.state
            passes.append(model.quench(state) if quench else 0)
            finals.append(model.energy(state) if quench else last.energy)
            if keep_states:
                states.append(state)
    return ChainRun(states, energies, schedule.temperatures(sweeps), summaries, total, passes,
                    np.asarray(finals))
