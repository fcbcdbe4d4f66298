"""``[uncertainty] precision``: more draws until every interval limit of a
fraction has a Monte Carlo SE below the precision asked (issue 10 item 2).

The MCSE of each limit is the order-statistic estimate checked against the
closed form in tests/test_uncertainty_limits.py; here the loop is checked:
the limits end below the target, the draws rose, the note says so, and the
cap stops the loop with an honest note.
"""

from __future__ import annotations

import pytest

import doseattr.analysis.pipeline as pipeline
from doseattr.analysis.config import analysis_from_dict
from doseattr.errors import InputError

BASE = {"unit": "ug/m3",
        "curve": {"model": "log-linear", "rr": 1.08, "per": 10, "ci": [1.03, 1.13],
                  "max_dose": 60.0},
        "exposure": {"gm": 12.0, "gsd": 1.9},
        "scenario": [{"name": "cap", "cap": 15.0}]}


def _run(precision, draws=200):
    u = {"draws": draws, "seed": 3}
    if precision is not None:
        u["precision"] = precision
    d = {**BASE, "uncertainty": u}
    return pipeline.run_analysis(analysis_from_dict(d))


def _limit_errors(r):
    return [e for est in (r.paf, *(s.pif for s in r.scenarios))
            for e in (est.lower_mcse, est.upper_mcse)]


def test_draws_are_raised_until_the_limits_are_precise():
    loose = _run(None)
    target = 0.5 * max(_limit_errors(loose))
    r = _run(target)
    assert max(_limit_errors(r)) <= target
    assert r.uncertainty.draws > 200
    assert any(n.startswith(f"precision {target:g}: draws raised from 200 to "
                            f"{r.uncertainty.draws}") for n in r.notes)


def test_a_precision_already_met_keeps_the_draws():
    r = _run(0.09)
    assert r.uncertainty.draws == 200
    assert any("already met with 200 draws" in n for n in r.notes)


def test_the_cap_stops_the_loop_and_says_so(monkeypatch):
    monkeypatch.setattr(pipeline, "PRECISION_CAP", 800)
    r = _run(1e-7)
    assert r.uncertainty.draws == 800
    assert any("not reached: stopped at the cap of 800 draws" in n for n in r.notes)


@pytest.mark.parametrize("bad", [0.0, -0.001, 0.5])
def test_precision_out_of_range_is_refused(bad):
    with pytest.raises(InputError, match=r"\[uncertainty\] key 'precision'"):
        _run(bad)
