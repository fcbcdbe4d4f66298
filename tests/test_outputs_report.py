"""The HTML report: self-contained, escaped, complete, and sections that
appear only when the results hold what they show."""

from __future__ import annotations

import base64
import csv
import dataclasses
import datetime as dt
import math
import tomllib
from html import escape
from html.parser import HTMLParser
from pathlib import Path

import pytest
from scipy import stats
from test_outputs_cases import SCENARIO_NAMES, make_results, table_with

from doseattr.outputs import report
from doseattr.outputs.report import render_report
from doseattr.results import BurdenResult, Estimate, StratumExposure, StratumResult

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


class Collector(HTMLParser):
    """Every tag and its attributes, and the visible text."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def parse(html: str) -> Collector:
    c = Collector()
    c.feed(html)
    return c


@pytest.fixture(scope="module")
def results():
    return make_results()


@pytest.fixture(scope="module")
def html(results):
    return render_report(results, date=dt.date(2024, 6, 1))


def test_self_contained(html):
    """No reference to anything outside the file: no http(s) or protocol-
    relative src/href, no scripts, no external style sheets; every image is
    a base64 PNG data URI."""
    doc = parse(html)
    imgs = [a for t, a in doc.tags if t == "img"]
    assert len(imgs) == 5  # curve, exposure, Q-Q, contribution, categorical
    for tag, attrs in doc.tags:
        for key in ("src", "href"):
            value = attrs.get(key)
            if value is not None:
                assert not value.startswith(("http://", "https://", "//")), (tag, value)
        assert tag not in ("script", "link", "iframe", "object")
    for a in imgs:
        prefix = "data:image/png;base64,"
        assert a["src"].startswith(prefix)
        assert base64.b64decode(a["src"][len(prefix):])[:8] == PNG_MAGIC
        assert a.get("alt")
    assert "http://" not in html and "https://" not in html


def test_contains_cautions_warnings_and_scenarios_escaped(html, results):
    for caution in results.cautions:
        assert escape(caution) in html
    for warning in results.warnings:
        assert escape(warning) in html
    for name in SCENARIO_NAMES:
        assert escape(name) in html
    assert "<limit>" not in html  # the raw scenario text would be markup
    assert escape("Test <analysis> & co") in html
    assert "<analysis>" not in html


def test_key_numbers_and_date(html, results):
    text = "".join(parse(html).text)
    assert "2024-06-01" in text
    assert report.pct(results.paf.estimate) in text
    for s in results.scenarios:
        assert report.pct(s.pif.estimate) in text
    assert "<th>95% interval</th>" not in html  # no uncertainty run: no interval column
    for heading in ("Relative-risk curve", "Exposure distribution", "Cautions",
                    "Continuous against categorical", "Methods and references"):
        assert heading in text
    assert "Greenland S, Longnecker MP (1992)" in text


def test_curve_section_numbers(html, results):
    c = results.to_dict()["curve"]
    text = "".join(parse(html).text)
    assert report.num(c["coefficients"][0], 5) in text
    assert report.num(c["standard_errors"][0], 4) in text
    assert f"Q = {report.num(c['q'], 4)} on {c['df']} degrees of freedom" in text
    for f in c["fitted"]:
        assert report.num(f["rr_fitted"]) in text


def test_pct_formatting():
    """Three significant figures, trailing zeros kept (common practice)."""
    assert report.pct(0.1234) == "12.3%"
    assert report.pct(0.25) == "25.0%"
    assert report.pct(1.0) == "100%"
    assert report.pct(None) == report.NA


def test_cautions_never_missing():
    r = make_results(cautions=())
    html = render_report(r, figures=False)
    from doseattr.results.cautions import CAUTIONS

    for caution in CAUTIONS:
        assert escape(caution) in html


def test_no_warnings_message():
    html = render_report(make_results(warnings=()), figures=False)
    assert "No warnings were raised" in html
    assert 'class="warnings"' not in html


def test_uncertainty_section_only_with_intervals(results):
    assert 'id="uncertainty"' not in render_report(results, figures=False)
    p = results.paf.estimate
    with_ci = dataclasses.replace(results, attribution=dataclasses.replace(
        results.attribution, paf=Estimate(p, 0.8 * p, 1.2 * p, 0.001)))
    html = render_report(with_ci, figures=False)
    assert 'id="uncertainty"' in html
    text = "".join(parse(html).text)
    assert f"{report.pct(0.8 * p)} to {report.pct(1.2 * p)}" in text


def test_burden_section_from_typed_records():
    """Strata and total as the results layer records them (numbers invented:
    the test checks that the cells show them, formatted and escaped; the
    total PAF is total attributable over total cases, 18.5 / 200)."""
    shared = StratumExposure(False, "lognormal", {"gm": 10.0, "gsd": 2.0}, 12.0)
    strata = (StratumResult("North <A>", 120.0, Estimate(0.104),
                            Estimate(12.5, 9.0, 16.0), exposure=shared),
              StratumResult("South", 80.0, Estimate(0.075), Estimate(6.0, 4.0, 8.5),
                            exposure=shared))
    total = StratumResult("total", 200.0, Estimate(18.5 / 200.0), Estimate(18.5, 14.0, 23.0))
    html = report.burden_section(BurdenResult(strata, total), "ug/m3", {})
    assert escape("North <A>") in html and "<A>" not in html
    assert "12.5" in html and "9 to 16" in html and "Total" in html and "9.25%" in html
    header, rows = table_with(html, "attributable cases by stratum")
    assert header[-1] == "Exposure"
    assert [r[-1] for r in rows] == ["shared", "shared", report.NA]
    assert "own exposure" not in html  # no sentence when every stratum shares the exposure
    assert report.burden_section(None, "ug/m3", {}) == ""


DEMO = Path(__file__).resolve().parents[1] / "data_demo"


def demo_strata() -> list[dict[str, str]]:
    """The rows of the demo's burden table (invented demo data), read with
    the standard library's csv module; ``#`` lines are comments."""
    with open(DEMO / "districts.csv", encoding="utf-8", newline="") as fh:
        return list(csv.DictReader(line for line in fh if not line.startswith("#")))


@pytest.fixture(scope="module")
def demo():
    from doseattr.analysis import load_analysis, run_analysis

    return run_analysis(load_analysis(DEMO / "analysis.toml"))


def test_demo_report_shows_each_districts_exposure(demo):
    """Quarryside has its own GM and GSD in districts.csv; the report says
    so beside its PAF, with its mean exposure, and the other districts
    say "shared". The mean is checked against scipy.stats.lognorm (reference
    library) with the demo's unexposed share at zero:
    (1 - u) x GM exp(ln(GSD)^2 / 2)."""
    with open(DEMO / "analysis.toml", "rb") as fh:
        unexposed = tomllib.load(fh)["exposure"]["unexposed"]
    html = render_report(demo, figures=False)
    header, rows = table_with(html, "attributable cases by stratum")
    cells = {r[0]: dict(zip(header, r)) for r in rows}
    given = demo_strata()
    own = [r["stratum"] for r in given if r["gm"]]
    assert own == ["Quarryside"]
    for r in given:
        cell = cells[r["stratum"]]["Exposure"]
        if not r["gm"]:
            assert cell == "shared"
            continue
        gm, gsd = float(r["gm"]), float(r["gsd"])
        mean = (1 - unexposed) * stats.lognorm(s=math.log(gsd), scale=gm).mean()
        assert cell == (f"own: GM {report.num(gm)} {demo.unit}, GSD {report.num(gsd)}; "
                        f"mean exposure {report.num(mean)} {demo.unit}")
    assert cells["Total"]["Exposure"] == report.NA
    # PAFs differ exactly where exposures do
    pafs = {cells[r["stratum"]]["PAF"] for r in given if not r["gm"]}
    assert len(pafs) == 1 and cells["Quarryside"]["PAF"] not in pafs
    text = "".join(parse(html).text)
    assert ("Quarryside had its own exposure description in the burden table and the other "
            "strata use the shared exposure distribution") in text


def test_figures_false_has_no_images(results):
    html = render_report(results, figures=False)
    assert "<img" not in html


def entered_results():
    """A published log-linear curve (RR 1.08 per 10, CI 1.06 to 1.09, invented
    for the test) over an exposure given by GM and GSD: no bands, no fit, no data."""
    from test_outputs_cases import make_results as _base

    from doseattr.analysis.assemble import curve_section, exposure_section
    from doseattr.core.attribution.categorical import categorical_comparison
    from doseattr.core.attribution.contribution import burden_density
    from doseattr.core.attribution.fractions import paf
    from doseattr.core.curves.published import published_curve
    from doseattr.core.exposure.summary import from_gm_gsd

    curve = published_curve("log-linear", rr=1.08, per=10.0, ci=(1.06, 1.09), max_dose=60.0)
    exposure = from_gm_gsd(12.0, 1.8)
    base = _base()
    attribution = dataclasses.replace(
        base.attribution, paf=Estimate(paf(curve, exposure, minimum_risk=5.0)),
        minimum_risk=5.0, scenarios=(), contribution=burden_density(curve, exposure, 5.0))
    return dataclasses.replace(
        base, curve_section=curve_section(curve, exposure, None, (), ()),
        exposure_section=exposure_section(curve, exposure, comparison=(), substitution=(),
                                          worker_totals=None, parametric=()),
        attribution=attribution,
        categorical=categorical_comparison(curve, exposure, minimum_risk=5.0,
                                           cutpoints=[10.0, 20.0, 40.0]))


def test_entered_curve_and_summary_exposure():
    r = entered_results()
    html = render_report(r)
    text = "".join(parse(html).text)
    assert "entered as published" in text
    assert "Goodness of fit" not in text and "Study bands" not in text
    assert "<th scope='row'>Measurements</th>" not in html  # no data behind the exposure
    imgs = [a for t, a in parse(html).tags if t == "img"]
    assert len(imgs) == 4  # no Q-Q plot without measurements
    assert "RR: study" not in text  # no reported RRs for the analysis's own cutpoints


def test_same_results_give_identical_bytes(results, monkeypatch):
    """Figures carry no time stamp and the date can be fixed with
    SOURCE_DATE_EPOCH (86400 s after 1970-01-01 is 1970-01-02), so the
    report is byte-identical on a rerun."""
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "86400")
    first, second = render_report(results), render_report(results)
    assert first == second
    assert "1970-01-02" in first
