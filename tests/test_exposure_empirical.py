"""Empirical exposure distributions and the unexposed share."""

from dataclasses import replace

import numpy as np
import pytest

from doseattr.core.exposure import empirical, estimate_unexposed, unexposed_from_count
from doseattr.errors import ModelError


def test_empirical_weights_mean_and_cdf():
    """Source: definitions of the weighted empirical distribution, computed
    with numpy.average and by counting; the integer-weight case equals the
    unweighted distribution of the repeated values (numpy)."""
    x = np.array([0.0, 1.0, 2.0, 5.0])
    m = np.array([1, 3, 2, 2])
    e = empirical(x, m)
    np.testing.assert_allclose(e.weights.sum(), 1.0, rtol=1e-15)
    np.testing.assert_allclose(e.mean(), np.average(x, weights=m), rtol=1e-14)
    rep = np.repeat(x, m)
    grid = np.array([-1.0, 0.0, 0.5, 1.0, 3.0, 5.0, 9.0])
    np.testing.assert_allclose(e.cdf(grid), [np.mean(rep <= g) if g >= 0 else 0.0 for g in grid], rtol=1e-14)
    np.testing.assert_allclose(e.zero_share, np.mean(rep == 0), rtol=1e-14)
    assert e.family.name == "empirical" and e.parameters == {} and e.fit.n == 4


def test_empirical_with_extra_unexposed_share():
    """Source: mixture with a point mass u at zero: mean (1 - u) E[X],
    P(X = 0) = u + (1 - u) P_data(X = 0)."""
    e = replace(empirical([0.0, 2.0, 4.0]), unexposed=0.25)
    np.testing.assert_allclose(e.mean(), 0.75 * 2.0, rtol=1e-14)
    np.testing.assert_allclose(e.zero_share, 0.25 + 0.75 / 3, rtol=1e-14)
    np.testing.assert_allclose(e.cdf([0.0]), [0.25 + 0.75 / 3], rtol=1e-14)


def test_bootstrap_resamples_rows_with_their_weights():
    """Source: nonparametric bootstrap (Efron 1979): each draw is n rows drawn
    with replacement; reproduced here with the same numpy Generator calls."""
    x = np.array([1.0, 2.0, 4.0, 8.0])
    w = np.array([1.0, 1.0, 2.0, 4.0])
    e = empirical(x, w)
    values, weights = e.bootstrap(np.random.default_rng(42), 500)
    assert values.shape == weights.shape == (500, 4)
    idx = np.random.default_rng(42).integers(0, 4, size=(500, 4))
    np.testing.assert_array_equal(values, x[idx])
    np.testing.assert_allclose(weights, w[idx] / w[idx].sum(1, keepdims=True), rtol=1e-15)
    # the bootstrap means scatter around the weighted mean (ratio estimator, bias O(1/n))
    means = np.sum(values * weights, axis=1)
    assert abs(means.mean() - e.mean()) < 0.1 * e.mean()


def test_empirical_refusals():
    """Source: contract."""
    with pytest.raises(ModelError, match=">= 0"):
        empirical([1.0, -2.0])
    with pytest.raises(ModelError, match="positive numbers"):
        empirical([1.0, 2.0], [1.0, 0.0])
    with pytest.raises(ModelError, match="unexposed share"):
        empirical([1.0, 2.0], unexposed=1.0)


def test_estimate_unexposed_weighted_zeros():
    """Source: weighted share of zeros = sum of zero-value weights / sum of
    weights; with integer weights, the share of zeros in the repeated data (numpy)."""
    x = np.array([0.0, 3.0, 0.0, 1.5, 2.0])
    m = np.array([2, 1, 3, 1, 1])
    share, pos, w = estimate_unexposed(x, m)
    np.testing.assert_allclose(share, np.mean(np.repeat(x, m) == 0), rtol=1e-15)
    np.testing.assert_array_equal(pos, [3.0, 1.5, 2.0])
    np.testing.assert_array_equal(w, [1, 1, 1])
    assert estimate_unexposed([1.0, 2.0])[0] == 0.0
    with pytest.raises(ModelError, match="every value is zero"):
        estimate_unexposed([0.0, 0.0])
    with pytest.raises(ModelError, match="negative"):
        estimate_unexposed([0.0, -1.0])


def test_unexposed_from_count():
    """Source: share = count / total."""
    assert unexposed_from_count(30, 120) == 0.25
    with pytest.raises(ModelError, match="whole counts"):
        unexposed_from_count(12, 12)
