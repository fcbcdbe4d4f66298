"""PAF and PIF from the quadrature engine against closed forms derived here.

Each test's docstring derives its expected value; the only inputs from
outside are scipy.stats / scipy.special distribution functions used to
evaluate those closed forms. Tolerance: 1e-8 relative (issue requirement).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import ndtr

from doseattr.core.attribution.fractions import expected_rr, paf, pif
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.curves.power import Power
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.registry import FAMILIES
from doseattr.errors import DivergenceError

RTOL = 1e-8


def curve(model, b, max_dose=None):
    return Curve(model, np.array([b]), np.array([[0.01]]), max_dose=max_dose)


def lognormal(gm, gsd, unexposed=0.0):
    return Exposure(FAMILIES["lognormal"], np.array([gm, gsd]), unexposed)


def gamma(shape, scale, unexposed=0.0):
    return Exposure(FAMILIES["gamma"], np.array([shape, scale]), unexposed)


@pytest.mark.parametrize("k,theta,b", [(2.0, 3.0, 0.05), (0.4, 10.0, 0.02), (8.0, 0.5, 0.9),
                                       (1.0, 1.0, 0.999), (30.0, 0.2, 0.1)])
def test_gamma_loglinear_extended(k, theta, b):
    """Gamma(k, theta), RR = exp(b x), m = 0, extended: the gamma moment
    generating function gives E[e^{bX}] = (1 - b theta)^{-k} for
    b theta < 1, so PAF = 1 - (1 - b theta)^k (methods.md; derived)."""
    expected = -np.expm1(k * np.log1p(-b * theta))
    got = paf(curve(LogLinear(), b), gamma(k, theta), minimum_risk=0.0)
    assert got == pytest.approx(expected, rel=RTOL)


@pytest.mark.parametrize("k,theta,b,top", [(2.0, 3.0, 0.05, 10.0), (0.5, 4.0, 0.2, 2.0),
                                           (6.0, 2.0, 0.2, 25.0)])
def test_gamma_loglinear_flat_beyond(k, theta, b, top):
    """RR = exp(b min(x, D)): E = E[e^{bX}; X <= D] + e^{bD} P(X > D), with
    E[e^{bX}; X <= D] = (1 - b theta)^{-k} G(D; k, theta/(1 - b theta))
    (exponential tilting of the gamma density; G the gamma CDF, scipy)."""
    tilt = (1 - b * theta) ** (-k) * stats.gamma.cdf(top, k, scale=theta / (1 - b * theta))
    e = tilt + np.exp(b * top) * stats.gamma.sf(top, k, scale=theta)
    got = expected_rr(curve(LogLinear(), b, max_dose=top), gamma(k, theta))
    assert got == pytest.approx(e, rel=RTOL)


@pytest.mark.parametrize("gm,gsd,b", [(10.0, 2.0, 0.01), (3.0, 4.0, 0.2), (50.0, 1.2, 0.005),
                                      (1.0, 3.5, 2.0)])
def test_lognormal_linear_extended(gm, gsd, b):
    """RR = 1 + b x: E[RR] = 1 + b E[X] = 1 + b exp(mu + s^2/2), the
    lognormal mean (Aitchison & Brown 1957)."""
    s = np.log(gsd)
    e = 1 + b * gm * np.exp(s * s / 2)
    assert expected_rr(curve(LinearExcess(), b), lognormal(gm, gsd)) == pytest.approx(e, rel=RTOL)
    assert paf(curve(LinearExcess(), b), lognormal(gm, gsd), minimum_risk=0.0) == pytest.approx(1 - 1 / e, rel=RTOL)


@pytest.mark.parametrize("gm,gsd,b,cap", [(10.0, 2.0, 0.01, 15.0), (3.0, 4.0, 0.2, 2.0),
                                          (8.0, 3.0, 0.1, 100.0)])
def test_lognormal_linear_cap_scenario(gm, gsd, b, cap):
    """Cap g(x) = min(x, L), linear RR: E[RR(g(X))] = 1 + b E[min(X, L)] with the
    limited expectation E[min(X, L)] = e^{mu + s^2/2} Phi((ln L - mu - s^2)/s)
    + L (1 - Phi((ln L - mu)/s)) (methods.md; derived by splitting at L)."""
    mu, s = np.log(gm), np.log(gsd)
    lev = np.exp(mu + s * s / 2) * ndtr((np.log(cap) - mu - s * s) / s) \
        + cap * ndtr(-(np.log(cap) - mu) / s)
    e0 = 1 + b * np.exp(mu + s * s / 2)
    eg = 1 + b * lev
    got = pif(curve(LinearExcess(), b), lognormal(gm, gsd), Cap(cap), minimum_risk=0.0)
    assert got == pytest.approx(1 - eg / e0, rel=RTOL)


@pytest.mark.parametrize("gm,gsd,b,m", [(10.0, 2.0, 0.5, 5.0), (3.0, 4.0, 1.3, 1.0),
                                        (20.0, 1.5, 2.0, 30.0)])
def test_lognormal_power_minimum_risk(gm, gsd, b, m):
    """Power RR = (x / x_ref)^b with minimum risk m: RR_m(x) = (max(x, m)/m)^b,
    so E = F(m) + m^{-b} E[X^b; X > m], and for the lognormal
    E[X^b; X > m] = exp(b mu + b^2 s^2/2) Phi((mu + b s^2 - ln m)/s)
    (methods.md; complete the square)."""
    mu, s = np.log(gm), np.log(gsd)
    tail = np.exp(b * mu + b * b * s * s / 2) * ndtr((mu + b * s * s - np.log(m)) / s)
    e = ndtr((np.log(m) - mu) / s) + m ** (-b) * tail
    got = expected_rr(curve(Power(reference_dose=7.0), b), lognormal(gm, gsd), minimum_risk=m)
    assert got == pytest.approx(e, rel=RTOL)


@pytest.mark.parametrize("s_factor", [0.5, 0.8, 1.0])
def test_gamma_loglinear_scale_scenario(s_factor):
    """g(x) = s x on Gamma(k, theta): sX ~ Gamma(k, s theta), so
    E[e^{b s X}] = (1 - b s theta)^{-k}; PIF = 1 - E_g / E_0."""
    k, theta, b = 3.0, 2.0, 0.1
    e0 = (1 - b * theta) ** (-k)
    eg = (1 - b * s_factor * theta) ** (-k)
    got = pif(curve(LogLinear(), b), gamma(k, theta), Scale(s_factor), minimum_risk=0.0)
    assert got == pytest.approx(1 - eg / e0, rel=RTOL, abs=1e-14)


def test_lognormal_linear_reduce_by():
    """g(x) = max(x - d, 0), linear RR, m = 0: E[RR(g(X))] = 1 + b E[(X - d)^+]
    and E[(X - d)^+] = E[X] - E[min(X, d)] (limited expectation as above)."""
    gm, gsd, b, d = 6.0, 2.5, 0.07, 4.0
    mu, s = np.log(gm), np.log(gsd)
    mean = np.exp(mu + s * s / 2)
    lev = mean * ndtr((np.log(d) - mu - s * s) / s) + d * ndtr(-(np.log(d) - mu) / s)
    e0, eg = 1 + b * mean, 1 + b * (mean - lev)
    got = pif(curve(LinearExcess(), b), lognormal(gm, gsd), ReduceBy(d), minimum_risk=0.0)
    assert got == pytest.approx(1 - eg / e0, rel=RTOL)


def test_unexposed_point_mass():
    """A share u at zero exposure has RR_m = 1: E = u + (1 - u) E_exposed
    (law of total expectation), checked with the gamma closed form."""
    k, theta, b, u = 2.0, 3.0, 0.05, 0.3
    e = u + (1 - u) * (1 - b * theta) ** (-k)
    assert expected_rr(curve(LogLinear(), b), gamma(k, theta, u)) == pytest.approx(e, rel=RTOL)


def test_divergent_loglinear_over_lognormal_is_refused():
    """The lognormal moment generating function is infinite for any positive
    argument (methods.md), so E[exp(bX)] diverges: refused, never inf."""
    with pytest.raises(DivergenceError, match="lognormal"):
        paf(curve(LogLinear(), 0.01), lognormal(10.0, 2.0), minimum_risk=0.0)


def test_divergent_gamma_tilt_is_refused():
    """E[e^{bX}] for Gamma(k, theta) is infinite when b theta >= 1."""
    with pytest.raises(DivergenceError):
        paf(curve(LogLinear(), 0.6), gamma(2.0, 2.0), minimum_risk=0.0)


def test_weibull_linear_extended():
    """Linear RR on Weibull(k, lam): E[RR] = 1 + b lam Gamma(1 + 1/k)
    (Weibull mean; scipy.stats.weibull_min.mean as the reference)."""
    k, lam, b = 1.7, 12.0, 0.03
    e = 1 + b * stats.weibull_min(k, scale=lam).mean()
    ex = Exposure(FAMILIES["weibull"], np.array([k, lam]))
    assert expected_rr(curve(LinearExcess(), b), ex) == pytest.approx(e, rel=RTOL)


@pytest.mark.parametrize("target", [1e-13, 1e-16, 1e-77])
def test_tiny_paf_keeps_its_relative_precision(target: float) -> None:
    """Linear excess risk RR(x) = 1 + b x over a lognormal, minimum risk 0:
    E[RR] - 1 = b E[X] = b gm exp(ln(gsd)^2 / 2) (closed form, lognormal
    mean), so PAF = e/(1 + e) with e = b E[X]. Going through 1 + e would
    lose all digits below 1e-16; the excess keeps them."""
    gm, gsd = 12.0, 2.2
    mean = gm * np.exp(np.log(gsd) ** 2 / 2.0)
    b = target / mean
    e = b * mean
    got = paf(curve(LinearExcess(), b), lognormal(gm, gsd), minimum_risk=0.0)
    assert got == pytest.approx(e / (1.0 + e), rel=1e-9)


def test_minimum_risk_is_keyword_only_without_default() -> None:
    """A silent default of 0 let callers forget the minimum-risk level."""
    c, ex = curve(LinearExcess(), 0.01), lognormal(12.0, 2.2)
    with pytest.raises(TypeError):
        paf(c, ex)  # type: ignore[call-arg]
    with pytest.raises(TypeError):
        paf(c, ex, 1.0)  # type: ignore[misc]
