"""results.json against its published JSON Schema (doseattr/results/
results.schema.json), and the stratum's own exposure in results.json.

The validator is tests/schema_check.py (the JSON Schema draft 2020-12
keywords the schema uses); ``strict`` also requires the schema to declare
every key doseattr writes.
"""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path

import pytest
from schema_check import problems
from test_analysis_contract import FULL, _results
from test_analysis_contract import OUTCOMES as CONTRACT_OUTCOMES

from doseattr.analysis.config import load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.results.schema import results_schema
from doseattr.results.serialize import SCHEMA_VERSION

DEMO = Path(__file__).resolve().parent.parent / "data_demo" / "analysis.toml"
# Two outcomes, the second without a burden table of its own.
OUTCOMES = CONTRACT_OUTCOMES.rsplit("[outcome.burden]", 1)[0]
HISTORIES = ('unit = "mg/m3-years"\n[curve]\nmodel = "linear"\nerr = 0.02\n'
             '[exposure]\nhistories = "h.csv"\nas_of = "2020-01-01"\nlag_years = 5\n')


@pytest.fixture(scope="module")
def demo() -> dict:
    return json.loads(json.dumps(run_analysis(load_analysis(DEMO)).to_dict(), allow_nan=False))


def test_schema_is_the_version_written():
    s = results_schema()
    assert s["properties"]["schema_version"] == {"const": SCHEMA_VERSION} and SCHEMA_VERSION == "2.3"
    assert s["$schema"] == "https://json-schema.org/draft/2020-12/schema"


def test_demo_results_validate(demo):
    assert problems(demo, results_schema(), strict=True) == []


@pytest.mark.parametrize("text", [FULL, OUTCOMES, HISTORIES], ids=["full", "outcomes", "histories"])
def test_other_analyses_validate(tmp_path, text):
    d, _ = _results(tmp_path, text, cli=False)
    assert problems(d, results_schema(), strict=True) == []


@pytest.mark.parametrize("change, expected", [
    (lambda d: d.pop("paf"), "$: missing 'paf'"),
    (lambda d: d["paf"].update(estimate="12%"), "$.paf.estimate: str is not number"),
    (lambda d: d["burden"]["strata"][0].update(paf=0.1), "$.burden.strata[0].paf: float is not object"),
    (lambda d: d.update(schema_version="1.0"), "$.schema_version: '1.0' is not '2.3'"),
    (lambda d: d["curve"].update(beyond="up"), "$.curve.beyond: 'up' is not one of"),
    (lambda d: d["exposure"].update(surprise=1), "$.exposure: 'surprise' is not declared"),
])
def test_the_check_catches_a_broken_document(demo, change, expected):
    """The validation can fail: each edit breaks one rule of the schema."""
    broken = copy.deepcopy(demo)
    change(broken)
    found = problems(broken, results_schema(), strict=True)
    assert any(p.startswith(expected) for p in found), found


def test_stratum_exposure_is_shown(demo):
    """The demo's Quarryside district has its own GM and GSD in the burden
    table; the others share the town's fitted exposure. The mean of a
    lognormal with the unexposed share u counted at zero is
    (1 - u) GM exp(ln(GSD)^2 / 2) (closed form)."""
    strata = {s["stratum"]: s for s in demo["burden"]["strata"]}
    own = strata["Quarryside"]["exposure"]
    assert own["own"] is True and own["given"] == {"gm": 18.5, "gsd": 2.1}
    assert own["parameters"] == pytest.approx({"gm": 18.5, "gsd": 2.1}, rel=1e-12)
    u = demo["exposure"]["unexposed"]
    assert own["mean"] == pytest.approx((1 - u) * 18.5 * math.exp(math.log(2.1) ** 2 / 2),
                                        rel=1e-10)
    for name in ("Old Town", "Riverside", "Hillcrest"):
        shared = strata[name]["exposure"]
        assert shared["own"] is False and shared["given"] is None
        assert shared["parameters"] == demo["exposure"]["parameters"]
        assert shared["mean"] == pytest.approx(demo["exposure"]["mean"], rel=1e-12)
    assert "exposure" not in demo["burden"]["total"]


def test_schema_1_keys_are_kept(demo):
    """``paf_interval``, named by earlier issues beside a plain-number
    ``paf``, stays: the same estimate object as ``paf`` now is."""
    for row in demo["burden"]["strata"] + [demo["burden"]["total"]]:
        assert row["paf_interval"] == row["paf"] and isinstance(row["paf"], dict)


def test_summary_shows_the_stratum_exposure():
    """summary.txt lists each stratum with 'own: gm 18.5, gsd 2.1' for the
    demo's Quarryside (its row of data_demo/districts.csv) and 'shared' for
    the others."""
    text = run_analysis(load_analysis(DEMO)).summary()
    rows = {line.split()[0]: line for line in text.splitlines()
            if line.startswith(("Old Town", "Riverside", "Quarryside", "Hillcrest"))}
    assert rows["Quarryside"].endswith("own: gm 18.5, gsd 2.1")
    assert all(rows[k].endswith("shared") for k in ("Old", "Riverside", "Hillcrest"))
