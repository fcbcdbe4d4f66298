"""Weighted fits to fully observed data without a general search
(``Family.uncensored_mle``: lognormal closed form, gamma from its
sufficient statistics, Weibull through its profile in the shape) and their
closed-form information, against scipy."""

import numpy as np
import pytest
from scipy import optimize, special, stats
from statsmodels.tools.numdiff import approx_hess3

from doseattr.core.exposure import FAMILIES, fit_measurements

SEED = 20261204
TRUE = {"lognormal": stats.lognorm(0.8, scale=4.0), "gamma": stats.gamma(2.2, scale=1.5),
        "weibull": stats.weibull_min(1.6, scale=5.0)}


def public(name, fitted):
    """scipy.stats (shape, loc, scale) -> our public parameters."""
    shape, _, scale = fitted
    return np.array([scale, np.exp(shape)]) if name == "lognormal" else np.array([shape, scale])


def data(name, n=120, seed=SEED):
    rng = np.random.default_rng(seed)
    return TRUE[name].rvs(n, random_state=rng), rng.integers(1, 5, n)


@pytest.mark.parametrize("name", sorted(FAMILIES))
def test_integer_weights_match_scipy_fit_of_repeated_values(name):
    """Source: scipy.stats.<family>.fit(np.repeat(x, m), floc=0): integer
    frequency weights m are m copies of each value. scipy's own searches
    stop near 1e-5 (weibull_min) so the tolerance is theirs."""
    x, m = data(name)
    e = fit_measurements(name, x, weights=m)
    expected = public(name, TRUE[name].dist.fit(np.repeat(x, m), floc=0))
    np.testing.assert_allclose(e.params, expected, rtol=1e-4)


def test_gamma_weighted_mle_solves_the_likelihood_equation():
    r"""Source: closed form derived here: the weighted gamma likelihood
    equations are ln k - psi(k) = ln xbar - ybar (xbar, ybar weighted means
    of x and ln x) and theta = xbar / k; solved here by scipy.optimize.brentq
    on scipy.special.digamma, with non-integer weights."""
    rng = np.random.default_rng(SEED + 1)
    x = TRUE["gamma"].rvs(300, random_state=rng)
    w = rng.uniform(0.2, 3.0, 300)
    xbar, ybar = np.average(x, weights=w), np.average(np.log(x), weights=w)
    s = np.log(xbar) - ybar
    k = optimize.brentq(lambda a: np.log(a) - special.digamma(a) - s, 1e-3, 1e3, xtol=1e-15, rtol=1e-15)
    e = fit_measurements("gamma", x, weights=w)
    np.testing.assert_allclose(e.params, [k, xbar / k], rtol=1e-10)


def test_weibull_weighted_mle_solves_the_profile_equation():
    r"""Source: closed form derived here: the weighted Weibull shape solves
    1/k + ybar - sum w x^k ln x / sum w x^k = 0 and lambda^k = sum w x^k / W;
    solved here by scipy.optimize.brentq, with non-integer weights."""
    rng = np.random.default_rng(SEED + 2)
    x = TRUE["weibull"].rvs(300, random_state=rng)
    w = rng.uniform(0.2, 3.0, 300)
    y = np.log(x)
    ybar = np.average(y, weights=w)
    k = optimize.brentq(lambda a: 1 / a + ybar - np.sum(w * x**a * y) / np.sum(w * x**a), 0.05, 50,
                        xtol=1e-15, rtol=1e-15)
    lam = (np.sum(w * x**k) / np.sum(w)) ** (1 / k)
    e = fit_measurements("weibull", x, weights=w)
    np.testing.assert_allclose(e.params, [k, lam], rtol=1e-10)


@pytest.mark.parametrize("name", sorted(FAMILIES))
def test_covariance_is_inverse_numerical_hessian(name):
    """Source: statsmodels.tools.numdiff.approx_hess3 of the weighted
    log-likelihood built from scipy.stats logpdf, inverted, at our estimate
    (weights normalised to sum to n, as the fit does)."""
    rng = np.random.default_rng(SEED + 3)
    x = TRUE[name].rvs(200, random_state=rng)
    w = rng.uniform(0.5, 2.0, 200)
    w = w * (w.size / w.sum())
    fam = FAMILIES[name]
    e = fit_measurements(name, x, weights=w)

    def loglik(theta):
        a, b = fam.from_internal(theta)
        dist = stats.lognorm(np.log(b), scale=a) if name == "lognormal" else TRUE[name].dist(a, scale=b)
        return float(np.dot(w, dist.logpdf(x)))

    expected = np.linalg.inv(-approx_hess3(fam.to_internal(e.params), loglik))
    np.testing.assert_allclose(e.fit.cov_internal, expected, rtol=1e-5, atol=1e-6 * expected.max())


@pytest.mark.parametrize("name", sorted(FAMILIES))
def test_tied_values_pool_to_their_weights(name):
    """Source: closed form: equal values contribute identical terms, so
    rounded data with ties fit exactly as their distinct values weighted by
    the counts (np.unique); the fit normalises weights to sum to the number
    of values given, which scales the log-likelihood by u / n and the
    covariance by n / u (u distinct values of n)."""
    rng = np.random.default_rng(SEED + 4)
    x = np.round(TRUE[name].rvs(500, random_state=rng), 1) + 0.05
    uniq, counts = np.unique(x, return_counts=True)
    a = fit_measurements(name, x)
    b = fit_measurements(name, uniq, weights=counts)
    np.testing.assert_allclose(a.params, b.params, rtol=1e-10)
    np.testing.assert_allclose(b.fit.loglik, a.fit.loglik * uniq.size / x.size, rtol=1e-10)
    np.testing.assert_allclose(b.fit.cov_internal, a.fit.cov_internal * x.size / uniq.size, rtol=1e-6)
