"""Greenland & Longnecker (1992) covariance of category-level log RRs.

For crude ratios the pseudo-counts are the observed counts, so the
reconstructed covariance must equal the exact large-sample covariance of the
crude log ratios. That covariance is checked twice: against its closed form
(Woolf 1955 for odds ratios; Poisson and binomial variances for rate and
risk ratios) and against statsmodels' GLM fitted to the same counts with one
indicator per non-reference band (saturated model: its inverse Fisher
information at the MLE is the closed-form covariance).
"""

import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.stats import norm

from doseattr.core.curves.covariance import (
    greenland_longnecker,
    independent_covariance,
    var_log_rr_from_ci,
)
from doseattr.errors import ModelError

Z95 = norm.ppf(0.975)

# Invented counts (inputs only; every expected value below is computed from them).
CC_CASES = np.array([60.0, 45.0, 70.0, 90.0])
CC_CONTROLS = np.array([200.0, 110.0, 120.0, 95.0])


def _indicator_design(bands: int) -> np.ndarray:
    """Intercept plus one indicator per non-reference band (band 0 = reference)."""
    return np.column_stack([np.ones(bands), np.eye(bands)[:, 1:]])


def _saturated_glm_cov(endog, family, offset=None) -> np.ndarray:
    """Covariance of the indicator coefficients from statsmodels' saturated GLM.

    The saturated model has zero residual df; statsmodels then divides by zero
    computing a scale it does not use for these families (scale fixed at 1),
    hence the errstate, and it warns about perfect prediction.
    """
    exog = _indicator_design(len(endog))
    with warnings.catch_warnings(), np.errstate(divide="ignore", invalid="ignore"):
        warnings.simplefilter("ignore", sm.tools.sm_exceptions.PerfectSeparationWarning)
        warnings.simplefilter("ignore", sm.tools.sm_exceptions.DomainWarning)
        res = sm.GLM(endog, exog, family=family, offset=offset).fit(tol=1e-13)
    assert res.converged
    return np.asarray(res.cov_params())[1:, 1:]


def _woolf_table():
    """Crude ORs, their Woolf 95% CIs, and the Woolf covariance, from the counts.

    Woolf (1955): var(log OR_i) = 1/A_i + 1/B_i + 1/A_0 + 1/B_0 and, sharing
    the reference cells, cov(log OR_i, log OR_j) = 1/A_0 + 1/B_0.
    """
    a, b = CC_CASES, CC_CONTROLS
    log_or = np.log(a * b[0] / (a[0] * b))
    var = 1 / a + 1 / b + 1 / a[0] + 1 / b[0]
    lo, hi = np.exp(log_or - Z95 * np.sqrt(var)), np.exp(log_or + Z95 * np.sqrt(var))
    shared = 1 / a[0] + 1 / b[0]
    woolf = np.full((3, 3), shared) + np.diag(var[1:] - shared)
    return np.exp(log_or), lo, hi, woolf


def test_case_control_crude_equals_woolf():
    """Source: Woolf (1955) covariance of crude log ORs; Greenland & Longnecker
    (1992): for crude ORs the pseudo-counts equal the observed counts."""
    rr, lo, hi, woolf = _woolf_table()
    var = var_log_rr_from_ci(rr, lo, hi)
    cov = greenland_longnecker(rr, var, CC_CASES, CC_CONTROLS, design="case-control", ref=0)
    np.testing.assert_allclose(cov.pseudo_cases, CC_CASES, rtol=1e-10)
    np.testing.assert_allclose(cov.pseudo_totals, CC_CONTROLS, rtol=1e-10)
    np.testing.assert_allclose(cov.cov, woolf, rtol=1e-10)
    assert cov.method == "counts"


def test_case_control_crude_equals_statsmodels_logistic():
    """Source: statsmodels GLM Binomial (logit) on the grouped counts with band
    indicators; saturated, so its covariance is Woolf's (tolerance: IRLS tol)."""
    rr, lo, hi, _ = _woolf_table()
    cov = greenland_longnecker(rr, var_log_rr_from_ci(rr, lo, hi), CC_CASES, CC_CONTROLS,
                               design="case-control", ref=0)
    ref = _saturated_glm_cov(np.column_stack([CC_CASES, CC_CONTROLS]), sm.families.Binomial())
    np.testing.assert_allclose(cov.cov, ref, rtol=1e-7)


def test_incidence_rate_crude_equals_statsmodels_poisson():
    """Source: Poisson variance, var(log A) = 1/A, so cov(log RR_i, log RR_j) =
    1/A_0 (Greenland & Longnecker 1992); checked with statsmodels GLM Poisson
    with log(person-time) offset and band indicators (saturated)."""
    cases = np.array([30.0, 45.0, 60.0, 50.0])
    pt = np.array([10000.0, 9000.0, 8000.0, 5000.0])
    rr = (cases / pt) / (cases[0] / pt[0])
    var = 1 / cases + 1 / cases[0]
    cov = greenland_longnecker(rr, var, cases, pt, design="incidence-rate", ref=0)
    np.testing.assert_allclose(cov.pseudo_cases, cases, rtol=1e-12)
    np.testing.assert_allclose(cov.cov[0, 1], 1 / cases[0], rtol=1e-12)
    ref = _saturated_glm_cov(cases, sm.families.Poisson(), offset=np.log(pt))
    np.testing.assert_allclose(cov.cov, ref, rtol=1e-7)


def test_cumulative_incidence_crude_equals_statsmodels_binomial_log_link():
    """Derivation: p0 = A0/N0 binomial, var(p0) = p0 (1 - p0)/N0, so by the delta
    method var(log p0) = (1 - p0)/(N0 p0) = 1/A0 - 1/N0; log RR_i and log RR_j share
    -log p0, hence cov = 1/A0 - 1/N0. Checked with statsmodels GLM Binomial with
    log link (saturated, so its inverse information equals these variances)."""
    cases = np.array([20.0, 30.0, 45.0])
    persons = np.array([500.0, 400.0, 300.0])
    rr = (cases / persons) / (cases[0] / persons[0])
    var = 1 / cases - 1 / persons + 1 / cases[0] - 1 / persons[0]
    cov = greenland_longnecker(rr, var, cases, persons, design="cumulative-incidence", ref=0)
    np.testing.assert_allclose(cov.cov[0, 1], 1 / cases[0] - 1 / persons[0], rtol=1e-12)
    family = sm.families.Binomial(link=sm.families.links.Log())
    ref = _saturated_glm_cov(np.column_stack([cases, persons - cases]), family)
    np.testing.assert_allclose(cov.cov, ref, rtol=1e-7)


def test_case_control_adjusted_pseudo_counts_meet_their_definition():
    """Source: Greenland & Longnecker (1992) constraints: A_i + B_i = N_i,
    sum A_i = M_1 and A_i B_0 / (A_0 B_i) = RR_i, for adjusted ORs that differ
    from the crude ones. Reference band placed last to exercise `ref`."""
    rr = np.array([1.3, 1.9, 2.6, 1.0])
    cases, controls = CC_CASES[::-1].copy(), CC_CONTROLS[::-1].copy()
    var = np.array([0.05, 0.06, 0.07, np.nan])
    cov = greenland_longnecker(rr, var, cases, controls, design="case-control", ref=3)
    a, b = cov.pseudo_cases, cov.pseudo_totals
    np.testing.assert_allclose(a + b, cases + controls, rtol=1e-12)
    np.testing.assert_allclose(a.sum(), cases.sum(), rtol=1e-12)
    np.testing.assert_allclose(a * b[3] / (a[3] * b), rr, rtol=1e-10)
    expected = np.full((3, 3), 1 / a[3] + 1 / b[3]) + np.diag(var[:3] - 1 / a[3] - 1 / b[3])
    np.testing.assert_allclose(cov.cov, expected, rtol=1e-12)


def test_incidence_rate_adjusted_closed_form():
    """Source: Greenland & Longnecker (1992): A_i = A_0 RR_i PT_i / PT_0 with
    sum A_i = M_1; check the fitted rates reproduce the RRs and the total."""
    rr = np.array([1.0, 1.2, 1.7])
    cases, pt = np.array([40.0, 50.0, 70.0]), np.array([2e4, 1.8e4, 1.5e4])
    cov = greenland_longnecker(rr, [np.nan, 0.04, 0.03], cases, pt, design="incidence-rate",
                               ref=0)
    a = cov.pseudo_cases
    np.testing.assert_allclose((a / pt) / (a[0] / pt[0]), rr, rtol=1e-12)
    np.testing.assert_allclose(a.sum(), cases.sum(), rtol=1e-12)
    np.testing.assert_allclose(cov.cov[0, 1], 1 / a[0], rtol=1e-12)


@pytest.mark.parametrize("kwargs, match", [
    (dict(cases=[0, 0, 0], totals=[10, 10, 10], design="case-control"), "some cases"),
    (dict(cases=[5, 5, 5], totals=[0, 0, 0], design="case-control"), "some cases"),
    (dict(cases=[50, 50, 50], totals=[100, 60, 51], design="cumulative-incidence"), "risk >= 1"),
    (dict(cases=[5, 5, 5], totals=[10, 10, 10], design="nested"), "unknown study design"),
])
def test_no_solution_raises(kwargs, match):
    """Common practice: pseudo-counts that cannot exist are refused with a reason."""
    with pytest.raises(ModelError, match=match):
        greenland_longnecker([1.0, 1.5, 2.0], [np.nan, 0.1, 0.1], ref=0, **kwargs)


def test_reference_rr_must_be_one():
    with pytest.raises(ModelError, match="must have RR 1"):
        greenland_longnecker([1.1, 1.5], [np.nan, 0.1], [10, 10], [10, 10],
                             design="case-control", ref=0)


def test_not_positive_definite_raises():
    """Reported variances far below the shared term 1/A0 + 1/B0 cannot form a
    covariance matrix (its smallest eigenvalue is negative)."""
    with pytest.raises(ModelError, match="not positive definite"):
        greenland_longnecker([1.0, 1.5, 2.0], [np.nan, 1e-4, 1e-4], [5, 50, 50], [5, 50, 50],
                             design="case-control", ref=0)


def test_var_from_ci_formula():
    """Source: Wald CI on the log scale, var = ((log hi - log lo) / (2 z))^2 with
    z from scipy.stats.norm.ppf (common practice)."""
    rr, lo, hi = np.array([1.5, 2.0]), np.array([1.1, 1.2]), np.array([2.2, 3.1])
    z = norm.ppf(0.95)
    np.testing.assert_allclose(var_log_rr_from_ci(rr, lo, hi, level=0.90),
                               ((np.log(hi) - np.log(lo)) / (2 * z)) ** 2, rtol=1e-14)
    with pytest.raises(ModelError, match=r"contain|inside"):
        var_log_rr_from_ci(2.5, 1.1, 2.2)


def test_independent_is_diagonal():
    cov = independent_covariance([0.1, 0.2])
    np.testing.assert_array_equal(cov.cov, np.diag([0.1, 0.2]))
    assert cov.method == "independent"
    with pytest.raises(ModelError):
        independent_covariance([0.1, -1.0])
