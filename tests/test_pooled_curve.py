"""Several studies, one curve: ``[[curve.study]]`` blocks fitted one by one
and pooled (analysis file, results, report, bad input).

Every study table here is invented (made-up bands, RRs and counts, labelled
so at each table); none of their numbers serves as an expected value. The
expected values come from outside the pooling code: each study's own
single-table run (stage one), ``statsmodels.stats.meta_analysis.combine_effects``
(DerSimonian-Laird pooling of the per-study slopes), the Wald statistic
in closed form (scipy.stats.chi2 for its p-value), and the JSON Schema.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from schema_check import problems
from scipy.stats import chi2
from statsmodels.stats.meta_analysis import combine_effects

from doseattr.analysis.check import check_analysis
from doseattr.analysis.config import load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.cli import main
from doseattr.core.curves.spline import RestrictedCubicSpline
from doseattr.results.schema import results_schema

# Invented: a case-control study with counts (Greenland-Longnecker covariance).
STUDY_A = """lower,upper,dose,rr,ci_lower,ci_upper,cases,controls
0,5,2,1,,,100,400
5,10,7,1.2,0.9,1.6,80,260
10,20,14,1.5,1.1,2.0,90,230
20,,28,1.9,1.3,2.8,60,120
"""
# Invented: a case-control study with RRs and CIs only (effective counts).
STUDY_B = """lower,upper,dose,rr,ci_lower,ci_upper
0,8,3,1,,
8,16,11,1.1,0.85,1.42
16,,24,1.6,1.15,2.2
"""
# Invented: an incidence-rate study with person-time, close to A and B.
STUDY_C = """lower,upper,dose,rr,ci_lower,ci_upper,cases,person_time
0,4,1,1,,,50,20000
4,12,8,1.35,1.0,1.8,60,15000
12,25,18,1.8,1.3,2.5,55,9000
25,,35,2.6,1.7,4.0,30,3500
"""
# Invented: an incidence-rate study far steeper than A and B, precisely
# estimated (large counts), so that the studies disagree.
STUDY_STEEP = """lower,upper,dose,rr,ci_lower,ci_upper,cases,person_time
0,4,1,1,,,400,200000
4,12,8,2.0,1.75,2.3,500,120000
12,25,18,4.2,3.7,4.8,600,70000
25,,35,11.0,9.6,12.6,500,22000
"""
TABLES = {"a.csv": STUDY_A, "b.csv": STUDY_B, "c.csv": STUDY_C, "steep.csv": STUDY_STEEP}

BLOCK = {"A": 'table = "a.csv"\ndesign = "case-control"\n',
         "B": ('table = "b.csv"\ndesign = "case-control"\ncovariance = "effective-counts"\n'
               'total_cases = 300\ntotal_controls = 900\n'),
         "C": 'table = "c.csv"\ndesign = "incidence-rate"\n',
         "Steep": 'table = "steep.csv"\ndesign = "incidence-rate"\n'}
EXPOSURE = '[exposure]\ngm = 6\ngsd = 2\n'


def _pooled_toml(studies: list[str], curve: str = 'model = "log-linear"\n',
                 extra: str = "") -> str:
    blocks = "".join(f'[[curve.study]]\nname = "{n}"\n{BLOCK[n]}' for n in studies)
    return f'unit = "ug/m3"\n[curve]\n{curve}{blocks}{EXPOSURE}{extra}'


def _write(folder: Path, toml: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for name, text in TABLES.items():
        (folder / name).write_text(text)
    path = folder / "analysis.toml"
    path.write_text(toml)
    return path


def _run(folder: Path, toml: str):
    return run_analysis(load_analysis(_write(folder, toml)))


def _json(results) -> dict:
    return json.loads(json.dumps(results.to_dict(), allow_nan=False))


# -- stage one: each study as its own single-table run --------------------------------
@pytest.mark.parametrize("curve, single", [
    ('model = "log-linear"\n', 'model = "log-linear"\n'),
    ('model = "spline"\nknots = [5, 12, 22]\n', 'model = "spline"\nknots = [5, 12, 22]\n'),
], ids=["log-linear", "spline"])
def test_each_study_is_fitted_as_its_single_table_run(tmp_path, curve, single):
    """Source: the same table given as [curve] table (the single-study run)."""
    pooled = _run(tmp_path / "pooled", _pooled_toml(["A", "B", "C"], curve))
    studies = pooled.curve_section.pooling.studies
    for name, study in zip("ABC", studies, strict=True):
        assert study.name == name
        toml = f'unit = "ug/m3"\n[curve]\n{single}{BLOCK[name]}{EXPOSURE}'
        alone = _run(tmp_path / name, toml).curve_section.curve
        np.testing.assert_allclose(study.curve.coef, alone.coef, rtol=1e-12, atol=0)
        np.testing.assert_allclose(study.curve.cov, alone.cov, rtol=1e-12, atol=0)
        assert study.curve.model.reference_dose == alone.model.reference_dose


# -- stage two against statsmodels -------------------------------------------------------
def test_dl_pooling_of_three_studies_matches_statsmodels(tmp_path):
    """Source: statsmodels.stats.meta_analysis.combine_effects(method_re="dl")
    on the per-study slopes and their variances (three designs, different
    bands)."""
    d = _json(_run(tmp_path, _pooled_toml(["A", "B", "Steep"],
                                          'model = "log-linear"\ntau_method = "dl"\n')))
    pool = d["curve"]["pooling"]
    slopes = np.array([s["coefficients"][0] for s in pool["studies"]])
    variances = np.array([s["covariance"][0][0] for s in pool["studies"]])
    ref = combine_effects(slopes, variances, method_re="dl")
    assert ref.tau2 > 0  # the check covers the random-effects branch
    assert pool["method"] == "random-effects" and pool["tau_method"] == "dl"
    assert d["curve"]["coefficients"][0] == pytest.approx(ref.mean_effect_re, rel=1e-10)
    assert np.sqrt(d["curve"]["covariance"][0][0]) == pytest.approx(ref.sd_eff_w_re, rel=1e-10)
    assert pool["tau2"] == pytest.approx(ref.tau2, rel=1e-10)
    assert pool["q"] == pytest.approx(ref.q, rel=1e-10)
    assert pool["df"] == ref.df == 2
    assert pool["i2"] == pytest.approx(ref.i2, rel=1e-10)
    assert pool["p"] == pytest.approx(chi2.sf(ref.q, 2), rel=1e-10)  # scipy.stats.chi2
    np.testing.assert_allclose([s["weight"] for s in pool["studies"]], ref.weights_rel_re,
                               rtol=1e-10)
    assert [s["design"] for s in pool["studies"]] == ["case-control", "case-control",
                                                      "incidence-rate"]
    assert [s["covariance_method"] for s in pool["studies"]] == ["counts", "effective-counts",
                                                                 "counts"]


def test_fixed_effect_is_the_inverse_variance_mean(tmp_path):
    """Source: statsmodels combine_effects, its fixed-effect mean and SE."""
    d = _json(_run(tmp_path, _pooled_toml(["A", "B", "C"],
                                          'model = "log-linear"\npooling = "fixed"\n')))
    pool = d["curve"]["pooling"]
    slopes = np.array([s["coefficients"][0] for s in pool["studies"]])
    variances = np.array([s["covariance"][0][0] for s in pool["studies"]])
    ref = combine_effects(slopes, variances)
    assert pool["tau2"] == 0 and pool["tau_method"] is None
    assert d["curve"]["coefficients"][0] == pytest.approx(ref.mean_effect_fe, rel=1e-10)
    assert np.sqrt(d["curve"]["covariance"][0][0]) == pytest.approx(ref.sd_eff_w_fe, rel=1e-10)


def test_heterogeneity_warns(tmp_path):
    """I^2 above 75% and a study above 60% of the weight are each warned
    about (thresholds: common practice, Higgins et al. 2003)."""
    r = _run(tmp_path, _pooled_toml(["A", "B", "Steep"],
                                    'model = "log-linear"\npooling = "fixed"\n'))
    pooled = r.curve_section.pooling.pooled
    assert pooled.i2 > 0.75 and max(pooled.weights) > 0.6
    assert any("I^2 =" in w and "disagree" in w for w in r.warnings)
    assert any("study 'Steep' carries" in w for w in r.warnings)


# -- a pooled spline ------------------------------------------------------------------------
def test_pooled_spline_reports_its_nonlinearity_test(tmp_path):
    """Source: the Wald statistic W = b' V^-1 b of the non-linear
    coefficients in closed form, computed here from the pooled coefficients
    and covariance in results.json; p from scipy.stats.chi2."""
    r = _run(tmp_path, _pooled_toml(["A", "B", "C"], 'model = "spline"\n'))
    d = _json(r)
    pool = d["curve"]["pooling"]
    model = r.curve_section.curve.model
    assert isinstance(model, RestrictedCubicSpline)
    every = np.concatenate([s.bands.dose for s in r.curve_section.pooling.studies])
    # Harrell's 3-knot quantiles 0.10, 0.50, 0.90 of all studies' doses (numpy)
    np.testing.assert_allclose(model.knots, np.quantile(every, [0.1, 0.5, 0.9]), rtol=1e-12)
    idx = list(model.nonlinear_index)
    b = np.array(pool["coefficients"])[idx]
    v = np.array(pool["covariance"])[np.ix_(idx, idx)]
    w = float(b @ np.linalg.solve(v, b))
    assert pool["nonlinearity"]["w"] == pytest.approx(w, rel=1e-10)
    assert pool["nonlinearity"]["df"] == len(idx)
    assert pool["nonlinearity"]["p"] == pytest.approx(chi2.sf(w, len(idx)), rel=1e-10)
    assert d["curve"]["nonlinearity_p"] == pool["nonlinearity"]["p"]
    assert isinstance(pool["tau2"], list) and len(pool["tau2"]) == 2  # a 2 x 2 matrix
    assert problems(d, results_schema(), strict=True) == []


# -- predict ----------------------------------------------------------------------------------
UNCERTAINTY = "[uncertainty]\ndraws = 400\nseed = 7\n"


def _width(folder: Path, studies: list[str], predict: bool) -> tuple[float, object]:
    curve = f'model = "log-linear"\ntau_method = "dl"\npredict = {str(predict).lower()}\n'
    r = _run(folder, _pooled_toml(studies, curve, UNCERTAINTY))
    return r.attribution.paf.upper - r.attribution.paf.lower, r.curve_section.pooling.pooled


def test_predict_widens_the_interval_when_studies_differ(tmp_path):
    """With tau^2 > 0 the predictive covariance cov + tau^2 is larger, so
    the PAF's interval is wider (same seed, simulation)."""
    mean, pooled = _width(tmp_path / "mean", ["A", "B", "Steep"], False)
    new, _ = _width(tmp_path / "new", ["A", "B", "Steep"], True)
    assert pooled.tau2 > 0
    assert new > 1.5 * mean


def test_predict_changes_nothing_when_tau2_is_zero(tmp_path):
    """With tau^2 = 0 the predictive covariance is the pooled covariance:
    the same seed gives the same draws, so the same interval."""
    mean, pooled = _width(tmp_path / "mean", ["A", "B", "C"], False)
    new, _ = _width(tmp_path / "new", ["A", "B", "C"], True)
    assert pooled.tau2 == 0.0
    assert new == pytest.approx(mean, rel=1e-9)


# -- results, report, check -------------------------------------------------------------------
def test_outputs_hold_the_pooling(tmp_path):
    """results.json validates against the schema (strict); the report holds
    the studies table and the pooled figure; studies.csv has one row per
    study; the single-study run has curve.pooling = null."""
    path = _write(tmp_path / "case", _pooled_toml(["A", "B", "C"], 'model = "log-linear"\n',
                                                  UNCERTAINTY))
    out = tmp_path / "out"
    assert main(["run", str(path), "--out", str(out)]) == 0
    d = json.loads((out / "results.json").read_text())
    assert problems(d, results_schema(), strict=True) == []
    pool = d["curve"]["pooling"]
    assert [s["name"] for s in pool["studies"]] == ["A", "B", "C"]
    assert sum(s["weight"] for s in pool["studies"]) == pytest.approx(1.0, abs=1e-12)
    assert d["curve"]["coefficients"] == pool["coefficients"]
    assert d["curve"]["source"] == "pooled" and pool["predict"] is False
    assert [t["path"] for t in d["provenance"]["input_tables"]] == ["a.csv", "b.csv", "c.csv"]
    html = (out / "report.html").read_text()
    assert "Studies pooled" in html and "Cochran" in html and "I\u00b2" in html
    assert (out / "figures" / "pooled.png").is_file()
    assert "DerSimonian R, Laird N (1986)" in html and "Gasparrini" not in html
    rows = (out / "studies.csv").read_text().splitlines()
    assert rows[0].startswith("study,design,") and [r.split(",")[0] for r in rows[1:]] == [
        "A", "B", "C"]
    single = _run(tmp_path / "single", f'unit = "ug/m3"\n[curve]\n{BLOCK["A"]}{EXPOSURE}')
    assert _json(single)["curve"]["pooling"] is None


def test_the_figure_draws_each_study_and_the_bands(tmp_path):
    from doseattr.outputs.pooling_figures import plot_pooled

    r = _run(tmp_path, _pooled_toml(["A", "B", "Steep"], 'model = "log-linear"\n'
                                    'predict = true\n'))
    fig = plot_pooled(r.curve_section.pooling, "ug/m3")
    gids = {a.get_gid() for ax in fig.axes for a in ax.get_children()}
    assert {"pooled-rr", "pooled-band", "prediction-band", "study-1", "study-2",
            "study-3", "study-3-bands"} <= gids


def test_check_says_what_pooling_is_done(tmp_path):
    lines = check_analysis(load_analysis(_write(tmp_path, _pooled_toml(
        ["A", "B", "C"], 'model = "log-linear"\npredict = true\n'))))
    curve = lines[0]
    assert curve.startswith("curve: log-linear fitted to each of 3 studies and pooled by "
                            "random effects (between-study variance by REML)")
    assert "new population" in curve and "'B':" in curve


def test_study_units_are_converted_to_the_curve_unit(tmp_path):
    """A study given in mg/m3 is the same study in ug/m3 x 1000 (unit table:
    1 mg = 1000 ug); its slope per ug/m3 is the slope per mg/m3 / 1000."""
    mg = STUDY_C.replace("0,4,1,", "0,0.004,0.001,").replace("4,12,8,", "0.004,0.012,0.008,")
    mg = mg.replace("12,25,18,", "0.012,0.025,0.018,").replace("25,,35,", "0.025,,0.035,")
    folder = tmp_path / "mg"
    _write(folder, "")
    (folder / "c_mg.csv").write_text(mg)
    toml = _pooled_toml(["A", "B"]) + ('[[curve.study]]\nname = "C"\ntable = "c_mg.csv"\n'
                                       'design = "incidence-rate"\nunit = "mg/m3"\n')
    converted = run_analysis(load_analysis(_write(folder, toml)))
    plain = _run(tmp_path / "ug", _pooled_toml(["A", "B", "C"]))
    np.testing.assert_allclose(converted.curve_section.curve.coef,
                               plain.curve_section.curve.coef, rtol=1e-9)


# -- bad input: one line, exit 2, nothing written ------------------------------------------
# Invented and broken: the CI of its second band does not contain its RR.
BROKEN_B = STUDY_B.replace("8,16,11,1.1,0.85,1.42", "8,16,11,1.1,1.2,1.42")
# Invented: two studies whose bands sit at the same two doses.
TWO_DOSES = ("lower,upper,dose,rr,ci_lower,ci_upper\n0,5,2,1,,\n5,,7,{rr},0.9,1.8\n")
BAD = [
    (_pooled_toml(["A"]), "pooling needs at least two [[curve.study]] blocks"),
    (_pooled_toml(["A", "B"]).replace('name = "B"', 'name = "A"'),
     "[[curve.study]] 2 ('A') key 'name': study name 'A' is used twice"),
    (_pooled_toml(["A", "B"]).replace('name = "B"\n', 'name = "B"\nunit = "ppm-years"\n'),
     "[[curve.study]] 2 ('B') key 'unit': 'ppm-years' is a cumulative unit"),
    (_pooled_toml(["A", "B"], 'model = "spline"\n').replace('"a.csv"', '"two_a.csv"')
     .replace('"b.csv"', '"two_b.csv"'),
     "the 2 studies have 2 distinct assigned doses, fewer than the 3 knots"),
    (_pooled_toml(["A", "B"]).replace('table = "b.csv"', 'table = "bad.csv"'),
     "study 'B': "),
    (_pooled_toml(["A", "B"]).replace('table = "b.csv"', 'table = "nothere.csv"'),
     "[[curve.study]] 2 ('B') key 'table': file not found"),
    (_pooled_toml(["A", "B"], 'model = "log-linear"\ntable = "a.csv"\n'),
     "[curve] table and [[curve.study]] both give"),
    (_pooled_toml(["A", "B"], 'model = "log-linear"\ndesign = "case-control"\n'),
     "[curve] key 'design': 'design' belongs to each study"),
    (f'unit = "ug/m3"\n[curve]\npooling = "fixed"\n{BLOCK["A"]}{EXPOSURE}',
     "[curve] key 'pooling': 'pooling' goes with [[curve.study]] blocks"),
    # a pooled curve inside the second of two outcomes: the outcome is named
    ('unit = "ug/m3"\n' + EXPOSURE
     + '[[outcome]]\nname = "first"\n[outcome.curve]\nmodel = "linear"\nerr = 0.05\n'
     + '[[outcome]]\nname = "second"\n[outcome.curve]\nmodel = "log-linear"\n'
     + "".join(f'[[outcome.curve.study]]\nname = "{n}"\n{BLOCK[n]}' for n in "AB")
     .replace('table = "b.csv"', 'table = "nothere.csv"'),
     "[[outcome]] 2 ('second') [[outcome.curve.study]] 2 ('B') key 'table': file not found"),
]


@pytest.mark.parametrize("toml, fragment", BAD, ids=[
    "one-study", "same-name", "unit", "spline-doses", "refused-table", "missing-table",
    "table-and-studies", "shared-design", "pooling-one-table", "in-an-outcome"])
def test_bad_input_is_one_line_and_writes_nothing(tmp_path, capsys, toml, fragment):
    case = tmp_path / "case"
    _write(case, toml)
    (case / "bad.csv").write_text(BROKEN_B)
    (case / "two_a.csv").write_text(TWO_DOSES.format(rr=1.2))
    (case / "two_b.csv").write_text(TWO_DOSES.format(rr=1.3))
    out_dir = tmp_path / "out"
    code = main(["run", str(case / "analysis.toml"), "--out", str(out_dir)])
    out, err = capsys.readouterr()
    assert code == 2, err
    assert err.startswith("doseattr: error: ") and err.count("\n") == 1
    assert fragment in err and "Traceback" not in err and out == ""
    assert not out_dir.exists()


def test_curve_covariance_is_the_mean_s_and_the_draws_say_theirs(tmp_path):
    """curve.covariance holds the pooled mean's covariance (the contract);
    with predict = true the draws use covariance + tau^2 (definition of the
    predictive distribution), written as curve.draws_covariance."""
    curve = 'model = "log-linear"\ntau_method = "dl"\npredict = true\n'
    path = _write(tmp_path / "case", _pooled_toml(["A", "B", "Steep"], curve, UNCERTAINTY))
    out = tmp_path / "out"
    assert main(["run", str(path), "--out", str(out), "--quiet"]) == 0
    d = json.loads((out / "results.json").read_text())
    c, pool = d["curve"], d["curve"]["pooling"]
    assert c["covariance"] == pool["covariance"]
    tau2 = pool["tau2"]
    assert tau2 > 0
    assert c["draws_covariance"][0][0] == pytest.approx(pool["covariance"][0][0] + tau2,
                                                        rel=1e-12)
