"""``[curve] total_cases`` with ``total_controls`` (case-control) or
``total_person_time`` (incidence rate): the study's totals for effective
counts when its table has no count columns (issue 10 item 4).

Check, derived: Hamling et al. (2008, Stat Med 27:954; from memory) fit
pseudo-counts to two side conditions, one of them the case ratio
sum(A)/sum(B). Given the totals, the reconstructed counts must have exactly
that ratio; without them the default (equal cases and non-cases, ratio 1)
holds instead. Inputs: a crude table built here from invented counts (odds
ratios and Woolf 95% CIs computed from them; Woolf 1955).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from doseattr.analysis.build import log_rr_covariance
from doseattr.analysis.config import analysis_from_dict
from doseattr.errors import InputError

A = np.array([120.0, 95.0, 88.0, 54.0, 30.0])  # invented cases by band
B = np.array([480.0, 310.0, 220.0, 105.0, 45.0])  # invented controls by band
EDGES = [0, 10, 20, 40, 80, None]


def _table() -> str:
    lines = ["lower,upper,rr,ci_lower,ci_upper"]
    for i in range(A.size):
        upper = "" if EDGES[i + 1] is None else EDGES[i + 1]
        if i == 0:
            lines.append(f"{EDGES[i]},{upper},1,,")
            continue
        odds = float(A[i] * B[0] / (A[0] * B[i]))
        se = math.sqrt(1 / A[i] + 1 / B[i] + 1 / A[0] + 1 / B[0])
        lo, hi = odds * math.exp(-1.959964 * se), odds * math.exp(1.959964 * se)
        lines.append(f"{EDGES[i]},{upper},{odds!r},{lo!r},{hi!r}")
    return "\n".join(lines) + "\n"


def _analysis(tmp_path, **curve):
    (tmp_path / "bands.csv").write_text(_table())
    c = {"table": "bands.csv", "design": "case-control", "model": "log-linear",
         "covariance": "effective-counts", "max_dose": 100.0, **curve}
    return analysis_from_dict({"unit": "ug/m3", "curve": c,
                               "exposure": {"gm": 10.0, "gsd": 2.0}}, base_dir=tmp_path)


def test_the_totals_set_the_case_ratio(tmp_path):
    a = _analysis(tmp_path, total_cases=float(A.sum()), total_controls=float(B.sum()))
    cov, _, notes = log_rr_covariance(a.curve, a.curve.table)
    assert cov.method == "effective-counts"
    ratio = cov.pseudo_cases.sum() / cov.pseudo_totals.sum()
    assert ratio == pytest.approx(A.sum() / B.sum(), rel=1e-8)
    assert any("case ratio" in n and "total cases" in n for n in notes)


def test_without_them_the_default_ratio_holds(tmp_path):
    a = _analysis(tmp_path)
    cov, _, _ = log_rr_covariance(a.curve, a.curve.table)
    ratio = cov.pseudo_cases.sum() / cov.pseudo_totals.sum()
    assert ratio == pytest.approx(1.0, rel=1e-6)


@pytest.mark.parametrize("curve, key", [
    ({"total_cases": 387.0, "covariance": "independent"}, "total_cases"),
    ({"total_person_time": 1e5}, "total_person_time"),
    ({"total_cases": -3.0}, "total_cases"),
])
def test_misplaced_totals_are_refused(tmp_path, curve, key):
    with pytest.raises(InputError, match=rf"\[curve\] key '{key}'"):
        _analysis(tmp_path, **curve)
