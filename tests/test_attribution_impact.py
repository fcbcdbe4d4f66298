"""Impact fraction IF = E[1 - 1/RR_m(X)] and averted fraction
AF_g = E[1 - RR_m(g(X))/RR_m(X)] against references outside the project.

References: closed forms derived in each docstring (lognormal moments,
gamma moment generating function), scipy.integrate.quad through
tests/reference_integrals.expect_over (split at every kink, epsrel 1e-12),
and weighted averages written out with numpy. Agreement asked: 1e-8
relative unless a docstring says otherwise.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from reference_integrals import expect_over

from doseattr.core.attribution.fractions import expected_rr, paf
from doseattr.core.attribution.impact import (
    averted_fraction,
    empirical_impact_draws,
    impact_draws,
    impact_fraction,
)
from doseattr.core.attribution.scenarios import SCENARIO_KINDS, Cap, ReduceBy, Scale
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.curves.power import Power
from doseattr.core.curves.shapes import SaturatingExponential
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.core.exposure.registry import FAMILIES
from doseattr.errors import DivergenceError

RTOL = 1e-8


def curve(model, b, max_dose=None):
    return Curve(model, np.array([b]), np.array([[0.01]]), max_dose=max_dose)


def exposure(family, a, b, unexposed=0.0):
    return Exposure(FAMILIES[family], np.array([a, b]), unexposed)


def log_rr_m(crv, x, m):
    """ln RR_m(x) = ln RR(max(x, m)) - ln RR(m), flat above max_dose."""
    return float(crv.log_rr(np.array([max(x, m)]))[0] - crv.log_rr(np.array([m]))[0])


def quad_fraction(crv, exp, m, scenario=None):
    """(1-u) E_exposed[1 - RR_m(g(X))/RR_m(X)] by scipy.integrate.quad of
    -expm1(L_g(x) - L(x)); without a scenario L_g = 0 (everyone at m), which
    gives the impact fraction E[1 - 1/RR_m(X)]."""
    dist = exp.family.scipy(exp.params)

    def share(x):
        lg = 0.0 if scenario is None else log_rr_m(crv, float(scenario.apply(np.array([x]), m)[0]), m)
        return -math.expm1(lg - log_rr_m(crv, x, m))

    pts = [m] + [float(k) for k in np.ravel(crv.model.kinks(crv.coef))]
    if crv.max_dose is not None:
        pts.append(crv.max_dose)
    if scenario is not None:
        pts = pts + list(scenario.preimage(np.array(pts))) + list(scenario.own_kinks())
    return (1 - exp.unexposed) * expect_over(share, dist, pts, epsrel=1e-12, limit=500)


def lognormal_moment(gm, gsd, n):
    """E[X^n] = exp(n mu + n^2 s^2 / 2) for a lognormal (closed form)."""
    mu, s = math.log(gm), math.log(gsd)
    return math.exp(n * mu + n * n * s * s / 2)


@pytest.mark.parametrize("gm,gsd,b", [(10.0, 2.0, 0.01), (3.0, 4.0, 0.2), (50.0, 1.2, 0.005),
                                      (1.0, 3.5, 2.0)])
def test_lognormal_linear_if_below_paf(gm, gsd, b):
    """RR = 1 + b x, lognormal(GM, GSD), m = 0.

    E[RR] = 1 + b GM exp(ln^2 GSD / 2) (lognormal mean, closed form), so
    PAF = 1 - 1/E[RR] is checked against it; E[1/(1 + bX)] has no closed
    form and is taken from scipy.integrate.quad, IF = 1 - E[1/(1 + bX)].

    Jensen (derived here): r -> 1/r is convex on r > 0, so
    E[1/RR] >= 1/E[RR], i.e. 1 - IF >= 1 - PAF and IF <= PAF.
    """
    crv, exp = curve(LinearExcess(), b), exposure("lognormal", gm, gsd)
    e_rr = 1 + b * lognormal_moment(gm, gsd, 1)
    dist = exp.family.scipy(exp.params)
    e_inv = expect_over(lambda x: 1.0 / (1.0 + b * x), dist)          # scipy.integrate.quad
    got_if = impact_fraction(crv, exp, minimum_risk=0.0)
    got_paf = paf(crv, exp, minimum_risk=0.0)
    assert got_if == pytest.approx(1 - e_inv, rel=RTOL)
    assert got_paf == pytest.approx(1 - 1 / e_rr, rel=RTOL)
    assert got_if < got_paf


def test_lognormal_linear_if_paf_first_order():
    r"""For small b both fractions are b E[X] to first order; their gap
    (derived here by expanding 1/(1+bx) = 1 - bx + b^2x^2 - b^3x^3 + ...
    under E and 1/(1+b mu_1) likewise, mu_n = E[X^n]):

    .. math:: PAF - IF = E[1/RR] - 1/E[RR]
              = b^2 (\mu_2 - \mu_1^2) - b^3 (\mu_3 - \mu_1^3) + O(b^4),

    with the lognormal moments in closed form. Checked to 1e-6 relative
    on the gap (the O(b^4) term is about b mu_1 times smaller than the last).
    """
    gm, gsd, b = 10.0, 2.0, 1e-5
    crv, exp = curve(LinearExcess(), b), exposure("lognormal", gm, gsd)
    m1, m2, m3 = (lognormal_moment(gm, gsd, n) for n in (1, 2, 3))
    got_if = impact_fraction(crv, exp, minimum_risk=0.0)
    got_paf = paf(crv, exp, minimum_risk=0.0)
    assert got_if == pytest.approx(b * m1, rel=1e-3)
    gap = b * b * (m2 - m1 * m1) - b ** 3 * (m3 - m1 ** 3)
    assert got_paf - got_if == pytest.approx(gap, rel=1e-6)


@pytest.mark.parametrize("k,theta,b", [(2.0, 3.0, 0.05), (0.4, 10.0, 0.02), (8.0, 0.5, 0.9),
                                       (1.0, 1.0, 3.0), (30.0, 0.2, 0.1)])
def test_gamma_loglinear_extended_closed_form(k, theta, b):
    """RR = exp(b x), gamma(k, theta), m = 0, extended: the gamma moment
    generating function at -b gives E[e^{-bX}] = (1 + b theta)^{-k}, so
    IF = 1 - (1 + b theta)^{-k} (closed form derived here). Finite for every
    b > 0, also where E[RR] = (1 - b theta)^{-k} is infinite (b theta >= 1,
    the case (1, 1, 3)): the engine must not refuse it."""
    crv, exp = curve(LogLinear(), b), exposure("gamma", k, theta)
    expected = -math.expm1(-k * math.log1p(b * theta))
    assert impact_fraction(crv, exp, minimum_risk=0.0) == pytest.approx(expected, rel=RTOL)
    if b * theta >= 1:
        with pytest.raises(DivergenceError):
            expected_rr(crv, exp)


@pytest.mark.parametrize("k,theta,b", [(2.0, 3.0, 0.05), (6.0, 0.5, 0.3)])
def test_gamma_protective_loglinear(k, theta, b):
    """RR = exp(-b x), extended: 1 - 1/RR = 1 - e^{bX} is unbounded below
    and IF = 1 - E[e^{bX}] = 1 - (1 - b theta)^{-k} (gamma moment generating
    function, closed form), negative, finite for b theta < 1 and infinite
    from b theta = 1 on, which the engine must refuse."""
    crv, exp = curve(LogLinear(), -b), exposure("gamma", k, theta)
    expected = -math.expm1(-k * math.log1p(-b * theta))
    assert impact_fraction(crv, exp, minimum_risk=0.0) == pytest.approx(expected, rel=RTOL)
    with pytest.raises(DivergenceError):
        impact_fraction(curve(LogLinear(), -1.0 / theta), exp, minimum_risk=0.0)


@pytest.mark.parametrize("gm,gsd,b", [(10.0, 2.0, 0.05), (3.0, 4.0, 0.5)])
def test_lognormal_loglinear_extended_finite(gm, gsd, b):
    """RR = exp(b x) extended over a lognormal: E[RR] is infinite (the
    lognormal moment generating function diverges for any positive
    argument) and the engine refuses the PAF, but 0 <= 1 - e^{-bx} <= 1, so
    IF and the averted fraction of a 40% cut are finite; checked against
    scipy.integrate.quad."""
    crv, exp = curve(LogLinear(), b), exposure("lognormal", gm, gsd)
    with pytest.raises(DivergenceError):
        expected_rr(crv, exp)
    assert impact_fraction(crv, exp, minimum_risk=0.0) == pytest.approx(
        quad_fraction(crv, exp, 0.0), rel=RTOL)
    assert averted_fraction(crv, exp, Scale(0.6), minimum_risk=0.0) == pytest.approx(
        quad_fraction(crv, exp, 0.0, Scale(0.6)), rel=RTOL)


@pytest.mark.parametrize("family,a,c", [("gamma", 2.0, 3.0), ("gamma", 0.35, 30.0),
                                        ("weibull", 0.7, 10.0), ("weibull", 3.0, 15.0)])
@pytest.mark.parametrize("b,top", [(0.05, 20.0), (0.4, 30.0)])
def test_loglinear_flat_vs_quad(family, a, c, b, top):
    """RR = exp(b min(x, D)) over gamma and Weibull: IF against
    scipy.integrate.quad of 1 - e^{-b min(x, D)}, split at D."""
    crv, exp = curve(LogLinear(), b, max_dose=top), exposure(family, a, c)
    assert impact_fraction(crv, exp, minimum_risk=0.0) == pytest.approx(
        quad_fraction(crv, exp, 0.0), rel=RTOL)


@pytest.mark.parametrize("family,a,c", [("lognormal", 8.0, 3.0), ("gamma", 2.0, 4.0),
                                        ("weibull", 1.5, 10.0)])
def test_minimum_risk_and_unexposed(family, a, c):
    """m = 3 and u = 0.2: IF against (1 - u) times scipy.integrate.quad of
    1 - RR(m)/RR(max(x, m)) over the exposed; and IF(u) = (1 - u) IF(0)
    exactly (the unexposed have RR_m = 1, closed form), to 1e-13."""
    crv, m, u = curve(LogLinear(), 0.1, max_dose=25.0), 3.0, 0.2
    with_u, without = exposure(family, a, c, u), exposure(family, a, c)
    got = impact_fraction(crv, with_u, minimum_risk=m)
    assert got == pytest.approx(quad_fraction(crv, with_u, m), rel=RTOL)
    assert got == pytest.approx((1 - u) * impact_fraction(crv, without, minimum_risk=m), rel=1e-13)


CURVES = {
    "loglinear-flat": Curve(LogLinear(), np.array([0.15]), np.eye(1), max_dose=30.0),
    "linear-extended": Curve(LinearExcess(), np.array([0.25]), np.eye(1)),
    "power-extended": Curve(Power(reference_dose=1.0, offset=1.0), np.array([1.5]), np.eye(1)),
    "saturating-threshold": Curve(SaturatingExponential(threshold=2.5), np.array([1.2, 0.1, 0.7]),
                                  np.eye(3)),
}
EXPOSURES = {
    "lognormal": exposure("lognormal", 8.0, 2.5, 0.1),
    "gamma": exposure("gamma", 1.5, 6.0),
    "weibull": exposure("weibull", 0.8, 10.0, 0.3),
}
SCENARIOS = {"cap": Cap(6.0), "scale": Scale(0.6), "reduce": ReduceBy(3.0)}


@pytest.mark.parametrize("scn", list(SCENARIOS))
@pytest.mark.parametrize("crv", list(CURVES))
@pytest.mark.parametrize("exp", list(EXPOSURES))
@pytest.mark.parametrize("m", [0.0, 2.0])
def test_averted_fraction_vs_quad(scn, crv, exp, m):
    """AF_g against (1 - u) times scipy.integrate.quad of
    1 - RR_m(g(x))/RR_m(x), split at m, the curve's kinks, their preimages
    and the scenario's own kinks."""
    curve_, exp_, scenario = CURVES[crv], EXPOSURES[exp], SCENARIOS[scn]
    got = averted_fraction(curve_, exp_, scenario, minimum_risk=m)
    assert got == pytest.approx(quad_fraction(curve_, exp_, m, scenario), rel=RTOL)


@pytest.mark.parametrize("kind", list(SCENARIO_KINDS))
def test_unexposed_add_nothing(kind):
    """Every scenario maps zero exposure to at most m (cap: min(0, L) = 0,
    scale: 0, reduce_by: max(-d, m) = m; derived here), so RR_m(g(0)) =
    RR_m(0) = 1 and AF_g(u) = (1 - u) AF_g(0) exactly (to 1e-13)."""
    scenario = SCENARIO_KINDS[kind](0.5)
    for m in (0.0, 2.0):
        assert float(scenario.apply(np.zeros(1), m)[0]) <= m
        crv = CURVES["loglinear-flat"]
        full = averted_fraction(crv, exposure("gamma", 1.5, 6.0, 0.4), scenario, minimum_risk=m)
        none = averted_fraction(crv, exposure("gamma", 1.5, 6.0), scenario, minimum_risk=m)
        assert full == pytest.approx(0.6 * none, rel=1e-13)


def test_empirical_vs_weighted_average():
    """Weighted values: IF and AF against the weighted average written out
    with numpy from RR = exp(b min(x, D)) (independent of the code's
    minimum-risk clipping): (1 - u) sum w (1 - RR_m(g(x))/RR_m(x)) / sum w."""
    rng = np.random.default_rng(3)
    x = rng.gamma(2.0, 5.0, size=40)
    w = rng.uniform(0.5, 2.0, size=40)
    w = w / w.sum()
    b, top, m, u = 0.08, 25.0, 2.0, 0.15
    crv = curve(LogLinear(), b, max_dose=top)
    emp = EmpiricalExposure(x, w, unexposed=u)

    def rr_m(y):
        return np.exp(b * np.minimum(np.maximum(y, m), top)) / np.exp(b * m)

    expected_if = (1 - u) * np.sum(w * (1 - 1 / rr_m(x))) / np.sum(w)
    assert impact_fraction(crv, emp, minimum_risk=m) == pytest.approx(expected_if, rel=1e-12)
    for scenario, gx in [(Scale(0.7), 0.7 * x), (Cap(8.0), np.minimum(x, 8.0)),
                         (ReduceBy(4.0), np.maximum(x - 4.0, m))]:
        expected = (1 - u) * np.sum(w * (1 - rr_m(gx) / rr_m(x))) / np.sum(w)
        got = averted_fraction(crv, emp, scenario, minimum_risk=m)
        assert got == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("scenario", [None, Scale(0.5), Cap(5.0)])
def test_draws_equal_point_evaluations(scenario):
    """(D, p) coefficient draws (both signs of the slope, with a flat top)
    and per-draw exposure parameters: each row equals the point function
    of its own curve and exposure (the reference: one call per draw)."""
    slopes = np.array([0.02, 0.3, -0.05, 0.1, 1e-9, -0.2, 0.6])
    params = np.column_stack([np.linspace(1.0, 4.0, slopes.size), np.linspace(2.0, 6.0, slopes.size)])
    model, top, m, u = LogLinear(), 20.0, 1.0, 0.1
    crv = curve(model, 0.1, max_dose=top)
    got = impact_draws(crv, slopes[:, None], FAMILIES["gamma"], params, u, m, scenario)
    for d, b in enumerate(slopes):
        one = Curve(model, np.array([b]), np.eye(1), max_dose=top)
        exp = Exposure(FAMILIES["gamma"], params[d], u)
        point = (impact_fraction(one, exp, minimum_risk=m) if scenario is None
                 else averted_fraction(one, exp, scenario, minimum_risk=m))
        assert got[d] == pytest.approx(point, rel=1e-12, abs=1e-300)
    values = np.linspace(0.0, 30.0, 13)
    weights = np.full(13, 1 / 13)
    emp = empirical_impact_draws(crv, slopes[:, None], values, weights, u, m, scenario)
    for d, b in enumerate(slopes):
        one = Curve(model, np.array([b]), np.eye(1), max_dose=top)
        ex = EmpiricalExposure(values, weights, unexposed=u)
        point = (impact_fraction(one, ex, minimum_risk=m) if scenario is None
                 else averted_fraction(one, ex, scenario, minimum_risk=m))
        assert emp[d] == pytest.approx(point, rel=1e-12, abs=1e-300)


@pytest.mark.parametrize("model", [LinearExcess(), LogLinear()])
def test_tiny_slope_keeps_precision(model):
    """b = 1e-12: 1 - 1/RR = b x + O(b^2 x^2) for both RR = 1 + b x and
    e^{bx} (closed form), so IF = b E[X] to relative b E[X^2]/E[X] ~ 1e-10;
    E[X] = k theta for gamma(k, theta) (closed form)."""
    b, k, theta = 1e-12, 2.0, 5.0
    got = impact_fraction(curve(model, b), exposure("gamma", k, theta), minimum_risk=0.0)
    assert got == pytest.approx(b * k * theta, rel=1e-9)
    got_af = averted_fraction(curve(model, b), exposure("gamma", k, theta), Scale(0.5),
                              minimum_risk=0.0)
    assert got_af == pytest.approx(0.5 * b * k * theta, rel=1e-9)


@pytest.mark.parametrize("family,a,c", [("gamma", 0.35, 30.0), ("weibull", 0.7, 10.0),
                                        ("lognormal", 8.0, 3.0)])
@pytest.mark.parametrize("b,top", [(-0.4, 30.0), (-1.5, 40.0)])
def test_steep_protective_flat_vs_quad(family, a, c, b, top):
    """RR = exp(b min(x, D)), b < 0: 1/RR = e^{|b| min(x, D)} is steep just
    below D, so IF = 1 - E[1/RR] (large and negative) has its mass there;
    against scipy.integrate.quad split at D. Asked to 1e-10: without the
    graded panels below D the fixed rule is off by up to about 1.5e-8."""
    crv, exp = curve(LogLinear(), b, max_dose=top), exposure(family, a, c)
    assert impact_fraction(crv, exp, minimum_risk=0.0) == pytest.approx(
        quad_fraction(crv, exp, 0.0), rel=1e-10)


@pytest.mark.parametrize("k,theta,b", [(2.0, 3.0, 0.05), (1.0, 1.0, 3.0), (0.5, 4.0, -0.2),
                                       (6.0, 0.5, -1.0)])
def test_gamma_scale_closed_form(k, theta, b):
    """RR = exp(b x) extended, gamma(k, theta), scale s = 0.6, m = 0:
    RR(sx)/RR(x) = e^{-(1-s) b x}, so by the gamma moment generating function
    AF = 1 - (1 + (1-s) b theta)^{-k} (closed form derived here), finite for
    b > 0 however large (also b theta >= 1, where E[RR] is infinite) and,
    for b < 0 (a negative AF), while (1-s)|b| theta < 1."""
    s = 0.6
    crv, exp = curve(LogLinear(), b), exposure("gamma", k, theta)
    expected = -math.expm1(-k * math.log1p((1 - s) * b * theta))
    assert averted_fraction(crv, exp, Scale(s), minimum_risk=0.0) == pytest.approx(expected, rel=RTOL)


def test_protective_scale_refused_where_infinite():
    """RR = exp(-b x) extended: RR(sx)/RR(x) = e^{(1-s) b x}, whose mean is
    infinite over a lognormal (its moment generating function diverges for
    any positive argument) and over a gamma with (1-s) b theta >= 1
    (closed form); the engine must refuse both rather than return a number."""
    crv = curve(LogLinear(), -0.5)
    with pytest.raises(DivergenceError):
        averted_fraction(crv, exposure("lognormal", 8.0, 2.0), Scale(0.6), minimum_risk=0.0)
    with pytest.raises(DivergenceError):
        averted_fraction(crv, exposure("gamma", 2.0, 5.0), Scale(0.6), minimum_risk=0.0)


@pytest.mark.parametrize("s", [None, 0.6])
def test_mixed_sign_draws_extended_closed_form(s):
    """Slope draws of both signs on an extended log-linear curve over one
    gamma(k, theta): each row is 1 - (1 + (1-s) b theta)^{-k} (s = 0 for
    the impact fraction; gamma moment generating function, closed form), so
    rising and falling draws each get their own tail growth."""
    k, theta = 3.0, 2.0
    slopes = np.array([-0.3, -0.01, 1e-10, 0.05, 0.6, 2.0])
    scenario = None if s is None else Scale(s)
    got = impact_draws(curve(LogLinear(), 0.1), slopes[:, None], FAMILIES["gamma"],
                       np.array([k, theta]), 0.0, 0.0, scenario)
    cut = 1.0 if s is None else 1.0 - s
    expected = -np.expm1(-k * np.log1p(cut * slopes * theta))
    np.testing.assert_allclose(got, expected, rtol=RTOL, atol=0)
