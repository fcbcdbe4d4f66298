"""limit_statistics: choice of method, the overexposure flag, validation."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import ndtr, ndtri

from doseattr.core.exposure.fit import Measurements, fit_measurements, prepare
from doseattr.core.hygiene.limits import limit_statistics
from doseattr.core.hygiene.lognormal_exact import percentile_exact
from doseattr.core.hygiene.profile import percentile_target, profile_bounds
from doseattr.errors import ModelError


def _x(n: int = 12, seed: int = 1) -> np.ndarray:
    return np.exp(np.random.default_rng(seed).normal(0.0, 0.8, n))


def test_complete_lognormal_uses_the_exact_methods():
    x = _x()
    res = limit_statistics("lognormal", prepare(x), 3.0, confidence=0.70, level=0.95)
    assert res.exact and res.n == 12 and res.n_censored == 0 and res.family == "lognormal"
    y = np.log(x)
    n, ybar, s = y.size, y.mean(), y.std(ddof=1)
    # scipy.stats.nct: UTL exp(ybar + K s), K = t'_0.70(n-1, z95 sqrt n)/sqrt n (common practice)
    k = stats.nct.ppf(0.70, n - 1, ndtri(0.95) * np.sqrt(n)) / np.sqrt(n)
    assert res.p95.ucl == pytest.approx(np.exp(ybar + k * s), rel=1e-10)
    # closed form: plug-in exceedance with s of divisor n - 1
    assert res.exceedance.estimate == pytest.approx(ndtr(-(np.log(3.0) - ybar) / s), rel=1e-12)
    assert any("Land" in m for m in res.methods) and any("EN 689" in m for m in res.methods)
    assert any("licensed" in note for note in res.notes)


@pytest.mark.parametrize("family, censor, weights", [("lognormal", True, False),
                                                     ("lognormal", False, True),
                                                     ("gamma", False, False),
                                                     ("weibull", True, True)])
def test_other_cases_use_profile_likelihood_at_the_mle(family, censor, weights):
    # the estimates are the fitted distribution's values (fit_measurements)
    x = _x(15, seed=3)
    det = x > 0.6 if censor else np.ones(x.size, bool)
    x = np.where(det, x, 0.6)
    w = np.linspace(0.5, 1.5, x.size) if weights else None
    res = limit_statistics(family, prepare(x, det, w), 2.5)
    assert not res.exact
    assert res.n_censored == int((~det).sum())
    assert any("profile likelihood" in m for m in res.methods)
    assert any("normalised" in note for note in res.notes) == weights
    exp = fit_measurements(family, x, detected=det, weights=w)
    fam, p = exp.family, exp.params
    assert res.p95.estimate == pytest.approx(float(fam.ppf(0.95, p)[0]), rel=1e-6)
    assert res.mean.estimate == pytest.approx(float(fam.mean(p)), rel=1e-6)
    assert res.exceedance.estimate == pytest.approx(float(fam.sf(2.5, p)[0]), rel=1e-6)


@pytest.mark.parametrize("family, censor", [("lognormal", False), ("lognormal", True),
                                            ("gamma", False)])
def test_overexposure_flag_is_dual_to_the_utl(family, censor):
    # closed form (derived): {F(L) = 0.05} is {P95 = L}, so the one-sided limit of
    # the exceedance fraction exceeds 0.05 exactly when UTL(P95) exceeds L, for the
    # non-central t pivot and for the profile likelihood alike
    x = _x(20, seed=5)
    det = x > 0.5 if censor else np.ones(x.size, bool)
    data = prepare(np.where(det, x, 0.5), det)
    exact = family == "lognormal" and not censor
    utl = (percentile_exact(data.x).ucl if exact
           else profile_bounds(family, data, percentile_target(0.95)).ucl)
    assert utl is not None
    for factor in (0.9, 1.1):
        res = limit_statistics(family, data, factor * utl)
        assert res.overexposure == (factor < 1)
        assert res.exceedance.ucl is not None
        assert (res.exceedance.ucl > 0.05) == (factor < 1)


def _two_values() -> Measurements:
    return Measurements(np.array([1.0, 2.0]), np.ones(2, bool), np.ones(2))


@pytest.mark.parametrize("kwargs, match", [({"limit": 0.0}, "limit"),
                                           ({"limit": -1.0}, "limit"),
                                           ({"confidence": 0.5}, "confidence"),
                                           ({"confidence": 1.0}, "confidence"),
                                           ({"level": 0.0}, "level"),
                                           ({"level": 1.0}, "level"),
                                           ({"exceedance": 0.0}, "exceedance")])
def test_bad_arguments_are_refused(kwargs, match):
    args = {"limit": 1.0, **kwargs}
    limit = args.pop("limit")
    with pytest.raises(ModelError, match=match):
        limit_statistics("lognormal", prepare(_x()), limit, **args)


def test_too_few_values_are_refused():
    with pytest.raises(ModelError, match="at least 3"):
        limit_statistics("lognormal", _two_values(), 1.0)
    few = Measurements(np.array([1.0, 2.0, 0.5, 0.5]), np.array([True, True, False, False]),
                       np.ones(4))
    with pytest.raises(ModelError, match="detected"):
        limit_statistics("gamma", few, 1.0)
