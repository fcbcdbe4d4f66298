"""Monte Carlo propagation: intervals, consistency of totals, seeds."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from doseattr.core.attribution.fractions import paf
from doseattr.core.attribution.scenarios import Cap
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.empirical import empirical
from doseattr.core.exposure.registry import FAMILIES
from doseattr.core.uncertainty.propagate import Stratum, point_values, propagate
from doseattr.core.uncertainty.summary import summarise


def gamma_exposure():
    return Exposure(FAMILIES["gamma"], np.array([2.0, 3.0]), 0.1)


def test_interval_matches_monotone_transform_of_coefficient():
    """Only the slope varies and PAF(b) = 1 - 1/E[exp(b min(X, D))] is
    increasing in b (the integrand increases pointwise), so the percentiles
    of PAF draws are PAF at the percentiles of the slope draws, and those
    converge to PAF(b_hat +- 1.96 se) (normal quantiles, scipy.stats.norm).
    Monte Carlo error of a 2.5% sample quantile with D draws is about
    sqrt(p(1-p)/D)/phi(z) se (asymptotic variance of sample quantiles)."""
    b, se = 0.08, 0.02
    curve = Curve(LogLinear(), np.array([b]), np.array([[se**2]]), max_dose=25.0)
    ex = gamma_exposure()
    d = 20_000
    prop = propagate(curve, [Stratum("all", 100.0, ex)], [], draws=d,
                     rng=np.random.default_rng(11), minimum_risk=(0.0, 0.0), sources=("curve",))
    draws = prop.paf[0]
    z = stats.norm.ppf(0.975)
    mc_err = np.sqrt(0.025 * 0.975 / d) / stats.norm.pdf(z) * se
    for q, sign in [(0.025, -1), (0.975, 1)]:
        lo_b, hi_b = b + sign * z * se - 4 * mc_err, b + sign * z * se + 4 * mc_err
        bracket = sorted(paf(Curve(LogLinear(), np.array([v]), np.eye(1), max_dose=25.0), ex, minimum_risk=0.0)
                         for v in (lo_b, hi_b))
        assert bracket[0] <= np.quantile(draws, q) <= bracket[1]
    # exact monotone-transform identity at the sample quantiles (order statistics)
    slopes = np.random.default_rng(11).multivariate_normal([b], [[se**2]], size=d, method="eigh")[:, 0]
    k = int(0.975 * (d - 1))
    assert np.sort(draws)[k] == pytest.approx(
        paf(Curve(LogLinear(), np.array([np.sort(slopes)[k]]), np.eye(1), max_dose=25.0), ex, minimum_risk=0.0), rel=1e-10)


def test_totals_are_sums_of_strata_draw_by_draw():
    """Total attributable cases are the within-draw sum over strata, and the
    overall PAF is total attributable over total cases (definition)."""
    curve = Curve(LinearExcess(), np.array([0.05]), np.array([[0.0001]]), max_dose=30.0)
    shared = gamma_exposure()
    own = Exposure(FAMILIES["lognormal"], np.array([4.0, 2.0]))
    strata = [Stratum("north", 120.0, shared), Stratum("south", 80.0, shared),
              Stratum("east", 40.0, own)]
    prop = propagate(curve, strata, [Cap(5.0, name="cap")], draws=500,
                     rng=np.random.default_rng(3), minimum_risk=(0.0, 2.0))
    assert prop.total_attributable == pytest.approx(prop.attributable.sum(axis=0), rel=1e-14)
    assert prop.total_paf == pytest.approx(prop.attributable.sum(axis=0) / prop.cases.sum(axis=0))
    assert np.all(prop.pif["cap"] <= prop.paf + 1e-15)
    # strata sharing an exposure share its draws
    assert np.array_equal(prop.paf[0], prop.paf[1])


def test_same_seed_same_draws_and_other_seed_differs():
    curve = Curve(LinearExcess(), np.array([0.05]), np.array([[0.0001]]))
    strata = [Stratum("a", 10.0, gamma_exposure())]
    def run(seed):
        return propagate(curve, strata, [], draws=200, rng=np.random.default_rng(seed),
                                     minimum_risk=(0.0, 1.0)).paf
    assert np.array_equal(run(5), run(5))
    assert not np.array_equal(run(5), run(6))


def test_point_values_equal_core_paf():
    """point_values is the PAF at the point estimates (same engine as paf())."""
    curve = Curve(LinearExcess(), np.array([0.05]), np.array([[0.0001]]))
    ex = gamma_exposure()
    pv = point_values(curve, [Stratum("a", 50.0, ex)], [], 1.0)
    assert pv.paf[0, 0] == pytest.approx(paf(curve, ex, minimum_risk=1.0), rel=1e-14)
    assert pv.attributable[0, 0] == pytest.approx(50.0 * paf(curve, ex, minimum_risk=1.0), rel=1e-14)


def test_no_source_gives_zero_width():
    curve = Curve(LinearExcess(), np.array([0.05]), np.array([[0.0001]]))
    prop = propagate(curve, [Stratum("a", 50.0, gamma_exposure())], [], draws=100,
                     rng=np.random.default_rng(0), minimum_risk=(1.0, 1.0), sources=())
    s = summarise(0.0, prop.paf[0])
    assert s.upper - s.lower == 0.0


def test_poisson_cases_mean_and_variance():
    """Poisson case draws have mean and variance equal to the observed count
    (Poisson distribution); checked within 5 Monte Carlo standard errors."""
    curve = Curve(LinearExcess(), np.array([0.05]), np.array([[0.0001]]))
    prop = propagate(curve, [Stratum("a", 400.0, gamma_exposure())], [], draws=4000,
                     rng=np.random.default_rng(9), minimum_risk=(0.0, 0.0), sources=("cases",))
    c = prop.cases[0]
    assert abs(c.mean() - 400) < 5 * np.sqrt(400 / 4000)
    assert c.var(ddof=1) == pytest.approx(400, rel=0.1)


def test_exposure_draws_follow_fit_covariance():
    """Draws of the internal parameters have the fit's covariance (sample
    covariance within Monte Carlo error, numpy.cov as reference)."""
    from doseattr.core.exposure.fit import fit_measurements
    from doseattr.core.uncertainty.sampling import exposure_draws
    data = stats.lognorm(s=0.7, scale=5.0).rvs(size=80, random_state=np.random.default_rng(2))
    ex = fit_measurements(FAMILIES["lognormal"], data)
    dr = exposure_draws(ex, 20_000, np.random.default_rng(4))
    theta = ex.family.to_internal(dr.params)
    assert np.cov(theta.T) == pytest.approx(ex.fit.cov_internal, rel=0.05, abs=1e-4)


def test_empirical_bootstrap_interval_contains_point():
    x = stats.gamma(2.0, scale=3.0).rvs(size=60, random_state=np.random.default_rng(8))
    ex = empirical(x)
    curve = Curve(LinearExcess(), np.array([0.05]), np.array([[0.0]]))
    prop = propagate(curve, [Stratum("a", 10.0, ex)], [], draws=400,
                     rng=np.random.default_rng(1), minimum_risk=(0.0, 0.0), sources=("exposure",))
    s = summarise(paf(curve, ex, minimum_risk=0.0), prop.paf[0])
    assert s.lower < s.estimate < s.upper


def test_poisson_draws_with_no_cases_keep_the_total_paf_finite():
    """With tiny expected counts some Poisson draws have zero cases in every
    stratum; the total PAF there is not a ratio of cases and falls back to
    the stratum PAFs weighted by mean cases (here one stratum: its PAF)."""
    curve = Curve(LinearExcess(), np.array([0.05]), np.array([[0.0001]]))
    prop = propagate(curve, [Stratum("a", 0.3, gamma_exposure())], [], draws=300,
                     rng=np.random.default_rng(2), minimum_risk=(0.0, 0.0), sources=("cases",))
    assert np.any(prop.total_cases == 0)
    assert np.all(np.isfinite(prop.total_paf))
    assert prop.total_paf == pytest.approx(prop.paf[0], rel=1e-12)
