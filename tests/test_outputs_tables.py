"""CSV tables for optional results (burden, workers) and cell formatting,
and the report and figures for an empirical exposure."""

from __future__ import annotations

import csv
import io

import numpy as np
import pytest
from test_outputs_cases import make_curve

from doseattr.core.attribution.contribution import Contribution
from doseattr.core.exposure.empirical import empirical
from doseattr.core.exposure.histories import cumulative_exposure
from doseattr.outputs import figures, tables


def as_csv(table) -> list[dict[str, str]]:
    buf = io.StringIO()
    header, rows = table
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    for row in rows:
        w.writerow([tables.cell(v) for v in row])
    return list(csv.DictReader(io.StringIO(buf.getvalue())))


def test_cell_full_precision():
    """repr of a float round-trips exactly (Python float repr guarantee)."""
    v = 0.1 + 0.2
    assert float(tables.cell(v)) == v
    assert float(tables.cell(np.float64(1) / 3)) == 1 / 3
    assert tables.cell(None) == "" and tables.cell(True) == "true"
    assert tables.cell(np.int64(7)) == "7"
    assert tables.cell(float("inf")) == ""  # an open-ended band limit


def test_workers_table_from_histories():
    r"""Two workers, hand-computed (days / 365.25, as the analysis file
    defines years): A works 2000-01-01 to 2010-01-01 at 0.2 and 2010-01-01 to
    2012-01-01 at 0.5; B 2005-01-01 to 2006-01-01 at 1.0; as of 2020-01-01,
    no lag. A: 3653 days x 0.2 + 730 days x 0.5, B: 365 days x 1.0."""
    w = cumulative_exposure(
        np.array(["A", "A", "B"]),
        np.array(["2000-01-01", "2010-01-01", "2005-01-01"], dtype="datetime64[D]"),
        np.array(["2010-01-01", "2012-01-01", "2006-01-01"], dtype="datetime64[D]"),
        np.array([0.2, 0.5, 1.0]), as_of=np.datetime64("2020-01-01"))
    from doseattr.analysis.assemble import workers

    rows = as_csv(tables.workers_table(workers(w)))
    assert list(rows[0]) == ["worker", "cumulative", "duration_years", "mean_intensity"]
    assert [r["worker"] for r in rows] == ["A", "B"]
    a_cum = (3653 * 0.2 + 730 * 0.5) / 365.25
    a_dur = (3653 + 730) / 365.25
    assert float(rows[0]["cumulative"]) == pytest.approx(a_cum, rel=1e-12)
    assert float(rows[0]["duration_years"]) == pytest.approx(a_dur, rel=1e-12)
    assert float(rows[0]["mean_intensity"]) == pytest.approx(a_cum / a_dur, rel=1e-12)
    assert float(rows[1]["cumulative"]) == pytest.approx(365 / 365.25, rel=1e-12)
    from doseattr.outputs.records import workers_source

    records = [{k: v if k == "worker" else float(v) for k, v in r.items()} for r in rows]
    assert as_csv(tables.workers_table(records)) == rows  # the results.json list form
    assert workers_source(type("R", (), {"workers": w})(), {"workers": None}) is w
    assert workers_source(object(), {"workers": records}) is records


def test_burden_table_flattens_contract_records():
    d = {"burden": {"strata": [
        {"stratum": "north", "cases": 100.0,
         "attributable": {"estimate": 10.0, "lower": 8.0, "upper": 12.0}, "paf": 0.1}],
        "total": {"cases": 100.0, "attributable": {"estimate": 10.0, "lower": 8.0,
                                                   "upper": 12.0}, "paf": 0.1}}}
    rows = as_csv(tables.burden_table(d))
    assert [r["stratum"] for r in rows] == ["north", "total"]
    assert rows[0]["attributable_lower"] == "8.0" and rows[1]["paf_estimate"] == "0.1"
    # the PAF as a number with its interval beside it (paf_interval) reads the same
    d2 = {"burden": {"strata": [{**d["burden"]["strata"][0], "paf": 0.1, "paf_interval": {
        "estimate": 0.1, "lower": 0.08, "upper": 0.12, "mcse": None}}], "total": None}}
    rows2 = as_csv(tables.burden_table(d2))
    assert rows2[0]["paf_estimate"] == "0.1" and rows2[0]["paf_upper"] == "0.12"
    assert "paf_interval_lower" not in rows2[0]
    outcomes = {"outcomes": [{"name": "asthma", "burden": d["burden"]},
                             {"name": "copd", "burden": d["burden"]}]}
    rows = as_csv(tables.burden_table(outcomes))
    assert [r["outcome"] for r in rows] == ["asthma", "asthma", "copd", "copd"]
    assert tables.burden_table({}) is None


def test_empirical_exposure_plots():
    """Weighted empirical values: histogram bar areas sum to 1 (all values
    detected, derivation as in the fitted case), no density line, and the
    burden drawn as a cumulative share that ends at 100%."""
    rng = np.random.default_rng(3)
    values = rng.gamma(2.0, 4.0, 50)
    weights = rng.uniform(1, 3, 50)
    ex = empirical(values, weights)
    ax = figures.plot_exposure(ex, unit="ppm")
    bars = [p for p in ax.patches if p.get_gid() == "data-hist"]
    assert sum(p.get_height() * p.get_width() for p in bars) == pytest.approx(1.0, rel=1e-12)
    assert not [ln for ln in ax.get_lines() if ln.get_gid() == "fitted-density"]
    # the burden on weighted points, built here: share w_i (RR(x_i) - 1) / E[RR],
    # cumulated in order of x (log-linear RR, minimum risk 0)
    b = float(make_curve().coef[0])
    order = np.argsort(values)
    x, w = values[order], ex.weights[order]
    excess = w * np.expm1(b * x)
    cum = np.cumsum(excess) / excess.sum()
    con = Contribution(x, excess / (1 + excess.sum()), cum, None, excess.sum() / (1 + excess.sum()))
    ax = figures.plot_contribution(con, unit="ppm", cumulative=True)
    line = [ln for ln in ax.get_lines() if ln.get_gid() == "burden-cumulative"][0]
    np.testing.assert_allclose(line.get_ydata(), 100 * cum, rtol=1e-14)
    assert line.get_ydata()[-1] == pytest.approx(100.0, rel=1e-12)
    assert figures.is_empirical(ex) and figures.curve_extent(make_curve(), exposure=ex) > 0
