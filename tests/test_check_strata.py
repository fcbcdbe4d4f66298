"""`check`'s test that every stratum with its own exposure has a finite
expected RR: the strata of one family are integrated together, and the
first row that fails, in the table's order, is named with the message a
one-by-one check gives.

References: the gamma moment generating function E[e^{bX}] =
(1 - b theta)^{-k}, finite only for b theta < 1 (closed form, from memory),
and the single-stratum PAF (doseattr.core.attribution.fractions.paf, the
one-by-one path the batch must agree with).
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from doseattr.analysis import check
from doseattr.core.attribution.fractions import paf
from doseattr.core.curves.base import Curve
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.registry import FAMILIES
from doseattr.errors import DivergenceError, InputError

#: A log-linear curve extended without limit: over a gamma exposure its
#: expected RR is finite only where slope x scale < 1 (closed form).
CURVE = Curve(LogLinear(), np.array([0.05]), np.eye(1))


def _strata(scales):
    return [SimpleNamespace(exposure=Exposure(FAMILIES["gamma"], np.array([2.0, s])))
            for s in scales]


def _table(n):
    return SimpleNamespace(source="strata.csv", lines=tuple(range(2, 2 + n)))


@pytest.mark.parametrize("batch", [1, 3, 4096])
def test_first_failing_row_in_table_order(monkeypatch, batch):
    monkeypatch.setattr(check, "CHECK_BATCH", batch)
    scales = [5.0, 8.0, 25.0, 4.0, 30.0, 6.0]  # 0.05 x 25 and 0.05 x 30 >= 1: rows 4 and 6
    strata = _strata(scales)
    with pytest.raises(DivergenceError) as alone:  # the one-by-one path
        paf(CURVE, strata[2].exposure, minimum_risk=0.0)
    with pytest.raises(InputError) as exc:
        check._check_strata(_table(6), 0.0, CURVE, object(), strata)
    text = str(exc.value)
    assert "row 4" in text and "strata.csv" in text
    assert str(alone.value).rstrip(".") in text


@pytest.mark.parametrize("batch", [2, 4096])
def test_finite_strata_pass_and_the_shared_one_is_skipped(monkeypatch, batch):
    monkeypatch.setattr(check, "CHECK_BATCH", batch)
    strata = _strata([5.0, 8.0, 19.0, 4.0])  # slope x scale below 1 everywhere
    shared = strata[0].exposure
    check._check_strata(_table(4), 0.0, CURVE, shared, strata)
    # a shared exposure that diverges is not this check's to report
    bad = _strata([30.0])[0]
    check._check_strata(_table(5), 0.0, CURVE, bad.exposure, [*strata, bad])


def test_suspects_are_the_diverging_runs():
    strata = _strata([5.0, 25.0, 6.0])
    got = check._suspects(CURVE, 0.0, [s.exposure for s in strata])
    assert got == {0, 1, 2}  # one run of three, refused as a whole
    fine = check._suspects(CURVE, 0.0, [s.exposure for s in _strata([5.0, 6.0])])
    assert fine == set()
