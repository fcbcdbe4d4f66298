"""Burden figures whose size does not grow with the number of strata
(issue 15, item 3): at most the 40 strata with the most attributable cases
get a bar, the rest are summed into one bar, and the caption points to the
full table in burden.csv.

The records are built directly (1,000 strata with seeded random cases);
the expected bars are recomputed here with numpy from the records (sort
and sum: plain arithmetic on the inputs, not the figure code).
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt
import numpy as np
import pytest

from doseattr.outputs import gallery
from doseattr.outputs.burden_report import burden_section
from doseattr.results.estimate import Estimate
from doseattr.results.records import BurdenResult, StratumResult

N = 1_000
CAP = 40


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def _row(name: str, attributable: float, group: str | None = None) -> StratumResult:
    est = Estimate(attributable, 0.8 * attributable, 1.2 * attributable)
    rate = Estimate(attributable / 10.0, None, None)
    return StratumResult(name, 100.0, Estimate(attributable / 100.0), est, group=group,
                         population=1e4 if group else None,
                         attributable_rate=rate if group else None)


def _burden(values: np.ndarray) -> BurdenResult:
    strata = tuple(_row(f"s{i}", float(v)) for i, v in enumerate(values))
    return BurdenResult(strata, _row("total", float(values.sum())))


def _values(seed: int = 15) -> np.ndarray:
    return np.random.default_rng(seed).lognormal(0.0, 1.5, N)


def _bars(ax, prefix):
    return sorted((p for p in ax.patches if p.get_gid() == f"{prefix}-bars"),
                  key=lambda p: -p.get_y())


def test_burden_chart_caps_strata_and_sums_the_rest():
    values = _values()
    figure = gallery._burden([(None, _burden(values))])
    ax = figure.axes[0]
    bars = _bars(ax, "strata")
    assert len(bars) == CAP + 1
    # height bounded: one bar per stratum would be 0.32 * 1000 inches
    assert figure.get_size_inches()[1] <= 0.32 * (CAP + 1) + 1.3 + 1e-9
    order = np.argsort(-values, kind="stable")
    widths = [p.get_width() for p in bars]
    # arithmetic on the records: the 40 largest, then the sum of the rest
    np.testing.assert_array_equal(widths[:CAP], values[order[:CAP]])
    assert widths[CAP] == pytest.approx(values[order[CAP:]].sum(), rel=1e-12)
    assert sum(widths) == pytest.approx(values.sum(), rel=1e-12)
    labels = [t.get_text() for t in ax.get_yticklabels()]
    assert labels[:CAP] == [f"s{i}" for i in order[:CAP]]
    assert labels[CAP] == f"other {N - CAP} strata"
    segs = next(c for c in ax.collections if c.get_gid() == "strata-whiskers").get_segments()
    assert len(segs) == CAP  # the summed bar has no interval


def test_few_strata_are_drawn_unchanged():
    values = _values()[:CAP]
    figure = gallery._burden([(None, _burden(values))])
    bars = _bars(figure.axes[0], "strata")
    np.testing.assert_array_equal([p.get_width() for p in bars], values)


def test_caption_points_to_the_full_table():
    burden = _burden(_values())
    text = burden_section(burden, None, {"burden": b"x"})
    assert "burden.csv" in text and f"the {CAP} with the most" in text
    few = burden_section(_burden(_values()[:CAP]), None, {"burden": b"x"})
    assert "burden.csv" not in few


def test_rates_chart_caps_strata():
    values = _values()
    strata = tuple(_row(f"s{i}", float(v) * share, g) for i, v in enumerate(values)
                   for g, share in (("a", 0.25), ("b", 0.75)))
    totals = tuple(_row(f"s{i}", float(v)) for i, v in enumerate(values))
    burden = BurdenResult(strata, _row("total", float(values.sum()), "all"),
                          stratum_totals=totals)
    (panel,) = gallery.rate_panels([(None, burden)])
    order = np.argsort(-values, kind="stable")
    assert panel.strata == tuple(f"s{i}" for i in order[:CAP])
    assert panel.hidden == N - CAP
    # each row's rate is the record's (attributable / 10 by construction above)
    np.testing.assert_allclose([row[0] for row in panel.estimate],
                               values[order[:CAP]] * 0.25 / 10.0, rtol=1e-12)
    figure = gallery._burden_rates([(None, burden)])
    assert figure.get_size_inches()[1] <= 0.22 * CAP * 2 + 1.3 + 1e-9
    assert "burden.csv" in figure.axes[0].get_title()
