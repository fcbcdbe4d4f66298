"""Report, figures and CSV for the exposure section (issue 4): every family
tried when the family is picked by AIC, the Q-Q plots, the substitution
comparison, the empirical distribution, and work histories.

Results come from the real pipeline on invented inputs. Plotted densities
and quantiles are checked against scipy.stats (reference library), closed
forms are derived in the docstrings, and tables must reproduce the numbers
in the results exactly.
"""

from __future__ import annotations

import datetime as dt
import math

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt
import numpy as np
import pytest
from scipy import stats
from test_outputs_cases import (
    STUDY,
    UNIT,
    measurements_csv,
    run_pipeline,
    table_with,
)
from test_outputs_tables import as_csv

from doseattr.core.exposure.nondetects import ros_plotting_positions
from doseattr.outputs import figures, gallery, tables
from doseattr.outputs.markup import num, pct, signed_points
from doseattr.outputs.report import render_report

LIMIT = 3.0
HALF = 0.5
ROOT_HALF = 1 / math.sqrt(2)


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


@pytest.fixture(scope="module")
def best(tmp_path_factory):
    """Measurements with non-detects; the family picked by lowest AIC;
    two substitution fractions for comparison."""
    folder = tmp_path_factory.mktemp("best")
    values = measurements_csv(limit=LIMIT)
    assert "<3" in values  # the case must have non-detects
    return run_pipeline(folder, {
        "unit": UNIT,
        "curve": {"table": "study.csv", "design": "case-control", "model": "log-linear"},
        "exposure": {"table": "values.csv", "family": "best",
                     "substitution": [HALF, ROOT_HALF]},
        "attribution": {"minimum_risk": 5.0}}, {"study.csv": STUDY, "values.csv": values})


@pytest.fixture(scope="module")
def substituted(tmp_path_factory):
    """The same measurements, lognormal, with two substitution fractions."""
    folder = tmp_path_factory.mktemp("substituted")
    return run_pipeline(folder, {
        "unit": UNIT,
        "curve": {"table": "study.csv", "design": "case-control", "model": "log-linear"},
        "exposure": {"table": "values.csv", "family": "lognormal",
                     "substitution": [HALF, ROOT_HALF]},
        "attribution": {"minimum_risk": 5.0}},
        {"study.csv": STUDY, "values.csv": measurements_csv(limit=LIMIT)})


def scipy_family(name: str, params: dict):
    """The scipy.stats distribution of a family with the report's public
    parameters (lognormal: s = ln GSD, scale = GM; gamma: a = shape;
    Weibull: c = shape)."""
    if name == "lognormal":
        return stats.lognorm(s=np.log(params["gsd"]), scale=params["gm"])
    if name == "gamma":
        return stats.gamma(a=params["shape"], scale=params["scale"])
    assert name == "weibull"
    return stats.weibull_min(c=params["shape"], scale=params["scale"])


def params_text(p: dict) -> str:
    return f"gm = {num(p['gm'])} {UNIT}, gsd = {num(p['gsd'], 5)}"


def lines_by_gid(ax) -> dict:
    return {ln.get_gid(): ln for ln in ax.get_lines() if ln.get_gid()}


def test_exposure_figure_draws_every_family_tried(best):
    """The used density and every alternative equal the scipy.stats pdf
    with the parameters in results.json; non-detects are marked apart from
    the detected bars, at their limit."""
    d = best.to_dict()
    fits = d["exposure"]["fits"]
    assert sorted(f["family"] for f in fits) == ["gamma", "lognormal", "weibull"]
    ax = gallery._exposure(best.exposure_section, UNIT).axes[0]
    lines = lines_by_gid(ax)
    for f in fits:
        gid = "fitted-density" if f["family"] == d["exposure"]["family"] else \
            f"density-{f['family']}"
        x, y = lines[gid].get_xdata(), lines[gid].get_ydata()
        np.testing.assert_allclose(y, scipy_family(f["family"], f["parameters"]).pdf(x),
                                   rtol=1e-9, atol=1e-300)
        assert f"AIC {f['aic']:.1f}" in lines[gid].get_label()
    marks = lines["censored-marks"]
    assert len(marks.get_xdata()) == d["exposure"]["censored"] > 0
    assert set(marks.get_xdata()) == {LIMIT}
    assert marks.get_marker() == "v"
    bars = [p for p in ax.patches if p.get_gid() == "data-hist"]
    fit = best.exposure.fit
    w, det = np.asarray(fit.weights, float), np.asarray(fit.detected_mask)
    # bar areas are weighted shares of all measurements (derivation in
    # figures.data_histogram): they sum to the detected weight share
    assert sum(p.get_width() * p.get_height() for p in bars) == pytest.approx(
        w[det].sum() / w.sum(), rel=1e-12)


def test_used_family_has_the_lowest_aic(best):
    """family = "best" means the lowest AIC (Akaike 1974, from memory)."""
    d = best.to_dict()
    aics = {f["family"]: f["aic"] for f in d["exposure"]["fits"]}
    assert min(aics, key=aics.get) == d["exposure"]["family"]


def test_families_table(best):
    """Log-likelihood, AIC, AIC minus the lowest AIC, and the PAF under each
    family (``exposure_comparison``), with the empirical row's reason."""
    d = best.to_dict()
    html = render_report(best, figures=False)
    header, rows = table_with(html, "Exposure families fitted")
    cells = {r[0].replace(" (used)", ""): dict(zip(header, r)) for r in rows}
    low = min(f["aic"] for f in d["exposure"]["fits"])
    for f in d["exposure"]["fits"]:
        c = cells[f["family"]]
        assert c["Log-likelihood"] == num(f["loglik"], 6)
        assert c["AIC"] == num(f["aic"], 6) and c["\u0394AIC"] == num(f["aic"] - low, 3)
        for k, v in f["parameters"].items():
            assert f"{k} = {num(v, 4) if k in ('gm', 'scale') else num(v, 5)}" in c["Parameters"]
    main = d["paf"]["estimate"]
    for v in d["exposure_comparison"]:
        c = cells[v["family"]]
        assert c["PAF"] == pct(v["paf"])
        if v["family"] != d["exposure"]["family"] and v["paf"] is not None:
            assert c["Difference from the PAF used"] == signed_points(v["paf"] - main)
    assert "below a detection limit" in cells["empirical"]["Note"]
    assert [r[0] for r in rows if r[0].endswith("(used)")] == [d["exposure"]["family"] + " (used)"]


def test_qq_panels_one_per_family(best):
    """Each panel plots the measured values against that family's quantiles
    (scipy.stats ppf, reference library) at the censored-data plotting
    positions; non-detects are drawn at their limit."""
    d = best.to_dict()
    figure = gallery._qq(best.exposure_section, UNIT)
    axes = figure.axes
    fits = d["exposure"]["fits"]
    assert len(axes) == len(fits) == 3
    fit = best.exposure.fit
    values, det = np.asarray(fit.values), np.asarray(fit.detected_mask)
    pos = ros_plotting_positions(values, det)
    for ax in axes:
        family = ax.get_title().replace(" (used)", "")
        params = next(f["parameters"] for f in fits if f["family"] == family)
        theory = scipy_family(family, params).ppf(pos)
        lines = lines_by_gid(ax)
        np.testing.assert_allclose(lines["qq-detected"].get_xdata(), theory[det], rtol=1e-8)
        np.testing.assert_array_equal(lines["qq-detected"].get_ydata(), values[det])
        np.testing.assert_allclose(lines["qq-censored"].get_xdata(), theory[~det], rtol=1e-8)
        np.testing.assert_array_equal(lines["qq-censored"].get_ydata(), values[~det])
    assert axes[0].get_title() == f"{d['exposure']['family']} (used)"


def test_substitution_table_and_csv(substituted):
    r"""Each fraction's row shows the PAF it gives and its difference from
    the censored fit, for comparison only. The lognormal refit after
    substitution is checked against its closed form: with every value
    known, the weighted maximum-likelihood estimates are
    GM = exp(sum w ln x / sum w) and
    GSD = exp(sqrt(sum w (ln x - ln GM)^2 / sum w)) (derived by setting the
    weighted log-likelihood's derivatives to zero)."""
    d = substituted.to_dict()
    assert d["exposure"]["family"] == "lognormal" and d["exposure"]["censored"] > 0
    rows_in = d["exposure"]["substitution"]
    assert [r["fraction"] for r in rows_in] == [HALF, ROOT_HALF]
    main = d["paf"]["estimate"]
    html = render_report(substituted, figures=False)
    header, rows = table_with(html, "Substituting non-detects")
    assert [r[0] for r in rows] == ["0.5 \u00d7 limit", "limit / \u221a2"]
    fit = substituted.exposure.fit
    x, det, w = np.asarray(fit.values), np.asarray(fit.detected_mask), np.asarray(fit.weights)
    for row, r in zip(rows, rows_in):
        cells = dict(zip(header, row))
        assert cells["PAF"] == pct(r["paf"])
        assert r["difference"] == pytest.approx(r["paf"] - main, rel=1e-12, abs=1e-15)
        assert cells["Difference from the censored fit"] == signed_points(r["difference"])
        logs = np.log(np.where(det, x, r["fraction"] * x))
        mu = np.sum(w * logs) / w.sum()
        sigma = math.sqrt(np.sum(w * (logs - mu) ** 2) / w.sum())
        assert r["parameters"]["gm"] == pytest.approx(math.exp(mu), rel=1e-6)
        assert r["parameters"]["gsd"] == pytest.approx(math.exp(sigma), rel=1e-6)
        assert params_text(r["parameters"]) in cells["Parameters fitted"]
    assert "for comparison only" in html and "left-censored" in html
    assert "Helsel DR (2012)" in html  # reference listed when non-detects are shown
    csv_rows = as_csv(tables.substitution_table(substituted.exposure_section))
    for c, r in zip(csv_rows, rows_in):
        assert float(c["fraction"]) == r["fraction"] and float(c["paf"]) == r["paf"]
        assert float(c["difference"]) == r["difference"]


# -- the empirical path ------------------------------------------------------
RR_PER_10, M, TOP = 1.2, 2.0, 40.0


@pytest.fixture(scope="module")
def empirical(tmp_path_factory):
    folder = tmp_path_factory.mktemp("empirical")
    values = measurements_csv(limit=0.0, seed=5)  # every value detected
    return run_pipeline(folder, {
        "unit": UNIT,
        "curve": {"model": "log-linear", "rr": RR_PER_10, "per": 10.0, "max_dose": TOP},
        "exposure": {"table": "values.csv", "family": "empirical"},
        "attribution": {"minimum_risk": M}}, {"values.csv": values})


def test_empirical_paf_is_a_weighted_mean(empirical):
    r"""Closed form on weighted points: with RR_m(x) = 1.2^((min(max(x, m),
    T) - m)/10) and weights w_i, E[RR_m] = sum w_i RR_m(x_i) / sum w_i and
    PAF = 1 - 1/E[RR_m] (no unexposed share); the report prints that PAF and
    says how it was computed."""
    ex = empirical.exposure
    x, w = np.asarray(ex.values), np.asarray(ex.weights)
    rr = RR_PER_10 ** ((np.clip(x, M, TOP) - M) / 10.0)
    paf = 1 - 1 / (np.sum(w * rr) / w.sum())
    assert empirical.paf.estimate == pytest.approx(paf, rel=1e-10)
    html = render_report(empirical, figures=False)
    assert pct(paf) in html
    assert "weighted mean over the measured values" in html
    d = empirical.to_dict()
    assert d["exposure"]["parameters"] == {}


def test_empirical_figure_has_no_fitted_density(empirical):
    """Weighted bars of all the values (areas sum to 1), no density used;
    families fitted for comparison only are dotted and equal the scipy.stats
    pdf with their parameters."""
    ax = gallery._exposure(empirical.exposure_section, UNIT).axes[0]
    lines = lines_by_gid(ax)
    assert "fitted-density" not in lines
    bars = [p for p in ax.patches if p.get_gid() == "data-hist"]
    assert sum(p.get_width() * p.get_height() for p in bars) == pytest.approx(1.0, rel=1e-12)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any("weighted" in t and "mean" in t for t in labels)
    d = empirical.to_dict()
    compared = list(d["exposure"]["fits"])
    for f in compared:
        line = lines[f"compare-{f['family']}"]
        assert line.get_linestyle() == ":" and "comparison only" in line.get_label()
        np.testing.assert_allclose(line.get_ydata(),
                                   scipy_family(f["family"], f["parameters"]).pdf(
                                       line.get_xdata()), rtol=1e-9, atol=1e-300)
    assert gallery._qq(empirical.exposure_section, UNIT) is None  # no fitted family to compare with


# -- work histories ----------------------------------------------------------
JOBS = (("w1", "2000-01-01", "2004-01-01", 0.5), ("w1", "2004-01-01", "2006-07-01", 1.5),
        ("w2", "1998-03-01", "2001-03-01", 0.2), ("w3", "2010-01-01", "2020-01-01", 0.8),
        ("w4", "1990-06-15", "1992-06-15", 2.0), ("w5", "2005-01-01", "2015-01-01", 0.1),
        ("w6", "2001-01-01", "2003-01-01", 0.6), ("w7", "1995-01-01", "2005-01-01", 0.35))


@pytest.fixture(scope="module")
def histories(tmp_path_factory):
    folder = tmp_path_factory.mktemp("histories")
    text = "worker,start,end,intensity\n" + "".join(f"{w},{a},{b},{c}\n" for w, a, b, c in JOBS)
    return run_pipeline(folder, {
        "unit": "mg/m3-years",
        "curve": {"model": "log-linear", "rr": 1.1, "per": 1.0, "max_dose": 20.0},
        "exposure": {"histories": "jobs.csv", "family": "gamma", "as_of": "2023-01-01"},
        "attribution": {"minimum_risk": 0.0}}, {"jobs.csv": text})


def hand_cumulative() -> dict[str, float]:
    """Intensity x days / 365.25 summed per worker (the analysis file's
    definition of a year), days by datetime.date subtraction."""
    out: dict[str, float] = {}
    for w, a, b, c in JOBS:
        days = (dt.date.fromisoformat(b) - dt.date.fromisoformat(a)).days
        out[w] = out.get(w, 0.0) + c * days / 365.25
    return out


def test_workers_csv_and_histogram(histories):
    """Per-worker cumulative exposure equals the hand computation; the
    histogram's bar heights equal numpy.histogram of the same values
    (reference library)."""
    expected = hand_cumulative()
    d = histories.to_dict()
    rows = as_csv(tables.workers_table(histories.workers))
    assert {r["worker"] for r in rows} == set(expected)
    for r in rows:
        assert float(r["cumulative"]) == pytest.approx(expected[r["worker"]], rel=1e-12)
    read_back = [{k: v if k == "worker" else float(v) for k, v in r.items()} for r in rows]
    assert read_back == d["workers"]  # the CSV and results.json agree exactly
    ax = gallery._workers(histories.exposure_section, "mg/m3-years").axes[0]
    bars = [p for p in ax.patches if p.get_gid() == "cumulative-hist"] or ax.patches
    heights = [p.get_height() for p in bars]
    counts, _ = np.histogram(list(expected.values()), bins=len(bars))
    np.testing.assert_array_equal(heights, counts)
    assert "mg/m3-years" in ax.get_xlabel()


def test_histories_in_the_report(histories):
    """The report states the number of workers and the range of their
    cumulative exposures (hand computation above)."""
    expected = hand_cumulative()
    html = render_report(histories, figures=False)
    assert f"work histories of {len(expected)} workers" in html
    assert f"cumulative exposures of {len(expected)} workers" in html
    assert num(min(expected.values())) in html and num(max(expected.values())) in html


def test_banded_exposure_bars_and_no_qq():
    r"""Counts in bands: each closed band is one bar over the band with
    height n_i / (N (u_i - l_i)) (so its area is the band's share, derived),
    the open top band is named in the legend with its share, and the
    fitted density equals scipy.stats.gamma's pdf (reference library). No
    Q-Q plot: banded data have no individual values."""
    from test_outputs_cases import make_curve

    from doseattr.analysis.assemble import exposure_section
    from doseattr.core.exposure.summary import fit_bins

    lower = np.array([0.0, 5.0, 10.0, 20.0, 40.0])
    upper = np.array([5.0, 10.0, 20.0, 40.0, np.inf])
    counts = np.array([120.0, 260.0, 310.0, 180.0, 40.0])
    ex = fit_bins("gamma", lower, upper, counts)
    ax = figures.plot_exposure(ex, unit=UNIT)
    bars = sorted((p for p in ax.patches if p.get_gid() == "band-bars"), key=lambda p: p.get_x())
    assert [p.get_x() for p in bars] == list(lower[:-1])
    assert [p.get_width() for p in bars] == list((upper - lower)[:-1])
    np.testing.assert_allclose([p.get_height() for p in bars],
                               counts[:-1] / (counts.sum() * (upper - lower)[:-1]), rtol=1e-14)
    assert sum(p.get_width() * p.get_height() for p in bars) == pytest.approx(
        1 - counts[-1] / counts.sum(), rel=1e-12)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert f"open band above 40: {counts[-1] / counts.sum():.1%} (not drawn)" in labels
    line = lines_by_gid(ax)["fitted-density"]
    shape, scale = ex.parameters["shape"], ex.parameters["scale"]
    np.testing.assert_allclose(line.get_ydata(),
                               stats.gamma(a=shape, scale=scale).pdf(line.get_xdata()),
                               rtol=1e-9, atol=1e-300)
    section = exposure_section(make_curve(), ex, comparison=(), substitution=(),
                               worker_totals=None, parametric=())
    assert gallery._qq(section, UNIT) is None
