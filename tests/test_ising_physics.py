r"""The pure Ising prior (h = 0) on a periodic 64 x 64 lattice against exact results.

* Spontaneous magnetisation (C. N. Yang, Phys. Rev. 85 (1952) 808):
  :math:`M = (1 - \sinh(2K)^{-4})^{1/8}` for :math:`K > K_c = \tfrac12\ln(1+\sqrt2)`.
* Internal energy per site (L. Onsager, Phys. Rev. 65 (1944) 117; the closed
  form as given in K. Huang, Statistical Mechanics, 2nd ed. (1987), ch. 15,
  quoted from memory):
  :math:`u = -\coth(2K)\,[1 + \tfrac{2}{\pi}(2\tanh^2(2K) - 1)\,\mathbf{K}(\kappa)]`
  with :math:`\kappa = 2\sinh(2K)/\cosh^2(2K)` and :math:`\mathbf K` the
  complete elliptic integral of the first kind (:func:`scipy.special.ellipk`,
  which takes :math:`m = \kappa^2`).  Checked below at its known limits
  (u(K_c) = -sqrt(2); u -> -2 and u -> 0 as K -> inf, 0).
* Susceptibility bounds in the disordered phase:
  :math:`1 + 4\tanh K \le \chi = N\langle m^2\rangle \le 1 + 4\tanh K/(1 - 3\tanh K)`,
  the lower bound from Griffiths' second inequality (R. B. Griffiths, J. Math.
  Phys. 8 (1967) 478: correlations are non-negative and a neighbour correlation
  is at least tanh K), the upper from the self-avoiding-walk bound on
  correlations (M. E. Fisher, Phys. Rev. 162 (1967) 480) with at most
  :math:`4 \cdot 3^{n-1}` walks of n steps on a four-regular graph; both from memory.

Finite size: away from K_c the correlation length is about one lattice
spacing (K = 0.6, 0.3) or less, so on a 64 x 64 torus the deviations from the
infinite-lattice values fall off like exp(-64 / xi) and are negligible next to
the Monte-Carlo error.

Monte-Carlo tolerance: ``BATCHES`` independent chains (distinct seeds); each
chain's time average over ``SAMPLES`` sweeps (hundreds of autocorrelation
times) is close to normal, so (mean - exact) / se follows Student's t with
``BATCHES - 1`` degrees of freedom; checks use the two-sided 1e-3 quantile.
"""

import numpy as np
import pytest
from scipy import special, stats

from mrfclean import sampler
from mrfclean.diagnostics import autocorrelation_time
from mrfclean.models.binary import BinaryModel

L = 64
N = L * L
K_C = 0.5 * np.log(1.0 + np.sqrt(2.0))
BATCHES = 10
SAMPLES = 2000
T_CRIT = stats.t.ppf(1.0 - 0.5e-3, BATCHES - 1)  # two-sided 1e-3


# Results do not depend on the thread count (tests/test_kernels.py checks it); on
# these small lattices one thread is faster, and steadier when the machine is shared.
pytestmark = pytest.mark.usefixtures("one_numba_thread")


def onsager_energy(K):
    """Internal energy per site of the infinite square-lattice Ising model, in units of J."""
    kappa = 2.0 * np.sinh(2.0 * K) / np.cosh(2.0 * K) ** 2
    return -1.0 / np.tanh(2.0 * K) * (
        1.0 + 2.0 / np.pi * (2.0 * np.tanh(2.0 * K) ** 2 - 1.0) * special.ellipk(kappa**2))


def yang_magnetisation(K):
    return (1.0 - np.sinh(2.0 * K) ** -4) ** 0.125


def ising_batches(K, *, burn_in, tally=False):
    """Per-chain averages of |m|, N m^2 and E/(N K), and the merged P(on) tally."""
    model = BinaryModel(np.zeros((L, L)), coupling=K, boundary="periodic",
                        start=np.ones((L, L)))  # chain 0 of a run starts from the start spins
    abs_m, chi, u, taus, merged = [], [], [], [], None
    for b in range(BATCHES):
        run = sampler.run(model, sweeps=burn_in + SAMPLES, chains=1, seed=500 + b,
                          burn_in=burn_in, tally=tally)
        m = run.summaries[0]
        abs_m.append(np.abs(m).mean())
        chi.append(N * np.mean(m * m))
        u.append(np.mean(run.energies[0, burn_in:]) / (N * K))  # E = -K sum s_i s_j = N K u
        taus.append(autocorrelation_time(m))
        if tally:
            if merged is None:
                merged = run.tally
            else:
                merged.merge(run.tally)
    return dict(abs_m=np.array(abs_m), chi=np.array(chi), u=np.array(u), tau=np.mean(taus),
                tally=merged)


def mean_se(x):
    return x.mean(), x.std(ddof=1) / np.sqrt(x.size)


def test_closed_forms_at_their_known_limits():
    # the closed form as typed here, at its known values: -sqrt(2) at K_c (approached from
    # above; the formula is 0 * inf there), -2 and 0
    # in the zero- and infinite-temperature limits (handbook values)
    assert onsager_energy(K_C + 1e-6) == pytest.approx(-np.sqrt(2.0), rel=1e-4)
    assert onsager_energy(8.0) == pytest.approx(-2.0, rel=1e-9)
    assert onsager_energy(1e-4) == pytest.approx(-2.0 * np.tanh(1e-4), rel=1e-3)
    # Yang's M vanishes at K_c (sinh 2K_c = 1) and tends to 1 at low temperature
    assert yang_magnetisation(K_C * (1 + 1e-12)) < 0.05
    assert yang_magnetisation(3.0) == pytest.approx(1.0, abs=1e-10)


def test_ordered_phase_magnetisation_and_energy():
    K = 0.6
    r = ising_batches(K, burn_in=200)
    m, se = mean_se(r["abs_m"])
    assert abs(m - yang_magnetisation(K)) < T_CRIT * se, (m, se, yang_magnetisation(K))
    u, se_u = mean_se(r["u"])
    assert abs(u - onsager_energy(K)) < T_CRIT * se_u, (u, se_u, onsager_energy(K))
    # the chains stayed in the + phase they started in (a flip of the whole 64 x 64
    # lattice at K = 0.6 would need a domain wall costing ~ 2 * 64 * 2K = 154 in E/T)
    assert np.all(r["abs_m"] > 0.9)


def test_disordered_phase_magnetisation_is_small():
    K = 0.3
    r = ising_batches(K, burn_in=200)
    v = np.tanh(K)
    chi_low, chi_high = 1.0 + 4.0 * v, 1.0 + 4.0 * v / (1.0 - 3.0 * v)  # 2.17, 10.25
    chi, se_chi = mean_se(r["chi"])
    assert chi_low - T_CRIT * se_chi < chi < chi_high + T_CRIT * se_chi, (chi, se_chi)
    # E|m| <= sqrt(E m^2) <= sqrt(chi_high / N) = 0.050, against 0.97 in the ordered phase
    m, se = mean_se(r["abs_m"])
    assert m < np.sqrt(chi_high / N) + T_CRIT * se, (m, se)
    u, se_u = mean_se(r["u"])
    assert abs(u - onsager_energy(K)) < T_CRIT * se_u, (u, se_u, onsager_energy(K))


def test_high_temperature_marginals_are_one_half():
    K = 0.05
    r = ising_batches(K, burn_in=50, tally=True)
    p_on = r["tally"].mean()
    n = BATCHES * SAMPLES
    # Each site's P(on) estimate has variance (1/4) tau / n.  At K = 0.05 a sweep
    # nearly forgets the previous state (the magnetisation's integrated
    # autocorrelation time, measured and averaged over the chains, is ~1.1); tau <= 1.5
    # is allowed and checked.
    # Bonferroni over the N sites for a family-wise level of 1e-3:
    assert r["tau"] < 1.5
    z = stats.norm.isf(1e-3 / (2 * N))
    assert np.max(np.abs(p_on - 0.5)) < z * np.sqrt(0.25 * 1.5 / n)
    u, se_u = mean_se(r["u"])
    assert abs(u - onsager_energy(K)) < T_CRIT * se_u, (u, se_u, onsager_energy(K))
