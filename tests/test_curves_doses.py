"""Doses assigned to exposure bands."""

import numpy as np
import pytest
from scipy.stats import lognorm, norm

from doseattr.core.curves.doses import assign_doses, distribution_doses
from doseattr.errors import ModelError

LOWER = np.array([0.0, 5.0, 10.0, 20.0])
UPPER = np.array([5.0, 10.0, 20.0, np.inf])


def test_midpoints_and_open_top_band():
    """Midpoint (l + u)/2 (definition); open-ended top band: lower limit plus half
    the width of the band below, 20 + 10/2 = 25 (common practice)."""
    out = assign_doses(LOWER, UPPER, rule="midpoint")
    np.testing.assert_allclose(out.doses, [2.5, 7.5, 15.0, 25.0], rtol=1e-15)
    assert out.rule_used == ("midpoint", "midpoint", "midpoint", "open-ended")
    assert len(out.notes) == 1 and "common practice" in out.notes[0]


def test_given_doses_take_precedence():
    out = assign_doses(LOWER, UPPER, [1.0, np.nan, 14.0, 31.0])
    np.testing.assert_allclose(out.doses, [1.0, 7.5, 14.0, 31.0], rtol=1e-15)
    assert out.rule_used == ("given", "midpoint", "given", "given")
    assert out.notes == ()
    ignored = assign_doses(LOWER, UPPER, [1.0, np.nan, 14.0, 31.0], rule="midpoint")
    np.testing.assert_allclose(ignored.doses, [2.5, 7.5, 15.0, 25.0], rtol=1e-15)


def test_open_band_rule_uses_adjacent_band_in_any_table_order():
    out = assign_doses([20.0, 0.0, 8.0], [np.inf, 8.0, 20.0], rule="midpoint")
    np.testing.assert_allclose(out.doses, [26.0, 4.0, 14.0], rtol=1e-15)


@pytest.mark.parametrize("lower, upper, match", [
    ([5.0], [np.inf], "open-ended with no band below"),
    ([0.0, 10.0], [5.0, 8.0], "below its lower limit"),
    ([np.nan, 1.0], [1.0, 2.0], "finite lower limit"),
])
def test_invalid_bands(lower, upper, match):
    with pytest.raises(ModelError, match=match):
        assign_doses(lower, upper)


def _lognormal(mu=1.5, s=0.8):
    """Lognormal with its partial mean in closed form:
    E[X; a < X <= b] = exp(mu + s^2/2) [Phi((ln b - mu - s^2)/s) - Phi((ln a - mu - s^2)/s)]
    (standard result; completing the square in the normal integral)."""
    dist = lognorm(s, scale=np.exp(mu))

    def partial_mean(a, b):
        with np.errstate(divide="ignore"):
            la, lb = np.log(a), np.log(b)
        m = np.exp(mu + s**2 / 2)
        return m * (norm.cdf((lb - mu - s**2) / s) - norm.cdf((la - mu - s**2) / s))

    return dist, partial_mean


def test_band_mean_matches_scipy_conditional_expectation():
    """Source: scipy.stats lognorm.expect(lb, ub, conditional=True) (numerical
    quadrature, rtol 1e-7)."""
    dist, partial_mean = _lognormal()
    out = distribution_doses(LOWER, UPPER, rule="band-mean", cdf=dist.cdf,
                             partial_mean=partial_mean)
    expected = [dist.expect(lambda x: x, lb=a, ub=b, conditional=True)
                for a, b in zip(LOWER, UPPER)]
    np.testing.assert_allclose(out.doses, expected, rtol=1e-7)
    assert set(out.rule_used) == {"band-mean"}


def test_band_median_halves_the_band_probability():
    """Definition: F(median_i) = (F(l_i) + F(u_i)) / 2, with F from scipy.stats."""
    dist, _ = _lognormal()
    out = distribution_doses(LOWER, UPPER, rule="band-median", cdf=dist.cdf, ppf=dist.ppf)
    np.testing.assert_allclose(dist.cdf(out.doses), (dist.cdf(LOWER) + dist.cdf(UPPER)) / 2,
                               rtol=1e-12)


def test_empty_band_falls_back_with_note():
    dist, partial_mean = _lognormal(mu=0.0, s=0.1)
    out = distribution_doses([0.0, 5.0, 200.0], [5.0, 200.0, np.inf], rule="band-mean",
                             cdf=dist.cdf, partial_mean=partial_mean)
    assert out.rule_used == ("band-mean", "midpoint", "open-ended")
    np.testing.assert_allclose(out.doses[1:], [102.5, 297.5], rtol=1e-15)
    assert len(out.notes) == 2
