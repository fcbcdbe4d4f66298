"""Exact per-value terms and scores of the measurement log-likelihood
(``Family.log_terms_scores``, ``likelihood.value_and_gradient``) against
scipy.stats log densities / log CDFs and finite differences of them."""

import numpy as np
import pytest
from scipy import optimize, special, stats

from doseattr.core.exposure import FAMILIES
from doseattr.core.exposure.incomplete_gamma import dlog_gammainc_da
from doseattr.core.exposure.likelihood import pool_measurements, value_and_gradient

SEED = 20261203
PARAMS = {"lognormal": [3.0, 2.2], "gamma": [1.7, 2.5], "weibull": [1.3, 4.0]}


def scipy_frozen(name, params):
    a, b = params
    if name == "lognormal":
        return stats.lognorm(s=np.log(b), scale=a)
    return {"gamma": stats.gamma, "weibull": stats.weibull_min}[name](a, scale=b)


def scipy_loglik(name, theta, x, detected, w):
    """The weighted left-censored log-likelihood built from scipy.stats."""
    dist = scipy_frozen(name, FAMILIES[name].from_internal(theta))
    return float(np.dot(w[detected], dist.logpdf(x[detected]))
                 + np.dot(w[~detected], dist.logcdf(x[~detected])))


def central(f, theta, h=1e-6):
    """Central differences (error O(h^2); common practice)."""
    out = []
    for j in range(len(theta)):
        e = np.zeros(len(theta))
        e[j] = h
        out.append((f(theta + e) - f(theta - e)) / (2 * h))
    return np.array(out)


@pytest.mark.parametrize("name", sorted(FAMILIES))
@pytest.mark.parametrize("censored", [False, True])
def test_terms_and_scores_match_scipy(name, censored):
    """Source: scipy.stats.<family>.logpdf / logcdf for the terms, and their
    central differences in the internal parameters for the scores."""
    fam = FAMILIES[name]
    x = np.random.default_rng(SEED).lognormal(1.0, 1.0, 200)
    params = np.array(PARAMS[name])
    terms, scores = fam.log_terms_scores(x, params, censored=censored)
    dist = scipy_frozen(name, params)
    np.testing.assert_allclose(terms, dist.logcdf(x) if censored else dist.logpdf(x), rtol=1e-11)
    theta = fam.to_internal(params)
    method = "logcdf" if censored else "logpdf"
    for i in range(0, 200, 17):
        def term(th, v=x[i]):
            return float(getattr(scipy_frozen(name, fam.from_internal(th)), method)(v))

        np.testing.assert_allclose(scores[i], central(term, theta), rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("name", sorted(FAMILIES))
def test_pooled_value_and_gradient_match_check_grad(name):
    """Source: the log-likelihood built from scipy.stats (value) and
    scipy.optimize.check_grad (gradient against its finite differences);
    data censored at two limits, with ties and unequal weights."""
    rng = np.random.default_rng(SEED + 1)
    x = np.round(rng.lognormal(1.0, 0.9, 400), 1) + 0.05
    dl = rng.choice([1.5, 2.5], 400)
    det = x >= dl
    x = np.where(det, x, dl)
    w = rng.uniform(0.5, 2.0, 400)
    fam = FAMILIES[name]
    pooled = pool_measurements(fam, x, det, w)
    assert pooled.limits.size == 2
    assert (pooled.summary is not None) or 0 < pooled.detects.size < det.sum()
    theta = fam.to_internal(PARAMS[name]) + 0.1
    value, grad = value_and_gradient(fam, theta, pooled)
    np.testing.assert_allclose(value, scipy_loglik(name, theta, x, det, w), rtol=1e-11)
    err = optimize.check_grad(lambda th: scipy_loglik(name, th, x, det, w),
                              lambda th: value_and_gradient(fam, th, pooled)[1], theta,
                              epsilon=1e-6)
    assert err < 1e-3 * np.linalg.norm(grad) + 1e-3


@pytest.mark.parametrize("a", [0.3, 2.0, 40.0])
def test_dlog_gammainc_da_matches_differences(a):
    """Source: central differences of log(scipy.special.gammainc) in the
    shape (step 1e-6 a), including arguments past the series range (y = 600,
    where the function differences itself and P is 1 to double precision)."""
    y = np.array([1e-3, 0.4, 3.0, 25.0, 80.0, 600.0])
    h = 1e-6 * a
    fd = (np.log(special.gammainc(a + h, y)) - np.log(special.gammainc(a - h, y))) / (2 * h)
    np.testing.assert_allclose(dlog_gammainc_da(a, y), fd, rtol=1e-6, atol=1e-9)


def test_lognormal_limit_far_below_keeps_finite_scores():
    """Source: closed form (Mills ratio, from memory): r = phi(z) / Phi(z)
    = -z / (1 - 1/z^2 + ...) as z -> -inf, so at z = -40, r = 40 to 1e-3
    and the scores (-r/s, -r z) stay finite."""
    fam = FAMILIES["lognormal"]
    s = np.log(2.0)
    x = np.array([np.exp(-40 * s)])  # gm 1, gsd 2: z = -40
    terms, scores = fam.log_terms_scores(x, np.array([1.0, 2.0]), censored=True)
    assert np.isfinite(terms).all() and np.isfinite(scores).all()
    r = -scores[0, 0] * s
    np.testing.assert_allclose(r, 40.0, rtol=1e-3)
    np.testing.assert_allclose(scores[0, 1], -r * -40.0, rtol=1e-12)


def test_weibull_limit_far_below_has_unit_rate():
    """Source: closed form: for E = (x/lambda)^k -> 0, ln(1 - e^-E) = ln E
    + O(E), so the scores tend to (u, -k) with u = ln E."""
    fam = FAMILIES["weibull"]
    x = np.array([1e-20, 1e-200])
    _, scores = fam.log_terms_scores(x, np.array([1.5, 3.0]), censored=True)
    u = 1.5 * (np.log(x) - np.log(3.0))
    np.testing.assert_allclose(scores, np.stack([u, np.full(2, -1.5)], axis=1), rtol=1e-12)
