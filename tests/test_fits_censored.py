"""Left-censored, weighted fits (BFGS on the exact gradient over pooled
data) against an independent maximisation of the log-likelihood built from
scipy.stats, its statsmodels numerical Hessian and the Binder sandwich
computed here."""

import numpy as np
import pytest
from scipy import optimize, stats
from statsmodels.tools.numdiff import approx_hess3

from doseattr.core.exposure import FAMILIES, fit_measurements

SEED = 20261205
TRUE = {"lognormal": stats.lognorm(0.9, scale=3.0), "gamma": stats.gamma(1.8, scale=2.0),
        "weibull": stats.weibull_min(1.4, scale=4.0)}
#: Where the independent searches start (the generating parameters, rounded).
START = {"lognormal": [3.0, 2.5], "gamma": [1.8, 2.0], "weibull": [1.4, 4.0]}


def frozen(name, params):
    a, b = params
    return stats.lognorm(np.log(b), scale=a) if name == "lognormal" else TRUE[name].dist(a, scale=b)


def censored_sample(name, n=300, limits=25, seed=SEED):
    """Values below a per-value limit (one of ``limits`` distinct ones,
    around the 10th to 40th percentile) reported as that limit."""
    rng = np.random.default_rng(seed)
    x = TRUE[name].rvs(n, random_state=rng)
    dl = TRUE[name].ppf(np.linspace(0.1, 0.4, limits))[rng.integers(0, limits, n)]
    det = x >= dl
    return np.where(det, x, dl), det, rng.uniform(0.5, 2.0, n)


def scipy_loglik(name, theta, x, det, w):
    dist = frozen(name, FAMILIES[name].from_internal(theta))
    return float(np.dot(w[det], dist.logpdf(x[det])) + np.dot(w[~det], dist.logcdf(x[~det])))


@pytest.mark.parametrize("name", sorted(FAMILIES))
def test_censored_weighted_fit_matches_independent_maximum(name):
    """Source: scipy.optimize.minimize (Nelder-Mead, tight tolerances, then
    Powell) of the weighted left-censored log-likelihood built from
    scipy.stats logpdf / logcdf; covariance: the inverse of
    statsmodels.tools.numdiff.approx_hess3 of that log-likelihood."""
    x, det, w = censored_sample(name)
    w = w * (w.size / w.sum())
    e = fit_measurements(name, x, detected=det, weights=w)
    fam = FAMILIES[name]

    def neg(th):
        return -scipy_loglik(name, th, x, det, w)

    res = optimize.minimize(neg, fam.to_internal(START[name]),
                            method="Nelder-Mead", options={"xatol": 1e-12, "fatol": 1e-13, "maxiter": 20000})
    res = optimize.minimize(neg, res.x, method="Powell", options={"xtol": 1e-12, "ftol": 1e-15})
    np.testing.assert_allclose(fam.to_internal(e.params), res.x, rtol=1e-6, atol=1e-7)
    np.testing.assert_allclose(e.fit.loglik, -res.fun, rtol=1e-11)
    theta = fam.to_internal(e.params)
    expected = np.linalg.inv(approx_hess3(theta, neg))
    np.testing.assert_allclose(e.fit.cov_internal, expected, rtol=1e-5, atol=1e-6 * expected.max())
    assert e.fit.censored == int((~det).sum()) and e.fit.censored > 30


@pytest.mark.parametrize("name", sorted(FAMILIES))
def test_importance_sandwich_with_exact_scores(name):
    """Source: Binder (1983, Int Stat Rev 51:279, from memory) sandwich
    A^-1 B A^-1 computed here: A from approx_hess3 (statsmodels) of the
    scipy.stats log-likelihood, B = sum w^2 s s^T with the scores s by
    central differences of each value's scipy.stats term."""
    x, det, w = censored_sample(name, seed=SEED + 1)
    w = w * (w.size / w.sum())
    e = fit_measurements(name, x, detected=det, weights=w, weight_meaning="importance")
    fam = FAMILIES[name]
    theta = fam.to_internal(e.params)
    bread = np.linalg.inv(-approx_hess3(theta, lambda th: scipy_loglik(name, th, x, det, w)))

    def terms(th):
        dist = frozen(name, fam.from_internal(th))
        return np.where(det, dist.logpdf(x), dist.logcdf(x))

    h = 1e-6
    s = np.stack([(terms(theta + h * np.eye(2)[j]) - terms(theta - h * np.eye(2)[j])) / (2 * h)
                  for j in range(2)], axis=1)
    ws = s * w[:, None]
    expected = bread @ (ws.T @ ws) @ bread
    np.testing.assert_allclose(e.fit.cov_internal, expected, rtol=1e-4, atol=1e-6 * expected.max())


def test_many_limits_gamma_far_tail():
    """Source: the independent scipy maximisation above, on gamma data
    whose limits include some far above the body (y = x / theta beyond
    the series range of the shape derivative, where it differences)."""
    rng = np.random.default_rng(SEED + 2)
    x = TRUE["gamma"].rvs(200, random_state=rng)
    det = np.ones(200, bool)
    det[:3] = False
    x[:3] = [1500.0, 2000.0, 0.3]  # limits: two with y near 1000, one low
    w = np.ones(200)
    e = fit_measurements("gamma", x, detected=det)
    fam = FAMILIES["gamma"]
    res = optimize.minimize(lambda th: -scipy_loglik("gamma", th, x, det, w), fam.to_internal(START["gamma"]),
                            method="Nelder-Mead", options={"xatol": 1e-12, "fatol": 1e-13, "maxiter": 20000})
    np.testing.assert_allclose(fam.to_internal(e.params), res.x, rtol=1e-6, atol=1e-7)
