r"""Monte Carlo standard errors of the interval limits (core
:func:`~doseattr.core.uncertainty.summary.quantile_mcse`), against a
simulation with a known truth and a closed form.

Closed form (asymptotic normality of a sample quantile; Mosteller 1946,
Ann Math Stat 17:377, from memory): for n draws from a density f, the
sample q-quantile has standard deviation
:math:`\sqrt{q(1-q)/n}\,/\,f(x_q)`. For standard normal draws
:math:`f(x_q) = \varphi(\Phi^{-1}(q))` (scipy.stats.norm).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from doseattr.core.uncertainty.summary import quantile_mcse, summarise

N, SEEDS = 2000, 300


@pytest.mark.parametrize("q", [0.025, 0.5, 0.975])
def test_quantile_mcse_matches_the_closed_form_and_the_spread_over_seeds(q):
    """Over 300 seeds: the mean estimated MCSE is within 10% of the closed
    form, and the SD of the sample quantile across seeds (the truth the
    MCSE should predict) within 15% of it (a 300-seed SD has a relative
    error of about 4%)."""
    closed = np.sqrt(q * (1 - q) / N) / stats.norm.pdf(stats.norm.ppf(q))
    estimates, quantiles = [], []
    for seed in range(SEEDS):
        d = np.sort(np.random.default_rng(seed).standard_normal(N))
        estimates.append(quantile_mcse(d, q))
        quantiles.append(np.quantile(d, q))
    assert np.mean(estimates) == pytest.approx(closed, rel=0.10)
    assert np.std(quantiles, ddof=1) == pytest.approx(closed, rel=0.15)


def test_summary_reports_the_limits_mcse():
    """The interval's limits carry their own MCSE, larger than the MCSE of
    the mean for tail quantiles of normal draws (closed form above: the
    ratio for q = 0.025 is sqrt(q(1-q))/phi(z_q) = 2.68)."""
    d = np.random.default_rng(7).standard_normal(5000)
    i = summarise(0.0, d)
    assert i.lower_mcse == pytest.approx(quantile_mcse(np.sort(d), 0.025))
    assert i.upper_mcse == pytest.approx(quantile_mcse(np.sort(d), 0.975))
    ratio = np.sqrt(0.025 * 0.975) / stats.norm.pdf(stats.norm.ppf(0.025))
    assert i.lower_mcse / i.mcse == pytest.approx(ratio, rel=0.25)
