"""Curves given as points (dose, RR, CI) or as draws on a dose grid."""

import numpy as np
import pytest
from scipy.interpolate import interp1d
from scipy.stats import norm

from doseattr.core.curves.covariance import LogRRCovariance
from doseattr.core.curves.fit import fit_curve
from doseattr.core.curves.points import PointsCurve, curve_from_draws, points_curve
from doseattr.errors import ModelError

# Invented table (inputs only).
DOSES = np.array([0.0, 5.0, 10.0, 20.0, 40.0])
RR = np.array([1.0, 1.10, 1.18, 1.30, 1.45])
LO = np.array([np.nan, 1.02, 1.08, 1.15, 1.20])
HI = np.array([np.nan, 1.19, 1.29, 1.47, 1.75])


def test_interpolation_equals_scipy_interp1d():
    """Source: scipy.interpolate.interp1d (linear, held flat outside the points)
    of log RR."""
    curve = points_curve(DOSES, RR, LO, HI, reference_dose=0.0)
    ref = interp1d(DOSES, np.log(RR), kind="linear", bounds_error=False,
                   fill_value=(np.log(RR[0]), np.log(RR[-1])))
    x = np.linspace(0.0, 80.0, 161)
    np.testing.assert_allclose(curve.log_rr(x), ref(x), rtol=1e-13, atol=1e-15)
    assert curve.growth().kind == "bounded"
    np.testing.assert_array_equal(curve.kinks(), DOSES)


def test_reference_inside_the_points():
    """Relative to a reference between points: log RR(x) - log RR(x_ref)
    (interp1d as above)."""
    curve = points_curve(DOSES, RR, reference_dose=7.5)
    ref = interp1d(DOSES, np.log(RR))
    x = np.array([0.0, 7.5, 15.0, 40.0])
    np.testing.assert_allclose(curve.log_rr(x), ref(x) - ref(7.5), rtol=1e-13, atol=1e-15)


def test_covariance_from_pointwise_cis():
    """var = ((log hi - log lo)/(2 z))^2 (common practice), zero at the reference
    point (no CI), independent between points (note)."""
    curve = points_curve(DOSES, RR, LO, HI)
    z = norm.ppf(0.975)
    expected = np.r_[0.0, ((np.log(HI[1:]) - np.log(LO[1:])) / (2 * z)) ** 2]
    np.testing.assert_allclose(np.diag(curve.cov), expected, rtol=1e-14)
    assert any("independent" in n for n in curve.notes)


def test_refuse_beyond_last_point():
    curve = points_curve(DOSES, RR, beyond="refuse", max_dose=40.0)
    np.testing.assert_allclose(curve.rr(np.array([100.0])), [1.45], rtol=1e-14)
    model = PointsCurve(points=DOSES, beyond="refuse")
    with pytest.raises(ModelError, match="only up to dose 40"):
        model.log_rr(np.array([41.0]), np.log(RR))
    with pytest.raises(ModelError, match="only up to dose 40"):
        points_curve(DOSES, RR, beyond="refuse")


def test_invalid_points():
    with pytest.raises(ModelError, match="increasing"):
        PointsCurve(points=[0.0, 5.0, 5.0])
    with pytest.raises(ModelError, match="outside"):
        PointsCurve(points=[1.0, 5.0], reference_dose=0.0)
    with pytest.raises(ModelError, match="must be 1"):
        points_curve(DOSES, RR * 1.1)


def test_points_model_is_not_fitted():
    """The hat functions sum to one, so only coefficient differences are
    identified; the fitter refuses the model."""
    model = PointsCurve(points=DOSES[:3])
    cov = LogRRCovariance(np.diag([0.01, 0.01, 0.01]), "independent")
    with pytest.raises(ModelError, match="not identified"):
        fit_curve(model, [3.0, 6.0, 9.0], [0.1, 0.2, 0.3], cov)


def test_curve_from_draws():
    """coef = log of the pointwise median RR (numpy.median); draws = log RR draws;
    cov = numpy.cov of the log draws; each draw's curve is its own interpolation
    (scipy interp1d)."""
    rng = np.random.default_rng(7)
    grid = np.array([0.0, 10.0, 20.0, 40.0])
    slope = rng.normal(0.01, 0.002, size=(201, 1))
    rr = np.exp(slope * grid)
    curve = curve_from_draws(grid, rr)
    np.testing.assert_allclose(curve.coef, np.log(np.median(rr, axis=0)), rtol=1e-14)
    np.testing.assert_allclose(curve.draws, np.log(rr), rtol=1e-14)
    np.testing.assert_allclose(curve.cov, np.cov(np.log(rr), rowvar=False), rtol=1e-12)
    x = np.array([5.0, 30.0, 60.0])
    got = curve.log_rr(x, curve.draws)
    assert got.shape == (201, 3)
    ref = interp1d(grid, np.log(rr), axis=1, bounds_error=False,
                   fill_value=(np.log(rr[:, 0]), np.log(rr[:, -1])))
    np.testing.assert_allclose(got[:, :2], ref(x[:2]), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(got[:, 2], np.log(rr[:, -1]), rtol=1e-12)
    with pytest.raises(ModelError, match="positive"):
        curve_from_draws(grid, -rr)
