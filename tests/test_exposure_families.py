"""Exposure families against scipy.stats, scipy.special and scipy.integrate.

Reference distributions are built here from scipy.stats directly:
lognormal = ``lognorm(s=ln gsd, scale=gm)``, gamma = ``gamma(a=shape,
scale=scale)``, Weibull = ``weibull_min(c=shape, scale=scale)``.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats
from scipy.special import gammainc, gammaincc, gammaln

from doseattr.core.exposure import FAMILIES, Gamma, LogNormal, Weibull, get_family
from doseattr.core.exposure.incomplete_gamma import (
    log_gammainc,
    log_gammainc_series,
    log_gammaincc,
    log_gammaincc_cf,
)
from doseattr.errors import ModelError


def reference(name, params):
    a, b = params
    if name == "lognormal":
        return stats.lognorm(s=np.log(b), scale=a)
    if name == "gamma":
        return stats.gamma(a=a, scale=b)
    return stats.weibull_min(c=a, scale=b)


CASES = [
    ("lognormal", (2.0, 2.5)), ("lognormal", (0.03, 1.2)), ("lognormal", (40.0, 6.0)),
    ("gamma", (0.4, 3.0)), ("gamma", (2.5, 0.7)), ("gamma", (30.0, 0.1)),
    ("weibull", (0.6, 4.0)), ("weibull", (1.0, 2.0)), ("weibull", (3.5, 10.0)),
]


@pytest.mark.parametrize("name,params", CASES)
def test_distribution_functions_match_scipy(name, params):
    """Source: scipy.stats distributions with the same parameters."""
    fam, ref = FAMILIES[name], reference(name, params)
    x = ref.ppf([1e-9, 1e-4, 0.05, 0.3, 0.5, 0.8, 0.99, 1 - 1e-7])
    p = np.array(params)
    np.testing.assert_allclose(fam.logpdf(x, p), ref.logpdf(x), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(fam.cdf(x, p), ref.cdf(x), rtol=1e-10, atol=0)
    np.testing.assert_allclose(fam.sf(x, p), ref.sf(x), rtol=1e-9, atol=0)
    np.testing.assert_allclose(fam.logcdf(x, p), ref.logcdf(x), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(fam.logsf(x, p), ref.logsf(x), rtol=1e-9, atol=1e-12)
    q = np.array([1e-6, 0.01, 0.25, 0.5, 0.75, 0.99, 0.999999])
    np.testing.assert_allclose(fam.ppf(q, p), ref.ppf(q), rtol=1e-9)
    np.testing.assert_allclose(fam.mean(p), ref.mean(), rtol=1e-12)


@pytest.mark.parametrize("name,params", CASES)
def test_log_density_of_log_exposure(name, params):
    """Source: change of variables t = ln x, f_T(t) = f_X(e^t) e^t, with scipy's logpdf."""
    fam, ref = FAMILIES[name], reference(name, params)
    t = np.log(ref.ppf([1e-6, 0.1, 0.5, 0.9, 1 - 1e-6]))
    np.testing.assert_allclose(fam.log_density_log(t, np.array(params)), ref.logpdf(np.exp(t)) + t,
                               rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("name,params", CASES)
def test_partial_mean_matches_quadrature(name, params):
    """Source: scipy.integrate.quad of x f(x) (scipy.stats pdf) over (a, b]."""
    fam, ref = FAMILIES[name], reference(name, params)
    lo, med, hi = ref.ppf([0.1, 0.5, 0.95])
    for a, b in [(0.0, med), (lo, hi), (med, np.inf), (hi, np.inf), (0.0, np.inf)]:
        expected = integrate.quad(lambda v: v * ref.pdf(v), a, b, epsabs=0, epsrel=1e-12, limit=200)[0]
        got = fam.partial_mean(np.array([a]), np.array([b]), np.array(params))[0]
        np.testing.assert_allclose(got, expected, rtol=1e-7)


@pytest.mark.parametrize("name", list(FAMILIES))
def test_broadcasting_over_draws(name):
    """Source: the same scipy.stats reference evaluated row by row."""
    fam = FAMILIES[name]
    params = np.array([[1.5, 2.0], [3.0, 1.7], [0.8, 5.0]])
    x = np.array([0.2, 1.0, 4.0, 9.0])
    xd = np.array([x, 2 * x, 0.5 * x])
    for out, xs in [(fam.cdf(x, params), [x] * 3), (fam.cdf(xd, params), xd)]:
        assert out.shape == (3, 4)
        for row, p, xi in zip(out, params, xs):
            np.testing.assert_allclose(row, reference(name, p).cdf(xi), rtol=1e-10)
    t = np.log(x)
    dens = fam.log_density_log(t, params)
    for row, p in zip(dens, params):
        np.testing.assert_allclose(row, reference(name, p).logpdf(x) + t, rtol=1e-10)
    np.testing.assert_allclose(fam.mean(params), [reference(name, p).mean() for p in params], rtol=1e-12)
    pm = fam.partial_mean(np.zeros(1), np.full(1, np.inf), params)
    np.testing.assert_allclose(pm[:, 0], fam.mean(params), rtol=1e-12)


@pytest.mark.parametrize("name,params", CASES)
def test_internal_round_trip_and_scipy(name, params):
    """Source: the definition of the internal scale (logs of positive
    parameters; lognormal (ln gm, ln ln gsd)) and scipy's frozen objects."""
    fam = FAMILIES[name]
    p = np.array(params)
    np.testing.assert_allclose(fam.from_internal(fam.to_internal(p)), p, rtol=1e-13)
    ref = reference(name, params)
    np.testing.assert_allclose(fam.scipy(p).ppf([0.1, 0.9]), ref.ppf([0.1, 0.9]), rtol=1e-13)


def test_lognormal_internal_is_log_gm_and_log_sigma():
    """Source: the agreed API (internal = (log gm, log log gsd))."""
    theta = LogNormal().to_internal(np.array([3.0, 2.0]))
    np.testing.assert_allclose(theta, [np.log(3.0), np.log(np.log(2.0))], rtol=1e-14)


@pytest.mark.parametrize("name,bad,match", [
    ("lognormal", (2.0, 1.0), "gsd must be greater than 1"),
    ("lognormal", (-1.0, 2.0), "gm must be a positive"),
    ("gamma", (0.0, 1.0), "shape must be a positive"),
    ("weibull", (1.0, np.nan), "scale must be a positive"),
])
def test_check_names_the_parameter(name, bad, match):
    """Source: the Family contract (ModelError naming the parameter)."""
    with pytest.raises(ModelError, match=match):
        FAMILIES[name].check(np.array(bad))


def test_unknown_family_lists_the_valid_names():
    """Source: the registry contract."""
    with pytest.raises(ModelError, match="lognormal, gamma, weibull"):
        get_family("normal")


@pytest.mark.parametrize("a,y", [(50.0, 1e-3), (3.0, 1e-80), (0.2, 1e-300), (400.0, 150.0)])
def test_log_lower_incomplete_gamma_series(a, y):
    """Source: scipy.special.gammainc where its value is tiny but representable
    (the hand-written series takes over only where it underflows)."""
    np.testing.assert_allclose(log_gammainc_series(a, y), np.log(gammainc(a, y)), rtol=1e-12)


@pytest.mark.parametrize("a,y", [(2.5, 600.0), (0.3, 650.0), (40.0, 700.0), (400.0, 1100.0)])
def test_log_upper_incomplete_gamma_continued_fraction(a, y):
    """Source: scipy.special.gammaincc where its value is tiny but representable."""
    np.testing.assert_allclose(log_gammaincc_cf(a, y), np.log(gammaincc(a, y)), rtol=1e-12)


@pytest.mark.parametrize("a,y", [(2.5, 900.0), (7.0, 3000.0)])
def test_log_upper_incomplete_gamma_beyond_underflow(a, y):
    """Source: scipy.integrate.quad of the scaled integrand. Derivation:
    Q(a, y) = int_y^inf t^(a-1) e^-t dt / Gamma(a); with t = y + u,
    ln Q = -y - ln Gamma(a) + ln int_0^inf (y + u)^(a-1) e^-u du, whose
    integrand is of order y^(a-1) and easily integrated."""
    assert gammaincc(a, y) == 0.0
    integral = integrate.quad(lambda u: np.exp((a - 1) * np.log((y + u) / y) - u), 0, np.inf, epsrel=1e-13)[0]
    expected = -y - gammaln(a) + (a - 1) * np.log(y) + np.log(integral)
    np.testing.assert_allclose(log_gammaincc(a, y), expected, rtol=1e-12)


def test_log_lower_incomplete_gamma_beyond_underflow():
    """Source: leading term of the series, P(a, y) ~ y^a / Gamma(a + 1) as
    y -> 0 (relative error of order y), computed with scipy.special.gammaln."""
    a, y = 5.0, 1e-70
    assert gammainc(a, y) == 0.0
    np.testing.assert_allclose(log_gammainc(a, y), a * np.log(y) - gammaln(a + 1), rtol=1e-14)


def test_gamma_log_probabilities_stay_finite_in_the_tails():
    """Source: as above; the family uses the underflow-safe functions."""
    g = Gamma()
    p = np.array([3.0, 2.0])
    low = g.logcdf(np.array([1e-120]), p)[0]
    np.testing.assert_allclose(low, 3 * np.log(1e-120 / 2.0) - gammaln(4.0), rtol=1e-12)
    assert np.isfinite(g.logsf(np.array([3000.0]), p)[0])


def test_weibull_logcdf_deep_lower_tail():
    """Source: ln(1 - e^-E) = ln E - E/2 + O(E^2) for small E = (x/scale)^k
    (Taylor series); scipy's weibull_min.logcdf underflows to -inf here."""
    w = Weibull()
    x, p = 1e-200, np.array([2.0, 3.0])
    np.testing.assert_allclose(w.logcdf(np.array([x]), p)[0], 2.0 * np.log(x / 3.0), rtol=1e-14)


def _params(name):
    shape = st.floats(0.3, 20.0)
    scale = st.floats(0.01, 100.0)
    first = st.floats(0.01, 100.0) if name == "lognormal" else shape
    second = st.floats(1.05, 8.0) if name == "lognormal" else scale
    return st.tuples(first, second)


@pytest.mark.parametrize("name", list(FAMILIES))
def test_ppf_inverts_cdf_property(name):
    """Source: definition of the quantile function (cdf(ppf(q)) = q), and
    cdf + sf = 1, over random parameters (hypothesis)."""

    @settings(max_examples=60, deadline=None)
    @given(_params(name), st.floats(1e-6, 1 - 1e-6))
    def check(params, q):
        fam, p = FAMILIES[name], np.array(params)
        x = fam.ppf(np.array([q]), p)
        np.testing.assert_allclose(fam.cdf(x, p), [q], rtol=1e-8, atol=1e-12)
        np.testing.assert_allclose(fam.cdf(x, p) + fam.sf(x, p), [1.0], rtol=1e-13)

    check()
