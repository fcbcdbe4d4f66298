"""Outputs of health-impact burden results (issue 11): rates per
``rate_per`` people, groups within strata, years of life lost and the total
across outcomes, in the report, the figure, the CSV files and the text
summary.

The runs come from the real pipeline on invented inputs (the fixtures of
tests/test_outputs_burden.py); their burden records are then replaced by
records built here the way issue 11 defines them: each stratum of the run
split into two invented age groups with a population, a death rate and a
remaining life expectancy; cases = population x rate / rate_per;
attributable = cases x PAF, rate = attributable / population x rate_per,
YLL = attributable x life expectancy, each from Monte Carlo draws (the
interval is the 2.5th and 97.5th percentiles of the draws, numpy); every
sum (group across strata, stratum across groups, outcome, all outcomes) is
a sum draw by draw. The outputs must reproduce those records exactly: the
checks read the CSV files back with the standard library's csv module and
the report with its HTML parser.
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import csv
import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass, field
from html import escape

import matplotlib.pyplot as plt
import numpy as np
import pytest
from test_outputs_cases import (
    STRATA,
    STRATA_2,
    STUDY,
    UNIT,
    html_tables,
    measurements_csv,
    run_pipeline,
)

from doseattr.outputs import gallery, tables
from doseattr.outputs.burden_report import cases
from doseattr.outputs.markup import NA, estimate_text, interval, pct
from doseattr.outputs.report import render_report
from doseattr.outputs.text import GRAND_TOTAL_CAUTION, YLL_NOTE
from doseattr.results import Estimate, Results, StratumResult
from doseattr.results.records import METHOD_TEXT, BurdenResult, StratumEffect

K = 400  # draws of the hand-built records
RATE_PER = 100_000.0
#: Invented age groups: share of the stratum's population, death rate per
#: 100,000 and remaining life expectancy (years).
GROUPS = {"65-74": (0.6, 1800.0, 13.0), "75+ <old>": (0.4, 6500.0, 7.5)}
SCENARIOS = [{"name": "Cap 40", "cap": 40.0}, {"name": "Cut <25%>", "scale": 0.75}]
CURVE = {"table": "study.csv", "design": "case-control", "model": "log-linear"}
STUDY_2 = """\
lower,upper,rr,ci_lower,ci_upper,cases,controls
0,10,1,,,80,400
10,20,1.30,0.95,1.78,70,250
20,40,1.75,1.25,2.45,66,180
40,,2.60,1.70,3.98,40,70
"""

#: burden_groups.csv and burden_totals.csv, as documented in
#: doseattr/outputs/tables.py (the contract outside readers rely on).
GROUPS_CSV = ["outcome", "level", "stratum", "group", "population", "rate", "cases",
              "attributable", "attributable_lower", "attributable_upper",
              "attributable_rate", "attributable_rate_lower", "attributable_rate_upper",
              "yll", "yll_lower", "yll_upper", "life_expectancy"]
TOTALS_CSV = ["outcome", "level", "scenario", "cases", "population",
              "attributable", "attributable_lower", "attributable_upper",
              "attributable_rate", "attributable_rate_lower", "attributable_rate_upper",
              "yll", "yll_lower", "yll_upper", "averted", "averted_lower", "averted_upper",
              "averted_rate", "averted_rate_lower", "averted_rate_upper",
              "averted_yll", "averted_yll_lower", "averted_yll_upper"]
#: What burden.csv gains after its exposure columns.
BURDEN_CSV_EXTRA = ["group", "rate", "attributable_rate_estimate", "attributable_rate_lower",
                    "attributable_rate_upper", "attributable_rate_mcse", "yll_estimate",
                    "yll_lower", "yll_upper", "yll_mcse", "life_expectancy"]


# -- hand-built records --------------------------------------------------------
@dataclass
class Cell:
    """One row of a burden table or a sum of rows: the point value and the
    draws of the attributable cases, of the YLL and of each scenario's
    averted cases."""

    cases: float
    population: float
    att: tuple[float, np.ndarray]
    yll: tuple[float, np.ndarray]
    averted: dict[str, tuple[float, np.ndarray]] = field(default_factory=dict)
    averted_yll: dict[str, tuple[float, np.ndarray]] = field(default_factory=dict)


def estimate(point: float, draws: np.ndarray) -> Estimate:
    """Point value with the 2.5th and 97.5th percentiles of the draws
    (numpy.percentile) and the Monte Carlo SE of their mean."""
    lo, hi = np.percentile(draws, [2.5, 97.5])
    return Estimate(float(point), float(lo), float(hi), float(draws.std() / np.sqrt(draws.size)))


def scaled(pair: tuple[float, np.ndarray], factor: float) -> tuple[float, np.ndarray]:
    return pair[0] * factor, pair[1] * factor


def added(pairs: Sequence[tuple[float, np.ndarray]]) -> tuple[float, np.ndarray]:
    return sum(p[0] for p in pairs), np.sum([p[1] for p in pairs], axis=0)


def total_of(cells: Sequence[Cell]) -> Cell:
    """A sum of rows, draw by draw."""
    names = list(cells[0].averted)
    return Cell(sum(c.cases for c in cells), sum(c.population for c in cells),
                added([c.att for c in cells]), added([c.yll for c in cells]),
                {n: added([c.averted[n] for c in cells]) for n in names},
                {n: added([c.averted_yll[n] for c in cells]) for n in names})


def record(c: Cell, stratum: str, *, group: str | None = None, rate: float | None = None,
           life_expectancy: float | None = None, exposure=None, rates: bool = True,
           yll: bool = True) -> StratumResult:
    """The StratumResult of a cell: PAF = attributable / cases and
    rate = attributable / population x rate_per, draw by draw."""
    per = RATE_PER / c.population
    effects = tuple(StratumEffect(
        n, estimate(*scaled(c.averted[n], 1 / c.cases)), estimate(*c.averted[n]),
        estimate(*scaled(c.averted[n], per)) if rates else None,
        estimate(*c.averted_yll[n]) if yll else None) for n in c.averted)
    return StratumResult(stratum, c.cases, estimate(*scaled(c.att, 1 / c.cases)),
                         estimate(*c.att), effects, c.population if rates else None, exposure,
                         group, rate, estimate(*scaled(c.att, per)) if rates else None,
                         estimate(*c.yll) if yll else None,
                         life_expectancy if yll else None)


def build(run_burden: BurdenResult, rng: np.random.Generator, *, groups: bool = True,
          rates: bool = True, yll: bool = True,
          method: str = "paf") -> tuple[BurdenResult, Cell]:
    """The run's strata split into :data:`GROUPS` (or kept whole with
    ``groups=False``), with the run's PAF and PIFs per stratum and
    lognormal draws around them."""
    rows: list[tuple[StratumResult, Cell]] = []
    by_group: dict[str, list[Cell]] = {g: [] for g in GROUPS}
    by_stratum: list[tuple[str, list[Cell]]] = []
    for s in run_burden.strata:
        parts = GROUPS.items() if groups else [(None, (1.0, 900.0, 11.0))]
        mine = []
        for g, (share, rate, le) in parts:
            pop = 20_000.0 * share + 100.0 * len(s.stratum)
            n = pop * rate / RATE_PER
            paf = s.paf.estimate
            att = (n * paf, n * paf * np.exp(rng.normal(0.0, 0.15, K)))
            c = Cell(n, pop, att, scaled(att, le))
            for e in s.scenarios:
                c.averted[e.name] = (n * e.pif.estimate,
                                     n * e.pif.estimate * np.exp(rng.normal(0.0, 0.2, K)))
                c.averted_yll[e.name] = scaled(c.averted[e.name], le)
            rows.append((record(c, s.stratum, group=g, rate=rate, life_expectancy=le,
                                exposure=s.exposure, rates=rates, yll=yll), c))
            mine.append(c)
            if g is not None:
                by_group[g].append(c)
        by_stratum.append((s.stratum, mine))
    total = total_of([c for _, c in rows])
    sums = {"rates": rates, "yll": yll}
    b = BurdenResult(
        tuple(r for r, _ in rows), record(total, "total", **sums), method=method,
        rate_per=RATE_PER,
        groups=tuple(record(total_of(cs), "all strata", group=g, **sums)
                     for g, cs in by_group.items()) if groups else (),
        stratum_totals=tuple(record(total_of(cs), name, **sums) for name, cs in by_stratum)
        if groups else ())
    return b, total


def with_health_impact(run: Results, *, seed: int = 5, methods=("paf", "paf"),
                       **options) -> Results:
    """``run`` (two outcomes) with hand-built burdens and the grand total:
    the sum of the outcomes' totals draw by draw, over the same people
    (population = the first outcome's)."""
    rng = np.random.default_rng(seed)
    outcomes, cells = [], []
    for (name, o), method in zip(run.outcomes, methods):
        b, total = build(o.burden, rng, method=method, **options)
        outcomes.append((name, dataclasses.replace(o, burden=b)))
        cells.append(total)
    grand = total_of(cells)
    grand.population = cells[0].population
    return dataclasses.replace(run, outcomes=tuple(outcomes), burden=outcomes[0][1].burden,
                               grand_total=record(grand, "all outcomes",
                                                  rates=options.get("rates", True),
                                                  yll=options.get("yll", True)))


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """Two outcomes, each with its own curve and strata (real pipeline)."""
    folder = tmp_path_factory.mktemp("health")
    settings = {"unit": UNIT, "exposure": {"table": "values.csv", "family": "lognormal"},
                "attribution": {"minimum_risk": 3.0}, "scenario": SCENARIOS,
                "uncertainty": {"draws": 100, "seed": 3},
                "outcome": [{"name": "Deaths <all>", "curve": CURVE,
                             "burden": {"table": "strata.csv"}},
                            {"name": "Deaths & cardio", "curve": {**CURVE, "table": "s2.csv"},
                             "burden": {"table": "strata2.csv"}}]}
    return run_pipeline(folder, settings,
                        {"study.csv": STUDY, "s2.csv": STUDY_2, "values.csv": measurements_csv(),
                         "strata.csv": STRATA, "strata2.csv": STRATA_2})


@pytest.fixture(scope="module")
def health(run):
    return with_health_impact(run)


def _without_rates(b):
    def plain(s):
        return dataclasses.replace(s, population=None, attributable_rate=None, scenarios=tuple(
            dataclasses.replace(e, averted_rate=None) for e in s.scenarios))
    return dataclasses.replace(b, strata=tuple(plain(s) for s in b.strata),
                               total=plain(b.total))


@pytest.fixture(scope="module")
def old(run):
    """The real run as runs were before issue 11: no population (so no
    rates), no groups, no YLL and no total across outcomes."""
    outcomes = tuple((n, dataclasses.replace(o, burden=_without_rates(o.burden)))
                     for n, o in run.outcomes)
    return dataclasses.replace(run, outcomes=outcomes, burden=outcomes[0][1].burden,
                               grand_total=None)


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def read_csv(table, tmp_path, name: str) -> tuple[list[str], list[dict[str, str]]]:
    """Write ``table`` with the writer the outputs use and read it back
    with the csv module."""
    path = tables.write_csv(tmp_path / name, table)
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        return list(reader.fieldnames or []), list(reader)


def number(cell: str) -> float | None:
    return None if cell == "" else float(cell)


def limits(e: Estimate | None) -> list[float | None]:
    return [None, None, None] if e is None else [e.estimate, e.lower, e.upper]


def table_with(html: str, caption: str):
    found = [(h, r) for c, h, r in html_tables(html) if c == caption]
    assert len(found) == 1, (caption, [c for c, _, _ in html_tables(html)])
    return found[0]


# -- CSV -----------------------------------------------------------------------
def test_hand_built_sums_are_sums_of_rows(health):
    """The records the outputs are checked on hold what issue 11 says:
    cases = population x rate / rate_per per row, YLL = attributable x life
    expectancy, and every sum's point value is the sum of its rows' (the
    draws are summed the same way)."""
    for _, o in health.outcomes:
        b = o.burden
        for s in b.strata:
            assert s.cases == pytest.approx(s.population * s.rate / RATE_PER, rel=1e-12)
            assert s.yll.estimate == pytest.approx(s.attributable.estimate * s.life_expectancy,
                                                   rel=1e-12)
        for g in b.groups:
            rows = [s for s in b.strata if s.group == g.group]
            assert g.attributable.estimate == pytest.approx(
                sum(s.attributable.estimate for s in rows), rel=1e-12)
        assert b.total.yll.estimate == pytest.approx(sum(s.yll.estimate for s in b.strata),
                                                     rel=1e-12)
    assert health.grand_total.attributable.estimate == pytest.approx(
        sum(o.burden.total.attributable.estimate for _, o in health.outcomes), rel=1e-12)


def test_burden_groups_csv_equals_the_records(health, tmp_path):
    """burden_groups.csv: exactly the documented columns; per outcome the
    rows of the burden table (level "row"), each group across strata
    ("group"), each stratum across its groups ("stratum") and the total
    ("outcome"), every number the record's."""
    assert "burden_groups.csv" in tables.all_tables(health)
    header, rows = read_csv(tables.all_tables(health)["burden_groups.csv"], tmp_path, "g.csv")
    assert header == GROUPS_CSV
    expected = []
    for name, o in health.outcomes:
        b = o.burden
        expected += [(name, "row", s) for s in b.strata]
        expected += [(name, "group", s) for s in b.groups]
        expected += [(name, "stratum", s) for s in b.stratum_totals]
        expected += [(name, "outcome", b.total)]
    assert len(rows) == len(expected) == 2 * (6 + 2 + 3 + 1)
    for row, (name, level, s) in zip(rows, expected):
        assert (row["outcome"], row["level"]) == (name, level)
        assert row["stratum"] == ("total" if level == "outcome" else s.stratum)
        assert row["group"] == (s.group or "")
        assert [number(row[k]) for k in ("population", "rate", "cases", "life_expectancy")] == [
            s.population, s.rate, s.cases, s.life_expectancy]
        for key, e in (("attributable", s.attributable), ("attributable_rate",
                                                          s.attributable_rate),
                       ("yll", s.yll)):
            assert [number(row[key]), number(row[f"{key}_lower"]),
                    number(row[f"{key}_upper"])] == limits(e)
    levels = [r["level"] for r in rows]
    assert levels.count("group") == 4 and levels.count("stratum") == 6
    assert levels.count("outcome") == 2
    # a row keeps its own rate and life expectancy; a sum has neither
    assert all(r["rate"] and r["life_expectancy"] for r in rows if r["level"] == "row")
    assert not any(r["rate"] or r["life_expectancy"] for r in rows if r["level"] != "row")


def test_burden_totals_csv_equals_the_records(health, tmp_path):
    """burden_totals.csv: exactly the documented columns; one total row per
    outcome and one for all outcomes, each followed by one row per
    scenario holding only the averted cells."""
    header, rows = read_csv(tables.all_tables(health)["burden_totals.csv"], tmp_path, "t.csv")
    assert header == TOTALS_CSV
    totals = [(name, "outcome", o.burden.total) for name, o in health.outcomes]
    totals.append(("", "all outcomes", health.grand_total))
    names = [s["name"] for s in SCENARIOS]
    assert len(rows) == len(totals) * (1 + len(names))
    it = iter(rows)
    for name, level, t in totals:
        row = next(it)
        assert (row["outcome"], row["level"], row["scenario"]) == (name, level, "")
        assert [number(row["cases"]), number(row["population"])] == [t.cases, t.population]
        for key, e in (("attributable", t.attributable), ("attributable_rate",
                                                          t.attributable_rate),
                       ("yll", t.yll)):
            assert [number(row[key]), number(row[f"{key}_lower"]),
                    number(row[f"{key}_upper"])] == limits(e)
        assert all(row[k] == "" for k in TOTALS_CSV if k.startswith("averted"))
        for e in t.scenarios:
            srow = next(it)
            assert (srow["outcome"], srow["level"], srow["scenario"]) == (name, level, e.name)
            for key, est in (("averted", e.averted), ("averted_rate", e.averted_rate),
                             ("averted_yll", e.averted_yll)):
                assert [number(srow[key]), number(srow[f"{key}_lower"]),
                        number(srow[f"{key}_upper"])] == limits(est)
            assert all(srow[k] == "" for k in TOTALS_CSV[3:14])
        assert [e.name for e in t.scenarios] == names


def test_burden_csv_gains_the_health_impact_columns(health, old, tmp_path):
    """burden.csv keeps every column it had, in order, and appends group,
    rate, attributable rate and YLL (with MC SE) and life expectancy; a
    run without groups, rates or YLL has exactly the columns it had."""
    old_header, _ = read_csv(tables.all_tables(old)["burden.csv"], tmp_path, "old.csv")
    header, rows = read_csv(tables.all_tables(health)["burden.csv"], tmp_path, "new.csv")
    assert header == old_header + BURDEN_CSV_EXTRA
    assert not set(BURDEN_CSV_EXTRA) & set(old_header)
    records = [s for _, o in health.outcomes for s in (*o.burden.strata, o.burden.total)]
    assert len(rows) == len(records)
    for row, s in zip(rows, records):
        assert row["group"] == (s.group or "")
        assert number(row["rate"]) == s.rate
        assert number(row["population"]) == s.population
        for key, e in (("attributable_rate", s.attributable_rate), ("yll", s.yll)):
            assert [number(row[f"{key}_{c}"]) for c in ("estimate", "lower", "upper",
                                                        "mcse")] == [
                e.estimate, e.lower, e.upper, e.mcse]
        assert number(row["life_expectancy"]) == s.life_expectancy


def test_old_runs_have_no_new_outputs(old):
    """Without groups, rates, YLL or a grand total: no new CSV file, no new
    figure, no new table, note or line in the report and the summary."""
    run = old
    assert run.grand_total is None
    names = tables.all_tables(run)
    assert "burden_groups.csv" not in names and "burden_totals.csv" not in names
    assert gallery.rate_panels(run.burden_blocks) == []
    assert gallery._burden_rates(run.burden_blocks) is None
    html = render_report(run, figures=False)
    captions = [c for c, _, _ in html_tables(html)]
    assert not any("group" in c or "Totals by outcome" in c for c in captions)
    assert escape(YLL_NOTE) not in html and escape(GRAND_TOTAL_CAUTION) not in html
    for _, o in run.outcomes:
        header, _ = table_with(html, f"{_name(o, run)}: attributable cases by stratum")
        assert header == ["Stratum", "Cases", "Attributable cases", "95% interval", "PAF",
                          "95% interval", "Exposure"]
    text = run.summary()
    assert "Grand total" not in text and "YLL" not in text


def _name(o: Results, run: Results) -> str:
    return next(n for n, x in run.outcomes if x is o)


def test_rates_without_groups_or_grand_total(old, tmp_path):
    """Rates and YLL without groups and without a total across outcomes:
    rate and YLL columns but no group tables and no figure;
    burden_totals.csv holds the outcome totals only."""
    rng = np.random.default_rng(9)
    run = old
    name, o = run.outcomes[0]
    b, _ = build(o.burden, rng, groups=False)
    r = dataclasses.replace(run, outcomes=((name, dataclasses.replace(o, burden=b)),),
                            burden=b)
    assert not b.has_groups and b.has_rates and b.has_yll
    assert gallery._burden_rates(r.burden_blocks) is None
    html = render_report(r, figures=False)
    header, rows = table_with(html, f"{name}: attributable cases by stratum")
    assert "Group" not in header
    assert header[4:6] == ["Attributable per 100,000 (95% interval)",
                           "Years of life lost (95% interval)"]
    for row, s in zip(rows, (*b.strata, b.total)):
        assert row[4:6] == [estimate_text(s.attributable_rate, cases),
                            estimate_text(s.yll, cases)]
    assert not any("summed across" in c for c, _, _ in html_tables(html))
    assert escape(YLL_NOTE) in html
    # key numbers: the rate and the YLL of all strata
    key = next(rows for c, h, rows in html_tables(html) if h[:2] == ["Quantity", "Estimate"])
    t = b.total
    assert ["Attributable cases per 100,000 people in all strata", cases(t.attributable_rate
                                                                         .estimate),
            interval(t.attributable_rate.lower, t.attributable_rate.upper, cases)] in key
    assert ["Years of life lost to attributable deaths in all strata", cases(t.yll.estimate),
            interval(t.yll.lower, t.yll.upper, cases)] in key
    header, rows = read_csv(tables.all_tables(r)["burden_totals.csv"], tmp_path, "t.csv")
    assert [(x["level"], x["scenario"]) for x in rows] == [
        ("outcome", ""), *[("outcome", s["name"]) for s in SCENARIOS]]


# -- report --------------------------------------------------------------------
def test_report_table_by_stratum_and_group(health):
    """One row per row of the burden table: stratum, group, cases,
    attributable with its interval, the rate and the YLL with theirs, PAF;
    the total last."""
    html = render_report(health, figures=False)
    for name, o in health.outcomes:
        b = o.burden
        header, rows = table_with(html, f"{name}: attributable cases by stratum and group")
        assert header == ["Stratum", "Group", "Cases", "Attributable cases", "95% interval",
                          "Attributable per 100,000 (95% interval)",
                          "Years of life lost (95% interval)", "PAF", "95% interval",
                          "Exposure"]
        assert len(rows) == len(b.strata) + 1
        for row, s in zip(rows, (*b.strata, b.total)):
            att = s.attributable
            assert row[2:9] == [cases(s.cases), cases(att.estimate),
                                interval(att.lower, att.upper, cases),
                                estimate_text(s.attributable_rate, cases),
                                estimate_text(s.yll, cases), pct(s.paf.estimate),
                                interval(s.paf.lower, s.paf.upper)]
        assert [r[:2] for r in rows] == [[s.stratum, s.group] for s in b.strata] + [
            ["Total", NA]]


def test_report_group_and_stratum_sums(health):
    """Each group across strata and each stratum across its groups, with
    the total, exactly the records' sums."""
    html = render_report(health, figures=False)
    for name, o in health.outcomes:
        b = o.burden
        for caption, label, sums, key in (
                (f"{name}: each group summed across strata", "Group", b.groups, "group"),
                (f"{name}: each stratum summed across its groups", "Stratum",
                 b.stratum_totals, "stratum")):
            header, rows = table_with(html, caption)
            assert header == [label, "Cases", "Attributable cases", "95% interval",
                              "Attributable per 100,000 (95% interval)",
                              "Years of life lost (95% interval)", "PAF (95% interval)"]
            for row, s in zip(rows, (*sums, b.total)):
                assert row[1:] == [cases(s.cases), cases(s.attributable.estimate),
                                   interval(s.attributable.lower, s.attributable.upper, cases),
                                   estimate_text(s.attributable_rate, cases),
                                   estimate_text(s.yll, cases), estimate_text(s.paf)]
            assert [r[0] for r in rows] == [getattr(s, key) for s in sums] + ["Total"]


def test_report_scenarios_by_group_with_yll_averted(health):
    html = render_report(health, figures=False)
    name, o = health.outcomes[0]
    header, rows = table_with(html, f"{name}: cases averted by each scenario")
    n = SCENARIOS[0]["name"]
    assert header[:5] == ["Stratum", "Group", f"{n}: PIF", f"{n}: cases averted",
                          f"{n}: YLL averted"]
    for row, s in zip(rows, o.burden.strata):
        e = s.scenarios[0]
        assert row[:5] == [s.stratum, s.group, estimate_text(e.pif),
                           estimate_text(e.averted, cases), estimate_text(e.averted_yll, cases)]


def test_key_numbers_hold_the_totals_and_the_grand_total(health):
    """Up front: each outcome's total and the grand total, attributable,
    rate, YLL and averted per scenario with intervals; then the caution
    on adding outcomes and the YLL note."""
    html = render_report(health, figures=False)
    header, rows = table_with(html, "Totals by outcome and across all outcomes")
    names = [s["name"] for s in SCENARIOS]
    assert header == ["Outcome", "Cases", "Attributable cases (95% interval)",
                      "Attributable per 100,000 (95% interval)",
                      "Years of life lost (95% interval)",
                      *[x for n in names for x in (f"Cases averted, {n}", f"YLL averted, {n}")]]
    totals = [(n, o.burden.total) for n, o in health.outcomes]
    totals.append(("All outcomes (grand total)", health.grand_total))
    assert len(rows) == 3
    for row, (label, t) in zip(rows, totals):
        expected = [label, cases(t.cases), estimate_text(t.attributable, cases),
                    estimate_text(t.attributable_rate, cases), estimate_text(t.yll, cases)]
        for e in t.scenarios:
            expected += [estimate_text(e.averted, cases), estimate_text(e.averted_yll, cases)]
        assert row == expected
    summary = html[html.index('id="summary"'):html.index('id="outcomes"')]
    assert "Totals by outcome" in summary
    assert escape(GRAND_TOTAL_CAUTION) in summary and escape(YLL_NOTE) in summary
    assert "do not overlap" in GRAND_TOTAL_CAUTION and "licensed professionals" in \
        GRAND_TOTAL_CAUTION


def test_report_says_which_method_and_shows_both(run):
    """The burden section names the method and what it assumes (the
    records' METHOD_TEXT); with different methods per outcome, one
    sentence per outcome; the methods section gives both formulas with
    their sources."""
    same = render_report(with_health_impact(run), figures=False)
    burden = same[same.index('id="burden"'):]
    assert escape(METHOD_TEXT["paf"]) in burden
    assert escape(METHOD_TEXT["impact-function"]) not in burden
    mixed = render_report(with_health_impact(run, methods=("paf", "impact-function")),
                          figures=False)
    burden = mixed[mixed.index('id="burden"'):mixed.index('id="cautions"')]
    first, second = [n for n, _ in run.outcomes]
    assert escape(f"For {first}, attributable cases were computed by the PAF method") in burden
    assert escape(f"For {second}, attributable cases were computed by the health impact "
                  "function") in burden
    assert escape(METHOD_TEXT["impact-function"]) in burden
    methods = mixed[mixed.index('id="methods"'):]
    for part in ("PAF = 1 \u2212 1/E[RR_m(X)]", "E[1 \u2212 1/RR_m(X)]",
                 "Murray et al. 2003, Popul Health Metr 1:1", "Ostro 2004",
                 "Anenberg et al. 2010",
                 "cited from memory", YLL_NOTE):
        assert escape(part) in methods
    plain = render_report(run, figures=False)
    assert escape(METHOD_TEXT["paf"]) in plain  # the default method of every old run
    assert escape(YLL_NOTE) not in plain


def test_figure_of_rates_by_group(health):
    """One panel per outcome; per group one series of points, one per
    stratum (top first), at the records' attributable rates, whiskers
    from their lower to upper limits."""
    figure = gallery._burden_rates(health.burden_blocks)
    axes = [ax for ax in figure.axes if ax.get_visible()]
    assert len(axes) == len(health.outcomes) == 2
    for ax, (name, o) in zip(axes, health.outcomes):
        b = o.burden
        assert name in ax.get_title()
        assert ax.get_xlabel() == "Attributable per 100,000 people"
        strata = list(dict.fromkeys(s.stratum for s in b.strata))
        assert [t.get_text() for t in ax.get_yticklabels()] == strata
        assert list(np.diff(ax.get_yticks())) == [-1.0] * (len(strata) - 1)  # first on top
        points = [ln for ln in ax.get_lines() if ln.get_gid() == "rates-points"]
        whiskers = [c for c in ax.collections if c.get_gid() == "rates-whiskers"]
        assert [p.get_label() for p in points] == list(GROUPS)
        for group, line, lines in zip(GROUPS, points, whiskers):
            rows = [next(s for s in b.strata if s.stratum == st and s.group == group)
                    for st in strata]
            assert list(line.get_xdata()) == [s.attributable_rate.estimate for s in rows]
            segments = lines.get_segments()
            assert [(float(sg[0][0]), float(sg[1][0])) for sg in segments] == [
                (s.attributable_rate.lower, s.attributable_rate.upper) for s in rows]
            # each point sits on its whisker, in its stratum's row
            np.testing.assert_array_equal([sg[0][1] for sg in segments], line.get_ydata())
        legend = [t.get_text() for t in ax.get_legend().get_texts()]
        assert legend == list(GROUPS)


def test_report_embeds_the_rates_figure(health):
    """render_figures draws it; the report embeds it with its caption."""
    images = gallery.render_figures(dataclasses.replace(health, outcomes=health.outcomes))
    assert "burden_rates" in images and images["burden_rates"][:8] == b"\x89PNG\r\n\x1a\n"
    assert list(images) == [n for n in gallery.FIGURE_NAMES if n in images]
    html = render_report(health, images={"burden_rates": images["burden_rates"]})
    burden = html[html.index('id="burden"'):html.index('id="cautions"')]
    assert burden.count("<img") == 1
    assert "Attributable cases per 100,000 people by group" in burden


def test_summary_text_has_grand_total_rates_and_yll(health):
    """The text summary: group, rate and YLL columns, each outcome's total
    and the grand total line, with the caution."""
    text = health.summary()
    lines = text.splitlines()
    head = next(ln for ln in lines if ln.startswith("stratum"))
    assert head.split() == ["stratum", "group", "cases", "PAF", "attributable", "per",
                            "100,000", "YLL", "exposure"]
    g = health.grand_total

    def count(v: float) -> str:
        return f"{v:,.0f}" if abs(v) >= 1000 else f"{v:.4g}"

    grand = next(ln for ln in lines if ln.startswith("Grand total across outcomes"))
    assert count(g.attributable.estimate) in grand
    assert f"{count(g.yll.estimate)} ({count(g.yll.lower)} to {count(g.yll.upper)})" in text
    assert "do not overlap" in text and "licensed" in text
    totals = lines[lines.index("Totals by outcome") + 3:]
    for (name, o), line in zip(health.outcomes, totals):
        assert line.startswith(name)
        assert count(o.burden.total.attributable.estimate) in line


def test_written_folder_lists_the_new_files(health, tmp_path):
    """Results.write puts both CSV files and the figure in the folder and
    in its manifest (so a rerun may replace them)."""
    import json

    out = tmp_path / "out"
    written = {p.relative_to(out).as_posix() for p in health.write(out)}
    for name in ("burden_groups.csv", "burden_totals.csv", "figures/burden_rates.png"):
        assert name in written and (out / name).is_file()
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    assert {"burden_groups.csv", "burden_totals.csv", "figures/burden_rates.png"} <= {
        f["path"] for f in manifest["files"]}
    health.write(out)  # the folder is doseattr's: a rerun is accepted


def test_own_exposure_sentence_names_each_stratum_once(health):
    """With groups a stratum has several rows; the sentence on strata with
    their own exposure names each once (STRATA gives gm and gsd to two of
    its three strata, read with the csv module)."""
    given = [r["stratum"] for r in csv.DictReader(STRATA.splitlines()) if r["gm"]]
    assert len(given) == 2
    html = render_report(health, figures=False)
    assert escape(f"{given[0]} and {given[1]} had their own exposure descriptions") in html
