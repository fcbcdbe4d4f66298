"""GLS fitting of curves to category-level log RRs (doseattr.core.curves.fit)."""


import numpy as np
import pytest
import statsmodels.api as sm
from scipy.optimize import curve_fit
from scipy.stats import chi2

from doseattr.core.curves.covariance import greenland_longnecker, independent_covariance
from doseattr.core.curves.fit import fit_curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.curves.power import Power
from doseattr.errors import ModelError

# Invented grouped incidence-rate data (inputs only).
DOSE = np.array([0.0, 2.0, 5.0, 10.0, 20.0])
CASES = np.array([120.0, 150.0, 170.0, 260.0, 420.0])
PT = np.array([1.0e5, 9.5e4, 8.0e4, 9.0e4, 7.0e4])


def _crude_rate_ratios():
    rr = (CASES / PT) / (CASES[0] / PT[0])
    var = 1 / CASES + 1 / CASES[0]
    cov = greenland_longnecker(rr, var, CASES, PT, design="incidence-rate", ref=0)
    return np.log(rr[1:]), cov


def test_loglinear_gls_equals_statsmodels_gls():
    """Source: statsmodels.api.GLS (no intercept, sigma = V). Its params are
    (X'V^-1X)^-1 X'V^-1 y and normalized_cov_params is (X'V^-1X)^-1, the same
    closed form, so agreement is to rounding."""
    y, cov = _crude_rate_ratios()
    curve = fit_curve(LogLinear(), DOSE[1:], y, cov)
    ref = sm.GLS(y, DOSE[1:, None], sigma=cov.cov).fit()
    np.testing.assert_allclose(curve.coef, ref.params, rtol=1e-12)
    np.testing.assert_allclose(curve.cov, ref.normalized_cov_params, rtol=1e-10)


def test_loglinear_gls_close_to_poisson_glm():
    """Source: statsmodels GLM Poisson, log(person-time) offset, intercept and dose.

    Not the same estimator: GLS on crude log rate ratios with the
    Greenland-Longnecker covariance (here the exact large-sample covariance,
    since the ratios are crude) is a minimum-chi-square estimator, the GLM is
    maximum likelihood. Both are efficient and differ by O_p(1/m) against an
    SE of order 1/sqrt(m) (m ~ cases per band, >= 120 here), i.e. by about
    SE/sqrt(m) ~ 0.09 SE. Tolerance: 0.25 SE on the slope, 10% on the SE.
    """
    y, cov = _crude_rate_ratios()
    curve = fit_curve(LogLinear(), DOSE[1:], y, cov)
    glm = sm.GLM(CASES, sm.add_constant(DOSE), family=sm.families.Poisson(),
                 offset=np.log(PT)).fit(tol=1e-12)
    se = glm.bse[1]
    assert abs(curve.coef[0] - glm.params[1]) < 0.25 * se
    np.testing.assert_allclose(np.sqrt(curve.cov[0, 0]), se, rtol=0.10)


def test_power_gls_equals_numpy_closed_form():
    """Source: closed form (X'V^-1X)^-1 X'V^-1 y computed with numpy.linalg.solve,
    basis X = log((x + c)/(x_ref + c))."""
    y, cov = _crude_rate_ratios()
    model = Power(offset=1.0)
    curve = fit_curve(model, DOSE[1:], y, cov)
    x = np.log(DOSE[1:] + 1.0)[:, None]
    vi = np.linalg.inv(cov.cov)
    info = x.T @ vi @ x
    np.testing.assert_allclose(curve.coef, np.linalg.solve(info, x.T @ vi @ y), rtol=1e-12)
    np.testing.assert_allclose(curve.cov, np.linalg.inv(info), rtol=1e-12)


def test_linear_excess_equals_curve_fit():
    """Source: scipy.optimize.curve_fit with sigma = V (2-D covariance) and
    absolute_sigma=True minimises the same r'V^-1 r and reports (J'V^-1J)^-1.
    Tolerances: optimiser stopping (1e-7) and finite-difference Jacobians (1e-5)."""
    y, cov = _crude_rate_ratios()
    model = LinearExcess()
    curve = fit_curve(model, DOSE[1:], y, cov)

    def f(x, b):
        return np.log1p(b * x)

    popt, pcov = curve_fit(f, DOSE[1:], y, p0=[0.05], sigma=cov.cov, absolute_sigma=True,
                           xtol=1e-14, ftol=1e-14, gtol=1e-14)
    np.testing.assert_allclose(curve.coef, popt, rtol=1e-7)
    np.testing.assert_allclose(curve.cov, pcov, rtol=1e-5)
    assert curve.source == "fitted" and curve.data_max == 20.0


def test_q_statistic_and_p_value():
    """Source: Q = r'V^-1 r equals the whitened residual sum of squares that
    statsmodels GLS reports as `ssr`; p-value from scipy.stats.chi2.sf(Q, n - p)."""
    y, cov = _crude_rate_ratios()
    curve = fit_curve(LogLinear(), DOSE[1:], y, cov)
    ref = sm.GLS(y, DOSE[1:, None], sigma=cov.cov).fit()
    np.testing.assert_allclose(curve.fit.q, ref.ssr, rtol=1e-10)
    r = y - curve.fit.fitted_log_rr
    np.testing.assert_allclose(curve.fit.q, r @ np.linalg.solve(cov.cov, r), rtol=1e-10)
    assert curve.fit.df == 3
    np.testing.assert_allclose(curve.fit.p_value, chi2.sf(ref.ssr, 3), rtol=1e-10)


def test_poor_fit_warns_when_p_below_005():
    """A strongly curved (invented) pattern: p from scipy's chi2 is tiny, so the
    fit must carry the poor-fit warning naming the spline model."""
    doses = np.array([1.0, 2.0, 4.0, 8.0])
    y = np.log([2.0, 2.2, 2.3, 2.35])
    curve = fit_curve(LogLinear(), doses, y, independent_covariance(np.full(4, 0.001)))
    assert chi2.sf(curve.fit.q, 3) < 0.05
    assert any("spline" in w for w in curve.fit.warnings)


def test_exact_fit_has_no_p_value():
    curve = fit_curve(LogLinear(), [3.0], [0.3], independent_covariance([0.01]))
    np.testing.assert_allclose(curve.coef, [0.1], rtol=1e-14)
    assert curve.fit.df == 0 and curve.fit.p_value is None


def test_errors():
    cov = independent_covariance([0.01, 0.02])
    with pytest.raises(ModelError, match="disagree"):
        fit_curve(LogLinear(), [1.0, 2.0, 3.0], [0.1, 0.2], cov)
    with pytest.raises(ModelError, match="not identified"):
        fit_curve(LogLinear(), [0.0, 0.0], [0.1, 0.2], cov)


def test_linear_negative_slope_needs_max_dose():
    """RR = 1 + b x with b < 0 reaches 0 at -1/b: extended without limit it is
    refused; with max_dose below that it is accepted."""
    doses, y = np.array([1.0, 2.0]), np.log([0.8, 0.6])
    cov = independent_covariance([0.01, 0.01])
    with pytest.raises(ModelError, match="not positive"):
        fit_curve(LinearExcess(), doses, y, cov)
    curve = fit_curve(LinearExcess(), doses, y, cov, max_dose=2.5)
    assert curve.coef[0] < 0 and np.all(curve.rr(np.linspace(0, 100, 50)) > 0)
