"""The EN 689:2018 decision (rules from memory: screening test for 3 to 5
results at 0.1, 0.15 and 0.2 x the limit, any result above the limit is
non-compliance, the statistical test UTL(95th percentile, 70 %) < limit for
6 or more)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import ndtri

from doseattr.core.exposure.fit import Measurements, prepare
from doseattr.core.hygiene.en689 import (
    COMPLIES,
    DOES_NOT_COMPLY,
    NO_DECISION,
    en689_decision,
)
from doseattr.core.hygiene.limits import limit_statistics
from doseattr.errors import ModelError

LIMIT = 2.0


def _decide(values, detected=None, utl=None):
    # Measurements built directly: prepare() wants 3 detected values, which a
    # screening test does not need
    x = np.asarray(values, dtype=float)
    det = np.ones(x.size, bool) if detected is None else np.asarray(detected, bool)
    return en689_decision(Measurements(x, det, np.ones(x.size)), LIMIT, utl)


@pytest.mark.parametrize("n, fraction", [(3, 0.10), (4, 0.15), (5, 0.20)])
def test_screening_threshold_just_below_and_just_above(n, fraction):
    # EN 689:2018 screening test, from memory: all n results below fraction x limit
    threshold = fraction * LIMIT
    low = list(np.linspace(0.3, 0.6, n - 1) * threshold)
    below = _decide(low + [threshold * (1 - 1e-6)])
    assert below.verdict == COMPLIES and below.test == "screening"
    assert below.numbers["threshold"] == pytest.approx(threshold)
    assert below.from_memory
    above = _decide(low + [threshold * (1 + 1e-6)])
    assert above.verdict == NO_DECISION and above.test == "screening"
    assert f"{fraction:g} x the limit" in above.rule


@pytest.mark.parametrize("n", [3, 4, 5])
def test_a_result_above_the_limit_never_passes_the_screening_test(n):
    # EN 689:2018, from memory: in the screening test any result above the
    # limit means non-compliance
    values = [0.01 * LIMIT] * (n - 1) + [1.01 * LIMIT]
    values[0] *= 1.5
    decision = _decide(values, utl=0.5 * LIMIT)
    assert decision.verdict == DOES_NOT_COMPLY and decision.test == "screening"
    assert decision.numbers["largest_result"] == pytest.approx(1.01 * LIMIT)


def test_from_six_results_the_upper_tolerance_limit_alone_decides():
    # EN 689:2018, from memory: the statistical test compares the UTL with the
    # limit; a single result above the limit enters through the UTL
    values = [0.01 * LIMIT] * 7 + [1.01 * LIMIT]
    values[0] *= 1.5
    assert _decide(values, utl=0.5 * LIMIT).verdict == COMPLIES
    assert _decide(values, utl=1.5 * LIMIT).verdict == DOES_NOT_COMPLY


def test_non_detects_count_below_only_with_a_low_detection_limit():
    # EN 689:2018, from memory: a non-detect is below the threshold only if its
    # detection limit is; and a detection limit above the limit is not a result above it
    base = [0.05, 0.08]
    low_dl = _decide(base + [0.15], [True, True, False])
    assert low_dl.verdict == COMPLIES
    high_dl = _decide(base + [0.5], [True, True, False])
    assert high_dl.verdict == NO_DECISION
    above_limit_dl = _decide(base + [3.0], [True, True, False])
    assert above_limit_dl.verdict == NO_DECISION
    detected = _decide(base + [0.5])
    assert detected.verdict == NO_DECISION


def _utl_by_nct(x: np.ndarray, conf: float = 0.70) -> float:
    # scipy.stats.nct: exp(ybar + K s), K = t'_c(n-1, z95 sqrt(n)) / sqrt(n) (common practice)
    y = np.log(x)
    n = y.size
    k = stats.nct.ppf(conf, n - 1, ndtri(0.95) * np.sqrt(n)) / np.sqrt(n)
    return float(np.exp(y.mean() + k * y.std(ddof=1)))


@pytest.mark.parametrize("n", [6, 11])
def test_statistical_test_against_the_utl(n):
    # EN 689:2018, from memory: complies when UTL95,70 < limit; the UTL by
    # scipy.stats.nct in the test, the limit set just above and just below it
    x = np.exp(0.4 * ndtri((np.arange(n) + 0.5) / n))
    utl = _utl_by_nct(x)
    for factor, verdict in ((1.001, COMPLIES), (0.999, DOES_NOT_COMPLY)):
        limit = utl * factor
        assert x.max() < limit  # the statistical branch decides, not a result above the limit
        stats_ = limit_statistics("lognormal", prepare(x), limit)
        assert stats_.decision.verdict == verdict
        assert stats_.decision.test == "statistical"
        assert stats_.decision.numbers["utl_p95"] == pytest.approx(utl, rel=1e-9)
        direct = en689_decision(prepare(x), limit, utl)
        assert direct.verdict == verdict


def test_unbounded_utl_does_not_comply():
    # a UTL that could not be bounded is not shown below the limit (rule as written here)
    x = np.linspace(0.1, 0.3, 6)
    assert _decide(x, utl=None).verdict == DOES_NOT_COMPLY


def test_fewer_than_three_results_are_refused():
    with pytest.raises(ModelError, match="at least 3"):
        _decide([0.1, 0.2])
