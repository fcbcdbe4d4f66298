"""results.json whose size does not grow with the data (issue 15, item 3):
the contribution section keeps at most 201 points of the burden along the
exposure axis, exact at each of them, whatever the number of values.

The full curve is recomputed here from its definition with numpy (sorted
values, weights, RR_m(x) - 1 = expm1(b (max(x, m) - m)) for a log-linear
curve; closed form of the empirical PAF's decomposition), and the summary
is compared with the core's own arrays at its points.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from schema_check import problems

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.core.attribution.contribution import SUMMARY_POINTS, Contribution, summarise
from doseattr.results.schema import results_schema

N = 100_000
B, M = math.log(1.3) / 10.0, 3.0  # RR = exp(B x), minimum risk M
MAX_BYTES = 2_000_000


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("big")
    rng = np.random.default_rng(1515)  # simulation, seeded
    values = rng.lognormal(math.log(5.0), 0.8, N)
    weights = rng.uniform(0.5, 2.0, N)
    (tmp / "m.csv").write_text("value,weight\n" + "".join(
        f"{v:.6g},{w:.6g}\n" for v, w in zip(values, weights)))
    d = {"unit": "ug/m3",
         "curve": {"model": "log-linear", "rr": 1.3, "per": 10.0, "beyond": "extend"},
         "exposure": {"table": "m.csv", "family": "empirical"},
         "attribution": {"minimum_risk": M}}
    r = run_analysis(analysis_from_dict(d, base_dir=tmp))
    text = json.dumps(r.to_dict(), indent=1, allow_nan=False)
    return r, text


@pytest.mark.slow
def test_results_json_stays_small_and_valid(run):
    _, text = run
    assert len(text.encode()) < MAX_BYTES
    data = json.loads(text)
    assert problems(data, results_schema(), strict=True) == []
    c = data["contribution"]
    assert c["points"] == N and c["summarised"] is True
    assert len(c["x"]) == len(c["density"]) == len(c["cumulative"]) <= SUMMARY_POINTS
    assert len(c["x"]) > SUMMARY_POINTS // 2


@pytest.mark.slow
def test_core_curve_is_the_definition(run):
    """Cumulative share of sum_i w_i (RR_m(x_i) - 1) over the sorted values
    (closed form of the empirical decomposition, numpy)."""
    r, _ = run
    core = r.attribution.contribution
    x, w = r.exposure.values, r.exposure.weights
    order = np.argsort(x, kind="stable")
    part = w[order] * np.expm1(B * (np.maximum(x[order], M) - M))
    np.testing.assert_array_equal(core.x, x[order])
    # at the last of tied values the share does not depend on the order within ties
    ends = np.r_[np.flatnonzero(np.diff(core.x) > 0), N - 1]
    np.testing.assert_allclose(core.cumulative[ends], (np.cumsum(part) / part.sum())[ends],
                               rtol=1e-10, atol=1e-15)


@pytest.mark.slow
def test_summary_is_exact_at_its_points(run):
    r, text = run
    core = r.attribution.contribution
    c = json.loads(text)["contribution"]
    xs = np.array(c["x"])
    idx = np.searchsorted(core.x, xs, side="right") - 1  # last of tied values
    assert idx[0] == 0 and idx[-1] == N - 1
    np.testing.assert_array_equal(core.x[idx], xs)
    # the core's own arrays, exact (JSON round-trips floats exactly)
    np.testing.assert_array_equal(np.array(c["cumulative"]), core.cumulative[idx])
    assert c["median"] == core.median
    # a fixed grid of ranks k (n - 1) / 200, each the last of its tied
    # values (the schema's description)
    ranks = np.rint(np.arange(SUMMARY_POINTS) * (N - 1) / (SUMMARY_POINTS - 1)).astype(int)
    np.testing.assert_array_equal(xs, np.unique(core.x[ranks]))
    # each point carries the share of the values since the previous one
    sums = np.add.reduceat(core.density, np.r_[0, idx[:-1] + 1])
    np.testing.assert_allclose(c["density"], sums, rtol=1e-9, atol=1e-15)
    assert sum(c["density"]) == pytest.approx(r.paf.estimate, rel=1e-9)


def test_small_curves_are_kept_whole():
    """A curve of at most 201 points (the parametric grid) is written as is."""
    x = np.linspace(0.0, 1.0, SUMMARY_POINTS)
    c = Contribution(x, x, x, 0.5, 0.1)
    assert summarise(c) is c


def test_full_curve_in_a_csv_when_asked(tmp_path):
    """``[report] contribution_table = true`` writes contribution.csv with
    every value's burden mass (the closed form of the empirical PAF's
    decomposition, recomputed with numpy from the values), and results.json
    keeps its summary; without the key no such file is written."""
    import csv

    rng = np.random.default_rng(1516)  # simulation, seeded
    n = 3 * SUMMARY_POINTS
    values = np.round(rng.lognormal(math.log(5.0), 0.8, n), 4)
    (tmp_path / "m.csv").write_text("value\n" + "".join(f"{v:.4f}\n" for v in values))
    d = {"unit": "ug/m3",
         "curve": {"model": "log-linear", "rr": 1.3, "per": 10.0, "beyond": "extend"},
         "exposure": {"table": "m.csv", "family": "empirical"},
         "attribution": {"minimum_risk": M}}
    plain = run_analysis(analysis_from_dict(d, base_dir=tmp_path))
    plain.write(tmp_path / "plain")
    assert not (tmp_path / "plain" / "contribution.csv").exists()
    asked = run_analysis(analysis_from_dict({**d, "report": {"contribution_table": True}},
                                            base_dir=tmp_path))
    asked.write(tmp_path / "asked")
    with open(tmp_path / "asked" / "contribution.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == ["exposure (ug/m3)", "burden_mass", "cumulative_share"]
    got = np.array(rows[1:], dtype=float)
    x = np.sort(values)
    ex = np.expm1(B * (np.maximum(x, M) - M))
    mass = ex / n / (1.0 + ex.mean())
    np.testing.assert_allclose(got[:, 0], x, rtol=1e-12)
    np.testing.assert_allclose(got[:, 1], mass, rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(got[:, 2], np.cumsum(mass) / mass.sum(), rtol=1e-9, atol=1e-15)
    data = json.loads((tmp_path / "asked" / "results.json").read_text())
    assert data["contribution"]["summarised"] is True
    assert len(data["contribution"]["x"]) <= SUMMARY_POINTS
