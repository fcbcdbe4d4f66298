"""Exact lognormal limits: non-central t for the exceedance fraction and the
95th percentile, Land's interval for the arithmetic mean."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.integrate import quad
from scipy.special import ndtr, ndtri

from doseattr.core.hygiene.lognormal_exact import (
    exceedance_exact,
    land_cdf,
    log_summary,
    mean_land,
    mvue_mean,
    percentile_exact,
)
from doseattr.errors import ModelError

Z95 = float(ndtri(0.95))


def _sample(n: int, sigma: float, seed: int, mu: float = 0.0) -> np.ndarray:
    return np.exp(np.random.default_rng(seed).normal(mu, sigma, n))


def _stats(x: np.ndarray) -> tuple[int, float, float]:
    y = np.log(x)
    return y.size, float(y.mean()), float(y.std(ddof=1))


@pytest.mark.parametrize("n, sigma, conf", [(3, 0.4, 0.70), (6, 1.0, 0.70), (25, 0.7, 0.95)])
def test_utl_k_factor_solves_the_nct_coverage_identity(n, sigma, conf):
    x = _sample(n, sigma, seed=n)
    _, ybar, s = _stats(x)
    b = percentile_exact(x, confidence=conf, level=0.90)
    rn = np.sqrt(n)
    for value, prob in ((b.ucl, conf), (b.lower, 0.05), (b.upper, 0.95)):
        k = (np.log(value) - ybar) / s
        # scipy.stats.nct: P(T' <= K sqrt(n)) with T' ~ t'(n-1, z95 sqrt(n)) is the coverage
        assert stats.nct.cdf(k * rn, n - 1, Z95 * rn) == pytest.approx(prob, abs=1e-9)
    # closed form: the estimate is exp(ybar + z95 s)
    assert b.estimate == pytest.approx(np.exp(ybar + Z95 * s), rel=1e-12)


@pytest.mark.parametrize("n, limit", [(4, 2.0), (10, 1.5), (40, 3.0), (12, 0.8)])
def test_exceedance_limits_plug_back_into_the_nct_cdf(n, limit):
    x = _sample(n, 0.8, seed=100 + n)
    _, ybar, s = _stats(x)
    b = exceedance_exact(x, limit, confidence=0.70, level=0.95)
    rn = np.sqrt(n)
    t_obs = rn * (np.log(limit) - ybar) / s
    for value, prob in ((b.ucl, 0.70), (b.upper, 0.975), (b.lower, 0.025)):
        delta = -rn * ndtri(value)  # F = Phi(-delta / sqrt(n)) inverted (closed form)
        # scipy.stats.nct: the limit's non-centrality puts the observed t at that quantile
        assert stats.nct.cdf(t_obs, n - 1, delta) == pytest.approx(prob, abs=1e-8)
    assert b.lower < b.estimate < b.ucl < b.upper
    # closed form: plug-in estimate with s of divisor n - 1
    assert b.estimate == pytest.approx(ndtr(-(np.log(limit) - ybar) / s), rel=1e-12)


@pytest.mark.parametrize("conf", [0.70, 0.95])
def test_exceedance_ucl_at_the_utl_is_the_percentile_fraction(conf):
    # closed form (derived): the same pivot gives both, so at L = UTL(p95, c)
    # the one-sided upper limit of P(X > L) at c is exactly 0.05
    x = _sample(9, 1.2, seed=7)
    utl = percentile_exact(x, confidence=conf).ucl
    assert utl is not None
    assert exceedance_exact(x, utl, confidence=conf).ucl == pytest.approx(0.05, rel=1e-7)


@pytest.mark.slow
def test_exceedance_limits_cover_by_simulation():
    # simulation, seeded: n = 8, mu 0, sigma 1, L such that F = 0.10; 1500 replicates.
    # Binomial SE at 0.70 is 0.012 and at 0.95 0.0056; tolerance 4 SE.
    rng = np.random.default_rng(20261203)
    n, reps, f_true = 8, 1500, 0.10
    limit = float(np.exp(ndtri(1 - f_true)))
    one = two = 0
    for _ in range(reps):
        b = exceedance_exact(np.exp(rng.normal(0.0, 1.0, n)), limit, confidence=0.70, level=0.95)
        one += b.ucl >= f_true
        two += b.lower <= f_true <= b.upper
    assert abs(one / reps - 0.70) < 4 * np.sqrt(0.70 * 0.30 / reps)
    assert abs(two / reps - 0.95) < 4 * np.sqrt(0.95 * 0.05 / reps)


@pytest.mark.parametrize("n, sigma, shift", [(3, 0.5, 0.3), (8, 2.0, -1.0), (30, 1.0, 2.5),
                                             (1000, 3.0, 0.0), (1500, 0.3, 1.0)])
def test_land_cdf_matches_adaptive_quadrature(n, sigma, shift):
    # scipy.integrate.quad of the same conditional density (docstring of land_cdf)
    x = _sample(n, sigma, seed=n)
    _, ybar, s = _stats(x)
    theta0 = ybar + s * s / 2 + shift * np.sqrt(s * s / n + s**4 / (2 * (n + 1)))
    rn = np.sqrt(n)
    d, spread = rn * (ybar - theta0), np.sqrt(n - 1) * s
    a, phi_obs = 0.5 * rn * np.hypot(spread, d), np.arctan2(spread, d)
    grid = np.linspace(1e-9, np.pi - 1e-9, 20001)
    h = -a * np.cos(grid) + (n - 2) * np.log(np.sin(grid))
    peak, mode = h.max(), grid[np.argmax(h)]

    def f(p: float) -> float:
        return float(np.exp(-a * np.cos(p) + (n - 2) * np.log(np.sin(p)) - peak))

    kw = {"limit": 500, "epsabs": 0.0, "epsrel": 1e-11}
    above = quad(f, phi_obs, np.pi, points=[max(mode, phi_obs)] if mode < np.pi else None, **kw)[0]
    below = quad(f, 0.0, phi_obs, points=[min(mode, phi_obs)] if mode > 0 else None, **kw)[0]
    assert land_cdf(theta0, n, ybar, s) == pytest.approx(above / (above + below), rel=1e-7,
                                                         abs=1e-14)


def test_land_limits_are_equivariant_under_a_shift_of_ln_x():
    # closed form: the conditional test depends on ybar - theta0 only, so
    # multiplying every value by e^c multiplies every limit by e^c
    x = _sample(7, 1.3, seed=3)
    base, moved = mean_land(x, confidence=0.95), mean_land(x * np.exp(1.7), confidence=0.95)
    for a, b in ((base.lower, moved.lower), (base.upper, moved.upper), (base.ucl, moved.ucl),
                 (base.estimate, moved.estimate)):
        assert b == pytest.approx(a * np.exp(1.7), rel=1e-8)


def test_land_limits_approach_the_cox_interval_for_large_n():
    # Cox's approximation exp(ybar + s^2/2 +- z sqrt(s^2/n + s^4/(2(n+1)))) (from memory);
    # first-order agreement only: within 1 % of the limit at n = 3000
    x = _sample(3000, 1.0, seed=11)
    n, ybar, s = _stats(x)
    b = mean_land(x, confidence=0.95, level=0.95)
    se = np.sqrt(s * s / n + s**4 / (2 * (n + 1)))
    z = ndtri(0.975)
    assert b.lower == pytest.approx(np.exp(ybar + s * s / 2 - z * se), rel=0.01)
    assert b.upper == pytest.approx(np.exp(ybar + s * s / 2 + z * se), rel=0.01)
    assert b.ucl == pytest.approx(np.exp(ybar + s * s / 2 + ndtri(0.95) * se), rel=0.01)


def test_land_limits_solve_their_tail_equations():
    # the definition: the conditional CDF equals the tail probability at each limit
    x = _sample(5, 2.0, seed=5)
    n, ybar, s = _stats(x)
    b = mean_land(x, confidence=0.90, level=0.95)
    for value, prob in ((b.lower, 0.975), (b.upper, 0.025), (b.ucl, 0.10)):
        assert land_cdf(float(np.log(value)), n, ybar, s) == pytest.approx(prob, abs=1e-9)


def test_mvue_of_the_mean_is_unbiased_by_simulation():
    # simulation, seeded: 8000 samples of n = 5, sigma = 1; true mean e^(1/2).
    # The MVUE's SD here is about 0.85, so the standard error is about 0.01; tolerance 4 SE
    rng = np.random.default_rng(42)
    y = rng.normal(0.0, 1.0, (8000, 5))
    est = np.array([mvue_mean(5, float(r.mean()), float(r.std(ddof=1))) for r in y])
    assert abs(est.mean() - np.exp(0.5)) < 4 * est.std() / np.sqrt(est.size)


def _land_coverage(n: int, sigma: float, reps: int, seed: int) -> tuple[float, float]:
    rng = np.random.default_rng(seed)
    mu = 0.3
    true_mean = np.exp(mu + sigma**2 / 2)
    low = up = 0
    for _ in range(reps):
        b = mean_land(np.exp(rng.normal(mu, sigma, n)), confidence=0.95, level=0.90)
        low += b.lower <= true_mean
        up += b.ucl >= true_mean
    return low / reps, up / reps


@pytest.mark.slow
@pytest.mark.parametrize("n, sigma", [(5, 0.5), (5, 2.0), (20, 0.5), (20, 2.0)])
def test_land_one_sided_limits_cover_by_simulation(n, sigma):
    # simulation, seeded: 1500 replicates; each one-sided 95 % limit (the lower
    # end of the 90 % interval, the upper limit at confidence 0.95) should cover
    # 0.95; binomial SE 0.0056, tolerance 4 SE
    reps = 1500
    low, up = _land_coverage(n, sigma, reps, seed=1000 * n + int(10 * sigma))
    tol = 4 * np.sqrt(0.95 * 0.05 / reps)
    assert abs(low - 0.95) < tol
    assert abs(up - 0.95) < tol


def test_inputs_are_checked():
    with pytest.raises(ModelError, match="at least 3"):
        percentile_exact([1.0, 2.0])
    with pytest.raises(ModelError, match="positive"):
        mean_land([1.0, -2.0, 3.0])
    with pytest.raises(ModelError, match="equal"):
        log_summary([2.0, 2.0, 2.0])
    with pytest.raises(ModelError, match="confidence"):
        exceedance_exact([1.0, 2.0, 3.0], 2.0, confidence=0.4)
    with pytest.raises(ModelError, match="limit"):
        exceedance_exact([1.0, 2.0, 3.0], 0.0)
