"""Properties every curve model must have (hypothesis)."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from doseattr.core.curves.covariance import independent_covariance
from doseattr.core.curves.fit import fit_curve
from doseattr.core.curves.registry import MODELS, make_model

LLW = dict(scale=1.6, midpoint=15.5, spread=36.8, threshold=2.4)

# name -> settings, a valid coefficient vector for u in [0, 1], the reference
# dose range, and doses that identify the model with as many bands as
# parameters (None: the model is not fitted, see PointsCurve).
CASES = {
    "log-linear": ({}, lambda u: [2 * u - 1], (0, 50), [3.0]),
    "linear": ({}, lambda u: [2 * u], (0, 50), [3.0]),
    "power": ({"offset": 1.0}, lambda u: [4 * u - 2], (0, 50), [3.0]),
    "spline": ({"knots": [1.0, 4.0, 9.0]}, lambda u: [u - 0.5, 1 - 2 * u], (0, 50), [3.0, 8.0]),
    # gamma z^delta stays below about 1 at the fitted doses: saturated data
    # would not identify gamma and delta separately.
    "saturating-exponential": ({"threshold": 2.4}, lambda u: [0.2 + 2 * u, 0.002 + 0.008 * u,
                                                              0.5 + 0.5 * u], (0, 50),
                               [10.0, 40.0, 100.0]),
    "log-logistic-weighted": (LLW, lambda u: [0.3 * u - 0.1], (0, 50), [20.0]),
    "points": ({"points": [0.0, 5.0, 10.0, 20.0]}, lambda u: [0.0, u, 2 * u, -u], (0, 20), None),
}

finite = dict(allow_nan=False, allow_infinity=False)


def test_every_registered_model_is_covered():
    assert set(CASES) == set(MODELS)


@settings(deadline=None, max_examples=100)
@given(name=st.sampled_from(sorted(CASES)), r=st.floats(0.0, 1.0, **finite),
       u=st.floats(0.0, 1.0, **finite))
def test_log_rr_is_zero_at_the_reference_dose(name, r, u):
    """Definition: RR(x_ref) = 1 for every model, whatever the coefficients."""
    setting, coef, (lo, hi), _ = CASES[name]
    ref = lo + r * (hi - lo)
    model = make_model(name, reference_dose=ref, **setting)
    out = model.log_rr(np.array([ref]), np.array(coef(u), dtype=float))
    assert abs(out[0]) <= 1e-12


@settings(deadline=None, max_examples=80)
@given(name=st.sampled_from(sorted(n for n, c in CASES.items() if c[3] is not None)),
       data=st.data())
def test_fit_reproduces_data_when_n_equals_p(name, data):
    """With as many bands as parameters the GLS residual is zero: the fitted log
    RRs equal the data. Linear-in-coefficient models (and the one-parameter
    linear-excess model) reach any data; the saturating shape is given data
    generated from its own formula so that an exact solution exists."""
    setting, coef, _, doses = CASES[name]
    model = make_model(name, reference_dose=0.0, **setting)
    n = len(doses)
    if model.linear or n == 1:
        y = np.array(data.draw(st.lists(st.floats(-1.0, 2.0, **finite), min_size=n,
                                        max_size=n)))
    else:
        y = model.log_rr(np.array(doses), np.array(coef(data.draw(st.floats(0.0, 1.0)))))
    var = np.array(data.draw(st.lists(st.floats(0.001, 1.0, **finite), min_size=n,
                                      max_size=n)))
    curve = fit_curve(model, doses, y, independent_covariance(var), max_dose=max(doses))
    np.testing.assert_allclose(curve.fit.fitted_log_rr, y, atol=1e-7)
    assert curve.fit.df == 0
