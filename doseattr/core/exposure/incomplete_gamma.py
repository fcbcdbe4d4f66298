r"""Logarithms and quantiles of the regularized incomplete gamma function.

scipy.special gives ``P(a, y) = gammainc(a, y)``, ``Q(a, y) = gammaincc(a, y)``
and their inverses, but no logarithms: ``log(gammainc)`` is ``-inf`` once
``P`` underflows (``y`` far below ``a``) and ``log(gammaincc)`` once ``Q``
does (``y`` beyond about 700). The gamma and Weibull families need finite
log-probabilities there (left-censored likelihoods, grouped data, tails),
so the two classical expansions are written here by hand, and used only
where scipy's value underflows:

.. math::

    P(a, y) = \frac{y^a e^{-y}}{\Gamma(a + 1)}
              \sum_{n \ge 0} \frac{y^n}{(a+1)\cdots(a+n)},

    Q(a, y) = \frac{y^a e^{-y}}{\Gamma(a)}\,
              \cfrac{1}{y + 1 - a - \cfrac{1 (1 - a)}{y + 3 - a - \cdots}}

(series and Legendre continued fraction; Abramowitz & Stegun 1964,
6.5.29 and 6.5.31; evaluated as in Press et al., Numerical Recipes, 3rd ed.
2007, section 6.2 - references from memory).
"""

from __future__ import annotations

from typing import cast

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import digamma, gammainc, gammaincc, gammainccinv, gammaincinv, gammaln, ndtr

from doseattr.core.exposure.base import Z_BREAKS, FloatArray

#: Below this, scipy's P or Q is replaced by the expansion.
_TINY = 1e-280
_MAX_TERMS = 1000

#: Probabilities matching the standard-normal breakpoints Z_BREAKS: lower
#: probabilities for Z <= 0, upper (survival) probabilities for Z > 0.
LOWER_P = ndtr(Z_BREAKS[Z_BREAKS <= 0])
UPPER_Q = ndtr(-Z_BREAKS[Z_BREAKS > 0])


def log_gammainc_series(a: ArrayLike, y: ArrayLike) -> FloatArray:
    """log P(a, y) by the power series (accurate for y below about a + 1)."""
    a, y = np.broadcast_arrays(np.asarray(a, float), np.asarray(y, float))
    term = np.ones_like(y)
    total = np.ones_like(y)
    for n in range(1, _MAX_TERMS):
        term = term * y / (a + n)
        total = total + term
        if np.all(term <= 1e-17 * total):
            break
    with np.errstate(divide="ignore"):
        return cast(FloatArray, a * np.log(y) - y - gammaln(a + 1) + np.log(total))


def log_gammaincc_cf(a: ArrayLike, y: ArrayLike) -> FloatArray:
    """log Q(a, y) by the Legendre continued fraction (modified Lentz;
    accurate for y above about a + 1)."""
    a, y = np.broadcast_arrays(np.asarray(a, float), np.asarray(y, float))
    tiny = 1e-300
    b = y + 1.0 - a
    c = np.full_like(y, 1.0 / tiny)
    d = 1.0 / b
    h = d.copy()
    for i in range(1, _MAX_TERMS):
        an = -i * (i - a)
        b = b + 2.0
        d = an * d + b
        d = np.where(np.abs(d) < tiny, tiny, d)
        c = b + an / c
        c = np.where(np.abs(c) < tiny, tiny, c)
        d = 1.0 / d
        delta = d * c
        h = h * delta
        if np.all(np.abs(delta - 1.0) < 1e-16):
            break
    return cast(FloatArray, a * np.log(y) - y - gammaln(a) + np.log(h))


def log_gammainc(a: ArrayLike, y: ArrayLike) -> FloatArray:
    """log P(a, y) without underflow (``-inf`` only at ``y = 0``)."""
    a, y = np.broadcast_arrays(np.asarray(a, float), np.asarray(y, float))
    p = gammainc(a, y)
    with np.errstate(divide="ignore"):
        out = np.array(np.log(p))
    small = (p < _TINY) & (y > 0)
    if np.any(small):
        out[small] = log_gammainc_series(a[small], y[small])
    return out


def log_gammaincc(a: ArrayLike, y: ArrayLike) -> FloatArray:
    """log Q(a, y) without underflow (``-inf`` only at ``y = inf``)."""
    a, y = np.broadcast_arrays(np.asarray(a, float), np.asarray(y, float))
    q = gammaincc(a, y)
    with np.errstate(divide="ignore"):
        out = np.array(np.log(q))
    small = (q < _TINY) & np.isfinite(y)
    if np.any(small):
        out[small] = log_gammaincc_cf(a[small], y[small])
    return out


#: Arguments up to which :func:`lower_gamma` and :func:`upper_gamma` take
#: power series (scipy's, for a shape raised by 2 where the argument is above
#: 1 and above the shape).
SERIES_Y = 2.0
#: Largest ``P`` from which :func:`upper_gamma` takes ``Q`` as ``1 - P``:
#: ``Q >= 0.01`` then carries at most 100 times ``P``'s absolute rounding, a
#: relative error below about 2e-13 (checked against ``gammaincc`` in the tests).
ONE_MINUS_P = 0.99


def _flat(k: ArrayLike, y: ArrayLike) -> tuple[FloatArray, FloatArray, tuple[int, ...]]:
    shape = np.broadcast_shapes(np.shape(k), np.shape(y))
    a, b = (np.broadcast_to(np.asarray(v, dtype=float), shape).ravel() for v in (k, y))
    return a, b, shape


def lower_gamma(k: ArrayLike, y: ArrayLike) -> FloatArray:
    r"""The regularised lower incomplete gamma function :math:`P(k, y)`
    (``scipy.special.gammainc``), by a faster route where Cephes' ``igam``
    is slow: for :math:`1 < y \le 2` above the shape it takes
    :math:`1 - Q` from ``igamc``'s continued fraction (about 250 ns a value)
    or, for ``y <= 1.1``, from its series (several microseconds; timings
    here). There two steps of the recurrence :math:`P(a, y) = P(a + 1, y) +
    y^a e^{-y} / \Gamma(a + 1)` (Abramowitz & Stegun 1964, 6.5.21, from
    memory) give

    .. math:: P(k, y) = P(k + 2, y) + t\,\bigl(1 + y/(k + 1)\bigr), \qquad
              t = e^{k \ln y - y - \ln\Gamma(k + 1)},

    with :math:`P(k + 2, y)` from ``igam``'s power series (``y <= k + 2``).
    The terms are positive, so the relative error is at most that of
    ``gammainc`` plus :math:`t`'s: its exponent is below 3 in size here
    (``k < y <= 2``), a few units in the last place."""
    a, b, shape = _flat(k, y)
    band = (b > 1.0) & (b <= SERIES_Y) & (b > a)
    if not band.any():
        return cast(FloatArray, gammainc(a, b).reshape(shape))
    # subsets by index: scipy's ufuncs corrupt memory with ``where=`` here
    p = np.empty(b.size)
    rest = ~band
    p[rest] = gammainc(a[rest], b[rest])
    kb, yb = a[band], b[band]
    t = np.exp(kb * np.log(yb) - yb - gammaln(kb + 1.0))
    p[band] = gammainc(kb + 2.0, yb) + t * (1.0 + yb / (kb + 1.0))
    return p.reshape(shape)


def upper_gamma(k: ArrayLike, y: ArrayLike) -> FloatArray:
    r"""The regularised upper incomplete gamma function :math:`Q(k, y)`
    (``scipy.special.gammaincc``), as :math:`1 - P(k, y)` (:func:`lower_gamma`)
    where ``y`` is at most :data:`SERIES_Y` and ``P`` at most
    :data:`ONE_MINUS_P` (a relative error below about 2e-13: ``P``'s
    absolute error is a few units in the last place of 1, and ``Q >=
    0.01``), else directly (full relative precision in the upper tail).
    This avoids Cephes' slow series for ``Q`` near ``y = 1`` (several
    microseconds a value, seen in timings here) and its continued fraction
    up to ``y = 2`` (about 250 ns), for about 60 ns."""
    a, b, shape = _flat(k, y)
    near = np.flatnonzero(b <= SERIES_Y)
    q = np.empty(b.size)
    if near.size == b.size:
        p = lower_gamma(a, b)
        ok = p <= ONE_MINUS_P
        if ok.all():
            return cast(FloatArray, np.subtract(1.0, p, out=p).reshape(shape))
        q[ok] = 1.0 - p[ok]
        rest = np.flatnonzero(~ok)
    elif near.size:
        p = lower_gamma(a[near], b[near])
        ok = p <= ONE_MINUS_P
        q[near[ok]] = 1.0 - p[ok]
        far = np.ones(b.size, dtype=bool)
        far[near[ok]] = False
        rest = np.flatnonzero(far)
    else:
        return cast(FloatArray, gammaincc(a, b).reshape(shape))
    q[rest] = gammaincc(a[rest], b[rest])
    return q.reshape(shape)


def _log_lower_quantile(a: FloatArray, p: FloatArray) -> FloatArray:
    """log of the ``p`` quantile of Gamma(a, 1), finite even when it
    underflows: there ``y^a / Gamma(a+1) = p`` is used, which bounds the
    quantile from below because ``P(a, y) <= y^a / Gamma(a+1)``."""
    y = gammaincinv(a, p)
    bound = (np.log(p) + gammaln(a + 1)) / a
    with np.errstate(divide="ignore"):
        return cast(FloatArray, np.where(y > 1e-250, np.log(np.maximum(y, 1e-300)), bound))


def _log_upper_quantile(a: FloatArray, q: FloatArray) -> FloatArray:
    """log of the quantile with survival probability ``q``; for a shape
    near 0 it can underflow (most of the mass lies below 1e-300), and then
    the lower-side bound of :func:`_log_lower_quantile` at ``1 - q`` is used."""
    y = gammainccinv(a, q)
    bound = (np.log1p(-q) + gammaln(a + 1)) / a
    with np.errstate(divide="ignore"):
        return cast(FloatArray, np.where(y > 1e-250, np.log(np.maximum(y, 1e-300)), bound))


def log_gamma_break_quantiles(shape: ArrayLike) -> FloatArray:
    """log quantiles of Gamma(shape, 1) at the probabilities of Z_BREAKS.

    Lower quantiles use ``gammaincinv``, upper ones the survival side
    ``gammainccinv`` for accuracy. The inversion is slow, so it runs once
    per distinct shape. Returns shape ``shape.shape + (K,)``.
    """
    shape = np.asarray(shape, dtype=float)
    uniq, inverse = np.unique(shape, return_inverse=True)
    a = uniq[:, None]
    lower = _log_lower_quantile(a, LOWER_P[None, :])
    upper = _log_upper_quantile(a, UPPER_Q[None, :])
    table = np.concatenate([lower, upper], axis=1)
    return table[inverse.reshape(shape.shape)]


#: Largest argument for which :func:`dlog_gammainc_da` sums the series.
_SERIES_Y_MAX = 500.0


def dlog_gammainc_da(a: float, y: FloatArray) -> FloatArray:
    r""":math:`\partial \ln P(a, y) / \partial a` for one shape ``a`` and
    arguments ``y``.

    Term by term from the series above (derived here): with
    :math:`r_0 = 1`, :math:`r_n = r_{n-1}\, y / (a + n)` and
    :math:`H_n = \sum_{j \le n} 1/(a + j)`,

    .. math:: \frac{\partial \ln P}{\partial a} = \ln y - \psi(a + 1)
              - \frac{\sum_n r_n H_n}{\sum_n r_n}.

    The series needs about ``y`` terms; above ``y = 500`` (where ``P`` is
    within about 1e-40 of 1 unless ``a`` is large) or where it has not
    settled after 1000 terms, the derivative is a central difference of
    :func:`log_gammainc` in ``a`` (relative step 1e-5)."""
    y = np.asarray(y, dtype=float)
    out = np.empty(y.shape)
    use = (y > 0) & (y <= _SERIES_Y_MAX)
    ys = y[use]
    r, h = np.ones_like(ys), np.zeros_like(ys)
    total, weighted = np.ones_like(ys), np.zeros_like(ys)
    done = np.zeros(ys.shape, bool)
    for n in range(1, _MAX_TERMS):
        r = r * ys / (a + n)
        h = h + 1.0 / (a + n)
        total = total + r
        weighted = weighted + r * h
        done = r * (1.0 + h) <= 1e-17 * (total + weighted)
        if np.all(done):
            break
    with np.errstate(divide="ignore"):
        series = np.log(ys) - digamma(a + 1) - weighted / total
    out[use] = np.where(done, series, np.nan)
    out[y <= 0] = 0.0
    rest = np.flatnonzero(~np.isfinite(out) | ((y > _SERIES_Y_MAX) & np.isfinite(y)))
    if rest.size:
        step = 1e-5 * a
        out[rest] = (log_gammainc(a + step, y[rest]) - log_gammainc(a - step, y[rest])) / (2 * step)
    out[np.isinf(y)] = 0.0
    return out
