"""Categorical comparison on weighted values: the sorted-points computation
against the definition written out here on every row (brute force)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from doseattr.core.attribution.categorical import (
    band_means,
    band_shares,
    categorical_comparison,
    equal_probability_paf,
    equal_probability_pafs,
    multi_category_paf,
    rr_at,
)
from doseattr.core.curves.base import Curve
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.empirical import empirical


def _values(seed: int, n: int = 4000, unexposed: float = 0.0):
    """Repeated values (rounded lognormal, some zeros) with continuous
    weights (simulation, seeded)."""
    rng = np.random.default_rng(seed)
    x = np.round(rng.lognormal(1.5, 0.8, n), 1)
    x[rng.random(n) < 0.03] = 0.0
    w = rng.uniform(0.5, 3.0, n)
    return empirical(x, w, unexposed=unexposed, weight_meaning="importance")


def _brute_shares(x, w, u, cuts):
    """Definition: share of each band [0,c1], (c1,c2], ..., (cK, inf) on
    every row, the unexposed u in the first (closed form of the mixture)."""
    edges = np.concatenate([[-np.inf], cuts, [np.inf]])
    p = np.array([w[(x > a) & (x <= b)].sum() for a, b in zip(edges[:-1], edges[1:])])
    p = (1 - u) * p
    p[0] += u
    return p


def _brute_means(x, w, u, cuts):
    lo = np.concatenate([[0.0], cuts])
    hi = np.concatenate([cuts, [np.inf]])
    pm = np.array([(1 - u) * (w * x)[(x > a) & (x <= b)].sum() for a, b in zip(lo, hi)])
    return pm / _brute_shares(x, w, u, cuts)


def _brute_equal_probability(curve, x, w, u, k, m):
    """Definition: cutpoints at the smallest row value whose cumulative
    weight in sorted order reaches j/k, RR at each band's mean of the
    exposed rows, unexposed one more band at RR 1 (Rockhill et al. 1998)."""
    order = np.argsort(x, kind="stable")
    cum = np.cumsum(w[order])
    idx = np.minimum(np.searchsorted(cum, np.arange(1, k) / k * cum[-1]), x.size - 1)
    cuts = x[order][idx]
    p = (1 - u) * _brute_shares(x, w, 0.0, cuts)
    lo = np.concatenate([[0.0], cuts])
    hi = np.concatenate([cuts, [np.inf]])
    pm = np.array([(w * x)[(x > a) & (x <= b)].sum() for a, b in zip(lo, hi)])
    inner = _brute_shares(x, w, 0.0, cuts)
    mid = 0.5 * lo + 0.5 * np.where(np.isfinite(hi), hi, lo)
    means = np.where(inner > 0, pm / np.where(inner > 0, inner, 1.0), mid)
    rr = rr_at(curve, means, m)
    return multi_category_paf(np.append(p, u), np.append(rr, 1.0))


CURVE = Curve(LogLinear(), np.array([np.log(1.08) / 10]), np.eye(1) * 1e-6)


@pytest.mark.parametrize("seed,u", [(1, 0.0), (2, 0.2)])
def test_shares_and_means_match_rows(seed, u):
    ex = _values(seed, unexposed=u)
    cuts = np.array([0.0, 2.0, 4.45, 4.5, 9.0, 30.0])  # 4.5: a repeated value
    assert band_shares(ex, cuts) == pytest.approx(_brute_shares(ex.values, ex.weights, u, cuts),
                                                  rel=1e-12, abs=1e-15)
    brute = _brute_means(ex.values, ex.weights, u, cuts)
    got = band_means(ex, cuts)
    held = np.isfinite(brute)
    assert got[held] == pytest.approx(brute[held], rel=1e-12)


@pytest.mark.parametrize("seed,u", [(3, 0.0), (4, 0.1)])
def test_equal_probability_matches_rows(seed, u):
    ex = _values(seed, unexposed=u)
    ks = range(2, 21)
    shared = equal_probability_pafs(CURVE, ex, ks, 5.0)
    for k, value in zip(ks, shared):
        brute = _brute_equal_probability(CURVE, ex.values, ex.weights, u, k, 5.0)
        assert value == pytest.approx(brute, rel=1e-12)
        assert equal_probability_paf(CURVE, ex, k, 5.0) == value


def test_comparison_uses_shared_pafs():
    ex = _values(5)
    cmp_ = categorical_comparison(CURVE, ex, minimum_risk=5.0, cutpoints=[3.0, 6.0, 12.0])
    for k, value in cmp_.convergence:
        assert value == pytest.approx(_brute_equal_probability(CURVE, ex.values, ex.weights,
                                                               0.0, k, 5.0), rel=1e-12)


def test_tied_quantile_level_takes_the_smaller_value():
    """Integer frequency weights whose cumulative sum hits 1/2 exactly: the
    weighted median is the value where the sum reaches 1/2 (the inverted
    CDF, closed form), whatever the rounding of the normalised weights."""
    x = np.array([1.0, 2.0, 3.0, 4.0])
    w = np.array([3.0, 7.0, 1.0, 9.0])  # cum 3, 10, 11, 20: half at 2.0
    ex = empirical(x, w, weight_meaning="frequency")
    value = equal_probability_paf(CURVE, ex, 2, 0.0)
    rr = rr_at(CURVE, np.array([(3 * 1 + 7 * 2) / 10, (3 + 36) / 10]), 0.0)
    assert value == pytest.approx(multi_category_paf([0.5, 0.5, 0.0], np.append(rr, 1.0)),
                                  rel=1e-12)


def test_points_cache_is_reused():
    ex = _values(6)
    equal_probability_pafs(CURVE, ex, range(2, 5), 5.0)
    first = ex.points[0]
    equal_probability_pafs(CURVE, ex, range(2, 5), 5.0)
    assert ex.points[0] is first
    assert dataclasses.replace(ex).points[0] is not first  # a new exposure sorts anew
