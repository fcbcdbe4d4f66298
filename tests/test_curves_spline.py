"""Restricted cubic spline model (Harrell, Regression Modeling Strategies, 2015)."""

import numpy as np
import patsy
import pytest
import statsmodels.api as sm

from doseattr.core.curves.covariance import LogRRCovariance
from doseattr.core.curves.fit import fit_curve
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.curves.spline import (
    HARRELL_QUANTILES,
    RestrictedCubicSpline,
    default_knots,
    nonlinearity_test,
)
from doseattr.errors import ModelError

KNOTS = np.array([1.0, 3.0, 5.0, 8.0])
# Invented study (inputs only): 7 non-reference bands, reference dose 0.
DOSES = np.array([1.5, 3.0, 4.5, 6.0, 8.0, 10.0, 12.0])
LOG_RR = np.log([1.10, 1.35, 1.52, 1.60, 1.66, 1.70, 1.78])


def _covariance() -> LogRRCovariance:
    """Shared-reference structure: 0.004 off the diagonal (like 1/A0 + 1/B0)."""
    var = np.array([0.02, 0.015, 0.018, 0.02, 0.025, 0.03, 0.04])
    cov = np.full((7, 7), 0.004) + np.diag(var - 0.004)
    return LogRRCovariance(cov, "counts")


def _cr_basis(x: np.ndarray) -> np.ndarray:
    """patsy's natural cubic regression spline ('cr') with the same knots: k
    columns spanning the natural cubic splines (constants included)."""
    return np.asarray(patsy.dmatrix(
        "cr(x, knots=(3.0, 5.0), lower_bound=1.0, upper_bound=8.0) - 1", {"x": x}))


def test_fitted_curve_equals_second_construction_with_patsy():
    """Source: patsy 'cr' basis. Both bases span the natural cubic splines with
    knots 1, 3, 5, 8 (cubic between knots, C2, linear outside); subtracting the
    basis at the reference leaves the curves through log RR = 0 at dose 0. GLS
    on the patsy basis (minimum-norm lstsq: the constant direction drops out)
    must give the same fitted curve everywhere, including beyond the knots."""
    cov = _covariance()
    curve = fit_curve(RestrictedCubicSpline(reference_dose=0.0, knots=KNOTS), DOSES, LOG_RR, cov)
    ref = _cr_basis(np.array([0.0]))
    chol = np.linalg.cholesky(cov.cov)
    xw = np.linalg.solve(chol, _cr_basis(DOSES) - ref)
    beta = np.linalg.lstsq(xw, np.linalg.solve(chol, LOG_RR), rcond=None)[0]
    grid = np.linspace(0.0, 40.0, 161)
    expected = np.exp((_cr_basis(grid) - ref) @ beta)
    np.testing.assert_allclose(curve.rr(grid), expected, rtol=1e-9)


def test_truncated_power_formula_written_out():
    """Source: Harrell (2015) eq. for the restricted cubic spline, typed out here
    with numpy for 3 knots (one non-linear term), normalised by (t3 - t1)^2."""
    t1, t2, t3 = 2.0, 4.0, 9.0
    model = RestrictedCubicSpline(reference_dose=1.0, knots=[t1, t2, t3])
    x = np.linspace(0.0, 15.0, 61)

    def s2(v):
        def p(z):
            return np.maximum(z, 0.0) ** 3
        return (p(v - t1) - p(v - t2) * (t3 - t1) / (t3 - t2)
                + p(v - t3) * (t2 - t1) / (t3 - t2)) / (t3 - t1) ** 2

    expected = np.column_stack([x - 1.0, s2(x) - s2(1.0)])
    np.testing.assert_allclose(model.basis(x), expected, rtol=1e-12, atol=1e-12)


def test_linear_beyond_last_knot_and_growth():
    """Restricted: second derivative zero beyond the last knot, so log RR is
    linear there; the slope growth() reports equals central differences of
    the curve (the curve itself beyond the knots is checked against patsy and
    against the written-out formula in the other tests)."""
    model = RestrictedCubicSpline(reference_dose=0.0, knots=KNOTS)
    coef = np.array([0.2, 0.3, -0.5])
    x = np.array([20.0, 1e3, 1e6])
    h = 1e-2
    fd = (model.log_rr(x + h, coef) - model.log_rr(x - h, coef)) / (2 * h)
    np.testing.assert_allclose(fd, model.tail_slope(coef), rtol=1e-6)
    g = model.growth(coef)
    assert g.kind == "exp" and g.rate == pytest.approx(float(model.tail_slope(coef)))
    assert model.growth(np.array([-0.2, 0.0, 0.0])).kind == "bounded"
    np.testing.assert_array_equal(model.kinks(coef), KNOTS)


def test_far_tail_matches_patsy():
    """Source: patsy 'cr' basis, far beyond the last knot (1e4)."""
    cov = _covariance()
    curve = fit_curve(RestrictedCubicSpline(reference_dose=0.0, knots=KNOTS), DOSES, LOG_RR, cov)
    ref = _cr_basis(np.array([0.0]))
    beta = np.linalg.lstsq(_cr_basis(DOSES) - ref, curve.fit.fitted_log_rr, rcond=None)[0]
    far = np.array([1e4])
    np.testing.assert_allclose(curve.log_rr(far), (_cr_basis(far) - ref) @ beta, rtol=1e-7)


def test_nonlinearity_test_equals_statsmodels_wald():
    """Source: statsmodels GLS (sigma = V, fixed scale 1) wald_test of the
    non-linear coefficients being 0, chi-square form."""
    cov = _covariance()
    model = RestrictedCubicSpline(reference_dose=0.0, knots=KNOTS)
    curve = fit_curve(model, DOSES, LOG_RR, cov)
    w, df, p = nonlinearity_test(curve)
    res = sm.GLS(LOG_RR, model.basis(DOSES), sigma=cov.cov).fit(cov_type="fixed scale")
    r = np.eye(3)[1:]
    ref = res.wald_test(r, use_f=False, scalar=True)
    np.testing.assert_allclose(w, ref.statistic, rtol=1e-8)
    np.testing.assert_allclose(p, ref.pvalue, rtol=1e-8)
    assert df == 2
    with pytest.raises(ModelError, match="spline"):
        nonlinearity_test(fit_curve(LogLinear(), DOSES, LOG_RR, cov))


def test_default_knots():
    """Source: Harrell's default knot quantiles (methods guide, read in the
    documentation of his spline routine), placed with numpy.quantile."""
    assert HARRELL_QUANTILES[3] == (0.10, 0.50, 0.90)
    assert HARRELL_QUANTILES[4] == (0.05, 0.35, 0.65, 0.95)
    assert HARRELL_QUANTILES[5] == (0.05, 0.275, 0.50, 0.725, 0.95)
    doses = np.r_[0.0, DOSES]
    np.testing.assert_allclose(default_knots(doses, 4),
                               np.quantile(doses, [0.05, 0.35, 0.65, 0.95]), rtol=1e-15)
    with pytest.raises(ModelError, match="repeated knots"):
        default_knots([0.0, 0.0, 0.0, 5.0], 3)
    with pytest.raises(ModelError, match="3, 4 or 5"):
        default_knots(doses, 6)


def test_too_few_bands_and_bad_knots():
    cov = LogRRCovariance(np.diag([0.01, 0.02]), "independent")
    with pytest.raises(ModelError, match="only 2 non-reference bands"):
        fit_curve(RestrictedCubicSpline(knots=KNOTS), [2.0, 4.0], [0.1, 0.2], cov)
    with pytest.raises(ModelError, match="increasing"):
        RestrictedCubicSpline(knots=[1.0, 1.0, 2.0])
