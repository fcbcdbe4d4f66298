"""Published fine-particle shapes (forms from memory, see the methods guide:
Burnett et al. 2014, Environ Health Perspect 122:397; Burnett et al. 2018,
PNAS 115:9592). The settings below are the methods guide's recalled values,
used as inputs only; expected values come from the formulas typed out here
and from scipy/statsmodels."""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.optimize import curve_fit

from doseattr.core.curves.covariance import LogRRCovariance
from doseattr.core.curves.fit import fit_curve
from doseattr.core.curves.shapes import LogLogisticWeighted, SaturatingExponential
from doseattr.errors import ModelError

# From memory (methods guide): non-accidental deaths, theta 0.1430, alpha 1.6,
# mu 15.5, nu 36.8, cf 2.4.
LLW = dict(scale=1.6, midpoint=15.5, spread=36.8, threshold=2.4)
X = np.linspace(0.0, 120.0, 97)


def _llw_formula(x, theta, ref):
    """log RR(z) = theta log(z/a + 1) / (1 + exp(-(z - u)/v)), z = max(0, x - cf),
    relative to the reference dose (Burnett et al. 2018, from memory)."""
    def f(v):
        z = np.maximum(0.0, v - 2.4)
        return theta * np.log(z / 1.6 + 1) / (1 + np.exp(-(z - 15.5) / 36.8))
    return f(x) - f(ref)


def test_log_logistic_weighted_formula():
    for ref in (0.0, 2.4, 10.0):
        model = LogLogisticWeighted(reference_dose=ref, **LLW)
        np.testing.assert_allclose(model.log_rr(X, np.array([0.143])),
                                   _llw_formula(X, 0.143, ref), rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(model.basis(X)[:, 0], _llw_formula(X, 1.0, ref),
                                   rtol=1e-12, atol=1e-15)


def test_log_logistic_weighted_threshold_and_growth():
    """RR = 1 up to cf (z = 0); kink at cf; for large x the weight tends to 1 so
    log RR - theta log(x) tends to -theta log(alpha) (power growth theta)."""
    model = LogLogisticWeighted(reference_dose=0.0, **LLW)
    theta = np.array([0.143])
    np.testing.assert_array_equal(model.log_rr(np.array([0.0, 1.0, 2.4]), theta), 0.0)
    np.testing.assert_array_equal(model.kinks(theta), [2.4])
    g = model.growth(theta)
    assert g.kind == "power" and g.rate == pytest.approx(0.143)
    far = model.log_rr(np.array([1e9]), theta)[0] - 0.143 * np.log(1e9)
    np.testing.assert_allclose(far, -0.143 * np.log(1.6), atol=1e-6)


def test_log_logistic_weighted_gls_equals_statsmodels():
    """Source: statsmodels GLS (no intercept) on the same one-column basis."""
    model = LogLogisticWeighted(reference_dose=2.4, **LLW)
    doses = np.array([8.0, 15.0, 25.0, 40.0, 60.0])
    y = np.log([1.10, 1.21, 1.28, 1.36, 1.41])            # invented
    cov = LogRRCovariance(np.full((5, 5), 0.001) + np.diag(np.full(5, 0.003)), "counts")
    curve = fit_curve(model, doses, y, cov)
    ref = sm.GLS(y, _llw_formula(doses, 1.0, 2.4)[:, None], sigma=cov.cov).fit()
    np.testing.assert_allclose(curve.coef, ref.params, rtol=1e-10)
    np.testing.assert_allclose(curve.cov, ref.normalized_cov_params, rtol=1e-10)


def _sat_formula(x, a, g, d, cf=2.4, ref=0.0):
    """RR(z) = 1 + a (1 - exp(-g z^d)), z = max(0, x - cf) (Burnett et al. 2014,
    from memory), relative to RR at the reference dose."""
    def rr(v):
        return 1 + a * (1 - np.exp(-g * np.maximum(0.0, v - cf) ** d))
    return np.log(rr(x) / rr(ref))


def test_saturating_exponential_formula_bound_and_kink():
    model = SaturatingExponential(reference_dose=5.0, threshold=2.4)
    coef = np.array([0.9, 0.05, 0.8])
    np.testing.assert_allclose(model.log_rr(X, coef), _sat_formula(X, *coef, ref=5.0),
                               rtol=1e-12, atol=1e-15)
    model0 = SaturatingExponential(threshold=2.4)
    np.testing.assert_allclose(np.exp(model0.log_rr(np.array([1e12]), coef)), [1 + 0.9],
                               rtol=1e-12)
    assert model0.growth(coef).kind == "bounded"
    # the threshold first, then a mesh graded towards it, cf (1 + 8^-j) for
    # j = -1..6 (out to 9 cf so the engine's panels beyond it grow gradually)
    k = model0.kinks(coef)
    assert k[0] == 2.4 and k.size == 9 and np.all(k[1:] > 2.4) and np.all(np.diff(k[1:]) < 0)
    with pytest.raises(ModelError, match="gamma > 0"):
        model0.check(np.array([0.9, -0.05, 0.8]))


def test_saturating_exponential_fit_equals_curve_fit():
    """Source: scipy.optimize.curve_fit with sigma = V, absolute_sigma=True and the
    same bounds, minimising the same r'V^-1 r. Data: the formula at invented
    parameters, perturbed by invented offsets. Tolerances: optimiser stopping
    and finite-difference Jacobians of a weakly identified 3-parameter fit."""
    doses = np.array([5.0, 10.0, 20.0, 35.0, 50.0, 80.0, 120.0, 200.0])
    y = _sat_formula(doses, 0.9, 0.05, 0.8) + np.array([0.01, -0.01, 0.005, 0.0, -0.008,
                                                        0.012, -0.004, 0.006])
    v = np.full((8, 8), 0.0004) + np.diag(np.full(8, 0.0016))
    model = SaturatingExponential(threshold=2.4)
    curve = fit_curve(model, doses, y, LogRRCovariance(v, "counts"))
    popt, pcov = curve_fit(lambda x, a, g, d: _sat_formula(x, a, g, d), doses, y,
                           p0=[1.0, 0.05, 1.0], sigma=v, absolute_sigma=True,
                           bounds=model.bounds, xtol=1e-15, ftol=1e-15, gtol=1e-15,
                           max_nfev=20000)
    np.testing.assert_allclose(curve.coef, popt, rtol=1e-5)
    np.testing.assert_allclose(curve.cov, pcov, rtol=1e-3)
