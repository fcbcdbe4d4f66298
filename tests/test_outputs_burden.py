"""Report, figures and CSV for uncertainty, attributable cases by stratum
and scenario, the width of the interval by source, and several outcomes
side by side (issue 5).

Results come from the real pipeline on invented inputs. What is drawn and
printed must equal the numbers in the results object; the percentile
interval and the histogram are recomputed from the draws with numpy
(reference library), and the totals are checked against their definitions
in the issue (total PAF = total attributable / total cases).
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import csv
import io
from html import escape

import matplotlib.pyplot as plt
import numpy as np
import pytest
from scipy import stats
from test_outputs_cases import (
    STRATA,
    STRATA_2,
    STUDY,
    UNIT,
    html_tables,
    measurements_csv,
    run_pipeline,
    table_with,
)
from test_outputs_tables import as_csv

from doseattr.outputs import gallery, tables
from doseattr.outputs.burden_figures import OWN_MARK, OWN_NOTE
from doseattr.outputs.burden_report import cases
from doseattr.outputs.markup import estimate_text, interval, num, pct
from doseattr.outputs.report import render_report

DRAWS = 200
SCENARIOS = [{"name": "Cap 40", "cap": 40.0}, {"name": "Cut <25%>", "scale": 0.75}]
STUDY_2 = """\
lower,upper,rr,ci_lower,ci_upper,cases,controls
0,10,1,,,80,400
10,20,1.30,0.95,1.78,70,250
20,40,1.75,1.25,2.45,66,180
40,,2.60,1.70,3.98,40,70
"""


def base(**more) -> dict:
    return {"unit": UNIT, "exposure": {"table": "values.csv", "family": "lognormal"},
            "attribution": {"minimum_risk": [3.0, 7.0]}, "scenario": SCENARIOS,
            "uncertainty": {"draws": DRAWS, "seed": 7}, **more}


CURVE = {"table": "study.csv", "design": "case-control", "model": "log-linear"}


@pytest.fixture(scope="module")
def single(tmp_path_factory):
    """One curve, strata with cases (two with their own exposure)."""
    folder = tmp_path_factory.mktemp("single")
    return run_pipeline(folder, base(curve=CURVE, burden={"table": "strata.csv"}),
                        {"study.csv": STUDY, "values.csv": measurements_csv(),
                         "strata.csv": STRATA})


@pytest.fixture(scope="module")
def outcomes(tmp_path_factory):
    """Two outcomes, each with its own curve and strata."""
    folder = tmp_path_factory.mktemp("outcomes")
    return run_pipeline(folder, base(outcome=[
        {"name": "Bronchitis", "curve": CURVE, "burden": {"table": "strata.csv"}},
        {"name": "Asthma & wheeze", "curve": {**CURVE, "table": "study2.csv"},
         "burden": {"table": "strata2.csv"}}]),
        {"study.csv": STUDY, "study2.csv": STUDY_2, "values.csv": measurements_csv(),
         "strata.csv": STRATA, "strata2.csv": STRATA_2})


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def test_paf_draws_histogram(single):
    """The histogram holds every draw of results.propagation (40 bins, as
    numpy.histogram of the same draws in percent gives them); the marked
    limits are the 2.5th and 97.5th percentiles, which numpy.percentile of
    the draws reproduces."""
    draws = np.asarray(single.propagation.paf[0], float)
    assert draws.shape == (DRAWS,)
    ax = gallery._paf_draws(single.uncertainty, single.paf).axes[0]
    bars = [p for p in ax.patches if p.get_gid() == "draws-hist"]
    counts, _ = np.histogram(100 * draws, bins=40)
    np.testing.assert_array_equal([p.get_height() for p in bars], counts)
    lo, hi = np.percentile(draws, [2.5, 97.5])
    assert single.paf.lower == pytest.approx(lo, rel=1e-12)
    assert single.paf.upper == pytest.approx(hi, rel=1e-12)
    vlines = sorted(ln.get_xdata()[0] for ln in ax.get_lines())
    np.testing.assert_allclose(vlines, sorted(100 * np.array([lo, single.paf.estimate, hi])),
                               rtol=1e-12)


def whiskers(ax, prefix):
    """``[(lower, upper)]`` of the interval whiskers, top bar first."""
    coll = [c for c in ax.collections if c.get_gid() == f"{prefix}-whiskers"]
    assert len(coll) == 1
    segs = sorted(coll[0].get_segments(), key=lambda s: -s[0][1])
    return [(s[0][0], s[1][0]) for s in segs]


def bar_widths(ax, prefix):
    bars = sorted((p for p in ax.patches if p.get_gid() == f"{prefix}-bars"),
                  key=lambda p: -p.get_y())
    return [p.get_width() for p in bars]


def test_burden_figure_bars_and_whiskers(outcomes):
    """One row per outcome: attributable cases per stratum with their
    interval (left); all attributable and each scenario's averted cases in
    total with intervals (right). Every number is the results'."""
    figure = gallery._burden(outcomes.burden_blocks)
    axes = [ax for ax in figure.axes if ax.get_visible()]
    assert len(axes) == 4
    for (left, right), (name, o) in zip(zip(axes[::2], axes[1::2]), outcomes.outcomes):
        strata = o.burden.strata
        assert name in left.get_title()
        assert [t.get_text().removesuffix(f" {OWN_MARK}") for t in left.get_yticklabels()] == [
            s.stratum for s in strata]
        assert bar_widths(left, "strata") == [s.attributable.estimate for s in strata]
        assert whiskers(left, "strata") == [(s.attributable.lower, s.attributable.upper)
                                            for s in strata]
        total = o.burden.total
        expected = [total.attributable] + [s.averted for s in total.scenarios]
        assert bar_widths(right, "scenario") == [e.estimate for e in expected]
        assert whiskers(right, "scenario") == [(e.lower, e.upper) for e in expected]
        assert [t.get_text() for t in right.get_yticklabels()][1:] == [
            s["name"] for s in SCENARIOS]


def own_exposure_strata(text: str) -> list[str]:
    """Strata of a burden table that give their own exposure: those with
    values in the gm and gsd columns (the burden table's rule, read with
    the standard library's csv module)."""
    import csv
    import io

    lines = [ln for ln in text.splitlines() if not ln.startswith("#")]
    return [r["stratum"] for r in csv.DictReader(io.StringIO("\n".join(lines)))
            if (r.get("gm") or "").strip() and (r.get("gsd") or "").strip()]


def marked_strata(ax) -> list[str]:
    return [t.get_text().removesuffix(f" {OWN_MARK}") for t in ax.get_yticklabels()
            if t.get_text().endswith(f" {OWN_MARK}")]


def test_burden_figure_marks_strata_with_their_own_exposure(outcomes):
    """Exactly the strata whose row in the burden table gives gm and gsd
    carry the mark, and the legend explains it; the second outcome's table
    has no exposure columns, so its panel has neither."""
    figure = gallery._burden(outcomes.burden_blocks)
    left = [ax for ax in figure.axes if ax.get_visible()][::2]
    assert marked_strata(left[0]) == own_exposure_strata(STRATA) == ["South <b>",
                                                                     "East & hills"]
    assert [t.get_text() for t in left[0].get_legend().get_texts()] == [OWN_NOTE]
    assert marked_strata(left[1]) == own_exposure_strata(STRATA_2) == []
    assert left[1].get_legend() is None


def test_demo_burden_figure_marks_quarryside():
    """The bundled demo: data_demo/districts.csv gives Quarryside (only)
    its own GM and GSD, so only Quarryside is marked."""
    from pathlib import Path

    import doseattr

    demo = Path(__file__).resolve().parent.parent / "data_demo"
    r = doseattr.run_analysis(doseattr.load_analysis(demo / "analysis.toml"))
    figure = gallery._burden(r.burden_blocks)
    strata_ax = figure.axes[0]
    own = own_exposure_strata((demo / "districts.csv").read_text(encoding="utf-8"))
    assert own == ["Quarryside"]
    assert marked_strata(strata_ax) == own
    assert [t.get_text() for t in strata_ax.get_legend().get_texts()] == [OWN_NOTE]


def test_strata_table_with_intervals(single):
    """Cases, attributable cases and PAF with their intervals, per stratum
    and in total; the total PAF is the total attributable over the total
    cases (definition in the issue), and the totals' point estimates are the
    sums of the strata's."""
    b = single.burden
    html = render_report(single, figures=False)
    header, rows = table_with(html, "attributable cases by stratum")
    # the table has a population column, so every count also has its rate (issue 11)
    assert header == ["Stratum", "Cases", "Attributable cases", "95% interval",
                      "Attributable per 100,000 (95% interval)", "PAF", "95% interval",
                      "Exposure"]
    for row, (label, s) in zip(rows, [(s.stratum, s) for s in b.strata] + [("Total", b.total)]):
        att, paf = s.attributable, s.paf
        assert s.attributable_rate is not None and s.population is not None
        assert s.attributable_rate.estimate == pytest.approx(
            att.estimate / s.population * 1e5, rel=1e-12)
        assert row[:4] + row[5:-1] == [label, cases(s.cases), cases(att.estimate),
                            interval(att.lower, att.upper, cases), pct(paf.estimate),
                            interval(paf.lower, paf.upper)]
        assert paf.lower < paf.estimate < paf.upper
    t = b.total
    assert t.attributable.estimate == pytest.approx(
        sum(s.attributable.estimate for s in b.strata), rel=1e-12)
    assert t.paf.estimate == pytest.approx(t.attributable.estimate / t.cases, rel=1e-12)


def test_strata_table_names_each_strata_exposure(single):
    """The strata of STRATA with gm and gsd (read back with the csv module)
    show them with their mean exposure, checked against scipy.stats.lognorm
    (reference library; no unexposed share here); the others say "shared",
    and one sentence under the table names the strata with their own."""
    html = render_report(single, figures=False)
    _, rows = table_with(html, "attributable cases by stratum")
    cells = {r[0]: r[-1] for r in rows}
    given = list(csv.DictReader(io.StringIO(STRATA)))
    own = [r["stratum"] for r in given if r["gm"]]
    assert len(own) == 2
    for r in given:
        if not r["gm"]:
            assert cells[r["stratum"]] == "shared"
            continue
        gm, gsd = float(r["gm"]), float(r["gsd"])
        mean = stats.lognorm(s=np.log(gsd), scale=gm).mean()
        assert cells[r["stratum"]] == (f"own: GM {num(gm)} {UNIT}, GSD {num(gsd)}; "
                                       f"mean exposure {num(mean)} {UNIT}")
    sentence = (f"{own[0]} and {own[1]} had their own exposure descriptions in the burden "
                "table and the other strata use the shared exposure distribution")
    assert escape(sentence) in html
    assert "South &lt;b&gt;" in html and "South <b>" not in html


def test_scenario_table_by_stratum(single):
    """Every stratum's PIF and cases averted per scenario, with intervals,
    exactly as in the results; user text is escaped."""
    b = single.burden
    html = render_report(single, figures=False)
    header, rows = table_with(html, "cases averted by each scenario")
    names = [s["name"] for s in SCENARIOS]
    assert header == ["Stratum"] + [f"{n}: {w}" for n in names for w in ("PIF",
                                                                          "cases averted")]
    records = [(s.stratum, s) for s in b.strata] + [("Total", b.total)]
    for row, (label, r) in zip(rows, records):
        assert [e.name for e in r.scenarios] == names
        expected = [label]
        for e in r.scenarios:
            expected += [estimate_text(e.pif), estimate_text(e.averted, cases)]
        assert row == expected
    assert "Cut &lt;25%&gt;" in html and "Cut <25%>" not in html


def test_every_fraction_table_has_intervals(single):
    """Key numbers, the scenarios of the attribution section, the
    uncertainty table and the continuous row of the categorical comparison
    all carry the 95% interval of the results."""
    html = render_report(single, figures=False)
    paf = interval(single.paf.lower, single.paf.upper)
    found = html_tables(html)
    key = next(r for c, h, r in found if h[:2] == ["Quantity", "Estimate"])
    assert key[0][2] == paf
    for row, s in zip(key[1:], single.scenarios):
        assert row[2] == interval(s.pif.lower, s.pif.upper)
    _, rows = table_with(html, "Scenarios")
    assert [r[3] for r in rows] == [interval(s.pif.lower, s.pif.upper)
                                    for s in single.scenarios]
    _, rows = table_with(html, "Categorical against continuous PAF")
    assert rows[-1][1] == estimate_text(single.paf)


def test_width_by_source_table(single):
    """One row per source varied alone, widest first, then all sources
    together; the share is width / full width; with strata the interval of
    the total attributable cases is beside it."""
    unc = single.uncertainty
    widths = sorted(unc.width_by_source, key=lambda r: -r.width)
    assert {r.source for r in widths} == {"curve", "exposure", "minimum_risk"}
    assert unc.minimum_risk_varied  # minimum_risk is a range in base()
    html = render_report(single, figures=False)
    header, rows = table_with(html, "which input drives the width")
    full = unc.width_all
    for row, r in zip(rows, widths + [full]):
        cells = dict(zip(header, row))
        assert cells["95% interval of the PAF"] == interval(r.lower, r.upper)
        assert cells["Share of the full width"] == f"{100 * r.width / full.width:.0f}%"
        assert cells["Attributable cases, 95% interval"] == interval(*r.attributable, cases)
    assert rows[-1][0] == "all sources together"
    # the full interval is the total PAF's (strata given), as in the burden table
    total = single.burden.total.paf
    assert (full.lower, full.upper) == pytest.approx((total.lower, total.upper), rel=1e-12)
    assert "the minimum-risk level (uniform over its range)" in html
    csv_rows = as_csv(tables.width_by_source_table(single.uncertainty))
    json_rows = single.to_dict()["uncertainty"]["width_by_source"]
    assert [float(r["width"]) for r in csv_rows] == [r["width"] for r in json_rows]


def test_outcomes_side_by_side(outcomes):
    """One column per outcome holding that outcome's PAF, PIFs, cases and
    attributable cases with intervals, exactly as in the results."""
    names = [name for name, _ in outcomes.outcomes]
    runs = [o for _, o in outcomes.outcomes]
    html = render_report(outcomes, figures=False)
    header, rows = table_with(html, "PAF, PIF and cases per outcome")
    assert header == ["", *names]
    row = {r[0]: r[1:] for r in rows}
    assert row["PAF"] == [estimate_text(o.paf) for o in runs]
    for s in SCENARIOS:
        assert row[f"PIF, {s['name']}"] == [
            estimate_text(next(x.pif for x in o.scenarios if x.name == s["name"]))
            for o in runs]
    totals = [o.burden.total for o in runs]
    assert row["Attributable cases"] == [estimate_text(t.attributable, cases) for t in totals]
    assert row["Cases (all strata)"] == [cases(t.cases) for t in totals]
    # one stratum table per outcome
    for n in names:
        table_with(html, f"{n}: attributable cases by stratum")
    # each outcome's own width-by-source table
    assert len([c for c, _, _ in html_tables(html) if "which input drives" in c]) == 2


def test_outcome_curves_side_by_side(outcomes):
    """Each panel's line is that outcome's RR(x) (the curve object itself)."""
    figure = gallery._outcome_curves(outcomes.outcomes, UNIT)
    axes = [ax for ax in figure.axes if ax.get_visible()]
    assert len(axes) == len(outcomes.outcomes) == 2
    for ax, (name, r) in zip(axes, outcomes.outcomes):
        line = next(ln for ln in ax.get_lines() if ln.get_gid() == "fitted-rr")
        np.testing.assert_allclose(line.get_ydata(), r.curve.rr(line.get_xdata()), rtol=1e-12)
        assert name in ax.get_title() and pct(r.paf.estimate) in ax.get_title()


def test_burden_csv_files(outcomes):
    """burden.csv: one row per outcome and stratum plus the totals, the PAF
    as estimate and limits; burden_scenarios.csv: one row per outcome,
    stratum (and total) and scenario. Values are the results' exactly."""
    blocks = outcomes.burden_blocks
    assert [n for n, _ in blocks] == [n for n, _ in outcomes.outcomes]
    rows = as_csv(tables.burden_blocks_table(blocks, UNIT))
    n_rows = sum(len(o.burden.strata) + 1 for _, o in outcomes.outcomes)
    assert len(rows) == n_rows
    first = outcomes.outcomes[0][1].burden.strata[0]
    assert float(rows[0]["paf_lower"]) == first.paf.lower
    assert float(rows[0]["paf_estimate"]) == first.paf.estimate
    assert float(rows[0]["attributable_upper"]) == first.attributable.upper
    assert "scenarios" not in rows[0]
    scen = as_csv(tables.burden_scenarios_blocks_table(blocks))
    assert len(scen) == n_rows * len(SCENARIOS)
    last = outcomes.outcomes[-1][1].burden.total.scenarios[-1]
    assert scen[-1]["stratum"] == "total" and scen[-1]["scenario"] == last.name
    assert float(scen[-1]["averted_estimate"]) == last.averted.estimate


def test_each_outcomes_warnings_are_shown(outcomes):
    """The top-level warnings are the first outcome's; every other
    outcome's warnings must still reach the report's warning box, named by
    outcome (and "no warnings" must not be claimed)."""
    import dataclasses
    from html import escape

    name, second = outcomes.outcomes[1]
    flagged = dataclasses.replace(second, warnings=second.warnings + ("fit <poor> here",))
    r = dataclasses.replace(outcomes, outcomes=(outcomes.outcomes[0], (name, flagged)))
    html = render_report(r, figures=False)
    assert "No warnings were raised" not in html
    box = html[html.index('<div class="warnings">'):]
    box = box[:box.index("</div>")]
    for w in flagged.warnings:
        assert w not in outcomes.warnings
        assert escape(f"{name}: {w}") in box
    for w in outcomes.outcomes[0][1].warnings:  # already the top-level ones
        assert escape(f"{outcomes.outcomes[0][0]}: {w}") not in html
