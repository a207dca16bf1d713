"""Temperature schedules: small objects that answer "temperature at sweep k of n".

A schedule is used for simulated annealing towards the MAP estimate (Kirkpatrick,
Gelatt & Vecchi 1983; Geman & Geman 1984) and, as :class:`Constant` at T = 1,
for sampling the posterior itself.

References
----------
.. [1] S. Kirkpatrick, C. D. Gelatt and M. P. Vecchi, "Optimization by simulated
   annealing", Science 220 (1983) 671-680.
.. [2] S. Geman and D. Geman, "Stochastic relaxation, Gibbs distributions, and
   the Bayesian restoration of images", IEEE TPAMI 6 (1984) 721-741.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


class Schedule:
    """Base class; subclasses define :meth:`temperature`."""

    def temperature(self, k: int, n: int) -> float:  # pragma: no cover - abstract
        """Temperature at sweep ``k`` (0-based) of a run of ``n`` sweeps."""
        raise NotImplementedError

    def temperatures(self, n: int) -> np.ndarray:
        """All ``n`` temperatures of a run, as float64."""
        return np.array([self.temperature(k, n) for k in range(n)], dtype=np.float64)

    def describe(self) -> dict:
        """Plain, JSON-ready description (name and parameters)."""
        d = {"schedule": type(self).__name__.lower()}
        d.update(self.__dict__)
        return d


def _check_positive(**values):
    for name, v in values.items():
        if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise ValueError(f"{name} must be a positive finite number, got {v!r}")


@dataclass(frozen=True)
class Constant(Schedule):
    """The same temperature at every sweep (T = 1 samples the posterior)."""

    value: float = 1.0

    def __post_init__(self):
        _check_positive(value=self.value)

    def temperature(self, k, n):
        return float(self.value)


@dataclass(frozen=True)
class _Cooling(Schedule):
    """A schedule from a start to an end temperature (shared checks)."""

    start: float = 3.0
    end: float = 0.05

    def __post_init__(self):
        _check_positive(start=self.start, end=self.end)


@dataclass(frozen=True)
class Geometric(_Cooling):
    """``T_k = start * (end / start) ** (k / (n - 1))``: exponential cooling."""

    def temperature(self, k, n):
        if n <= 1:
            return float(self.end)
        return float(self.start * (self.end / self.start) ** (k / (n - 1)))


@dataclass(frozen=True)
class Linear(_Cooling):
    """``T_k = start + (end - start) * k / (n - 1)``."""

    def temperature(self, k, n):
        if n <= 1:
            return float(self.end)
        return float(self.start + (self.end - self.start) * k / (n - 1))


@dataclass(frozen=True)
class Logarithmic(_Cooling):
    """``T_k = c / log(2 + k)`` with ``c = start * log 2``, floored at ``end``.

    The schedule of Geman & Geman (1984) under which annealing provably reaches
    the global minimum for ``c`` large enough; it cools slowly, so in practice it
    is cut off at ``end``.
    """

    def temperature(self, k, n):
        return float(max(self.start * math.log(2.0) / math.log(2.0 + k), self.end))


SCHEDULES = {"geometric": Geometric, "linear": Linear, "logarithmic": Logarithmic}


def make_schedule(name: str, *, start: float = 3.0, end: float = 0.05) -> Schedule:
    """Build an annealing schedule from its name (``geometric``, ``linear``, ``logarithmic``)."""
    try:
        cls = SCHEDULES[name]
    except KeyError:
        raise ValueError(f"unknown schedule {name!r}; choose one of {sorted(SCHEDULES)}") from None
    return cls(start=start, end=end)
