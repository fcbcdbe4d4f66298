"""Figures and report tables whose size does not grow with the data
(issue 15, item 3): a Q-Q plot of many values draws the points at evenly
spaced ranks, and the report's burden tables show the 40 strata with the
most attributable cases with a line saying where the rest are.

Inputs are seeded simulations; expected points are recomputed here from
their definitions (Weibull plotting positions i/(n+1), scipy.stats.lognorm
quantiles, sorting with numpy), never by the code under test.
"""

from __future__ import annotations

import dataclasses
import re

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt
import numpy as np
import pytest
from scipy import stats

from doseattr.core.exposure.base import ExposureFit
from doseattr.core.exposure.registry import get_family
from doseattr.outputs import figures
from doseattr.outputs.burden_report import burden_section
from doseattr.results.estimate import Estimate
from doseattr.results.records import BurdenResult, StratumEffect, StratumResult

CAP = 40


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def _lognormal(values: np.ndarray, detected: np.ndarray, gm: float, gsd: float):
    """An Exposure holding ``values`` as its fitted data (parameters given:
    the plot reads only the data and the family's quantiles)."""
    from doseattr.core.exposure.base import Exposure

    family = get_family("lognormal")
    params = np.array([gm, gsd])
    n = values.size
    fit = ExposureFit(method="test", loglik=-1.0, aic=6.0, n=n, detected=int(detected.sum()),
                      censored=int((~detected).sum()), values=values, detected_mask=detected,
                      weights=np.ones(n))
    return Exposure(family, params, fit=fit)


def test_qq_of_many_values_draws_evenly_spaced_ranks():
    """20,000 uncensored values: positions r/(n+1) (Weibull positions,
    common practice; Helsel 2012); the plot keeps the 2,000 ranks
    round(linspace(0, n - 1, 2000)) (0-based), the smallest and the
    largest among them, each at scipy.stats.lognorm's quantile of its
    position."""
    n, gm, gsd = 20_000, 6.0, 2.0
    rng = np.random.default_rng(1501)  # simulation, seeded
    values = gm * np.exp(np.log(gsd) * rng.standard_normal(n))
    ex = _lognormal(values, np.ones(n, bool), gm, gsd)
    ax = figures.plot_qq(ex)
    line = next(a for a in ax.get_lines() if a.get_gid() == "qq-detected")
    x, y = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
    ranks = np.unique(np.round(np.linspace(0, n - 1, figures.MAX_QQ_POINTS)).astype(int))
    assert ranks.size == figures.MAX_QQ_POINTS == y.size
    order = np.argsort(y)
    np.testing.assert_array_equal(y[order], np.sort(values)[ranks])
    f = stats.lognorm(s=np.log(gsd), scale=gm)
    np.testing.assert_allclose(x[order], f.ppf((ranks + 1) / (n + 1)), rtol=1e-10)
    assert y.min() == values.min() and y.max() == values.max()


def test_qq_thins_detected_and_censored_apart():
    """3,000 censored at one limit below 5,000 detects: each kind thinned
    to at most the cap on its own; the censored markers stay at the limit
    and the detected ones keep the extremes (simulation, seeded)."""
    rng = np.random.default_rng(1502)
    n, limit = 8_000, 3.0
    raw = 6.0 * np.exp(np.log(2.0) * rng.standard_normal(n))
    detected = raw > limit
    values = np.where(detected, raw, limit)
    ex = _lognormal(values, detected, 6.0, 2.0)
    ax = figures.plot_qq(ex)
    lines = {a.get_gid(): a for a in ax.get_lines()}
    det_y = np.asarray(lines["qq-detected"].get_ydata())
    cen_y = np.asarray(lines["qq-censored"].get_ydata())
    assert det_y.size == min(figures.MAX_QQ_POINTS, int(detected.sum()))
    assert cen_y.size == min(figures.MAX_QQ_POINTS, int((~detected).sum()))
    assert np.all(cen_y == limit)
    assert det_y.max() == values[detected].max() and det_y.min() == values[detected].min()


def test_qq_points_keeps_everything_below_the_cap():
    pos = np.linspace(0.01, 0.99, 50)
    detected = np.arange(50) % 3 > 0
    np.testing.assert_array_equal(figures.qq_points(pos, detected, cap=40), np.arange(50))
    # above the cap, indices come back in the data's order, each kind capped
    kept = figures.qq_points(pos, detected, cap=10)
    assert np.all(np.diff(kept) > 0)
    assert detected[kept].sum() == 10 and (~detected[kept]).sum() == 10


# -- report tables ----------------------------------------------------------------
def _row(name: str, attributable: float, scenario: bool = True) -> StratumResult:
    est = Estimate(attributable, 0.8 * attributable, 1.2 * attributable)
    effects = ((StratumEffect("cap", Estimate(0.1), Estimate(attributable / 10.0)),)
               if scenario else ())
    return StratumResult(name, 100.0, Estimate(attributable / 100.0), est, scenarios=effects)


def _burden(values: np.ndarray) -> BurdenResult:
    strata = tuple(_row(f"s{i}", float(v)) for i, v in enumerate(values))
    return BurdenResult(strata, _row("total", float(values.sum())))


def _first_cells(html: str, caption: str) -> list[str]:
    """The first cell of every body row of the table with ``caption``."""
    start = html.index(caption)
    body = html[start:html.index("</table>", start)]
    return re.findall(r"<tr><td[^>]*>([^<]*)</td>", body)


def test_report_tables_show_the_largest_strata_and_say_where_the_rest_are():
    """3,000 seeded strata: the strata and scenarios tables hold the 40
    with the most attributable cases (numpy's descending stable sort of the
    inputs) and the total, and say that every row is in the CSV files."""
    n = 3_000
    values = np.random.default_rng(1503).lognormal(0.0, 1.5, n)  # simulation, seeded
    html = burden_section(_burden(values), None, {"burden": b"x"})
    expected = [f"s{i}" for i in np.argsort(-values, kind="stable")[:CAP]] + ["Total"]
    assert _first_cells(html, "attributable cases by stratum") == expected
    assert _first_cells(html, "cases averted by each scenario") == expected
    assert f"the {CAP} of the {n:,} rows with the most attributable" in html
    assert "burden.csv" in html and "burden_scenarios.csv" in html
    assert html.count("<tr>") < 4 * (CAP + 10)  # bounded, not one row per stratum


def test_report_tables_with_few_strata_are_whole_and_in_table_order():
    values = np.random.default_rng(1504).lognormal(0.0, 1.5, CAP)
    html = burden_section(_burden(values), None, {"burden": b"x"})
    assert _first_cells(html, "attributable cases by stratum") == (
        [f"s{i}" for i in range(CAP)] + ["Total"])
    assert "rows with the most attributable" not in html


def test_many_own_exposures_are_counted_not_listed():
    from doseattr.results.records import StratumExposure

    own = StratumExposure(True, "lognormal", {"gm": 5.0, "gsd": 2.0}, 6.0)
    values = np.random.default_rng(1505).lognormal(0.0, 1.0, 100)
    burden = _burden(values)
    burden = dataclasses.replace(burden, strata=tuple(
        dataclasses.replace(s, exposure=own) if i % 2 else s
        for i, s in enumerate(burden.strata)))
    html = burden_section(burden, None, {"burden": b"x"})
    assert "50 strata had their own exposure descriptions" in html
    assert "s1, s3" not in html
