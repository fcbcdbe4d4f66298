"""Attributable cases by stratum ([burden]), checked against closed forms:
attributable = PAF x cases, totals are sums over strata, and a stratum's own
exposure (GM, GSD) gives the lognormal closed form."""

from __future__ import annotations

import math

import numpy as np
import pytest

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

STRATA = """\
stratum,cases,gm,gsd
North,120,,
South,80,14,2.5
East,45,,
"""


def _run(tmp_path, strata=STRATA, uncertainty=None):
    (tmp_path / "strata.csv").write_text(strata)
    d = {"unit": "ug/m3", "curve": {"model": "linear", "err": 0.05, "beyond": "extend"},
         "exposure": {"gm": 8.0, "gsd": 2.0}, "burden": {"table": "strata.csv"},
         "scenario": [{"name": "half", "scale": 0.5}]}
    if uncertainty:
        d["uncertainty"] = uncertainty
    return run_analysis(analysis_from_dict(d, base_dir=tmp_path))


def _paf(gm, gsd, b=0.05, factor=1.0):
    """Lognormal mean closed form (see test_analysis_pipeline):
    E[1 + b s X] = 1 + b s GM exp(ln^2 GSD / 2)."""
    return 1 - 1 / (1 + b * factor * gm * math.exp(math.log(gsd) ** 2 / 2))


def test_attributable_cases_by_stratum(tmp_path):
    r"""Attributable cases are :math:`PAF_s N_s`; the total is their sum and
    the overall PAF is total attributable over total cases. The scale
    scenario's PIF is :math:`1 - E[RR(sX)]/E[RR(X)]`."""
    res = _run(tmp_path)
    d = res.to_dict()["burden"]
    pafs = {"North": _paf(8.0, 2.0), "South": _paf(14.0, 2.5), "East": _paf(8.0, 2.0)}
    cases = {"North": 120.0, "South": 80.0, "East": 45.0}
    for row in d["strata"]:
        # schema 2.0: a stratum's PAF is an estimate object like every other
        np.testing.assert_allclose(row["paf"]["estimate"], pafs[row["stratum"]], rtol=1e-8)
        np.testing.assert_allclose(row["attributable"]["estimate"],
                                   pafs[row["stratum"]] * cases[row["stratum"]], rtol=1e-8)
    total = sum(pafs[k] * cases[k] for k in cases)
    np.testing.assert_allclose(d["total"]["attributable"]["estimate"], total, rtol=1e-8)
    np.testing.assert_allclose(d["total"]["paf"]["estimate"], total / 245.0, rtol=1e-8)
    e, e_half = 1 / (1 - _paf(14.0, 2.5)), 1 / (1 - _paf(14.0, 2.5, factor=0.5))
    south = next(r for r in d["strata"] if r["stratum"] == "South")
    np.testing.assert_allclose(south["scenarios"][0]["pif"]["estimate"], 1 - e_half / e,
                               rtol=1e-8)


def test_intervals_bracket_the_estimates(tmp_path):
    res = _run(tmp_path, uncertainty={"draws": 200, "seed": 5, "poisson_cases": True})
    total = res.to_dict()["burden"]["total"]["attributable"]
    assert total["lower"] <= total["estimate"] <= total["upper"]


@pytest.mark.parametrize("bad, message", [
    (STRATA.replace("East,45", "East,-4"), r"row 4, column 'cases': cases must be 0 or more"),
    (STRATA.replace("East,45", "North,45"), r"row 4, column 'stratum': stratum 'North' appears "
                                            r"twice"),
    (STRATA.replace("South,80,14,2.5", "South,80,14,"), r"row 3, column 'gsd': incomplete "
                                                        r"exposure"),
    (STRATA.replace(",gm,gsd", ",gm").replace(",14,2.5", ",14").replace(",,", ","),
     r"column 'gsd': missing column 'gsd'"),
])
def test_bad_strata(tmp_path, bad, message):
    with pytest.raises(InputError, match=message):
        _run(tmp_path, strata=bad)


def test_poisson_cases_needs_a_burden_table():
    with pytest.raises(InputError, match=r"\[uncertainty\] key 'poisson_cases'"):
        analysis_from_dict({"unit": "ppm", "curve": {"model": "linear", "err": 0.1},
                            "exposure": {"gm": 5.0, "gsd": 2.0},
                            "uncertainty": {"poisson_cases": True}})


def _outcomes(tmp_path, second_curve):
    (tmp_path / "strata.csv").write_text(STRATA)
    return {"unit": "ug/m3", "exposure": {"gm": 8.0, "gsd": 2.0},
            "outcome": [{"name": "A", "curve": {"model": "linear", "err": 0.05,
                                                "beyond": "extend"},
                         "burden": {"table": "strata.csv"}},
                        {"name": "B", "curve": second_curve}]}


def test_several_outcomes_side_by_side(tmp_path):
    """Each outcome has its own curve; with RR = 1 + b x over the shared
    lognormal each PAF is the lognormal-mean closed form."""
    d = _outcomes(tmp_path, {"model": "linear", "err": 0.02, "beyond": "extend"})
    res = run_analysis(analysis_from_dict(d, base_dir=tmp_path)).to_dict()
    names = [o["name"] for o in res["outcomes"]]
    assert names == ["A", "B"]
    np.testing.assert_allclose(res["outcomes"][0]["paf"]["estimate"], _paf(8.0, 2.0), rtol=1e-8)
    np.testing.assert_allclose(res["outcomes"][1]["paf"]["estimate"], _paf(8.0, 2.0, b=0.02),
                               rtol=1e-8)
    assert res["outcomes"][0]["burden"]["total"]["cases"] == 245.0
    assert res["outcomes"][1]["burden"] is None
    assert res["paf"] == res["outcomes"][0]["paf"]


def test_outcome_errors_name_the_outcome(tmp_path):
    d = _outcomes(tmp_path, {"model": "linear", "err": 0.02, "modle": "x"})
    with pytest.raises(InputError, match=r"\[\[outcome\]\] 2 \('B'\) \[outcome.curve\] key "
                                         r"'modle'"):
        analysis_from_dict(d, base_dir=tmp_path)
