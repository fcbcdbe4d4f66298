"""The comparison fits beside an empirical PAF on many repeated values
(issue 15, item 3) are fitted to the distinct values with summed weights
and put back on the scale of every value.

References: the lognormal MLE and its observed information in closed form
(mean and divisor-n SD of ln x; information diag(n / sigma^2, 2n) in
(mu, ln sigma), derived for the normal log-likelihood), scipy.stats
log-densities summed over every value, scipy.stats.gamma.fit, and a
Kolmogorov-Smirnov test by scipy.stats.kstest on every value. Data:
seeded simulations, rounded so that values repeat.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from doseattr.analysis.comparisons import COLLAPSE_FROM, comparison_fits

N = COLLAPSE_FROM + 10_000


def _values(seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)  # simulation, seeded
    return np.round(6.0 * np.exp(0.6 * rng.standard_normal(N)), 1)


def test_lognormal_on_distinct_values_is_the_closed_form_on_all_values():
    x = _values(1508)
    assert np.unique(x).size * 2 <= x.size  # the collapsed path is taken
    (fit,), why = comparison_fits(x, None, ("lognormal",))
    assert why == []
    logs = np.log(x)
    mu, s = logs.mean(), logs.std()  # closed form, divisor n
    np.testing.assert_allclose(fit.parameters["gm"], math.exp(mu), rtol=1e-10)
    np.testing.assert_allclose(fit.parameters["gsd"], math.exp(s), rtol=1e-10)
    dist = stats.lognorm(s=s, scale=math.exp(mu))
    loglik = float(np.sum(dist.logpdf(x)))  # scipy.stats, every value
    np.testing.assert_allclose(fit.fit.loglik, loglik, rtol=1e-10)
    assert fit.fit.aic == pytest.approx(4 - 2 * loglik, rel=1e-10)
    # closed form: inverse of diag(n / s^2, 2n) in (mu, ln s)
    np.testing.assert_allclose(np.diag(fit.fit.cov_internal), [s * s / N, 1 / (2 * N)],
                               rtol=1e-5)
    assert fit.fit.n == N and fit.fit.values.size == N and fit.fit.weights_meaning is None
    ks = stats.kstest(x, dist.cdf)  # scipy.stats.kstest on every value
    assert fit.fit.gof["n"] == N
    np.testing.assert_allclose(fit.fit.gof["statistic"], ks.statistic, rtol=1e-8)


def test_gamma_on_distinct_values_matches_scipy_on_all_values():
    x = _values(1509)
    (fit,), _ = comparison_fits(x, None, ("gamma",))
    a, _, scale = stats.gamma.fit(x, floc=0)  # scipy's MLE on every value
    np.testing.assert_allclose([fit.parameters[k] for k in fit.family.param_names],
                               [a, scale], rtol=1e-5)
    loglik = float(np.sum(stats.gamma.logpdf(x, fit.params[0], scale=fit.params[1])))
    np.testing.assert_allclose(fit.fit.loglik, loglik, rtol=1e-10)


def test_weights_are_summed_per_distinct_value():
    """Integer weights w_i: the weighted log-likelihood is sum w_i log f(x_i)
    scaled to weights summing to n (the core's normalisation), here
    checked with scipy.stats.lognorm at the closed-form weighted MLE."""
    x = _values(1510)
    w = np.random.default_rng(1511).integers(1, 21, x.size).astype(float)
    (fit,), _ = comparison_fits(x, w, ("lognormal",))
    wn = w * (x.size / w.sum())
    logs = np.log(x)
    mu = np.average(logs, weights=wn)
    s = math.sqrt(np.average((logs - mu) ** 2, weights=wn))
    np.testing.assert_allclose([fit.parameters["gm"], fit.parameters["gsd"]],
                               [math.exp(mu), math.exp(s)], rtol=1e-10)
    loglik = float(np.dot(wn, stats.lognorm(s=s, scale=math.exp(mu)).logpdf(x)))
    np.testing.assert_allclose(fit.fit.loglik, loglik, rtol=1e-10)
    np.testing.assert_allclose(fit.fit.effective_n, w.sum() ** 2 / np.sum(w * w), rtol=1e-10)
    assert fit.fit.weights_meaning == "frequency"
    np.testing.assert_allclose(fit.fit.weights, wn, rtol=1e-14)


def test_zeros_are_left_out_and_failures_are_notes():
    x = _values(1512)
    x[:50] = 0.0
    (fit,), _ = comparison_fits(x, None, ("lognormal",))
    assert fit.fit.n == N - 50
    fits, why = comparison_fits(np.r_[np.zeros(N - 2), 1.0, 2.0], None, ("lognormal",))
    assert fits == () and len(why) == 1 and why[0].startswith("lognormal not fitted")
