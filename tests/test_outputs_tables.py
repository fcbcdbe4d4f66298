"""CSV tables built from the typed result sections (burden with each
stratum's exposure, workers) and cell formatting, and the report and
figures for an empirical exposure."""

from __future__ import annotations

import csv
import dataclasses
import io
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from test_outputs_cases import UNIT, make_curve, make_results

from doseattr.analysis.assemble import stratum_exposure, workers
from doseattr.analysis.config import load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.core.attribution.contribution import Contribution
from doseattr.core.exposure import summary
from doseattr.core.exposure.empirical import empirical
from doseattr.core.exposure.histories import cumulative_exposure
from doseattr.outputs import figures, tables
from doseattr.results import BurdenResult, Estimate, StratumResult
from doseattr.results.records import StratumEffect
from doseattr.results.serialize import workers_list

DEMO = Path(__file__).resolve().parent.parent / "data_demo"
#: The columns burden.csv had before the exposure columns were added, in
#: their order: external readers rely on both names and order.
BURDEN_COLUMNS = ["stratum", "cases", "population", "paf_estimate", "paf_lower", "paf_upper",
                  "paf_mcse", "attributable_estimate", "attributable_lower",
                  "attributable_upper", "attributable_mcse"]


def as_csv(table) -> list[dict[str, str]]:
    buf = io.StringIO()
    header, rows = table
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    for row in rows:
        w.writerow([tables.cell(v) for v in row])
    return list(csv.DictReader(io.StringIO(buf.getvalue())))


def header_of(table) -> list[str]:
    return list(table[0])


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
    record = workers(w)
    rows = as_csv(tables.workers_table(record))
    assert list(rows[0]) == ["worker", "cumulative", "duration_years", "mean_intensity"]
    assert [r["worker"] for r in rows] == ["A", "B"]
    a_cum = (3653 * 0.2 + 730 * 0.5) / 365.25
    a_dur = (3653 + 730) / 365.25
    assert float(rows[0]["cumulative"]) == pytest.approx(a_cum, rel=1e-12)
    assert float(rows[0]["duration_years"]) == pytest.approx(a_dur, rel=1e-12)
    assert float(rows[0]["mean_intensity"]) == pytest.approx(a_cum / a_dur, rel=1e-12)
    assert float(rows[1]["cumulative"]) == pytest.approx(365 / 365.25, rel=1e-12)
    # the CSV holds exactly the numbers of results.json's workers list
    read_back = [{k: v if k == "worker" else float(v) for k, v in r.items()} for r in rows]
    assert read_back == workers_list(record)
    assert tables.workers_table(None) is None


# -- burden.csv: attributable cases and each stratum's exposure ---------------
def lognormal_mean(gm: float, gsd: float, unexposed: float = 0.0) -> float:
    r"""Mean exposure with a share ``unexposed`` at zero and the rest
    lognormal: (1 - u) GM exp(ln(GSD)^2 / 2) (closed form of the lognormal
    mean, exp(mu + sigma^2 / 2) with mu = ln GM, sigma = ln GSD)."""
    return (1.0 - unexposed) * gm * math.exp(math.log(gsd) ** 2 / 2)


def stratum(name: str, cases: float, paf: float, exposure, shared, given=None) -> StratumResult:
    """A stratum record as the pipeline builds it (invented inputs; the
    tests read them back)."""
    p = Estimate(paf, 0.8 * paf, 1.2 * paf, 1e-4)
    a = Estimate(cases * paf, cases * p.lower, cases * p.upper, cases * 1e-4)
    effect = StratumEffect("Cap", Estimate(paf / 2), Estimate(cases * paf / 2))
    return StratumResult(name, cases, p, a, (effect,), 10 * cases,
                         stratum_exposure(exposure, shared, given))


def burden_of(*strata: StratumResult) -> BurdenResult:
    cases = sum(s.cases for s in strata)
    attributable = sum(s.attributable.estimate for s in strata)
    averted = sum(s.scenarios[0].averted.estimate for s in strata)
    effect = StratumEffect("Cap", Estimate(averted / cases), Estimate(averted))
    total = StratumResult("total", cases, Estimate(attributable / cases), Estimate(attributable),
                          (effect,))
    return BurdenResult(tuple(strata), total)


def test_burden_table_shows_each_strata_exposure():
    """The burden columns keep their names and order; after them, whether
    the stratum had its own exposure, its family and parameters, and its
    mean (lognormal closed form, unexposed at zero); the total row leaves
    the exposure cells empty."""
    shared = dataclasses.replace(summary.from_gm_gsd(10.0, 2.0), unexposed=0.05)
    own = dataclasses.replace(summary.from_gm_gsd(18.0, 2.5), unexposed=0.05)
    b = burden_of(stratum("North", 100.0, 0.1, shared, shared),
                  stratum("South", 50.0, 0.2, own, shared, {"gm": 18.0, "gsd": 2.5}))
    table = tables.burden_table(b, UNIT)
    mean = f"exposure_mean ({UNIT})"
    assert header_of(table) == [*BURDEN_COLUMNS, "exposure", "exposure_family", "exposure_gm",
                                "exposure_gsd", mean]
    rows = as_csv(table)
    assert [r["stratum"] for r in rows] == ["North", "South", "total"]
    assert [r["exposure"] for r in rows] == ["shared", "own", ""]
    for r, s, (gm, gsd) in zip(rows, b.strata, [(10.0, 2.0), (18.0, 2.5)]):
        assert float(r["cases"]) == s.cases and float(r["population"]) == s.population
        assert [float(r[f"paf_{k}"]) for k in ("estimate", "lower", "upper", "mcse")] == [
            s.paf.estimate, s.paf.lower, s.paf.upper, s.paf.mcse]
        assert float(r["attributable_upper"]) == s.attributable.upper
        assert r["exposure_family"] == "lognormal"
        assert float(r["exposure_gm"]) == pytest.approx(gm, rel=1e-12)
        assert float(r["exposure_gsd"]) == pytest.approx(gsd, rel=1e-12)
        assert float(r[mean]) == pytest.approx(lognormal_mean(gm, gsd, 0.05), rel=1e-12)
    total = rows[-1]
    assert float(total["paf_estimate"]) == b.total.paf.estimate
    assert total["paf_lower"] == "" and total["population"] == ""
    assert [total[k] for k in header_of(table)[len(BURDEN_COLUMNS):]] == [""] * 5


def test_burden_blocks_of_outcomes():
    """One block per outcome (the top level shown once when it is the first
    outcome's own, by identity or equal records), parameter columns the
    union over all strata in first-seen order, and the analysis's own
    burden in front when it is not the first outcome's."""
    base = make_results()
    ln = summary.from_gm_gsd(10.0, 2.0)
    g = summary.from_parameters("gamma", {"shape": 2.0, "scale": 5.0})
    g_own = summary.from_parameters("gamma", {"shape": 3.0, "scale": 4.0})
    b1 = burden_of(stratum("North", 100.0, 0.1, ln, ln))
    b2 = burden_of(stratum("East", 40.0, 0.3, g, g),
                   stratum("West", 60.0, 0.2, g_own, g, {"shape": 3.0, "scale": 4.0}))
    outcomes = (("Asthma", dataclasses.replace(base, burden=b1)),
                ("COPD", dataclasses.replace(base, burden=b2)))
    run = dataclasses.replace(base, burden=b1, outcomes=outcomes)
    blocks = run.burden_blocks
    assert [(n, b) for n, b in blocks] == [("Asthma", b1), ("COPD", b2)]
    assert blocks[0][1] is b1 and blocks[1][1] is b2
    copy = burden_of(*b1.strata)
    assert copy is not b1 and copy == b1
    assert (dataclasses.replace(run, burden=copy)).burden_blocks == blocks

    table = tables.burden_blocks_table(blocks, UNIT)
    mean = f"exposure_mean ({UNIT})"
    assert header_of(table) == ["outcome", *BURDEN_COLUMNS, "exposure", "exposure_family",
                                "exposure_gm", "exposure_gsd", "exposure_shape",
                                "exposure_scale", mean]
    rows = as_csv(table)
    assert [(r["outcome"], r["stratum"], r["exposure"]) for r in rows] == [
        ("Asthma", "North", "shared"), ("Asthma", "total", ""), ("COPD", "East", "shared"),
        ("COPD", "West", "own"), ("COPD", "total", "")]
    east, west = rows[2], rows[3]
    assert east["exposure_family"] == "gamma" and east["exposure_gm"] == ""
    assert (float(west["exposure_shape"]), float(west["exposure_scale"])) == (3.0, 4.0)
    # gamma mean = shape x scale (closed form); lognormal mean as above
    assert float(east[mean]) == pytest.approx(2.0 * 5.0, rel=1e-12)
    assert float(west[mean]) == pytest.approx(3.0 * 4.0, rel=1e-12)
    assert float(rows[0][mean]) == pytest.approx(lognormal_mean(10.0, 2.0), rel=1e-12)
    assert rows[1]["exposure_shape"] == "" and rows[0]["exposure_shape"] == ""

    top = burden_of(stratum("Centre", 30.0, 0.05, ln, ln))
    beside = (dataclasses.replace(run, burden=top)).burden_blocks
    assert [n for n, _ in beside] == [None, "Asthma", "COPD"] and beside[0][1] is top
    table = tables.burden_blocks_table(beside, UNIT)
    # the outcome column keeps the place it had in this case: after the burden columns
    assert header_of(table)[:len(BURDEN_COLUMNS) + 1] == [*BURDEN_COLUMNS, "outcome"]
    assert [(r["outcome"], r["stratum"]) for r in as_csv(table)][:3] == [
        ("", "Centre"), ("", "total"), ("Asthma", "North")]

    scen = as_csv(tables.burden_scenarios_blocks_table(blocks))
    assert [(r["outcome"], r["stratum"]) for r in scen] == [
        (r["outcome"], r["stratum"]) for r in rows]
    assert float(scen[-1]["averted_estimate"]) == b2.total.scenarios[0].averted.estimate
    single = as_csv(tables.burden_scenarios_table(b1))
    assert "outcome" not in single[0] and float(single[0]["pif_estimate"]) == 0.05
    assert base.burden_blocks == [] and tables.burden_blocks_table([], UNIT) is None
    assert "burden.csv" not in tables.all_tables(base)


@pytest.fixture(scope="module")
def demo():
    return run_analysis(load_analysis(DEMO / "analysis.toml"))


def test_demo_burden_csv_shows_own_and_shared_exposure(demo):
    r"""The demo's districts.csv gives Quarryside its own GM and GSD; the
    other districts share the fitted exposure. burden.csv says which, gives
    the parameters, and the mean equals the closed form
    (1 - u) GM exp(ln(GSD)^2 / 2) for a lognormal with unexposed share u
    ([exposure] unexposed, which applies to a stratum's own exposure too)."""
    settings = tomllib.loads((DEMO / "analysis.toml").read_text(encoding="utf-8"))
    u = settings["exposure"]["unexposed"]
    lines = [ln for ln in (DEMO / "districts.csv").read_text(encoding="utf-8").splitlines()
             if not ln.startswith("#")]
    given = {r["stratum"]: r for r in csv.DictReader(lines)}
    table = tables.all_tables(demo)["burden.csv"]
    mean = f"exposure_mean ({demo.unit})"
    # the demo's table has a population column, so the rate columns follow (issue 11)
    extra = ["group", "rate", "attributable_rate_estimate", "attributable_rate_lower",
             "attributable_rate_upper", "attributable_rate_mcse", "yll_estimate", "yll_lower",
             "yll_upper", "yll_mcse", "life_expectancy"]
    assert header_of(table) == [*BURDEN_COLUMNS, "exposure", "exposure_family", "exposure_gm",
                                "exposure_gsd", mean, *extra]
    rows = as_csv(table)
    assert [r["stratum"] for r in rows] == [*given, "total"]
    fitted = demo.exposure.parameters
    for r in rows[:-1]:
        g = given[r["stratum"]]
        if g["gm"]:
            gm, gsd = float(g["gm"]), float(g["gsd"])
            assert r["exposure"] == "own"
        else:
            gm, gsd = fitted["gm"], fitted["gsd"]
            assert r["exposure"] == "shared"
            assert float(r[mean]) == demo.exposure_section.mean
        assert r["exposure_family"] == settings["exposure"]["family"] == "lognormal"
        assert (float(r["exposure_gm"]), float(r["exposure_gsd"])) == (gm, gsd)
        assert float(r[mean]) == pytest.approx(lognormal_mean(gm, gsd, u), rel=1e-12)
    assert [r["stratum"] for r in rows if r["exposure"] == "own"] == ["Quarryside"]
    assert [v for k, v in rows[-1].items() if k.startswith("exposure")] == [""] * 5
    # the burden columns are results.json's numbers exactly
    d = demo.to_dict()["burden"]
    for r, s in zip(rows, [*d["strata"], d["total"]], strict=True):
        assert float(r["cases"]) == s["cases"] and float(r["population"]) == s["population"]
        for part in ("paf", "attributable"):
            for k in ("estimate", "lower", "upper", "mcse"):
                assert float(r[f"{part}_{k}"]) == s[part][k]


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
    line = next(ln for ln in ax.get_lines() if ln.get_gid() == "burden-cumulative")
    np.testing.assert_allclose(line.get_ydata(), 100 * cum, rtol=1e-14)
    assert line.get_ydata()[-1] == pytest.approx(100.0, rel=1e-12)
    assert figures.is_empirical(ex) and figures.curve_extent(make_curve(), exposure=ex) > 0
