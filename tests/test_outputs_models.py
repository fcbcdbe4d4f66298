"""Report, figures and CSV for the curve models compared, the dose
assignment sensitivity, and the fit of a model to the study's bands (issue 3).

The results come from the real pipeline on invented inputs. The figures
and tables must reproduce the numbers in the results object exactly; the
printed goodness-of-fit p-values are also checked against
scipy.stats.chi2 (reference library).
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import csv
import io

import matplotlib.pyplot as plt
import numpy as np
import pytest
from scipy import stats
from test_outputs_cases import (
    STEP_STUDY,
    STUDY,
    UNIT,
    measurements_csv,
    run_pipeline,
    table_with,
)
from test_outputs_tables import as_csv

from doseattr.outputs import gallery, tables
from doseattr.outputs.markup import num, pct, signed_points
from doseattr.outputs.report import render_report

MODELS = ["log-linear", "linear", "power"]


def settings(model: str, study: str = "study.csv", **curve) -> dict:
    return {"title": "models", "unit": UNIT,
            "curve": {"table": study, "design": "case-control", "model": model, **curve},
            "exposure": {"table": "values.csv", "family": "lognormal"},
            "attribution": {"minimum_risk": 5.0}}


@pytest.fixture(scope="module")
def spline(tmp_path_factory):
    """A spline with three other models compared on the same bands."""
    folder = tmp_path_factory.mktemp("spline")
    return run_pipeline(folder, settings("spline", knot_count=3, compare_models=MODELS),
                        {"study.csv": STUDY, "values.csv": measurements_csv()})


@pytest.fixture(scope="module")
def step(tmp_path_factory):
    """A log-linear model on bands whose risk jumps and then stays level."""
    folder = tmp_path_factory.mktemp("step")
    return run_pipeline(folder, settings("log-linear", compare_models=["spline"]),
                        {"study.csv": STEP_STUDY, "values.csv": measurements_csv()})


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def gid_line(ax, gid):
    found = [ln for ln in ax.get_lines() if ln.get_gid() == gid]
    assert len(found) == 1, gid
    return found[0]


def test_every_model_is_compared(spline):
    """Precondition of the tests below: every model of compare_models was
    fitted (the analysis's own model first)."""
    labels = [v.label for v in spline.model_comparison]
    assert labels == ["spline", *MODELS]
    assert all(v.curve is not None and v.paf is not None for v in spline.model_comparison)


def test_model_panels_draw_each_model_with_the_band_estimates(spline):
    """One panel per model: its line is that model's RR(x) (the curve
    object itself), its title gives the model's PAF, and the study's band
    estimates sit at the doses that model was fitted at."""
    figure = gallery._models(spline.curve_section, spline.exposure, UNIT)
    axes = [ax for ax in figure.axes if ax.get_visible()]
    variants = spline.model_comparison
    assert len(axes) == len(variants)
    ref = np.asarray(spline.band_table.reference)
    for ax, v in zip(axes, variants):
        line = gid_line(ax, "fitted-rr")
        x = line.get_xdata()
        np.testing.assert_allclose(line.get_ydata(), v.curve.rr(x), rtol=1e-12)
        assert pct(v.paf) in ax.get_title() and v.label in ax.get_title()
        points = next(c for c in ax.containers if c.get_label().startswith("study")).lines[0]
        np.testing.assert_array_equal(points.get_xdata(), np.asarray(v.doses)[~ref])
        np.testing.assert_array_equal(points.get_ydata(), spline.band_table.rr[~ref])
    # one shared dose axis
    assert len({ax.get_xlim() for ax in axes}) == 1


def test_curve_figure_overlays_the_other_models(spline):
    figure = gallery._curve(spline.curve_section, spline.exposure, UNIT)
    ax = figure.axes[0]
    np.testing.assert_allclose(gid_line(ax, "fitted-rr").get_ydata(),
                               spline.curve.rr(gid_line(ax, "fitted-rr").get_xdata()), rtol=1e-12)
    for v in spline.model_comparison[1:]:
        line = gid_line(ax, f"model-{v.label}")
        x = line.get_xdata()
        y = line.get_ydata()
        ok = np.isfinite(y)  # a power curve without offset has no RR at dose 0
        np.testing.assert_allclose(y[ok], v.curve.rr(x[ok]), rtol=1e-12)
        assert line.get_linestyle() == "--"
    # the model the analysis used (CurveVariant.used) is the solid line, not repeated dashed
    used = [v.label for v in spline.model_comparison if v.used]
    assert used == ["spline"]
    assert not [ln for ln in ax.get_lines() if ln.get_gid() == f"model-{used[0]}"]


def test_model_table_gives_each_models_paf_and_fit(spline):
    """Each row: the model's PAF, Q / df, p and non-linearity p as in the
    results; p is scipy.stats.chi2.sf(Q, df) (reference library)."""
    d = spline.to_dict()
    html = render_report(spline, figures=False)
    header, rows = table_with(html, "PAF under each curve model")
    assert [r[0] for r in rows] == ["spline (used)", *MODELS]
    main = d["paf"]["estimate"]
    for row, v in zip(rows, d["model_comparison"]):
        cells = dict(zip(header, row))
        assert cells["PAF"] == pct(v["paf"])
        assert cells["Q / df"] == f"{num(v['q'], 3)} / {v['df']}"
        assert v["p_value"] == pytest.approx(stats.chi2.sf(v["q"], v["df"]), rel=1e-10)
        assert cells["p (fit)"].startswith(num(v["p_value"], 3))
        expected = "\u2013" if v["label"] == "spline" else signed_points(v["paf"] - main)
        assert cells["Difference from the PAF used"] == expected
        for b in v["coefficients"]:
            assert num(b, 4) in cells["Coefficients (SE)"]
    spline_row = dict(zip(header, rows[0]))
    assert spline_row["p (non-linearity)"] == num(d["curve"]["nonlinearity_p"], 3)
    assert f"p = {num(d['curve']['nonlinearity_p'], 3)}" in html  # curve text too


def test_dose_sensitivity_table(spline):
    """One row per dose rule with the doses and PAF of the results exactly
    as formatted; the rule the analysis used is marked once."""
    d = spline.to_dict()
    html = render_report(spline, figures=False)
    header, rows = table_with(html, "Sensitivity to the dose assigned")
    variants = d["dose_sensitivity"]
    assert len(rows) == len(variants) >= 3
    used = [r for r in rows if r[0].endswith("(used)")]
    assert len(used) == 1 and used[0][0].startswith("band midpoint")
    # the record marks the rule applied: without a dose column, the default
    # "given" assigns each closed band its midpoint (l + u) / 2 (definition)
    applied = [v for v in spline.dose_sensitivity if v.used]
    assert [v.label for v in applied] == ["midpoint"]
    bands = list(csv.DictReader(io.StringIO(STUDY)))
    assert "dose" not in bands[0]
    mids = [(float(b["lower"]) + float(b["upper"])) / 2 for b in bands if b["upper"]]
    np.testing.assert_allclose(applied[0].doses[:len(mids)], mids, rtol=1e-15)
    for row, v in zip(rows, variants):
        cells = dict(zip(header, row))
        assert cells["PAF"] == pct(v["paf"])
        assert cells[f"Assigned doses ({UNIT})"] == ", ".join(num(x) for x in v["doses"])
    # the rules really move the doses: band means differ from midpoints
    mids = next(v for v in variants if v["label"] == "midpoint")["doses"]
    means = next(v for v in variants if v["label"] == "band-mean")["doses"]
    assert not np.allclose(mids, means)


def test_no_poor_fit_warning_when_the_model_fits(spline):
    """p >= 0.05 (the conventional threshold, common practice): no warning."""
    html = render_report(spline, figures=False)
    assert spline.curve.fit.p_value > 0.05
    assert "Poor fit:" not in html


def test_poor_fit_warning_and_reported_against_fitted(step):
    """The log-linear model cannot follow a jump then a plateau: Q is large
    and its p (scipy.stats.chi2.sf, reference library) below 0.05, so the
    report warns beside the fit; the table of reported against fitted RRs
    shows both, the fitted ones being exp(fitted log RR) of the fit."""
    fit = step.curve.fit
    p = stats.chi2.sf(fit.q, fit.df)
    assert p < 0.05 and fit.p_value == pytest.approx(p, rel=1e-10)
    html = render_report(step, figures=False)
    assert "Poor fit:" in html and "fits the study&#x27;s band estimates poorly" in html
    assert f"Q = {num(fit.q, 4)} on {fit.df} degrees of freedom, p = {num(p, 3)}" in html
    _header, rows = table_with(html, "reported against fitted RR")
    exposed = [r for r in rows if "(reference)" not in r[2]]
    np.testing.assert_array_equal([r[2] for r in exposed],
                                  [num(v) for v in np.exp(fit.log_rr)])
    np.testing.assert_array_equal([r[4] for r in exposed],
                                  [num(v) for v in np.exp(fit.fitted_log_rr)])
    # each model compared is flagged exactly when its own p is below 0.05
    _, model_rows = table_with(html, "PAF under each curve model")
    for row, v in zip(model_rows, step.model_comparison):
        assert row[3].endswith("(poor fit)") == (v.curve.fit.p_value < 0.05), row


def test_model_and_dose_csv_full_precision(spline):
    """CSV cells read back as the exact floats of results.json (Python's
    float repr round-trips)."""
    d = spline.to_dict()
    rows = as_csv(tables.model_comparison_table(spline.curve_section))
    assert [r["model"] for r in rows] == ["spline", *MODELS]
    for r, v in zip(rows, d["model_comparison"]):
        assert float(r["paf"]) == v["paf"] and float(r["q"]) == v["q"]
        assert float(r["coefficient_1"]) == v["coefficients"][0]
    assert rows[0]["coefficient_2"] != "" and rows[1]["coefficient_2"] == ""
    rows = as_csv(tables.dose_sensitivity_table(spline.curve_section, UNIT))
    for r, v in zip(rows, d["dose_sensitivity"]):
        assert [float(r[f"dose_{i + 1} ({UNIT})"]) for i in range(len(v["doses"]))] == v["doses"]
        assert float(r["paf"]) == v["paf"]
