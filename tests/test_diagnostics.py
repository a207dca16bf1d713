"""R-hat against its closed-form limits, and what the sampler does when it cannot be computed.

For ``m`` chains of ``n`` independent N(mu_c, 1) draws whose chain means
``mu_c`` themselves spread with variance ``tau^2``, the expectations of the
statistic's parts are ``E W = 1`` and ``E B/n = 1/n + tau^2`` (Gelman & Rubin
1992, Statistical Science 7, 457-472; Gelman et al., Bayesian Data Analysis,
3rd ed., sec. 11.4), so with many chains R-hat tends to
``sqrt((n - 1)/n + 1/n + tau^2) = sqrt(1 + tau^2)``.  Split R-hat halves each
chain first: the same limit with ``n/2`` draws.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from mrfclean.diagnostics import ChainsDisagree, rhat


def _chains(m, n, tau, seed):
    gen = np.random.default_rng(seed)
    return gen.normal(0.0, tau, size=(m, 1)) + gen.standard_normal((m, n))


@pytest.mark.parametrize("n", [2, 3, 4, 6])
@pytest.mark.parametrize("tau", [0.0, 1.0])
def test_rhat_matches_its_many_chain_limit(n, tau):
    """20000 chains: R-hat^2 = ((n'-1)/n' W + B/n') / W with W and B/n' averages over
    the chains, so its Monte-Carlo error is a few times 1/sqrt(m) at most: with
    m = 20000 the sd of W is sqrt(2/(n'-1)/m) <= 0.01 (n' = 2), the sd of B/n' about
    (1/n' + tau^2) sqrt(2/m) <= 0.02.  Tolerance 0.03 on R-hat is about three of those
    sds; n' = n for 2-3 draws (whole chains), n/2 for 4 and 6 (split)."""
    r = rhat(_chains(20000, n, tau, seed=n + 10 * int(tau)))
    assert abs(r - math.sqrt(1 + tau * tau)) < 0.03, r


def test_short_chains_are_compared_whole():
    """With 2 or 3 draws the chains are not split: the statistic is Gelman & Rubin's
    original one, computed here from its definition."""
    x = _chains(5, 2, 0.5, seed=3)
    n = x.shape[1]
    W = np.mean([np.var(c, ddof=1) for c in x])
    B_over_n = np.var(x.mean(axis=1), ddof=1)
    assert rhat(x) == pytest.approx(math.sqrt(((n - 1) / n * W + B_over_n) / W), rel=1e-12)


def test_rhat_undefined_cases():
    assert math.isnan(rhat(np.ones((4, 1))))          # one draw per chain
    assert math.isnan(rhat(_chains(1, 3, 0.0, 1)))    # one chain, too short to split
    assert np.isfinite(rhat(_chains(1, 8, 0.0, 1)))   # one chain, split in two
    assert rhat(np.ones((3, 5))) == 1.0               # nothing varies


def test_sampler_does_not_report_disagreement_it_could_not_measure():
    """One kept sweep per chain leaves R-hat undefined: no ChainsDisagree warning
    claiming 'R-hat nan > 1.2' (the grey note falls back to the Monte-Carlo error)."""
    from mrfclean.estimates import sample_posterior
    from mrfclean.models.grey import GreyModel, GSMPrior

    y = np.random.default_rng(0).standard_normal((1, 16, 16))
    m = GreyModel(y, variance=1.0, prior=GSMPrior.quadratic(1.0), tol=1e-6)
    with warnings.catch_warnings():
        warnings.simplefilter("error", ChainsDisagree)
        post = sample_posterior(m, burn_in=1, samples=1, chains=2, seed=0)
    assert math.isnan(post.rhat)
