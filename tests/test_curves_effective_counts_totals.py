"""Effective counts (Hamling et al. 2008, Stat Med 27:954) that take their two side
conditions from the table's own counts or totals.

The check throughout is Greenland & Longnecker (1992, Am J Epidemiol 135:1301): on a
crude table, whose ratios and variances are computed from its counts (Woolf 1955 for
odds ratios, Poisson for rate ratios), the covariance of two log ratios is the variance
of the shared reference term, 1/A_0 + 1/B_0 (case-control) or 1/A_0 (incidence rate),
a closed form of the counts. The counts below are inputs only.
"""

from types import SimpleNamespace

import numpy as np
import pytest

from doseattr.analysis.build import log_rr_covariance
from doseattr.analysis.tables import read_study_table
from doseattr.core.curves.covariance import greenland_longnecker
from doseattr.core.curves.effective_counts import effective_counts, table_conditions
from doseattr.errors import ModelError

#: Crude case-control counts by band (reference band 0): cases A_i, controls B_i.
CASES = np.array([120.0, 95.0, 88.0, 54.0, 30.0])
CONTROLS = np.array([480.0, 310.0, 220.0, 105.0, 45.0])
#: A second crude table, reference band in the middle.
CASES_2 = np.array([45.0, 60.0, 70.0, 90.0])
CONTROLS_2 = np.array([110.0, 200.0, 120.0, 95.0])


def _woolf(a, b, ref):
    """Crude ORs and Woolf (1955) variances 1/A_i + 1/B_i + 1/A_0 + 1/B_0 (0 at ref)."""
    rr = a * b[ref] / (a[ref] * b)
    var = 1 / a + 1 / b + 1 / a[ref] + 1 / b[ref]
    var[ref] = np.nan
    return rr, var


def _with(rr, var, ref, design="case-control", **given):
    cond = table_conditions(ref=ref, design=design, **given)
    cov = effective_counts(rr, var, ref=ref, design=design, case_ratio=cond.case_ratio,
                           reference_share=cond.reference_share, share_of=cond.share_of)
    return cond, cov


@pytest.mark.parametrize("a, b, ref", [(CASES, CONTROLS, 0), (CASES_2, CONTROLS_2, 1)])
def test_crude_case_control_totals_give_the_greenland_longnecker_covariance(a, b, ref):
    """With the table's cases and controls the shared term is 1/A_0 + 1/B_0
    (closed form, Greenland & Longnecker 1992) and equals greenland_longnecker's;
    the defaults alone (case ratio 1, reference share 1/B) miss it by far more
    than the solver's error (measured, printed with -s)."""
    rr, var = _woolf(a, b, ref)
    exact = 1 / a[ref] + 1 / b[ref]
    cond, cov = _with(rr, var, ref, cases=a, totals=b)
    off = cov.cov[~np.eye(cov.cov.shape[0], dtype=bool)]
    np.testing.assert_allclose(off, exact, rtol=1e-8)
    gl = greenland_longnecker(rr, np.nan_to_num(var), a, b, design="case-control", ref=ref)
    np.testing.assert_allclose(cov.cov, gl.cov, rtol=1e-8)
    np.testing.assert_allclose(cov.pseudo_cases, a, rtol=1e-8)
    np.testing.assert_allclose(cov.pseudo_totals, b, rtol=1e-8)
    assert not any("assume" in n for n in cov.notes)
    assert any("case ratio" in n and "cases summed" in n for n in cond.notes)
    assert any("share of controls" in n for n in cond.notes)
    default = effective_counts(rr, var, ref=ref)
    excess = default.cov[0, 1] / exact - 1
    print(f"defaults overstate the shared covariance by {excess:.1%}; table totals by "
          f"{cov.cov[0, 1] / exact - 1:.1e}")
    assert abs(excess) > 0.05


def test_partial_totals_fill_only_what_they_give():
    """Controls per band with an overall total of cases pin both conditions, so
    the counts are again exact; cases per band with the total of controls use the
    cases' share A_0/sum A (the same truth, so exact too); cases alone give the
    share but leave the case ratio at its default, which is noted."""
    a, b, ref = CASES, CONTROLS, 0
    rr, var = _woolf(a, b, ref)
    exact = 1 / a[ref] + 1 / b[ref]
    _, cov = _with(rr, var, ref, totals=b, total_cases=a.sum())
    np.testing.assert_allclose(cov.cov[0, 1], exact, rtol=1e-8)
    cond, cov = _with(rr, var, ref, cases=a, total_noncases=b.sum())
    assert cond.share_of == "cases"
    np.testing.assert_allclose(cov.cov[0, 1], exact, rtol=1e-8)
    np.testing.assert_allclose(cov.pseudo_cases, a, rtol=1e-8)
    partial = np.where(np.arange(a.size) == ref, a, np.nan)    # only the reference cases
    cond, cov = _with(rr, var, ref, cases=partial, total_cases=a.sum())
    assert cond.case_ratio is None and cond.share_of == "cases"
    assert any("as many cases as non-cases" in n for n in cov.notes)
    np.testing.assert_allclose(cov.pseudo_cases[ref] / cov.pseudo_cases.sum(),
                               a[ref] / a.sum(), rtol=1e-8)


@pytest.mark.parametrize("given", ["cases", "person_time"])
def test_crude_incidence_rate_totals_give_the_shared_reference_variance(given):
    """Poisson variances 1/A_i + 1/A_0 of crude rate ratios: the reference band's
    share of cases, or of person-time (T_i proportional to A_i/RR_i), pins A_0, so
    the covariance is 1/A_0 (Greenland & Longnecker 1992)."""
    a = np.array([30.0, 45.0, 60.0, 50.0])
    pt = np.array([1.0e4, 9.0e3, 8.0e3, 5.0e3])
    rr = (a / pt) / (a[0] / pt[0])
    var = np.r_[np.nan, 1 / a[1:] + 1 / a[0]]
    kw = {"cases": a} if given == "cases" else {"totals": pt}
    cond, cov = _with(rr, var, 0, design="incidence-rate", **kw)
    assert cond.share_of == ("cases" if given == "cases" else "totals")
    np.testing.assert_allclose(cov.cov[0, 1], 1 / a[0], rtol=1e-8)
    gl = greenland_longnecker(rr, np.nan_to_num(var), a, pt, design="incidence-rate", ref=0)
    np.testing.assert_allclose(cov.cov, gl.cov, rtol=1e-8)
    default = effective_counts(rr, var, ref=0, design="incidence-rate")
    assert abs(default.cov[0, 1] * a[0] - 1) > 0.05


def test_nothing_given_keeps_todays_defaults():
    rr, var = _woolf(CASES, CONTROLS, 0)
    cond = table_conditions(ref=0)
    assert (cond.case_ratio, cond.reference_share, cond.notes) == (None, None, ())
    _, cov = _with(rr, var, 0)
    np.testing.assert_array_equal(cov.cov, effective_counts(rr, var, ref=0).cov)


def test_bad_totals_are_refused():
    with pytest.raises(ModelError, match="cases must be positive"):
        table_conditions(ref=0, cases=[10.0, -1.0])
    with pytest.raises(ModelError, match="total controls must be positive"):
        table_conditions(ref=0, total_noncases=0.0)
    with pytest.raises(ModelError, match="share_of"):
        effective_counts([1.0, 1.5], [np.nan, 0.04], ref=0, reference_share=0.5,
                         share_of="people")


def test_build_uses_the_study_tables_counts_and_says_so(tmp_path):
    """covariance = "effective-counts" on a table with counts: the analysis takes
    the counts' totals (note names them), and on a crude table the result is the
    Greenland & Longnecker covariance from the same counts."""
    rr, var = _woolf(CASES, CONTROLS, 0)
    lo, hi = rr * np.exp(-1.959963984540054 * np.sqrt(var)), rr * np.exp(
        1.959963984540054 * np.sqrt(var))
    rows = ["lower,upper,rr,ci_lower,ci_upper,cases,controls"]
    for i, (r, lw, up) in enumerate(zip(rr.tolist(), lo.tolist(), hi.tolist())):
        ci = ",,," if i == 0 else f",{lw!r},{up!r},"
        upper = "" if i == rr.size - 1 else str(10 * (i + 1))
        rows.append(f"{10 * i},{upper},{r!r}{ci}{CASES[i]:g},{CONTROLS[i]:g}")
    path = tmp_path / "bands.csv"
    path.write_text("\n".join(rows) + "\n")
    table = read_study_table(path, design="case-control")
    spec = SimpleNamespace(covariance="effective-counts", design="case-control",
                           total_cases=None, total_noncases=None)
    cov, warnings, notes = log_rr_covariance(spec, table)
    assert cov.method == "effective-counts" and warnings == []
    np.testing.assert_allclose(cov.cov[0, 1], 1 / CASES[0] + 1 / CONTROLS[0], rtol=1e-7)
    assert any("from the table's cases summed over the bands" in n for n in notes)
    assert not any("assume" in n for n in notes)
