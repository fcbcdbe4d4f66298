"""The faster routes to the incomplete gamma function and Stirling's
correction that the integration engine takes per draw: against
scipy.special over the ranges where they are used, and against
high-precision references computed here in decimal arithmetic.
"""

from __future__ import annotations

from decimal import Decimal, localcontext

import numpy as np
import pytest
from scipy.special import gammainc, gammaincc, gammaln

from doseattr.core.exposure.gamma import stirling_correction
from doseattr.core.exposure.incomplete_gamma import SERIES_Y, lower_gamma, upper_gamma

_PREC = 40
_PI = Decimal("3.141592653589793238462643383279502884197")


def _stirling_ref(k: float, terms: int = 600) -> Decimal:
    r"""c(k) = ln Gamma(k) - (k - 1/2) ln k + k - ln(2 pi)/2 in 40-digit
    decimal arithmetic, from the closed form c(k) - c(k + 1) =
    (k + 1/2) ln(1 + 1/k) - 1 (derived from Gamma(k + 1) = k Gamma(k)),
    summed up to k + 600, where c is 1/(12 z) - 1/(360 z^3) to 1e-27
    (the next term is 1/(1260 z^5))."""
    with localcontext() as ctx:
        ctx.prec = _PREC
        z = Decimal(k)
        total = Decimal(0)
        for _ in range(terms):
            total += (z + Decimal("0.5")) * (1 + 1 / z).ln() - 1
            z += 1
        return total + 1 / (12 * z) - 1 / (360 * z**3)


def _lower_ref(k: float, y: float) -> Decimal:
    r"""P(k, y) = y^k e^{-y} / Gamma(k + 1) * sum_n y^n / ((k+1)...(k+n))
    (the power series, Abramowitz & Stegun 6.5.29, from memory) in 40-digit
    decimal arithmetic, with ln Gamma(k + 1) from :func:`_stirling_ref`."""
    with localcontext() as ctx:
        ctx.prec = _PREC
        a, x = Decimal(k) + 1, Decimal(y)
        log_gamma = _stirling_ref(float(a)) + (a - Decimal("0.5")) * a.ln() - a + (2 * _PI).ln() / 2
        term, total, n = Decimal(1), Decimal(1), 0
        while term > total * Decimal("1e-38"):
            n += 1
            term = term * x / (Decimal(k) + n)
            total += term
        return (Decimal(k) * x.ln() - x - log_gamma).exp() * total


def _rel(got: np.ndarray, want: np.ndarray) -> np.ndarray:
    return np.abs(got - want) / np.abs(want)


def _shapes_and_arguments(seed: int, n: int, y_max: float) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    k = np.exp(rng.uniform(np.log(1e-3), np.log(1e3), n))
    y = rng.uniform(0.0, y_max, n)
    # the ends of the ranges where the routes change
    y[:6] = [1.0, np.nextafter(1.0, 2.0), 1.1, SERIES_Y, np.nextafter(SERIES_Y, 3.0), 0.0]
    return k, y


def test_lower_gamma_matches_scipy():
    """P(k, y) against scipy.special.gammainc for shapes 1e-3 to 1e3 and
    arguments to 2.5 (beyond the recurrence's range, 1 < y <= 2 above the
    shape). The bound: 3e-14 relative, scipy's own error there (its
    1 - igamc is off by up to 1.4e-14 against the decimal reference below;
    elsewhere the two are the same function)."""
    k, y = _shapes_and_arguments(1, 200_000, 2.5)
    got, want = lower_gamma(k, y), gammainc(k, y)  # scipy.special.gammainc
    pos = want > 0
    assert np.all(got[~pos] == 0.0)
    assert _rel(got[pos], want[pos]).max() < 3e-14
    band = (y > 1) & (y <= SERIES_Y) & (y > k)
    assert band.sum() > 10_000
    assert np.array_equal(got[~band], want[~band])


def test_upper_gamma_matches_scipy():
    """Q(k, y) against scipy.special.gammaincc for shapes 1e-3 to 1e3 and
    arguments to 6, and at the ends: 2e-13 relative (1 - P carries at most
    100 times P's rounding where P <= 0.99; full precision elsewhere)."""
    k, y = _shapes_and_arguments(2, 200_000, 6.0)
    got, want = upper_gamma(k, y), gammaincc(k, y)  # scipy.special.gammaincc
    assert _rel(got, want).max() < 2e-13
    # beyond SERIES_Y, and where P is near 1, Q is scipy's value itself
    direct = (y > SERIES_Y) | (gammainc(k, y) > 0.99)
    assert np.array_equal(got[direct], want[direct])
    ends = upper_gamma(np.array([0.5, 2.0, 3.0]), np.array([0.0, np.inf, np.nan]))
    assert ends[0] == 1.0 and ends[1] == 0.0 and np.isnan(ends[2])


def test_shapes_broadcast():
    """Column of shapes against rows of arguments, as the engine calls them
    (scipy.special broadcasting)."""
    k = np.array([[0.2], [1.5], [40.0]])
    y = np.array([[0.5, 1.05, 1.7, 3.0]])
    np.testing.assert_allclose(lower_gamma(k, y), gammainc(k, y), rtol=3e-14)
    np.testing.assert_allclose(upper_gamma(k, y), gammaincc(k, y), rtol=2e-13)
    assert upper_gamma(k, y).shape == (3, 4)


@pytest.mark.parametrize(("k", "y"), [(0.02, 1.04), (0.3, 1.01), (0.9, 1.09), (0.07, 1.5),
                                      (0.5, 1.99), (1.2, 1.6), (1.9, 2.0)])
def test_recurrence_against_decimal_series(k, y):
    """Where the recurrence is taken (1 < y <= 2 above the shape): P to
    2e-15 relative, and Q = 1 - P to 2e-13, against the power series in
    40-digit decimal arithmetic (reference computed here)."""
    ref = _lower_ref(k, y)
    got = lower_gamma(np.array([k]), np.array([y]))[0]
    assert abs(float((Decimal(float(got)) - ref) / ref)) < 2e-15
    q = upper_gamma(np.array([k]), np.array([y]))[0]
    assert abs(float((Decimal(float(q)) - (1 - ref)) / (1 - ref))) < 2e-13


@pytest.mark.parametrize("k", [0.01, 0.5, 3.0, 9.99, 10.0, np.nextafter(10.0, 11.0), 10.5, 13.0,
                               30.0, 1e4])
def test_stirling_correction_against_decimal(k):
    """Stirling's correction on both sides of the switch to the series at
    k = 10: within 5e-15 absolute of the telescoped closed form in decimal
    arithmetic (the direct difference's cancellation; the series is good to
    about 3e-17 there)."""
    ref = _stirling_ref(float(k))
    got = float(stirling_correction(np.array([k]))[0])
    assert abs(float(Decimal(got) - ref)) < (5e-15 if k <= 10 else 1e-16)


def test_stirling_correction_mixed_and_given_log():
    """A mixed array gives each side's values; ``log_k`` given or not gives
    the same; against scipy.special.gammaln, with ln Gamma rebuilt, to its
    rounding."""
    k = np.exp(np.random.default_rng(3).uniform(np.log(0.05), np.log(200.0), (500, 1)))
    mixed = stirling_correction(k)
    small = k <= 10
    np.testing.assert_array_equal(mixed[small], stirling_correction(k[small]))
    np.testing.assert_array_equal(mixed[~small], stirling_correction(k[~small]))
    np.testing.assert_array_equal(stirling_correction(k, np.log(k)), mixed)
    rebuilt = mixed + (k - 0.5) * np.log(k) - k + 0.5 * np.log(2 * np.pi)
    np.testing.assert_allclose(rebuilt, gammaln(k), rtol=1e-14, atol=1e-14)  # scipy.special.gammaln

