"""ROS plotting positions with many detection limits against a direct,
quadratic evaluation of their definition written here."""

import numpy as np
import pytest

from doseattr.core.exposure import ros_plotting_positions


def direct_positions(x, det):
    """Hirsch & Stedinger (1987, Water Resour Res 23:715) plotting positions
    as set out by Helsel (2012, Statistics for Censored Environmental Data,
    2nd ed.; both from memory), evaluated straight from the definition:
    limits DL_1 < ... < DL_m (the smallest value first when a detect lies
    below DL_1); A_j detects in [DL_j, DL_j+1); B_j detects below DL_j plus
    non-detects at or below it; C_j non-detects at DL_j;
    Pe_j = Pe_j+1 + A_j / (A_j + B_j) (1 - Pe_j+1), Pe_m+1 = 0. A detect of
    rank r in its interval is at (1 - Pe_j) + (Pe_j - Pe_j+1) r / (A_j + 1); a
    non-detect of rank r at its limit at (1 - Pe_j) r / (C_j + 1); the
    non-detect positions, sorted, go to the non-detects in increasing order
    of limit. Ranks break ties by input order. Every count is a loop over
    all values: O(n m)."""
    n = len(x)
    limits = sorted({float(v) for v, d in zip(x, det) if not d})
    if min(x) < limits[0]:
        limits.insert(0, float(min(x)))
    m = len(limits)
    upper = limits[1:] + [np.inf]
    a = [sum(1 for v, d in zip(x, det) if d and lo <= v < hi) for lo, hi in zip(limits, upper)]
    b = [sum(1 for v, d in zip(x, det) if (d and v < lo) or (not d and v <= lo)) for lo in limits]
    c = [sum(1 for v, d in zip(x, det) if not d and v == lo) for lo in limits]
    pe = [0.0] * (m + 1)
    for j in range(m - 1, -1, -1):
        pe[j] = pe[j + 1] + a[j] / (a[j] + b[j]) * (1 - pe[j + 1])
    pos = [0.0] * n
    for i in range(n):
        j = max(k for k in range(m) if limits[k] <= x[i])
        if det[i]:
            r = 1 + sum(1 for q in range(n) if det[q] and limits[j] <= x[q] < upper[j]
                        and (x[q] < x[i] or (x[q] == x[i] and q < i)))
            pos[i] = (1 - pe[j]) + (pe[j] - pe[j + 1]) * r / (a[j] + 1)
        else:
            r = 1 + sum(1 for q in range(i) if not det[q] and x[q] == x[i])
            pos[i] = (1 - pe[j]) * r / (c[j] + 1)
    cen = [i for i in range(n) if not det[i]]
    by_limit = sorted(cen, key=lambda i: (x[i], i))
    for i, p in zip(by_limit, sorted(pos[i] for i in cen)):
        pos[i] = p
    return np.array(pos)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_many_limits_match_direct_definition(seed):
    """Source: the direct definition above; random data (seeded) rounded to
    two decimals, so with ties among detects, among limits and between the
    two, and about a hundred distinct limits."""
    rng = np.random.default_rng(seed)
    n = 500
    x = np.round(np.exp(rng.standard_normal(n)), 2)
    dl = np.round(np.exp(rng.standard_normal(n) - 0.7), 2)
    det = x >= dl
    x = np.where(det, x, dl)
    assert np.unique(x[~det]).size > 60
    got = ros_plotting_positions(x, det)
    np.testing.assert_allclose(got, direct_positions(list(x), list(det)), rtol=1e-13, atol=0)


def test_all_limits_distinct_and_nondetects_above_detects():
    """Source: the direct definition above; every limit distinct
    (continuous values) and some non-detects above the largest detect."""
    rng = np.random.default_rng(7)
    n = 300
    x = np.exp(rng.standard_normal(n))
    dl = np.exp(rng.standard_normal(n) - 0.3)
    det = x >= dl
    x = np.where(det, x, dl)
    assert np.max(x[~det]) > np.max(x[det]) or np.unique(x[~det]).size == (~det).sum()
    got = ros_plotting_positions(x, det)
    np.testing.assert_allclose(got, direct_positions(list(x), list(det)), rtol=1e-13, atol=0)
    assert np.all((got > 0) & (got < 1))
