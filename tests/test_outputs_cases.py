"""Results built from real core objects, shared by the outputs tests.

The inputs (band table, measurements, scenarios) are invented; every
expected value in the outputs tests is computed in the test from an outside
reference (scipy, closed forms) or read back from the results object that
the output must reproduce exactly.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from reference_integrals import expect_over
from scipy import stats

from doseattr.analysis.assemble import curve_section, exposure_section
from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_inputs
from doseattr.core.attribution.categorical import categorical_comparison
from doseattr.core.attribution.contribution import burden_density
from doseattr.core.attribution.fractions import paf, pif
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale
from doseattr.core.curves.covariance import greenland_longnecker, var_log_rr_from_ci
from doseattr.core.curves.fit import fit_curve
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.fit import fit_measurements
from doseattr.results import AttributionSection, BandTable, Estimate, Results, ScenarioResult

UNIT = "ug/m3"
# Invented study bands (inputs only).
LOWER = np.array([0.0, 5.0, 10.0, 20.0])
UPPER = np.array([5.0, 10.0, 20.0, np.inf])
DOSE = np.array([2.5, 7.5, 15.0, 25.0])
RR = np.array([1.0, 1.3, 1.6, 2.4])
CI_LO = np.array([np.nan, 1.0, 1.2, 1.6])
CI_HI = np.array([np.nan, 1.7, 2.1, 3.6])
CASES = np.array([100.0, 80.0, 70.0, 50.0])
CONTROLS = np.array([300.0, 200.0, 150.0, 80.0])
MINIMUM_RISK = 2.5
UNEXPOSED = 0.05
LIMIT = 2.0
SCENARIO_NAMES = ("Cap at 15 <limit> & more", "Halve \"all\"", "Lower by 3")


def make_curve():
    var = var_log_rr_from_ci(RR[1:], CI_LO[1:], CI_HI[1:])
    cov = greenland_longnecker(RR, np.r_[0.0, var], CASES, CONTROLS, design="case-control", ref=0)
    return fit_curve(LogLinear(reference_dose=DOSE[0]), DOSE[1:], np.log(RR[1:]), cov,
                     max_dose=float(DOSE[-1]))


def make_exposure(censored: bool = True):
    rng = np.random.default_rng(20240611)
    values = np.exp(rng.normal(np.log(6.0), np.log(2.0), 80))
    detected = values > LIMIT if censored else np.ones(values.size, bool)
    values = np.where(detected, values, LIMIT)
    weights = rng.uniform(0.5, 2.0, values.size)
    ex = fit_measurements("lognormal", values, detected=detected, weights=weights)
    return dataclasses.replace(ex, unexposed=UNEXPOSED)


def make_analysis(title: str):
    """A real Analysis for the title, unit and settings the Results reads
    (built from a dict without files; the numbers in it are not used)."""
    return analysis_from_dict({
        "title": title, "unit": UNIT,
        "curve": {"model": "log-linear", "rr": 1.1, "per": 10.0},
        "exposure": {"family": "lognormal", "gm": 6.0, "gsd": 2.0},
        "attribution": {"minimum_risk": MINIMUM_RISK}})


def make_results(*, title: str = "Test <analysis> & co", warnings=("Fit <warning> one",),
                 cautions=("Causal only if unconfounded <caution>.",
                           "Miettinen's case-based formula for adjusted RRs."),
                 censored: bool = True) -> Results:
    curve, exposure, m = make_curve(), make_exposure(censored), MINIMUM_RISK
    kinds = (Cap(15.0), Scale(0.5), ReduceBy(3.0))
    scenarios = tuple(ScenarioResult(name, s.kind, s.value, Estimate(pif(curve, exposure, s, minimum_risk=m)))
                      for name, s in zip(SCENARIO_NAMES, kinds))
    bands = BandTable(LOWER, UPPER, DOSE, RR, CI_LO, CI_HI, np.array([True, False, False, False]),
                      ("given",) * 4)
    analysis = make_analysis(title)
    attribution = AttributionSection(Estimate(paf(curve, exposure, minimum_risk=m)), m, None,
                                     scenarios, burden_density(curve, exposure, m))
    return Results(
        title=analysis.title, unit=analysis.unit,
        curve_section=curve_section(curve, exposure, bands, (), ()),
        exposure_section=exposure_section(curve, exposure, comparison=(), substitution=(),
                                          worker_totals=None, parametric=()),
        attribution=attribution,
        categorical=categorical_comparison(curve, exposure, minimum_risk=m,
                                           cutpoints=UPPER[:-1], reported_rr=RR),
        warnings=tuple(warnings), cautions=tuple(cautions), inputs=run_inputs(analysis))


def quad_paf(results: Results) -> float:
    r"""PAF by scipy.integrate.quad, the outside reference.

    With a log-linear curve held flat beyond ``max_dose`` = M and minimum
    risk m: RR_m(x) = exp(b (min(max(x, m), M) - m)); E[RR_m(X)] =
    u + (1 - u) \int RR_m(x) f(x) dx with f the lognormal density
    (scipy.stats.lognorm(s=ln GSD, scale=GM)); PAF = 1 - 1/E.
    """
    c, ex, m = results.curve, results.exposure, results.minimum_risk
    b, top = float(c.coef[0]), float(c.max_dose)
    gm, gsd = ex.parameters["gm"], ex.parameters["gsd"]
    f = stats.lognorm(s=np.log(gsd), scale=gm)

    def rr_m(x):
        return np.exp(b * (min(max(x, m), top) - m))

    body = expect_over(rr_m, f, (m, top), epsrel=1e-12, limit=200)
    e = ex.unexposed + (1 - ex.unexposed) * body
    return 1 - 1 / e


@pytest.fixture(scope="module")
def results() -> Results:
    return make_results()


def test_case_paf_matches_scipy_quad(results):
    """The shared case is a real analysis: its PAF agrees with
    scipy.integrate.quad (reference library), so outputs are tested on
    numbers that are right."""
    assert results.paf.estimate == pytest.approx(quad_paf(results), rel=1e-8, abs=0)
    assert 0.0 < results.paf.estimate < 1.0
    assert results.exposure.fit.censored > 0  # the plots must show non-detects


# -- results from the real pipeline (issues 3 to 5) ---------------------------
# Invented inputs only: a study table with counts, measurements with
# non-detects, strata. Every expected value in the tests that use them is read
# from the results object or computed from an outside reference.
STUDY = """\
lower,upper,rr,ci_lower,ci_upper,cases,controls
0,10,1,,,120,480
10,20,1.18,0.85,1.64,95,310
20,40,1.42,1.01,2.00,88,220
40,80,1.85,1.22,2.80,54,105
80,,2.40,1.39,4.13,30,45
"""

#: Risk that jumps in the first exposed band and then stays level: a
#: log-linear model through the reference band cannot follow it.
STEP_STUDY = """\
lower,upper,rr,ci_lower,ci_upper,cases,controls
0,5,1,,,200,800
5,10,2.00,1.70,2.35,180,360
10,20,2.05,1.75,2.40,175,340
20,40,2.10,1.78,2.48,160,305
40,,2.15,1.80,2.57,120,225
"""

STRATA = """\
stratum,cases,population,gm,gsd
North,420,52000,,
South <b>,310,48000,14,2.3
East & hills,150,21000,8,1.9
"""

STRATA_2 = """\
stratum,cases
North,60
South <b>,45
East & hills,20
"""


def measurements_csv(n: int = 60, limit: float = 3.0, seed: int = 11) -> str:
    """Lognormal values (GM 10, GSD 2.2) with weights; values below
    ``limit`` written as non-detects ``<limit``."""
    rng = np.random.default_rng(seed)
    values = np.exp(rng.normal(np.log(10.0), np.log(2.2), n))
    weights = rng.integers(1, 6, n)
    cells = [f"<{limit:g}" if v < limit else f"{v:.3f}" for v in values]
    return "value,weight\n" + "".join(f"{c},{w}\n" for c, w in zip(cells, weights))


def run_pipeline(folder, settings: dict, files: dict[str, str]) -> Results:
    """Write ``files`` into ``folder`` and run ``settings`` (shaped like
    the analysis file) through the real pipeline."""
    from doseattr.analysis.pipeline import run_analysis

    folder.mkdir(parents=True, exist_ok=True)
    for name, text in files.items():
        (folder / name).write_text(text, encoding="utf-8")
    return run_analysis(analysis_from_dict(settings, base_dir=folder))


def html_tables(html: str) -> list[tuple[str, list[str], list[list[str]]]]:
    """Every ``<table>`` of a page as ``(caption, header, rows)`` of cell
    text (entities decoded), read with the standard library's parser; the
    header is the row inside ``<thead>``."""
    from html.parser import HTMLParser

    class Tables(HTMLParser):
        def __init__(self) -> None:
            super().__init__(convert_charrefs=True)
            self.found: list[list] = []
            self.text: list[str] | None = None
            self.row: list[str] | None = None
            self.in_head = False

        def handle_starttag(self, tag, attrs):
            if tag == "table":
                self.found.append(["", [], []])
            elif tag == "thead":
                self.in_head = True
            elif tag == "tbody":
                self.in_head = False
            elif tag == "tr":
                self.row = []
            elif tag in ("td", "th", "caption"):
                self.text = []

        def handle_endtag(self, tag):
            if tag == "caption":
                self.found[-1][0] = "".join(self.text)
            elif tag in ("td", "th"):
                self.row.append("".join(self.text))
            elif tag == "tr":
                if self.in_head:
                    self.found[-1][1] = self.row
                else:
                    self.found[-1][2].append(self.row)
            if tag in ("td", "th", "caption"):
                self.text = None

        def handle_data(self, data):
            if self.text is not None:
                self.text.append(data)

    parser = Tables()
    parser.feed(html)
    return [(c, h, r) for c, h, r in parser.found]


def table_with(html: str, caption_part: str) -> tuple[list[str], list[list[str]]]:
    """Header and rows of the one table whose caption contains ``caption_part``."""
    found = [(h, r) for c, h, r in html_tables(html) if caption_part in c]
    assert len(found) == 1, (caption_part, [c for c, _, _ in html_tables(html)])
    return found[0]
