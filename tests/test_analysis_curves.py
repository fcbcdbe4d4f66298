"""Curve inputs of the analysis file beyond the log-linear/linear/power
foundation: splines, effective counts, dose from the exposure distribution,
curves given as points or draws, model comparison. Each numeric check names
its outside reference (a textbook formula written out here, scipy).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from analysis_helpers import write_case
from reference_integrals import expect_over
from scipy import stats

from doseattr.analysis.config import load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

Z975 = stats.norm.ppf(0.975)

BANDS = """\
lower,upper,dose,rr,ci_lower,ci_upper
0,5,2,1,,
5,10,7,1.40,1.10,1.78
10,20,14,1.65,1.25,2.18
20,40,28,1.80,1.35,2.40
40,,55,1.90,1.30,2.78
"""
GM, GSD = 9.0, 2.3


def _analysis(curve: str, exposure: str = f"gm = {GM}\ngsd = {GSD}", extra: str = "") -> str:
    return f'unit = "ug/m3"\n[curve]\n{curve}\n[exposure]\n{exposure}\n{extra}'


def _run(tmp_path, curve, *, bands=BANDS, files=None, **kw):
    path = write_case(tmp_path, _analysis(curve, **kw), bands=bands, measurements=None)
    for name, text in (files or {}).items():
        (tmp_path / name).write_text(text)
    return run_analysis(load_analysis(path))


def _textbook_rcs(x, knots):
    r"""Restricted cubic spline basis written out from Harrell (Regression
    Modeling Strategies, 2nd ed., eq. 2.25) without his normalisation:
    :math:`x` and, for :math:`j = 1..k-2`,
    :math:`(x - t_j)_+^3 - (x - t_{k-1})_+^3 (t_k - t_j)/(t_k - t_{k-1})
    + (x - t_k)_+^3 (t_{k-1} - t_j)/(t_k - t_{k-1})`."""
    t = np.asarray(knots, float)
    x = np.asarray(x, float)[:, None]
    p = lambda z: np.maximum(z, 0) ** 3  # noqa: E731
    k = t.size
    cols = [x[:, 0]]
    for j in range(k - 2):
        cols.append((p(x - t[j]) - p(x - t[k - 2]) * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
                     + p(x - t[k - 1]) * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2]))[:, 0])
    return np.column_stack(cols)


def test_spline_fitted_rr_matches_a_second_basis(tmp_path):
    r"""Fitted RRs do not depend on the spline basis chosen, so a GLS fit
    (:math:`\hat b = (X'V^{-1}X)^{-1}X'V^{-1}y`, diagonal V from the CIs,
    no counts) on the textbook basis, centred at the reference dose, must
    give the same curve at every dose inside the knots. The Wald statistic
    of non-linearity, :math:`b_{NL}' \operatorname{cov}^{-1} b_{NL}`, is
    invariant to rescaling the non-linear columns, so its chi-square p-value
    (scipy.stats.chi2) must match too."""
    knots = [2.0, 14.0, 55.0]
    r = _run(tmp_path, f'table = "bands.csv"\nmodel = "spline"\nknots = {knots}')
    dose = np.array([7.0, 14.0, 28.0, 55.0])
    y = np.log([1.40, 1.65, 1.80, 1.90])
    lo, hi = np.array([1.10, 1.25, 1.35, 1.30]), np.array([1.78, 2.18, 2.40, 2.78])
    vinv = np.diag(1 / ((np.log(hi) - np.log(lo)) / (2 * Z975)) ** 2)
    basis = lambda x: _textbook_rcs(x, knots) - _textbook_rcs([2.0], knots)  # noqa: E731
    x = basis(dose)
    cov = np.linalg.inv(x.T @ vinv @ x)
    b = cov @ x.T @ vinv @ y
    grid = np.linspace(2.0, 55.0, 40)
    np.testing.assert_allclose(r.curve.log_rr(grid), basis(grid) @ b, rtol=1e-9, atol=1e-12)
    w = b[1] ** 2 / cov[1, 1]
    np.testing.assert_allclose(r.to_dict()["curve"]["nonlinearity_p"], stats.chi2.sf(w, 1),
                               rtol=1e-8)


def test_knots_outside_the_doses_are_refused(tmp_path):
    with pytest.raises(InputError, match=r"\[curve\] key 'knots'.*within the assigned doses"):
        _run(tmp_path, 'table = "bands.csv"\nmodel = "spline"\nknots = [2, 14, 80]')


def test_too_few_bands_for_the_spline(tmp_path):
    bands = "\n".join(BANDS.splitlines()[:3]) + "\n"
    with pytest.raises(InputError, match=r"\[curve\] key '(model|knot_count)'"):
        _run(tmp_path, 'table = "bands.csv"\nmodel = "spline"\nknot_count = 5', bands=bands)


def test_effective_counts_keep_the_reported_variances(tmp_path):
    r"""With a design but no counts the default covariance is effective
    counts (Hamling et al. 2008); like Greenland & Longnecker's it keeps the
    reported variances :math:`((\ln hi - \ln lo)/(2 z_{0.975}))^2` on the
    diagonal, with one positive shared covariance off it."""
    r = _run(tmp_path, 'table = "bands.csv"\ndesign = "case-control"')
    d = r.to_dict()["curve"]
    assert d["covariance_method"] == "effective-counts"
    v = np.array(d["log_rr_covariance"])
    lo, hi = np.array([1.10, 1.25, 1.35, 1.30]), np.array([1.78, 2.18, 2.40, 2.78])
    np.testing.assert_allclose(np.diag(v), ((np.log(hi) - np.log(lo)) / (2 * Z975)) ** 2,
                               rtol=1e-10)
    off = v[~np.eye(4, dtype=bool)]
    assert np.all(off > 0) and np.ptp(off) < 1e-12


def test_band_mean_doses_are_conditional_means(tmp_path):
    r""":math:`E[X \mid l < X \le u]` of the lognormal exposure for every
    band, from scipy.stats.lognorm.expect(..., conditional=True); the
    band-median is :math:`F^{-1}((F(l) + F(u))/2)` (scipy ppf)."""
    r = _run(tmp_path, 'table = "bands.csv"\ndose = "band-mean"')
    dist = stats.lognorm(s=math.log(GSD), scale=GM)
    lower = [0, 5, 10, 20, 40]
    upper = [5, 10, 20, 40, np.inf]
    expected = [dist.expect(lambda x: x, lb=a, ub=b, conditional=True, epsabs=0, epsrel=1e-12)
                for a, b in zip(lower, upper)]
    np.testing.assert_allclose(r.band_table.dose, expected, rtol=1e-7)
    rows = {v.label: v for v in r.dose_sensitivity}
    assert set(rows) == {"given", "midpoint", "band-mean", "band-median"}
    median = dist.ppf((dist.cdf(lower) + dist.cdf(upper)) / 2)
    np.testing.assert_allclose(rows["band-median"].doses, median, rtol=1e-8)
    np.testing.assert_allclose(rows["given"].doses, [2, 7, 14, 28, 55])
    assert all(v.paf is not None and 0 < v.paf < 1 for v in rows.values())


POINTS = """\
dose,rr,ci_lower,ci_upper
0,1,,
10,1.20,1.05,1.37
25,1.45,1.20,1.75
60,1.70,1.30,2.22
"""


def _points_expectation(doses, log_rr, m=0.0):
    r""":math:`E[RR_m(X)]` for log RR interpolated linearly (numpy.interp,
    flat beyond the last dose) over the lognormal, by scipy.integrate.quad
    split at the points."""
    dist = stats.lognorm(s=math.log(GSD), scale=GM)
    rr_m = lambda x: math.exp(np.interp(max(x, m), doses, log_rr)  # noqa: E731
                              - np.interp(m, doses, log_rr))
    return expect_over(rr_m, dist, doses[1:], epsrel=1e-12, limit=200)


def test_points_curve_paf_against_quad(tmp_path):
    r = _run(tmp_path, 'points = "points.csv"', bands=None, files={"points.csv": POINTS})
    doses = np.array([0.0, 10.0, 25.0, 60.0])
    e = _points_expectation(doses, np.log([1, 1.20, 1.45, 1.70]))
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-7)
    assert r.curve.max_dose == 60.0


def test_points_not_increasing_in_dose(tmp_path):
    bad = POINTS.replace("25,1.45", "8,1.45")
    with pytest.raises(InputError, match=r"points.csv: row 4, column 'dose': doses must "
                                         r"increase"):
        _run(tmp_path, 'points = "points.csv"', bands=None, files={"points.csv": bad})


DRAWS = """\
dose,d1,d2,d3,d4,d5
0,1,1,1,1,1
20,1.10,1.30,1.20,1.25,1.15
50,1.30,1.70,1.40,1.60,1.50
"""


def test_draws_curve_uses_the_median(tmp_path):
    """The point estimate is the pointwise median of the draws (numpy
    median), interpolated on the log scale; PAF against scipy quad."""
    r = _run(tmp_path, 'draws = "draws.csv"', bands=None, files={"draws.csv": DRAWS})
    doses = np.array([0.0, 20.0, 50.0])
    e = _points_expectation(doses, np.log([1.0, 1.20, 1.50]))
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-7)
    assert r.curve.draws.shape == (5, 3)


def test_draws_file_with_ragged_rows(tmp_path):
    ragged = DRAWS.replace("50,1.30,1.70,1.40,1.60,1.50", "50,1.30,1.70,1.40")
    with pytest.raises(InputError, match=r"draws.csv: row 4: has 4 values but the header has 6"):
        _run(tmp_path, 'draws = "draws.csv"', bands=None, files={"draws.csv": ragged})


def test_compare_models_reports_each_paf(tmp_path):
    r = _run(tmp_path, 'table = "bands.csv"\nmodel = "spline"\n'
                       'compare_models = ["log-linear", "linear"]')
    labels = [v.label for v in r.model_comparison]
    assert labels == ["spline", "log-linear", "linear"]
    assert r.model_comparison[0].paf == r.paf.estimate
    alone = _run(tmp_path / "alone", 'table = "bands.csv"\nmodel = "log-linear"')
    np.testing.assert_allclose(r.model_comparison[1].paf, alone.paf.estimate, rtol=1e-12)
    assert [m["label"] for m in r.to_dict()["model_comparison"]] == labels
