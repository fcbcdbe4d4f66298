"""Exposure distributions from summaries, checked with scipy.stats and
scipy.optimize."""

import numpy as np
import pytest
from scipy import optimize, stats

from doseattr.core.exposure import (
    fit_bins,
    from_gm_gsd,
    from_mean_sd,
    from_parameters,
    from_percentiles,
)
from doseattr.errors import ModelError

FAMILIES = ["lognormal", "gamma", "weibull"]


def frozen(name, params):
    a, b = params
    if name == "lognormal":
        return stats.lognorm(s=np.log(b), scale=a)
    if name == "gamma":
        return stats.gamma(a, scale=b)
    return stats.weibull_min(a, scale=b)


def test_from_gm_gsd():
    """Source: scipy.stats.lognorm(s=ln gsd, scale=gm): median gm, and
    exp(sd of ln X) = gsd."""
    e = from_gm_gsd(12.0, 2.2)
    ref = stats.lognorm(s=np.log(2.2), scale=12.0)
    np.testing.assert_allclose(e.family.ppf(np.array([0.5, 0.9]), e.params), ref.ppf([0.5, 0.9]), rtol=1e-13)
    assert e.parameters == {"gm": 12.0, "gsd": 2.2} and e.source == "gm-gsd"
    with pytest.raises(ModelError, match="gsd must be greater than 1"):
        from_gm_gsd(12.0, 0.9)


def test_from_parameters_names():
    """Source: the API contract (parameters by name, ModelError otherwise)."""
    e = from_parameters("gamma", {"scale": 2.0, "shape": 3.0})
    np.testing.assert_array_equal(e.params, [3.0, 2.0])
    with pytest.raises(ModelError, match="takes parameters shape, scale"):
        from_parameters("gamma", {"shape": 3.0})


@pytest.mark.parametrize("name", FAMILIES)
@pytest.mark.parametrize("mean,sd", [(3.0, 2.0), (50.0, 120.0), (1.0, 0.1)])
def test_from_mean_sd_round_trip(name, mean, sd):
    """Source: scipy.stats frozen distribution mean() and std()."""
    e = from_mean_sd(name, mean, sd)
    ref = frozen(name, e.params)
    np.testing.assert_allclose([ref.mean(), ref.std()], [mean, sd], rtol=1e-9)


def test_from_mean_sd_refuses_non_positive():
    """Source: contract (ModelError naming the quantity)."""
    with pytest.raises(ModelError, match="sd must be a positive"):
        from_mean_sd("gamma", 3.0, 0.0)


@pytest.mark.parametrize("name", FAMILIES)
@pytest.mark.parametrize("table", [{50: 2.0, 95: 8.0}, {10: 0.3, 75: 4.0}, {5: 1.0, 99: 1.5}])
def test_two_percentiles_are_matched_exactly(name, table):
    """Source: scipy.stats ppf of the resulting distribution."""
    e = from_percentiles(name, table)
    pct = np.array(sorted(table))
    np.testing.assert_allclose(frozen(name, e.params).ppf(pct / 100), [table[p] for p in pct], rtol=1e-9)


@pytest.mark.parametrize("name", FAMILIES)
def test_several_percentiles_by_least_squares(name):
    """Source: scipy.optimize.least_squares run here on ln(scipy.stats ppf) -
    ln(value), from a different start."""
    table = {10: 0.5, 25: 1.1, 50: 2.0, 75: 4.5, 95: 9.0}
    p = np.array(sorted(table)) / 100
    x = np.array([table[k] for k in sorted(table)])
    e = from_percentiles(name, table)

    def public(th):
        return np.exp(th) if name != "lognormal" else [np.exp(th[0]), np.exp(np.exp(th[1]))]

    def resid(th):
        return np.log(frozen(name, public(th)).ppf(p)) - np.log(x)

    start = [0.0, 0.0] if name != "lognormal" else [0.5, -0.5]
    ref = optimize.least_squares(resid, start, xtol=1e-14, ftol=1e-14, gtol=1e-14).x
    np.testing.assert_allclose(e.params, public(ref), rtol=1e-6)
    assert "least-squares" in e.notes[0]


@pytest.mark.parametrize("table,match", [
    ({50: 2.0}, "at least two"), ({0: 1.0, 50: 2.0}, "strictly between 0 and 100"),
    ({50: 3.0, 90: 2.0}, "must increase"), ({50: -1.0, 90: 2.0}, "positive"),
])
def test_percentile_refusals(table, match):
    """Source: contract."""
    with pytest.raises(ModelError, match=match):
        from_percentiles("lognormal", table)


EDGES = np.array([0.0, 1.0, 2.0, 4.0, 8.0, 16.0, np.inf])


def binned(name, n=2000, seed=4):
    truth = {"lognormal": stats.lognorm(0.9, scale=3.0), "gamma": stats.gamma(1.6, scale=2.5),
             "weibull": stats.weibull_min(1.3, scale=4.0)}[name]
    x = truth.rvs(n, random_state=np.random.default_rng(seed))
    counts = np.array([np.sum((x >= lo) & (x < hi)) for lo, hi in zip(EDGES[:-1], EDGES[1:])])
    return x, counts


@pytest.mark.parametrize("name", FAMILIES)
def test_fit_bins_matches_direct_multinomial_optimisation(name):
    """Source: scipy.optimize.minimize (Nelder-Mead) of the multinomial
    log-likelihood sum n_j ln[F(u_j) - F(l_j)] with scipy.stats cdf."""
    _, counts = binned(name)
    e = fit_bins(name, EDGES[:-1], EDGES[1:], counts)

    def neg(th):
        pub = np.exp(th) if name != "lognormal" else [np.exp(th[0]), np.exp(np.exp(th[1]))]
        return -np.sum(counts * np.log(np.diff(frozen(name, pub).cdf(EDGES))))

    start = [1.0, -0.2] if name == "lognormal" else [0.3, 1.0]
    res = optimize.minimize(neg, start, method="Nelder-Mead",
                            options={"xatol": 1e-11, "fatol": 1e-12, "maxiter": 5000})
    expected = np.exp(res.x) if name != "lognormal" else [np.exp(res.x[0]), np.exp(np.exp(res.x[1]))]
    np.testing.assert_allclose(e.params, expected, rtol=1e-5)
    np.testing.assert_allclose(e.fit.loglik, -res.fun, rtol=1e-9)
    assert e.fit.n == 2000 and e.fit.cov_internal is not None


@pytest.mark.parametrize("name", FAMILIES)
def test_fine_bins_approach_the_ungrouped_fit(name):
    """Source: grouped MLE converges to the ungrouped MLE as bins narrow;
    the ungrouped reference is scipy.stats.<family>.fit(x, floc=0)."""
    x, _ = binned(name, n=3000)
    edges = np.concatenate([[0.0], np.quantile(x, np.linspace(0.002, 0.998, 400)), [np.inf]])
    counts = np.histogram(x, np.concatenate([edges[:-1], [x.max() * 2]]))[0]
    e = fit_bins(name, edges[:-1], edges[1:], counts)
    dist = {"lognormal": stats.lognorm, "gamma": stats.gamma, "weibull": stats.weibull_min}[name]
    shape, _, scale = dist.fit(x, floc=0)
    expected = [scale, np.exp(shape)] if name == "lognormal" else [shape, scale]
    np.testing.assert_allclose(e.params, expected, rtol=5e-3)


def test_fit_bins_shares_and_total():
    """Source: the grouped likelihood scaled by a constant has the same
    maximum, and its information scales with the total."""
    _, counts = binned("gamma")
    shares = counts / counts.sum()
    by_counts = fit_bins("gamma", EDGES[:-1], EDGES[1:], counts)
    by_shares = fit_bins("gamma", EDGES[:-1], EDGES[1:], shares)
    with_total = fit_bins("gamma", EDGES[:-1], EDGES[1:], shares, total=counts.sum())
    np.testing.assert_allclose(by_shares.params, by_counts.params, rtol=1e-5)
    assert by_shares.fit.cov_internal is None and "no standard errors" in by_shares.fit.warnings[0]
    np.testing.assert_allclose(with_total.fit.cov_internal, by_counts.fit.cov_internal, rtol=1e-4)


def test_fit_bins_refusals():
    """Source: contract."""
    with pytest.raises(ModelError, match="overlap"):
        fit_bins("gamma", [0, 1, 1.5], [2, 3, np.inf], [5, 5, 5])
    with pytest.raises(ModelError, match="at least three bands"):
        fit_bins("gamma", [0, 1, 2], [1, 2, np.inf], [5, 0, 5])
    with pytest.raises(ModelError, match="lower < upper"):
        fit_bins("gamma", [0, 2, 1], [1, 2, np.inf], [5, 5, 5])


def test_fit_bins_matches_scipy_interval_censored_fit():
    """Source: scipy.stats.lognorm.fit on scipy.stats.CensoredData.interval_censored
    (each person known only to lie in a band), floc=0."""
    _, counts = binned("lognormal", n=500)
    lo, hi = EDGES[:-1], EDGES[1:]
    e = fit_bins("lognormal", lo, hi, counts)
    interval = stats.CensoredData.interval_censored(np.repeat(lo, counts), np.repeat(hi, counts))
    s, _, scale = stats.lognorm.fit(interval, floc=0)
    np.testing.assert_allclose(e.params, [scale, np.exp(s)], rtol=2e-3)
