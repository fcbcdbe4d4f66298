"""Warnings for results that mislead (issue 10 item 5), each triggered and
not triggered on a small real analysis.

The input numbers are invented; whether each warning is due is derived
outside the code under test: bounds on E[RR_m(X)] from the curve's formula
and the lognormal's tail (scipy.stats), expectations by adaptive quadrature
(scipy.integrate.quad via tests.reference_integrals), the lognormal's
closed-form MLE (GM = exp of the mean of ln x, GSD = exp of its SD with
divisor n; common practice) and the rules as the issue states them:
a fraction above 0.99 or below 0; a median more than 10-fold outside the
curve's data range; comparison PAFs whose largest exceeds their smallest
by more than a third (max/min > 4/3); more than half of the PAF above the
highest dose with data.
"""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from reference_integrals import expect_over
from scipy import stats

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import DoseattrWarning

LOGLIN = {"model": "log-linear", "rr": 1.1, "per": 10, "max_dose": 50, "beyond": "flat"}
EXPOSURE = {"gm": 9.0, "gsd": 2.0}
HIGH, NEGATIVE = "(above 0.99)", "(below 0)"
SCALE, COMPARE, EXTRAPOLATED = "on different scales", "differing by more than a third", \
    "rests on extrapolation"


def _run(tmp_path: Path, d: dict, files: dict[str, str] | None = None):
    for name, text in (files or {}).items():
        (tmp_path / name).write_text(text)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DoseattrWarning)
        return run_analysis(analysis_from_dict({"unit": "ug/m3", **d}, tmp_path))


def _has(results, fragment: str) -> list[str]:
    return [w for w in results.warnings if fragment in w]


def _lognormal(gm: float, gsd: float):
    return stats.lognorm(s=math.log(gsd), scale=gm)


# -- a fraction above 0.99 ----------------------------------------------------------
def test_rr_per_hundredth_instead_of_per_ten_gives_a_paf_above_099(tmp_path):
    """RR 1.1 per 0.01 (b = ln 1.1 / 0.01 = 9.53 per ug/m3), held flat above
    50. RR_m is increasing, so E[RR_m(X)] >= P(X >= 9) exp(9 b) (Markov-type
    bound) with P(X >= 9) = 1/2 at the median: PAF >= 1 - 2 exp(-9 b), far
    above 0.99. A cap at 1 has E[RR_m(g(X))] <= exp(b), so its PIF is
    >= 1 - 2 exp(b) exp(-9 b) too."""
    b = math.log(1.1) / 0.01
    r = _run(tmp_path, {"curve": {**LOGLIN, "per": 0.01}, "exposure": EXPOSURE,
                        "scenario": [{"name": "cap", "cap": 1}]})
    bound = 1 - 2 * math.exp(-9 * b)
    assert bound > 0.99 and 1 - 2 * math.exp(b - 9 * b) > 0.99
    assert r.attribution.paf.estimate >= bound - 1e-12
    paf_lines = [w for w in _has(r, HIGH) if w.startswith("the PAF")]
    assert len(paf_lines) == 1 and "`per`" in paf_lines[0] and "unit" in paf_lines[0]
    assert [w for w in _has(r, HIGH) if w.startswith("scenario 'cap'")]
    assert paf_lines[0] in r.to_dict()["warnings"]


def test_rr_per_ten_stays_below_099(tmp_path):
    """RR 1.1 per 10 held flat above 50: 1 <= RR_m <= 1.1**5, so
    0 <= PAF <= 1 - 1.1**-5 = 0.38 and 0 <= PIF <= PAF (the cap lowers
    RR_m pointwise): no fraction warning."""
    r = _run(tmp_path, {"curve": LOGLIN, "exposure": EXPOSURE,
                        "scenario": [{"name": "cap", "cap": 1}]})
    assert 0 <= r.attribution.paf.estimate <= 1 - 1.1 ** -5 < 0.99
    assert not _has(r, HIGH) and not _has(r, NEGATIVE)


# -- a fraction below 0 -------------------------------------------------------------
J_POINTS = "dose,rr,ci_lower,ci_upper\n0,1,,\n10,0.7,0.55,0.9\n40,1.0,0.8,1.25\n80,1.5,1.1,2.0\n"
J_EXPOSURE = {"gm": 10.0, "gsd": 1.5}


def _j_log_rr(x: float) -> float:
    """log RR of the points curve: linear between the points, flat beyond
    (the curve as the analysis file describes it)."""
    return float(np.interp(x, [0, 10, 40, 80], np.log([1, 0.7, 1.0, 1.5])))


def test_j_shape_with_the_default_minimum_risk_gives_a_negative_paf(tmp_path):
    """With minimum_risk 0, RR_m = RR; E[RR(X)] by quadrature is below 1,
    so the PAF is negative, and the warning names the curve's minimum."""
    e = expect_over(lambda x: math.exp(_j_log_rr(x)), _lognormal(**J_EXPOSURE), [10, 40, 80],
                    limit=200)
    expected = 1 - 1 / e
    assert expected < 0
    r = _run(tmp_path, {"curve": {"points": "p.csv"}, "exposure": J_EXPOSURE},
             {"p.csv": J_POINTS})
    assert r.attribution.paf.estimate == pytest.approx(expected, rel=1e-6)
    lines = _has(r, NEGATIVE)
    assert len(lines) == 1 and "J-shape" in lines[0] and "minimum_risk" in lines[0]
    assert "at 10 ug/m3" in lines[0]  # the lowest point of the curve


def test_j_shape_with_minimum_risk_at_its_minimum_is_not_negative(tmp_path):
    """minimum_risk at the curve's lowest point (10: log RR is piecewise
    linear, so its minimum is at a point) makes RR_m >= 1 everywhere, so
    0 <= PAF <= 1 - 0.7/1.5 < 0.99."""
    r = _run(tmp_path, {"curve": {"points": "p.csv"}, "exposure": J_EXPOSURE,
                        "attribution": {"minimum_risk": 10}}, {"p.csv": J_POINTS})
    assert 0 <= r.attribution.paf.estimate <= 1 - 0.7 / 1.5
    assert not _has(r, NEGATIVE) and not _has(r, HIGH)


# -- the exposure on another scale than the curve -----------------------------------
BANDS = """\
lower,upper,dose,rr,ci_lower,ci_upper,cases,controls
0,5,2,1,,,120,480
5,10,7,1.30,1.05,1.61,95,310
10,20,14,1.55,1.20,2.00,88,220
20,40,28,1.80,1.30,2.49,60,140
40,,55,2.10,1.40,3.15,40,80
"""
VALUES = np.array([12.0, 9.5, 15.6, 3.7, 17.3, 11.0, 8.2, 26.4])
TABLE_CURVE = {"table": "b.csv", "dose": "given", "model": "log-linear", "beyond": "flat"}


def _measured(tmp_path: Path, factor: float):
    text = "value\n" + "".join(f"{v * factor:g}\n" for v in VALUES)
    return _run(tmp_path, {"curve": TABLE_CURVE,
                           "exposure": {"table": "m.csv", "family": "lognormal"}},
                {"b.csv": BANDS, "m.csv": text})


@pytest.mark.parametrize("factor, due", [
    (1e-3, True),   # mg/m3 read as ug/m3: median 1000-fold below the doses
    (1e3, True),    # ug/m3 read as mg/m3 the other way round: 1000-fold above
    (1.0, False),
])
def test_median_outside_the_data_range(tmp_path, factor, due):
    """The lognormal MLE's median is the geometric mean of the values
    (closed form); the data range is the table's given doses, 2 to 55.
    The warning is due when the median is above 10 x 55 or below 2 / 10."""
    median = factor * math.exp(np.log(VALUES).mean())
    assert due == (median > 10 * 55 or median < 2 / 10)
    r = _measured(tmp_path, factor)
    assert bool(_has(r, SCALE)) == due
    if due:
        assert "check the units" in _has(r, SCALE)[0]


@pytest.mark.parametrize("factor", [1e-3, 1.0])
def test_median_of_weighted_values_outside_the_data_range(tmp_path, factor):
    """The same with family = "empirical": the median is the weighted
    values' own (equal weights, 8 values: the 4th smallest, 11.0, by the
    smallest-value-reaching-one-half rule), so 1000-fold smaller is below
    2 / 10 and the values as they are lie within 2 to 55."""
    median = factor * float(np.sort(VALUES)[3])
    due = median < 2 / 10
    assert due == (factor == 1e-3)
    text = "value\n" + "".join(f"{v * factor:g}\n" for v in VALUES)
    r = _run(tmp_path, {"curve": TABLE_CURVE,
                        "exposure": {"table": "m.csv", "family": "empirical"}},
             {"b.csv": BANDS, "m.csv": text})
    assert bool(_has(r, SCALE)) == due
    if due:
        assert f"median {median:.3g} ug/m3" in _has(r, SCALE)[0]


# -- comparisons that disagree ------------------------------------------------------
CONCAVE = ("5,10,7,2.0,1.6,2.5\n10,20,14,2.1,1.7,2.6\n20,40,28,2.2,1.75,2.77\n"
           "40,,55,2.3,1.6,3.3\n")
STRAIGHT = ("5,10,7,1.05,0.9,1.22\n10,20,14,1.11,0.95,1.3\n20,40,28,1.25,1.05,1.49\n"
            "40,,55,1.6,1.25,2.05\n")


@pytest.mark.parametrize("rows", [CONCAVE, STRAIGHT])
def test_model_comparison(tmp_path, rows):
    """Log-linear RR = exp(b (x - 2)) and linear RR = 1 + b (x - 2), both
    flat above 55, relative to minimum risk 0: each variant's PAF is
    recomputed by quadrature from its fitted slope, and the warning is due
    when the larger exceeds the smaller by more than a third."""
    table = "lower,upper,dose,rr,ci_lower,ci_upper\n0,5,2,1,,\n" + rows
    r = _run(tmp_path, {"curve": {**TABLE_CURVE, "compare_models": ["log-linear", "linear"]},
                        "exposure": EXPOSURE}, {"b.csv": table})
    variants = {v.label: v for v in r.curve_section.model_comparison}
    dist = _lognormal(**EXPOSURE)
    formulas = {"log-linear": lambda b, x: math.exp(b * (min(x, 55) - 2)),
                "linear": lambda b, x: 1 + b * (min(x, 55) - 2)}
    pafs = {}
    for label, rr in formulas.items():
        b = float(variants[label].curve.coef[0])
        e = expect_over(lambda x, b=b, rr=rr: rr(b, x) / rr(b, 0.0), dist, [55], limit=200)
        pafs[label] = 1 - 1 / e
        assert variants[label].paf == pytest.approx(pafs[label], rel=1e-6)
    due = max(pafs.values()) / min(pafs.values()) > 4 / 3
    assert due == (rows is CONCAVE)  # the two tables are one of each kind
    lines = _has(r, "model comparison")
    assert bool(lines) == due
    if due:
        assert COMPARE in lines[0] and "log-linear" in lines[0] and "linear)" in lines[0]


def _lognormal_mle(x: np.ndarray) -> dict:
    t = np.log(x)
    return {"gm": math.exp(t.mean()), "gsd": math.exp(t.std())}


@pytest.mark.parametrize("values", [
    [2.0] * 6 + [45.0] * 2,                                         # two clusters
    [3.11, 4.87, 6.41, 8.07, 10.04, 12.63, 16.65, 26.07],           # lognormal-like
])
def test_family_comparison(tmp_path, values):
    """Lognormal fit against the weighted values themselves: the fit's PAF
    by quadrature at the closed-form MLE, the values' PAF as
    1 - 1/mean(RR_m(x_i)); the warning is due when they differ by more
    than a third (of the smaller)."""
    x = np.array(values)
    b = math.log(1.1) / 10

    def rr(v: float) -> float:
        return math.exp(b * min(v, 50))

    fitted = 1 - 1 / expect_over(rr, _lognormal(**_lognormal_mle(x)), [50], limit=200)
    empirical = 1 - 1 / float(np.mean([rr(v) for v in x]))
    due = max(fitted, empirical) / min(fitted, empirical) > 4 / 3
    text = "value\n" + "".join(f"{v:g}\n" for v in x)
    r = _run(tmp_path, {"curve": LOGLIN, "exposure": {"table": "m.csv", "family": "lognormal"}},
             {"m.csv": text})
    got = {v.label: v.paf for v in r.exposure_section.comparison}
    assert got["lognormal"] == pytest.approx(fitted, rel=1e-6)
    assert got["empirical"] == pytest.approx(empirical, rel=1e-9)
    assert due == (values[0] == 2.0)  # the clusters disagree, the lognormal-like data do not
    assert bool(_has(r, "exposure family comparison")) == due


# -- a PAF resting on extrapolation -------------------------------------------------
@pytest.mark.parametrize("gm", [30.0, 5.0])
def test_paf_above_the_highest_dose_with_data(tmp_path, gm):
    """RR 1.5 per 10 held flat above max_dose 20 (the data's end). The
    excess above 20 is P(X > 20) (RR(20) - 1), exactly; below 20 it is
    integrated by quadrature. The warning is due when the share above is
    more than half of the total excess (the PAF's share: the PAF is the
    excess over E[RR_m])."""
    b = math.log(1.5) / 10
    dist = _lognormal(gm, 1.5)
    above = float(dist.sf(20)) * math.expm1(20 * b)
    below = expect_over(lambda x: math.expm1(b * x), dist, upper=20, limit=200)
    due = above / (above + below) > 0.5
    assert due == (gm == 30.0)
    r = _run(tmp_path, {"curve": {"model": "log-linear", "rr": 1.5, "per": 10, "max_dose": 20,
                                  "beyond": "flat"},
                        "exposure": {"gm": gm, "gsd": 1.5}})
    lines = _has(r, EXTRAPOLATED)
    assert bool(lines) == due
    if due:
        share = float(lines[0].removeprefix("about ").split("%")[0]) / 100
        assert share == pytest.approx(above / (above + below), abs=0.01)


@pytest.mark.parametrize("low, high, due", [(2, 6, True), (8, 1, False)])
def test_paf_of_weighted_values_above_the_highest_dose_with_data(tmp_path, low, high, due):
    """family = "empirical", ``low`` values at 5 and ``high`` at 30, RR 1.5
    per 10 flat above 20: the excess above 20 is high x (RR(20) - 1)
    against low x (RR(5) - 1) below (sums over the values, exactly)."""
    b = math.log(1.5) / 10
    above, below = high * math.expm1(20 * b), low * math.expm1(5 * b)
    assert (above / (above + below) > 0.5) == due
    text = "value\n" + "5\n" * low + "30\n" * high
    r = _run(tmp_path, {"curve": {"model": "log-linear", "rr": 1.5, "per": 10, "max_dose": 20,
                                  "beyond": "flat"},
                        "exposure": {"table": "m.csv", "family": "empirical"}},
             {"m.csv": text})
    lines = _has(r, EXTRAPOLATED)
    assert bool(lines) == due
    if due:
        assert lines[0].startswith(f"about {100 * above / (above + below):.3g}% of the PAF")


@pytest.mark.parametrize("pafs, due", [
    ([("a", -0.01), ("b", 0.05)], True),    # opposite signs always disagree
    ([("a", 0.092), ("b", 0.055)], True),   # the 9.2% vs 5.5%
    ([("a", 0.10), ("b", 0.12), ("c", None)], False),  # 1.2 < 4/3; None not computed
    ([("a", 0.10)], False),                 # nothing to compare with
])
def test_comparison_rule(pafs, due):
    """max - min > min|PAF| / 3, i.e. max/min > 4/3 for positive PAFs (the
    issue's rule, applied to given numbers)."""
    from doseattr.analysis.alarms import comparison_alarms

    assert bool(comparison_alarms("model comparison", "model", pafs)) == due


# -- where the warnings reach -------------------------------------------------------
def test_warnings_reach_the_summary_and_python_warnings(tmp_path):
    """The run issues each results warning as a DoseattrWarning and the
    summary lists it (wrapped, also at hyphens, so compared without whitespace)."""
    (tmp_path / "p.csv").write_text(J_POINTS)
    a = analysis_from_dict({"unit": "ug/m3", "curve": {"points": "p.csv"},
                            "exposure": J_EXPOSURE}, tmp_path)
    with pytest.warns(DoseattrWarning, match="J-shape"):
        r = run_analysis(a)
    assert "".join(_has(r, NEGATIVE)[0].split()) in "".join(r.summary().split())


def test_each_outcome_gets_its_own(tmp_path):
    """Two outcomes over one exposure: only the one with RR per 0.01 (PAF
    >= 1 - 2 exp(-9 b) > 0.99, as in the first test) is warned about, and
    the run issues it with the outcome's name."""
    a = analysis_from_dict({"unit": "ug/m3", "exposure": EXPOSURE, "outcome": [
        {"name": "A", "curve": LOGLIN}, {"name": "B", "curve": {**LOGLIN, "per": 0.01}}]},
        tmp_path)
    with pytest.warns(DoseattrWarning, match=r"outcome 'B': the PAF is 100% \(above 0.99\)"):
        r = run_analysis(a)
    by_name = dict(r.outcomes)
    assert _has(by_name["B"], HIGH) and not _has(by_name["A"], HIGH)


def test_demo_raises_none_of_them():
    """The demo (PAF 9.5%, dose rules within 10% of each other, median
    near 9 ug/m3 against doses 5 to 100) raises none of these warnings."""
    from doseattr.analysis.config import load_analysis

    demo = Path(__file__).resolve().parent.parent / "data_demo" / "analysis.toml"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DoseattrWarning)
        r = run_analysis(load_analysis(demo))
    for fragment in (HIGH, NEGATIVE, SCALE, COMPARE, EXTRAPOLATED):
        assert not _has(r, fragment)


@pytest.mark.parametrize("quiet", [False, True])
def test_the_command_line_prints_each_warning_on_standard_error(tmp_path, capsys, quiet):
    """``doseattr run`` shows each results warning once on standard error,
    as its own line, with or without --quiet; results.json lists it too."""
    import json

    from doseattr.cli import main

    (tmp_path / "p.csv").write_text(J_POINTS)
    (tmp_path / "a.toml").write_text('unit = "ug/m3"\n[curve]\npoints = "p.csv"\n[exposure]\n'
                                     + "".join(f"{k} = {v}\n" for k, v in J_EXPOSURE.items()))
    argv = ["run", str(tmp_path / "a.toml"), "--out", str(tmp_path / "out")]
    assert main(argv + (["--quiet"] if quiet else [])) == 0
    err = capsys.readouterr().err.splitlines()
    written = json.loads((tmp_path / "out" / "results.json").read_text())["warnings"]
    assert err == [f"doseattr: warning: {w}" for w in written]
    assert any(NEGATIVE in line for line in err)
