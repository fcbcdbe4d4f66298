"""Curves entered from published estimates."""

import numpy as np
import pytest
from scipy.stats import norm

from doseattr.core.curves.power import Power
from doseattr.core.curves.published import entered_curve, published_curve
from doseattr.errors import ModelError

Z95 = norm.ppf(0.975)


def test_fine_particles_hrapie():
    """Source: WHO Europe HRAPIE (2013) all-cause mortality, RR 1.062 (1.040 to
    1.083) per 10 ug/m3 (as transcribed in the methods guide). Slope =
    log(1.062)/10; se = (log 1.083 - log 1.040)/(2 z)/10. Rebuilding the CI
    from slope and se gives the published limits to their printed rounding
    (half a unit, 5e-4) plus the CI's slight asymmetry on the log scale
    (|mid-log - log RR| = 6.7e-4): atol 1e-3."""
    curve = published_curve("log-linear", rr=1.062, ci=(1.040, 1.083), per=10.0)
    np.testing.assert_allclose(curve.coef, [np.log(1.062) / 10], rtol=1e-14)
    se = (np.log(1.083) - np.log(1.040)) / (2 * Z95) / 10
    np.testing.assert_allclose(np.sqrt(curve.cov[0, 0]), se, rtol=1e-12)
    rr, lo, hi = curve.rr_interval(np.array([10.0]))
    np.testing.assert_allclose(rr, [1.062], rtol=1e-12)
    np.testing.assert_allclose([lo[0], hi[0]], [1.040, 1.083], atol=1e-3)
    assert curve.source == "entered"


def test_radon_linear_err():
    """Source: Darby et al. (2005), BMJ 330:223, ERR 8.4% (3.0 to 15.8%) per
    100 Bq/m3 (methods guide). slope = 0.084/100, se = (0.158 - 0.030)/(2 z)/100;
    the CI is asymmetric about 0.084, so a note must say so (the reported SE is
    the half-width; the draws follow the asymmetric CI:
    tests/test_curves_published_asymmetric.py)."""
    curve = published_curve("linear", err=0.084, ci=(0.030, 0.158), per=100.0)
    np.testing.assert_allclose(curve.coef, [0.00084], rtol=1e-14)
    np.testing.assert_allclose(np.sqrt(curve.cov[0, 0]), 0.128 / (2 * Z95) / 100, rtol=1e-12)
    assert any("asymmetric" in n for n in curve.notes)
    np.testing.assert_allclose(curve.rr(np.array([100.0])), [1.084], rtol=1e-12)


def test_linear_from_rr_equals_from_err():
    """ERR = RR - 1 (definition)."""
    a = published_curve("linear", rr=1.16, ci=(1.05, 1.31), per=100.0)
    b = published_curve("linear", err=0.16, ci=(0.05, 0.31), per=100.0)
    np.testing.assert_allclose(a.coef, b.coef, rtol=1e-12)
    np.testing.assert_allclose(a.cov, b.cov, rtol=1e-12)


def test_power_exponent():
    """Source: Park et al. (2002) Table 1 form (1 + x)^0.7942 (methods guide); the
    CI is invented, its se is (hi - lo)/(2 z)."""
    curve = published_curve("power", exponent=0.7942, ci=(0.6, 1.0), offset=1.0)
    assert isinstance(curve.model, Power)
    np.testing.assert_allclose(curve.rr(np.array([31.8])), [32.8 ** 0.7942], rtol=1e-12)
    np.testing.assert_allclose(np.sqrt(curve.cov[0, 0]), 0.4 / (2 * Z95), rtol=1e-12)


def test_no_ci_means_no_uncertainty_and_a_note():
    curve = published_curve("log-linear", rr=1.08, per=10.0)
    assert curve.cov[0, 0] == 0.0
    assert any("no confidence interval" in n for n in curve.notes)


@pytest.mark.parametrize("kwargs, match", [
    (dict(model="log-linear", rr=-1.0), "positive 'rr'"),
    (dict(model="log-linear", rr=1.1, ci=(1.2, 1.3)), "inside"),
    (dict(model="linear", rr=1.1, err=0.1), "exactly one"),
    (dict(model="power", exponent=0.5, per=10.0), "per"),
    (dict(model="log-linear", rr=1.1, per=0.0), "positive dose increment"),
    (dict(model="cubic", rr=1.1), "published estimates support"),
    (dict(model="linear", err=-0.5, per=1.0), "not positive"),
])
def test_invalid(kwargs, match):
    model = kwargs.pop("model")
    with pytest.raises(ModelError, match=match):
        published_curve(model, **kwargs)


def test_entered_curve_with_draws_uses_their_covariance():
    """Covariance of draws = numpy.cov of the draws (sample covariance)."""
    rng = np.random.default_rng(1)
    draws = rng.normal(0.01, 0.002, size=(500, 1))
    curve = entered_curve(Power(offset=1.0), [0.01], draws=draws)
    np.testing.assert_allclose(curve.cov, np.cov(draws[:, 0], ddof=1).reshape(1, 1),
                               rtol=1e-12)
    assert curve.draws.shape == (500, 1)
