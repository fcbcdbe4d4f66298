r"""Published curve shapes entered in [curve] (issue 3 item 2):

* ``model = "saturating-exponential"``:
  :math:`RR(z) = 1 + \alpha(1 - e^{-\gamma z^\delta})` (Burnett et al. 2014,
  Environ Health Perspect 122:397, form from memory);
* ``model = "log-logistic-weighted"``:
  :math:`RR(z) = \exp\{\theta \ln(z/a + 1) / (1 + e^{-(z - \mu)/\nu})\}`
  (Burnett et al. 2018, PNAS 115:9592, form from memory);

both with :math:`z = \max(0, x - cf)`, ``cf`` the ``threshold``. The
expected values are the same formulas written out here and integrated over
a lognormal with scipy.integrate.quad (split at the kinks). The parameter
values are invented inputs, not the published sets.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from reference_integrals import expect_over
from scipy import stats

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

GM, GSD = 10.0, 2.0
DIST = stats.lognorm(s=math.log(GSD), scale=GM)
SAT = {"model": "saturating-exponential", "alpha": 1.5, "gamma": 0.08, "delta": 1.3,
       "threshold": 2.4}
LLW = {"model": "log-logistic-weighted", "theta": 0.15, "theta_se": 0.03, "scale": 1.6,
       "midpoint": 15.5, "spread": 36.8, "threshold": 2.4}


def _run(curve, **extra):
    return run_analysis(analysis_from_dict({"unit": "ug/m3", "curve": curve,
                                            "exposure": {"gm": GM, "gsd": GSD}, **extra}))


def _sat_rr(x, a=1.5, g=0.08, d=1.3, cf=2.4):
    z = max(0.0, x - cf)
    return 1 + a * (1 - math.exp(-g * z ** d))


def _llw_rr(x, theta=0.15, a=1.6, mu=15.5, nu=36.8, cf=2.4):
    z = max(0.0, x - cf)
    return math.exp(theta * math.log(z / a + 1) / (1 + math.exp(-(z - mu) / nu)))


def _expected_rr_m(rr, m=0.0, kinks=(), cap=None):
    r""":math:`E[RR_m(g(X))]` with :math:`RR_m(x) = RR(\max(x, m))/RR(m)`, by
    scipy.integrate.quad split at the kinks; ``cap`` applies g(x) = min(x, cap)."""
    def rr_m(x):
        y = x if cap is None else min(x, cap)
        return rr(max(y, m)) / rr(m)

    return expect_over(rr_m, DIST, kinks, epsrel=1e-12, limit=200)


def test_saturating_exponential_against_quad():
    """PAF and a cap scenario's PIF, minimum-risk level 5 above the
    threshold 2.4."""
    r = _run(SAT, attribution={"minimum_risk": 5.0}, scenario=[{"name": "cap", "cap": 12.0}])
    e = _expected_rr_m(_sat_rr, 5.0, (2.4, 5.0))
    e_cap = _expected_rr_m(_sat_rr, 5.0, (2.4, 5.0, 12.0), cap=12.0)
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-8)
    np.testing.assert_allclose(r.scenarios[0].pif.estimate, 1 - e_cap / e, rtol=1e-8)
    d = r.to_dict()["curve"]
    assert d["model"] == "saturating-exponential" and d["parameter_names"] == ["alpha", "gamma",
                                                                                "delta"]
    assert d["coefficients"] == [1.5, 0.08, 1.3] and d["covariance"] == [[0.0] * 3] * 3


def test_log_logistic_weighted_against_quad():
    r = _run(LLW)
    e = _expected_rr_m(_llw_rr, 0.0, (2.4,))
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-8)


def test_held_flat_beyond_max_dose():
    """With max_dose (beyond = "flat" by default then) RR(x) = RR(min(x, max_dose))."""
    r = _run({**SAT, "max_dose": 20.0})
    e = _expected_rr_m(lambda x: _sat_rr(min(x, 20.0)), 0.0, (2.4, 20.0))
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-8)
    assert r.curve.max_dose == 20.0


def test_theta_interval_is_the_paf_at_theta_percentiles():
    r"""Only theta varies, normal with SD ``theta_se``. log RR is theta times
    a non-negative function of x, so E[RR] and the PAF increase with theta
    and the PAF's 2.5th/97.5th percentiles are the PAF at theta's own,
    :math:`\theta \pm z_{0.975} se`, within Monte Carlo error (5 standard
    errors of a sample quantile, :math:`\sqrt{p(1-p)/D}/\varphi(z_p)` in SD
    units, asymptotic quantile variance)."""
    draws = 4000
    r = _run(LLW, uncertainty={"draws": draws, "seed": 8})
    z = stats.norm.ppf(0.975)
    tol = 5 * math.sqrt(0.025 * 0.975 / draws) / stats.norm.pdf(z)

    def paf(t):
        return 1 - 1 / _expected_rr_m(lambda x: _llw_rr(x, theta=t), 0.0, (2.4,))

    assert paf(0.15 - (z + tol) * 0.03) < r.paf.lower < paf(0.15 - (z - tol) * 0.03)
    assert paf(0.15 + (z - tol) * 0.03) < r.paf.upper < paf(0.15 + (z + tol) * 0.03)


@pytest.mark.parametrize("change, message", [
    ({"alpha": -1.2}, r"key 'alpha': alpha must be above -1"),
    ({"gamma": 0}, r"key 'gamma': gamma must be above 0"),
    ({"delta": -0.5}, r"key 'delta': delta must be above 0"),
    ({"gamma_se": -0.1}, r"key 'gamma_se': a standard error must be 0 or more"),
    ({"theta": 0.1}, r"key 'theta': 'theta' goes with model = \"log-logistic-weighted\""),
    ({"rr": 1.2}, r"key 'rr': model = \"saturating-exponential\" is entered with its "
                  r"parameters"),
    ({"beyond": "flat"}, r"key 'beyond': beyond = \"flat\" needs max_dose"),
    ({"per": 10}, r"key 'per': 'per' does not apply"),
    ({"threshold": -1}, r"key 'threshold': negative exposure"),
])
def test_bad_saturating_exponential(change, message):
    with pytest.raises(InputError, match=rf"\[curve\] {message}"):
        analysis_from_dict({"unit": "ug/m3", "curve": {**SAT, **change},
                            "exposure": {"gm": GM, "gsd": GSD}})


def test_missing_shape_parameter():
    curve = {k: v for k, v in LLW.items() if k != "spread"}
    with pytest.raises(InputError, match=r"\[curve\] key 'spread': missing key 'spread'"):
        analysis_from_dict({"unit": "ug/m3", "curve": curve, "exposure": {"gm": GM, "gsd": GSD}})


def test_shape_key_with_another_model():
    with pytest.raises(InputError, match=r"\[curve\] key 'alpha': 'alpha' goes with model = "
                                         r"\"saturating-exponential\""):
        analysis_from_dict({"unit": "ug/m3", "curve": {"model": "linear", "err": 0.1,
                                                       "alpha": 1.0},
                            "exposure": {"gm": GM, "gsd": GSD}})


def test_standard_error_too_large_for_normal_draws():
    """gamma - 5 SE = 0.08 - 0.1 < 0: normal draws of gamma would reach the
    invalid region, so the run is refused when draws are asked for."""
    with pytest.raises(InputError, match=r"\[curve\] key 'gamma_se': gamma_se is too large"):
        _run({**SAT, "gamma_se": 0.02}, uncertainty={"draws": 200})
