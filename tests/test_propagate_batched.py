"""Family exposures integrated together in one engine call per scenario.

The batched propagation must give what one call per exposure gives (each
draw's integral depends on that draw alone), and must still agree with
closed forms.
"""

from __future__ import annotations

import numpy as np
import pytest

import doseattr.core.uncertainty.propagate as propagate_module
from doseattr.core.attribution.fractions import (
    excess_draws,
    paf,
    paf_from_excess,
    pif,
    pif_from_excess,
)
from doseattr.core.attribution.impact import averted_fraction, impact_draws, impact_fraction
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.empirical import empirical
from doseattr.core.exposure.fit import fit_measurements
from doseattr.core.exposure.registry import FAMILIES
from doseattr.core.uncertainty.propagate import Propagation, Stratum, point_values, propagate

SCENARIOS = [Cap(20.0, name="cap"), Scale(0.6, name="scale"), ReduceBy(2.0, name="minus")]
CURVE = Curve(LogLinear(), np.array([0.012]), np.array([[0.003**2]]), max_dose=60.0)


def _strata(n: int, seed: int) -> list[Stratum]:
    """``n`` strata cycling through lognormal, gamma and Weibull exposures
    with different parameters and unexposed shares; every fifth fitted to
    seeded measurements (so its parameters vary between draws), one
    exposure shared by two strata, and one empirical exposure."""
    rng = np.random.default_rng(seed)
    out: list[Stratum] = []
    for i in range(n):
        name = ("lognormal", "gamma", "weibull")[i % 3]
        u = float(rng.uniform(0.0, 0.3)) if i % 2 else 0.0
        if i % 5 == 0:
            x = rng.lognormal(np.log(rng.uniform(4, 12)), np.log(rng.uniform(1.5, 2.5)), 25)
            e = fit_measurements(name, x)
        elif name == "lognormal":
            e = Exposure(FAMILIES[name], np.array([rng.uniform(3, 15), rng.uniform(1.3, 3.0)]), u)
        else:
            e = Exposure(FAMILIES[name], np.array([rng.uniform(0.8, 3.0), rng.uniform(2, 10)]), u)
        out.append(Stratum(f"s{i}", float(rng.uniform(20, 500)), e))
    out.append(Stratum("shared", 80.0, out[1].exposure))
    out.append(Stratum("empirical", 60.0, empirical(rng.gamma(2.0, 4.0, 40), unexposed=0.05)))
    return out


def _run(method: str, strata: list[Stratum], draws: int = 120) -> Propagation:
    return propagate(CURVE, strata, SCENARIOS, draws=draws, rng=np.random.default_rng(7),
                     minimum_risk=(0.0, 4.0), method=method)


#: A fraction is a difference of expectations of order 1 or less, so where
#: it is near zero (a scenario that barely changes a stratum's exposure
#: above the minimum-risk level) its rounding is absolute, about 1e-17.
ATOL = 1e-15


def _assert_same(a: Propagation, b: Propagation, tol: float = 1e-13) -> None:
    np.testing.assert_allclose(a.paf, b.paf, rtol=tol, atol=ATOL)
    for g in SCENARIOS:
        np.testing.assert_allclose(a.pif[g.name], b.pif[g.name], rtol=tol, atol=ATOL)


@pytest.mark.parametrize("method", ["paf", "impact-function"])
def test_batched_equals_one_exposure_per_call(method, monkeypatch):
    """Reference: the same propagation with a batch of one exposure per
    engine call (the old path), and with batches that split a family."""
    strata = _strata(50, 3)
    batched = _run(method, strata)
    assert batched.inputs is not None and "exposure" in batched.inputs.varying
    monkeypatch.setattr(propagate_module, "BATCH_ROWS", 1)
    _assert_same(batched, _run(method, strata))
    monkeypatch.setattr(propagate_module, "BATCH_ROWS", 120 * 4)
    _assert_same(batched, _run(method, strata))


@pytest.mark.parametrize("method", ["paf", "impact-function"])
def test_batched_equals_direct_calls_of_the_family_path(method):
    """Reference: the fractions module's (or impact module's) function
    called directly for each exposure with the propagation's own draws."""
    strata = _strata(20, 5)
    prop = _run(method, strata)
    inputs = prop.inputs
    assert inputs is not None
    function = excess_draws if method == "paf" else impact_draws
    for i, s in enumerate(strata):
        if s.name == "empirical":
            continue
        e = s.exposure
        assert isinstance(e, Exposure)
        params = inputs.exposures[id(e)][1].params

        def one(g, e=e, params=params):
            return function(CURVE, inputs.coef, e.family, params, e.unexposed,
                            inputs.minimum_risk, g)

        base = one(None)
        expect = paf_from_excess(base) if method == "paf" else base
        np.testing.assert_allclose(prop.paf[i], expect, rtol=1e-13, atol=ATOL)
        for g in SCENARIOS:
            expect = pif_from_excess(base, one(g)) if method == "paf" else one(g)
            np.testing.assert_allclose(prop.pif[g.name][i], expect, rtol=1e-13, atol=ATOL)


@pytest.mark.parametrize("method", ["paf", "impact-function"])
def test_batched_point_values_equal_point_fractions(method):
    """Reference: the point functions paf/pif (impact_fraction /
    averted_fraction) of the attribution modules, one stratum at a time."""
    strata = _strata(30, 9)
    pv = point_values(CURVE, strata, SCENARIOS, 2.0, method=method)
    for i, s in enumerate(strata):
        whole = (paf(CURVE, s.exposure, minimum_risk=2.0) if method == "paf"
                 else impact_fraction(CURVE, s.exposure, minimum_risk=2.0))
        assert pv.paf[i, 0] == pytest.approx(whole, rel=1e-13, abs=ATOL)
        for g in SCENARIOS:
            part = (pif(CURVE, s.exposure, g, minimum_risk=2.0) if method == "paf"
                    else averted_fraction(CURVE, s.exposure, g, minimum_risk=2.0))
            assert pv.pif[g.name][i, 0] == pytest.approx(part, rel=1e-13, abs=ATOL)


def test_batched_matches_gamma_moment_generating_function():
    r"""Log-linear curve, no max_dose, minimum risk 0, gamma exposures with
    shape k, scale t and unexposed share u: closed form (gamma MGF)
    :math:`E[RR] = u + (1-u)(1 - b t)^{-k}` for :math:`b t < 1`, so
    :math:`PAF = 1 - 1/E[RR]` and, method "impact-function",
    :math:`E[1 - 1/RR] = (1-u)(1 - (1 + b t)^{-k})`, per slope draw b.
    (A lognormal has no moment generating function, so a log-linear curve
    over a lognormal exposure without max_dose has no finite E[RR].)"""
    rng = np.random.default_rng(21)
    curve = Curve(LogLinear(), np.array([0.03]), np.array([[0.005**2]]))
    k, t = rng.uniform(0.8, 4.0, 25), rng.uniform(1.0, 8.0, 25)
    u = np.where(np.arange(25) % 2 == 0, 0.0, rng.uniform(0.0, 0.4, 25))
    strata = [Stratum(f"g{i}", 100.0, Exposure(FAMILIES["gamma"], np.array([k[i], t[i]]), u[i]))
              for i in range(25)]
    for method in ("paf", "impact-function"):
        prop = propagate(curve, strata, [], draws=200, rng=np.random.default_rng(4),
                         minimum_risk=(0.0, 0.0), sources=("curve",), method=method)
        assert prop.inputs is not None
        b = prop.inputs.coef[:, 0]
        assert np.all(b[None, :] * t[:, None] < 0.5)
        if method == "paf":
            err = u[:, None] + (1 - u[:, None]) * (1 - b[None, :] * t[:, None]) ** -k[:, None]
            expect = 1 - 1 / err
        else:
            expect = (1 - u[:, None]) * -np.expm1(-k[:, None] * np.log1p(b[None, :] * t[:, None]))
        np.testing.assert_allclose(prop.paf, expect, rtol=1e-9)


def test_batched_matches_linear_excess_over_lognormal():
    r"""Linear ERR curve RR = 1 + b x, minimum risk 0, lognormal exposures:
    closed form :math:`E[RR] = 1 + (1-u)\, b\, e^{\mu + s^2/2}` (lognormal
    mean), :math:`\mu = \ln GM`, :math:`s = \ln GSD`."""
    rng = np.random.default_rng(8)
    curve = Curve(LinearExcess(), np.array([0.02]), np.array([[0.004**2]]))
    gm, gsd = rng.uniform(2, 20, 30), rng.uniform(1.2, 3.5, 30)
    u = rng.uniform(0.0, 0.3, 30)
    strata = [Stratum(f"l{i}", 50.0, Exposure(FAMILIES["lognormal"],
                                              np.array([gm[i], gsd[i]]), u[i]))
              for i in range(30)]
    prop = propagate(curve, strata, [], draws=150, rng=np.random.default_rng(1),
                     minimum_risk=(0.0, 0.0), sources=("curve",))
    assert prop.inputs is not None
    b = prop.inputs.coef[:, 0]
    mean = np.exp(np.log(gm) + np.log(gsd) ** 2 / 2)
    excess = (1 - u[:, None]) * b[None, :] * mean[:, None]
    np.testing.assert_allclose(prop.paf, excess / (1 + excess), rtol=1e-9)
