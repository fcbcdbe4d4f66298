"""Profile-likelihood limits (non-detects, weights, gamma and Weibull)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.optimize import minimize, minimize_scalar
from scipy.special import ndtri

from doseattr.core.exposure.fit import fit_measurements, prepare
from doseattr.core.exposure.registry import get_family
from doseattr.core.hygiene.lognormal_exact import mean_land, percentile_exact
from doseattr.core.hygiene.profile import (
    Profile,
    exceedance_target,
    mean_target,
    percentile_target,
    profile_bounds,
)

Z95 = float(ndtri(0.95))
CHI2_95 = float(stats.chi2.ppf(0.95, 1))


def _lognormal(n: int, seed: int, mu: float = 0.5, sigma: float = 0.9) -> np.ndarray:
    return np.exp(np.random.default_rng(seed).normal(mu, sigma, n))


def _censor(x: np.ndarray, dl: float) -> tuple[np.ndarray, np.ndarray]:
    return np.maximum(x, dl), x >= dl


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_lognormal_profile_limits_approach_the_exact_ones_at_n50(seed):
    # asymptotic agreement with the exact non-central t UTL and Land's limits
    # (percentile_exact and mean_land, themselves checked against scipy.stats.nct
    # and by simulation). The profile uses the divisor-n MLE of sigma, so it sits
    # a few per cent low at n = 50: tolerance 6 % on the log scale for the
    # percentile, 4 % for the mean
    x = _lognormal(50, seed)
    data = prepare(x)
    for conf in (0.70, 0.95):
        exact = percentile_exact(x, confidence=conf)
        prof = profile_bounds("lognormal", data, percentile_target(0.95), confidence=conf)
        assert abs(np.log(prof.ucl / exact.ucl)) < 0.06
        assert abs(np.log(prof.upper / exact.upper)) < 0.06
        assert abs(np.log(prof.lower / exact.lower)) < 0.06
        land = mean_land(x, confidence=conf)
        pm = profile_bounds("lognormal", data, mean_target(), confidence=conf)
        assert abs(np.log(pm.ucl / land.ucl)) < 0.04
        assert abs(np.log(pm.upper / land.upper)) < 0.04


def _norm_censored_loglik(mu: float, sigma: float, y: np.ndarray, det: np.ndarray) -> float:
    # scipy.stats.norm on ln x: density for detected values, CDF at ln DL for
    # non-detects (the ln x Jacobian is the same for every parameter value)
    return float(stats.norm.logpdf(y[det], mu, sigma).sum()
                 + stats.norm.logcdf(y[~det], mu, sigma).sum())


def test_censored_lognormal_profile_limit_has_the_chi2_deviance():
    # independent route: scipy.stats.norm likelihood, 2-D Nelder-Mead for the MLE,
    # and at the returned limit q a 1-D search over sigma with mu = ln q - z95 sigma;
    # the deviance there must be the chi-square point (Venzon & Moolgavkar 1988, from memory)
    x, det = _censor(_lognormal(25, 4), 1.2)
    assert 4 <= (~det).sum() <= 15
    y = np.log(x)
    b = profile_bounds("lognormal", prepare(x, det), percentile_target(0.95), confidence=0.70)
    best = minimize(lambda p: -_norm_censored_loglik(p[0], np.exp(p[1]), y, det),
                    [y.mean(), np.log(y.std())], method="Nelder-Mead",
                    options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 5000})
    lmax = -best.fun
    assert b.estimate == pytest.approx(np.exp(best.x[0] + Z95 * np.exp(best.x[1])), rel=1e-5)
    for q, crit in ((b.ucl, ndtri(0.70) ** 2), (b.upper, CHI2_95), (b.lower, CHI2_95)):
        res = minimize_scalar(
            lambda ls, q=q: -_norm_censored_loglik(np.log(q) - Z95 * np.exp(ls), np.exp(ls), y, det),
            bounds=(best.x[1] - 3, best.x[1] + 3), method="bounded", options={"xatol": 1e-10})
        assert 2 * (lmax + res.fun) == pytest.approx(crit, abs=2e-4)


def test_gamma_limits_have_the_chi2_deviance_by_scipy_fit():
    # independent route: scipy.stats.gamma.fit (floc = 0) for the MLE, and at the
    # limit m of the mean a 1-D search over the shape k with scale m / k
    x = np.random.default_rng(9).gamma(2.5, 1.4, 30)
    b = profile_bounds("gamma", prepare(x), mean_target(), confidence=0.95)
    k, _, scale = stats.gamma.fit(x, floc=0)
    lmax = stats.gamma.logpdf(x, k, scale=scale).sum()
    assert b.estimate == pytest.approx(k * scale, rel=1e-5)
    for m, crit in ((b.ucl, ndtri(0.95) ** 2), (b.upper, CHI2_95), (b.lower, CHI2_95)):
        res = minimize_scalar(lambda lk, m=m: -stats.gamma.logpdf(x, np.exp(lk),
                                                                  scale=m / np.exp(lk)).sum(),
                              bounds=(np.log(k) - 3, np.log(k) + 3), method="bounded",
                              options={"xatol": 1e-10})
        assert 2 * (lmax + res.fun) == pytest.approx(crit, abs=1e-3)


@pytest.mark.parametrize("family", ["gamma", "weibull"])
def test_estimates_are_the_fitted_distributions_values(family):
    # the fitted distribution's own formulas (fit_measurements) at its MLE, with
    # non-detects and weights
    x, det = _censor(_lognormal(30, 5), 1.0)
    w = np.random.default_rng(6).uniform(0.5, 2.0, x.size)
    data = prepare(x, det, w)
    fit = fit_measurements(family, x, detected=det, weights=w)
    fam, p = get_family(family), fit.params
    limit = 6.0
    expected = {"p95": float(fam.ppf(0.95, p)[0]), "mean": float(fam.mean(p)),
                "exceedance": float(fam.sf(limit, p)[0])}
    targets = {"p95": percentile_target(0.95), "mean": mean_target(),
               "exceedance": exceedance_target(limit)}
    for key, target in targets.items():
        b = profile_bounds(family, data, target)
        assert b.estimate == pytest.approx(expected[key], rel=1e-6)
        assert b.lower < b.estimate < b.ucl < b.upper
        assert b.note == ""


def test_exceedance_near_one_stays_inside_zero_one():
    # closed form: an exceedance fraction lies in [0, 1]; with the limit far below
    # the data its estimate is near 1 and the search runs on the logit scale
    x = _lognormal(12, 8)
    b = profile_bounds("weibull", prepare(x, x > 1.0), exceedance_target(0.01))
    assert 0.0 < b.lower < b.estimate < 1.0
    assert b.ucl is not None and b.upper is not None
    assert b.estimate <= b.ucl <= b.upper <= 1.0


def test_an_unreached_limit_is_the_range_end_with_a_note():
    # a Weibull fitted to values near 1 puts P(X > 100) around 1e-100: its lower
    # profile limit lies beyond floating point, so the end of the range (0) is
    # returned with a note saying so
    x = np.exp(np.random.default_rng(2).normal(0, 0.5, 10))
    b = profile_bounds("weibull", prepare(x, x > 0.9), exceedance_target(100.0))
    assert b.lower == 0.0
    assert "not reached" in b.note
    assert b.ucl is not None and b.ucl > b.estimate


def _ucl_coverage(conf: float, reps: int, seed: int) -> tuple[float, float]:
    rng = np.random.default_rng(seed)
    mu, sigma, n = 0.0, np.log(2.5), 20
    dl = float(np.exp(mu + sigma * ndtri(0.30)))  # 30 % of values below detection
    true_p95 = float(np.exp(mu + Z95 * sigma))
    fam = get_family("lognormal")
    crit = float(ndtri(conf)) ** 2
    hits, censored = 0, 0
    for _ in range(reps):
        x, det = _censor(np.exp(rng.normal(mu, sigma, n)), dl)
        if det.sum() < 3:
            continue
        censored += int((~det).sum())
        ucl, _ = Profile(fam, prepare(x, det), percentile_target(0.95)).limit(crit, +1)
        hits += ucl is not None and ucl >= true_p95
    return hits / reps, censored / (reps * n)


@pytest.mark.slow
@pytest.mark.parametrize("conf", [0.70, 0.95])
def test_censored_utl_covers_by_simulation(conf):
    # simulation, seeded: n = 20, GSD 2.5, detection limit at the 30th percentile;
    # 400 replicates. Binomial SE 0.023 at 0.70 and 0.011 at 0.95; the profile
    # method is asymptotic, so the tolerance is 4 SE
    reps = 400
    coverage, share = _ucl_coverage(conf, reps, seed=int(100 * conf))
    assert 0.25 < share < 0.35
    assert abs(coverage - conf) < 4 * np.sqrt(conf * (1 - conf) / reps)
