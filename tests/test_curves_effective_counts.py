"""Hamling et al. (2008, Stat Med 27:954) effective counts."""

import numpy as np
import pytest
from scipy.stats import norm

import doseattr.core.curves.effective_counts as ec
from doseattr.core.curves.covariance import var_log_rr_from_ci
from doseattr.core.curves.effective_counts import effective_counts
from doseattr.errors import ModelError

Z95 = norm.ppf(0.975)


def _woolf(a, b, ref):
    """Woolf (1955): log OR_i and var = 1/A_i + 1/B_i + 1/A_0 + 1/B_0."""
    log_or = np.log(a * b[ref] / (a[ref] * b))
    return log_or, 1 / a + 1 / b + 1 / a[ref] + 1 / b[ref]


def test_reproduces_reported_rrs_and_ci_widths():
    """Definition (Hamling et al. 2008): the effective counts' crude ORs and Woolf
    CI widths equal the reported ones, here to 1e-6. Reported values are an
    invented, rounded table (inputs only)."""
    rr = np.array([1.00, 1.35, 1.80, 2.60])
    lo = np.array([np.nan, 1.02, 1.31, 1.85])
    hi = np.array([np.nan, 1.79, 2.47, 3.65])
    var = np.r_[np.nan, var_log_rr_from_ci(rr[1:], lo[1:], hi[1:])]
    cov = effective_counts(rr, var, ref=0, case_ratio=0.5, reference_share=0.4)
    assert cov.method == "effective-counts"
    log_or, woolf_var = _woolf(cov.pseudo_cases, cov.pseudo_totals, 0)
    np.testing.assert_allclose(np.exp(log_or), rr, rtol=1e-6)
    width = 2 * Z95 * np.sqrt(woolf_var[1:])
    np.testing.assert_allclose(width, np.log(hi[1:]) - np.log(lo[1:]), rtol=1e-6)
    a, b = cov.pseudo_cases, cov.pseudo_totals
    np.testing.assert_allclose(a.sum() / b.sum(), 0.5, rtol=1e-8)
    np.testing.assert_allclose(b[0] / b.sum(), 0.4, rtol=1e-8)
    np.testing.assert_allclose(cov.cov[0, 1], 1 / a[0] + 1 / b[0], rtol=1e-12)
    np.testing.assert_allclose(np.diag(cov.cov), var[1:], rtol=1e-12)


def test_recovers_the_counts_of_a_crude_table():
    """Source: Woolf (1955) variances of a crude table; given the table's own
    case ratio and reference share, the effective counts are its counts."""
    a = np.array([45.0, 60.0, 70.0, 90.0])
    b = np.array([110.0, 200.0, 120.0, 95.0])
    log_or, var = _woolf(a, b, ref=1)
    cov = effective_counts(np.exp(log_or), var, ref=1, case_ratio=a.sum() / b.sum(),
                           reference_share=b[1] / b.sum())
    np.testing.assert_allclose(cov.pseudo_cases, a, rtol=1e-8)
    np.testing.assert_allclose(cov.pseudo_totals, b, rtol=1e-8)
    assert cov.notes == ()


def test_incidence_rate_recovers_counts():
    """Source: Poisson variances var(log RR_i) = 1/A_i + 1/A_0; with the table's
    share of cases in the reference band the effective cases are the counts and
    the person-time is proportional to the observed one."""
    cases = np.array([30.0, 45.0, 60.0, 50.0])
    pt = np.array([1.0e4, 9.0e3, 8.0e3, 5.0e3])
    rr = (cases / pt) / (cases[0] / pt[0])
    cov = effective_counts(rr, 1 / cases + 1 / cases[0], ref=0, design="incidence-rate",
                           reference_share=cases[0] / cases.sum())
    np.testing.assert_allclose(cov.pseudo_cases, cases, rtol=1e-8)
    np.testing.assert_allclose(cov.pseudo_totals / cov.pseudo_totals[0], pt / pt[0], rtol=1e-8)
    np.testing.assert_allclose(cov.cov[0, 1], 1 / cases[0], rtol=1e-8)


def test_defaults_are_noted():
    a, b = np.array([60.0, 45.0, 70.0]), np.array([200.0, 110.0, 120.0])
    log_or, var = _woolf(a, b, 0)
    cov = effective_counts(np.exp(log_or), var, ref=0)
    assert cov.method == "effective-counts" and len(cov.notes) == 2
    np.testing.assert_allclose(cov.pseudo_cases.sum() / cov.pseudo_totals.sum(), 1.0,
                               rtol=1e-8)


def test_fallback_to_independent(monkeypatch):
    """When no counts are found the covariance falls back to independent with a
    note (the failure is forced here; the solver itself is checked above)."""
    def fail(*args):
        raise ModelError("no effective counts reproduce the case ratio")

    monkeypatch.setattr(ec, "_case_control", fail)
    cov = effective_counts([1.0, 1.5, 2.0], [np.nan, 0.04, 0.05], ref=0)
    assert cov.method == "independent"
    np.testing.assert_array_equal(cov.cov, np.diag([0.04, 0.05]))
    assert any("failed" in n for n in cov.notes)
    with pytest.raises(ModelError, match="case ratio"):
        effective_counts([1.0, 1.5, 2.0], [np.nan, 0.04, 0.05], ref=0, fallback=False)


def test_invalid_inputs():
    with pytest.raises(ModelError, match="reference_share"):
        effective_counts([1.0, 1.5], [np.nan, 0.04], ref=0, reference_share=1.5)
    with pytest.raises(ModelError, match="positive numbers"):
        effective_counts([1.0, 1.5], [np.nan, -0.04], ref=0)


def test_cumulative_incidence_uses_the_rate_form_with_a_note():
    """Risk ratios: with only ratios and CIs the group sizes are unknown, so the
    rate form (cov = 1/A_0) is used; it must equal the incidence-rate result."""
    rr, var = [1.0, 1.4, 2.1], [np.nan, 0.05, 0.06]
    risk = effective_counts(rr, var, ref=0, design="cumulative-incidence")
    rate = effective_counts(rr, var, ref=0, design="incidence-rate")
    np.testing.assert_allclose(risk.cov, rate.cov, rtol=1e-14)
    assert any("rare-disease" in n for n in risk.notes)
    with pytest.raises(ModelError, match="support"):
        effective_counts(rr, var, ref=0, design="nested")
