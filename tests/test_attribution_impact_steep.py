"""Steep log-linear curves held flat at max_dose, under cap, scale and
reduce_by scenarios: impact fraction, averted fraction and the expected
excess of the PAF/PIF path against scipy.integrate.quad.

RR = exp(c x) held flat beyond D = 30, against a minimum-risk level m:
L(x) = ln RR_m(x) = c (min(max(x, m), D) - m). With a scenario g,
L_g(x) = L(g(x)). The references, computed here from the definitions:

* impact fraction IF = E[-expm1(-L(X))];
* averted fraction AF_g = E[-expm1(L_g(X) - L(X))];
* expected excess E[expm1(L_g(X))] (g the identity for the PAF's).

Each is scipy.integrate.quad on the log-dose scale (epsrel 1e-12), split at
every kink (m, D, a cap, and their pre-images under g) and at points graded
by 1/(|c| k) on both sides of each kink k (a steep exponential has its
integrand's mass within a few such steps of a kink), up to the dose F beyond
which the integrand is constant; the flat tail beyond F is that constant
times scipy.stats' sf(F), exactly. Agreement asked: 1e-8 relative. The wider
exposures (more mass near max_dose) are marked slow; together they double
the file's ~35 s.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from reference_integrals import expect_over_log_dose, scenario_dose, scenario_preimage

from doseattr.core.attribution.fractions import excess_draws
from doseattr.core.attribution.impact import averted_fraction, impact_fraction
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale
from doseattr.core.curves.base import Curve
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.registry import FAMILIES

RTOL = 1e-8
TOP = 30.0
SLOPES = [0.4, 2.0, 4.8, -0.4, -2.0, -4.8]
SCENARIOS = {"cap-15": Cap(15.0), "cap-45": Cap(45.0), "scale-0.6": Scale(0.6),
             "reduce-3": ReduceBy(3.0), "reduce-20": ReduceBy(20.0), "cap-3": Cap(3.0)}
EXPOSURES = {"lognormal": ("lognormal", [2.8, 1.95]), "lognormal-wide": ("lognormal", [8.0, 2.5]),
             "gamma": ("gamma", [2.0, 2.0]), "gamma-wide": ("gamma", [3.0, 5.0]),
             "weibull": ("weibull", [1.4, 4.0]), "weibull-wide": ("weibull", [2.0, 15.0])}
#: The wide exposures (more mass near max_dose) only in the slow run.
EXPOSURE_KEYS = [k if not k.endswith("-wide") else pytest.param(k, marks=pytest.mark.slow)
                 for k in EXPOSURES]
STEPS = (0.25, 0.5, 1, 2, 4, 8, 16, 32, 64)


def _setup(slope, exp_key):
    fam, p = EXPOSURES[exp_key]
    curve = Curve(LogLinear(), np.array([slope]), np.eye(1), max_dose=TOP)
    return curve, Exposure(FAMILIES[fam], np.array(p))


def _reference(func, dist, slope, m, scenario, flat):
    """E[func(X)] by quad on ln x up to ``flat`` plus func(flat) sf(flat)."""
    kinks = {m, TOP}
    if scenario is not None:
        kinks |= {scenario_preimage(scenario, m), scenario_preimage(scenario, TOP)}
        if isinstance(scenario, Cap):
            kinks.add(scenario.value)
    pts = set(kinks)
    for k in kinks:
        if k > 0:
            pts |= {k * math.exp(s * j / (abs(slope) * k)) for j in STEPS for s in (-1, 1)}
    lower = m if m > 0 else float(dist.ppf(1e-30))
    pts |= {float(dist.ppf(q)) for q in (1e-6, 0.01, 0.5, 0.99)}
    body = expect_over_log_dose(func, dist, [v for v in pts if lower < v < flat],
                                t_lower=math.log(lower), t_upper=math.log(flat),
                                epsrel=1e-12, limit=1000)
    return body + func(flat) * dist.sf(flat)


def _log_rr(slope, m):
    def L(x):
        return slope * (min(max(x, m), TOP) - m)
    return L


def _flat(scenario):
    """Dose beyond which both L and L_g are constant."""
    if scenario is None or isinstance(scenario, Cap):
        return TOP
    return scenario_preimage(scenario, TOP)


@pytest.mark.parametrize("m", [0.0, 1.3, 10.0])
@pytest.mark.parametrize("exp_key", EXPOSURE_KEYS)
@pytest.mark.parametrize("slope", SLOPES)
def test_impact_fraction_steep(slope, exp_key, m):
    """IF = E[-expm1(-L(X))] against quad (scipy.integrate.quad, scipy.stats)."""
    curve, ex = _setup(slope, exp_key)
    L = _log_rr(slope, m)
    ref = _reference(lambda x: -math.expm1(-L(x)), ex.family.scipy(ex.params), slope, m,
                     None, TOP)
    assert impact_fraction(curve, ex, minimum_risk=m) == pytest.approx(ref, rel=RTOL)


@pytest.mark.parametrize("m", [0.0, 1.3, 10.0])
@pytest.mark.parametrize("scn", list(SCENARIOS))
@pytest.mark.parametrize("exp_key", EXPOSURE_KEYS)
@pytest.mark.parametrize("slope", SLOPES)
def test_averted_fraction_steep(slope, exp_key, scn, m):
    """AF_g = E[-expm1(L(g(X)) - L(X))] against quad (scipy.integrate.quad,
    scipy.stats); for a cap above max_dose L(g(x)) = L(x), so AF = 0 and
    only an absolute check applies."""
    curve, ex = _setup(slope, exp_key)
    scenario = SCENARIOS[scn]
    L = _log_rr(slope, m)
    ref = _reference(lambda x: -math.expm1(L(scenario_dose(scenario, x, m)) - L(x)),
                     ex.family.scipy(ex.params), slope, m, scenario, _flat(scenario))
    got = averted_fraction(curve, ex, scenario, minimum_risk=m)
    if scn == "cap-45":
        assert ref == 0.0 and got == pytest.approx(0.0, abs=1e-14)
    else:
        assert got == pytest.approx(ref, rel=RTOL)


@pytest.mark.parametrize("m", [0.0, 1.3, 10.0])
@pytest.mark.parametrize("scn", ["none", *SCENARIOS])
@pytest.mark.parametrize("exp_key", EXPOSURE_KEYS)
@pytest.mark.parametrize("slope", SLOPES)
def test_expected_excess_steep(slope, exp_key, scn, m):
    """E[expm1(L(g(X)))], the PAF/PIF path's excess, against quad
    (scipy.integrate.quad, scipy.stats)."""
    curve, ex = _setup(slope, exp_key)
    scenario = SCENARIOS.get(scn)
    L = _log_rr(slope, m)
    ref = _reference(lambda x: math.expm1(L(scenario_dose(scenario, x, m))), ex.family.scipy(ex.params),
                     slope, m, scenario, _flat(scenario))
    got = excess_draws(curve, curve.coef, ex.family, ex.params, 0.0, m, scenario)[0]
    assert got == pytest.approx(ref, rel=RTOL)
