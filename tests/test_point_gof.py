"""Goodness of fit on many values: the interpolated quantile function and
the shared sort against the exact computation (scipy.stats ppf at every
plotting position)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from doseattr.core.exposure import gof
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.fit import fit_measurements
from doseattr.core.exposure.registry import FAMILIES

N = 50_000  # above gof.EXACT_UP_TO


def _weighted_gamma_fit(shape: float, seed: int):
    """A gamma fit to many weighted values (simulation, seeded)."""
    rng = np.random.default_rng(seed)
    x = np.round(rng.gamma(shape, 3.0, N), 2) + 0.01
    w = rng.integers(1, 20, N).astype(float)
    return fit_measurements("gamma", x, weights=w, weight_meaning="frequency")


def _exact_ppcc(e) -> float:
    """Definition: numpy.corrcoef of ln(sorted x) with ln scipy.stats.gamma
    ppf at rank / (n + 1) (Filliben 1975, from memory)."""
    x = np.sort(e.fit.values)
    k, theta = e.params
    q = stats.gamma(k, scale=theta).ppf(np.arange(1, x.size + 1) / (x.size + 1))
    return float(np.corrcoef(np.log(q), np.log(x))[0, 1])


@pytest.mark.parametrize("shape,seed", [(0.4, 1), (2.5, 2), (30.0, 3)])
def test_ppcc_agrees_with_exact(shape, seed):
    e = _weighted_gamma_fit(shape, seed)
    res = gof.goodness_of_fit(e)
    assert res["test"] == "probability plot correlation" and res["n"] == N
    assert abs(res["statistic"] - _exact_ppcc(e)) <= 1e-9  # goal stated in gof.log_quantiles


@pytest.mark.parametrize("shape", [0.05, 0.7, 4.0, 80.0])
def test_log_quantiles_within_the_bound(shape):
    """The interpolant against scipy.stats.gamma.ppf at every position: its
    error bound (pi/2) eps / s_t stays within PPCC_TOLERANCE (closed form
    in the docstring) when it is used."""
    e = Exposure(FAMILIES["gamma"], np.array([shape, 2.0]))
    p = np.arange(1, 200_001) / 200_001
    exact = np.log(stats.gamma(shape, scale=2.0).ppf(p))
    got = gof.log_quantiles(e, p)
    assert not np.array_equal(got, exact)  # the interpolant was used
    eps = np.max(np.abs(got - exact))
    assert 0.5 * np.pi * eps / np.std(exact) <= gof.PPCC_TOLERANCE


def test_coarse_interpolant_is_refused(monkeypatch):
    """With too few nodes the midpoint check fails and every position is
    evaluated: the result is then the exact one, bit for bit."""
    monkeypatch.setattr(gof, "NODES", 6)
    e = Exposure(FAMILIES["gamma"], np.array([0.3, 2.0]))
    p = np.arange(1, 30_001) / 30_001
    np.testing.assert_array_equal(gof.log_quantiles(e, p), np.log(e.family.ppf(p, e.params)))


def test_closed_form_families_stay_exact():
    for name, params in [("lognormal", [3.0, 2.0]), ("weibull", [1.5, 4.0])]:
        e = Exposure(FAMILIES[name], np.array(params))
        p = np.arange(1, 30_001) / 30_001
        np.testing.assert_array_equal(gof.log_quantiles(e, p),
                                      np.log(e.family.ppf(p, e.params)))


def test_given_order_gives_the_same_result():
    e = _weighted_gamma_fit(1.5, 4)
    order = np.argsort(e.fit.values, kind="stable")
    assert gof.goodness_of_fit(e, order=order) == gof.goodness_of_fit(e)


def test_qq_points_without_censoring_are_the_ros_positions():
    """All detected: the positions are rank / (n + 1) in stable order of the
    values (nondetects.ros_plotting_positions, the general path)."""
    from doseattr.core.exposure.nondetects import ros_plotting_positions

    rng = np.random.default_rng(7)
    x = np.round(rng.lognormal(1.0, 0.7, 300), 1)
    e = fit_measurements("gamma", x)
    pos = ros_plotting_positions(x, np.ones(x.size, bool))
    order = np.argsort(pos, kind="stable")
    theo, obs, det = gof.qq_points(e)
    k, theta = e.params
    np.testing.assert_allclose(theo, stats.gamma(k, scale=theta).ppf(pos[order]), rtol=1e-12)
    np.testing.assert_array_equal(obs, x[order])
    assert det.all()
