r"""Exact confidence limits for a lognormal sample without non-detects.

For unweighted, fully detected values ``x_1..x_n`` (``n >= 3``) with
:math:`\bar y` and :math:`s` the mean and SD (divisor ``n - 1``) of
``y = ln x``, and ``mu``, ``sigma`` the true mean and SD of ``ln X``:

* exceedance fraction :math:`F = P(X > L) = \Phi(-(\ln L - \mu)/\sigma)`
  and the 95th percentile :math:`\exp(\mu + z_{0.95}\sigma)` from the
  non-central t pivot (common practice in occupational hygiene; e.g.
  Hewett & Ganser, from memory);
* the arithmetic mean :math:`\exp(\mu + \sigma^2/2)` from Land's exact
  interval (Land 1971, Ann Math Stat 42:1187; Land 1975, tables; from
  memory), computed here from the conditional test it rests on
  (:func:`land_cdf`).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import cast

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats
from scipy.optimize import brentq
from scipy.special import hyp0f1, ndtr, ndtri

from doseattr.core.exposure.base import FloatArray
from doseattr.core.hygiene.bounds import Bounded
from doseattr.errors import ModelError

NCT_SOURCE = "non-central t (common practice; e.g. Hewett & Ganser, from memory)"
LAND_SOURCE = "Land's exact interval (Land 1971, Ann Math Stat 42:1187, from memory)"

_NODES, _WEIGHTS = np.polynomial.legendre.leggauss(32)
#: Panel edges around the mode of the Land integrand, in widths.
_WIDTHS = np.array([-64, -32, -16, -8, -4, -2, -1, 0, 1, 2, 4, 8, 16, 32, 64], dtype=float)


def log_summary(values: ArrayLike) -> tuple[int, float, float]:
    r"""``(n, ybar, s)`` of ``y = ln x``: mean and SD with divisor ``n - 1``;
    ModelError unless there are at least 3 positive finite values with a spread."""
    x = np.asarray(values, dtype=float)
    if x.ndim != 1 or x.size < 3:
        raise ModelError(f"exact lognormal limits need at least 3 values, got {x.size}; "
                         "take more samples")
    if not np.all(np.isfinite(x) & (x > 0)):
        raise ModelError("exact lognormal limits need positive finite values; remove zeros, "
                         "negatives and missing values")
    y = np.log(x)
    s = float(np.std(y, ddof=1))
    if not s > 0:
        raise ModelError(f"all values are equal ({x[0]:g}): a spread is needed for limits")
    return int(x.size), float(np.mean(y)), s


def _check_probabilities(confidence: float, level: float) -> None:
    if not 0.5 < confidence < 1:
        raise ModelError(f"confidence must lie in (0.5, 1), got {confidence}; give e.g. 0.70 or 0.95")
    if not 0 < level < 1:
        raise ModelError(f"level must lie in (0, 1), got {level}; give e.g. 0.95")


def _decreasing_root(f: Callable[[float], float], start: float, step: float,
                     what: str) -> float:
    """Root of a decreasing ``f`` by expanding a bracket from ``start``."""
    lo = hi = start
    f_lo = f_hi = f(start)
    for _ in range(80):
        if f_lo >= 0 >= f_hi and lo < hi:
            return float(brentq(f, lo, hi, xtol=1e-12, rtol=1e-12))
        if f_lo < 0:
            hi, f_hi = lo, f_lo
            lo -= step
            f_lo = f(lo)
        else:
            lo, f_lo = hi, f_hi
            hi += step
            f_hi = f(hi)
        step *= 2.0
    raise ModelError(f"{what}: no root found (the data are too extreme for the exact method)")


def nct_noncentrality(t_obs: float, df: int, prob: float) -> float:
    r"""The non-centrality :math:`\delta` with
    ``scipy.stats.nct.cdf(t_obs, df, delta) = prob`` (the CDF decreases in
    :math:`\delta`)."""
    def gap(delta: float) -> float:
        with np.errstate(all="ignore"):
            value = float(stats.nct.cdf(t_obs, df, delta))
        if not np.isfinite(value):
            raise ModelError(f"the non-central t CDF is not finite at t {t_obs:g}, "
                             f"delta {delta:g}; the data are too extreme for the exact method")
        return value - prob

    # The sign of the root is that of gap(0) (the central t): bracketing on
    # that side only keeps scipy away from far non-centralities of the other
    # sign, where its CDF is not finite.
    side = 1.0 if gap(0.0) >= 0 else -1.0
    end = side * max(abs(t_obs), 1.0)
    for _ in range(60):
        if side * gap(end) <= 0:
            lo, hi = sorted((0.0, end))
            return float(brentq(gap, lo, hi, xtol=1e-12, rtol=1e-12))
        end *= 2.0
    raise ModelError(f"exceedance limit: no non-centrality found for t {t_obs:g}; the data are "
                     "too extreme for the exact method")


def exceedance_exact(values: ArrayLike, limit: float, *, confidence: float = 0.70,
                     level: float = 0.95) -> Bounded:
    r"""Exceedance fraction :math:`F = P(X > L)` of a lognormal, exact limits.

    Estimate: the plug-in :math:`\Phi(-(\ln L - \bar y)/s)` with ``s`` of
    divisor ``n - 1`` (not the MLE, not unbiased). Limits: the pivot
    :math:`T = \sqrt n(\ln L - \bar y)/s` is non-central t with ``n - 1``
    degrees of freedom and non-centrality :math:`\delta = \sqrt n z`,
    :math:`z = (\ln L - \mu)/\sigma`; its CDF at the observed ``T``
    decreases in :math:`\delta`. The one-sided upper limit solves
    ``nct.cdf(T, n-1, delta) = confidence`` for :math:`\delta_c` and is
    :math:`\Phi(-\delta_c/\sqrt n)`; the two-sided interval uses
    :math:`(1 \pm \mathrm{level})/2` (common practice; e.g. Hewett &
    Ganser, from memory).
    """
    _check_probabilities(confidence, level)
    if not (np.isfinite(limit) and limit > 0):
        raise ModelError(f"the limit must be a positive number, got {limit}")
    n, ybar, s = log_summary(values)
    rn = np.sqrt(n)
    t_obs = rn * (np.log(limit) - ybar) / s

    failures: list[str] = []

    def fraction(prob: float) -> float | None:
        try:
            return float(ndtr(-nct_noncentrality(t_obs, n - 1, prob) / rn))
        except ModelError as err:
            failures.append(str(err))
            return None

    lower, upper = fraction((1 - level) / 2), fraction((1 + level) / 2)
    ucl = fraction(confidence)
    return Bounded(
        estimate=float(ndtr(-(np.log(limit) - ybar) / s)), lower=lower, upper=upper, ucl=ucl,
        level=level, confidence=confidence,
        method=f"exceedance fraction, plug-in estimate with s (n-1); {NCT_SOURCE}",
        note="; ".join(dict.fromkeys(failures)))


def percentile_exact(values: ArrayLike, p: float = 0.95, *, confidence: float = 0.70,
                     level: float = 0.95) -> Bounded:
    r"""The ``p`` quantile :math:`\exp(\mu + z_p\sigma)` of a lognormal.

    Estimate :math:`\exp(\bar y + z_p s)`; upper tolerance limit
    :math:`\exp(\bar y + K s)` with
    :math:`K = t'_{c}(n-1, z_p\sqrt n)/\sqrt n`, the ``c`` quantile of the
    non-central t (because :math:`(z_p\sqrt n - \sqrt n(\bar y - \mu)/\sigma)
    /(s/\sigma)` is non-central t with that non-centrality); the two-sided
    interval takes the :math:`(1 \mp \mathrm{level})/2` quantiles (common
    practice; e.g. Hewett & Ganser, from memory).
    """
    _check_probabilities(confidence, level)
    if not 0 < p < 1:
        raise ModelError(f"the percentile must be a fraction in (0, 1), got {p}")
    n, ybar, s = log_summary(values)
    rn = np.sqrt(n)
    zp = float(ndtri(p))

    def bound(prob: float) -> float:
        k = float(stats.nct.ppf(prob, n - 1, zp * rn)) / rn
        return float(np.exp(ybar + k * s))

    return Bounded(
        estimate=float(np.exp(ybar + zp * s)), lower=bound((1 - level) / 2),
        upper=bound((1 + level) / 2), ucl=bound(confidence), level=level,
        confidence=confidence,
        method=f"{100 * p:g}th percentile exp(ybar + z s); tolerance limit by {NCT_SOURCE}")


def _log_integrand(phi: FloatArray, a: float, m: int) -> FloatArray:
    with np.errstate(divide="ignore"):
        return cast(FloatArray, -a * np.cos(phi) + m * np.log(np.sin(phi)))


def _panel_sums(edges: FloatArray, a: float, m: int, log_peak: float) -> FloatArray:
    """Gauss-Legendre integral of exp(h - log_peak) on each panel."""
    mid, half = 0.5 * (edges[1:] + edges[:-1]), 0.5 * (edges[1:] - edges[:-1])
    phi = mid[:, None] + half[:, None] * _NODES
    vals = np.exp(_log_integrand(phi, a, m) - log_peak)
    return cast(FloatArray, half * (vals @ _WEIGHTS))


def land_cdf(theta0: float, n: int, ybar: float, s: float) -> float:
    r"""Conditional CDF of Land's test of :math:`\theta = \mu + \sigma^2/2 = \theta_0`.

    Derivation (verified here). With :math:`y'_i = y_i - \theta_0` and
    :math:`\mu = \theta_0 - \sigma^2/2` under the hypothesis,

    .. math:: f(y') \propto \exp\Big(-\frac{\sum y'^2_i}{2\sigma^2}
              - \frac{\sum y'_i}{2}\Big),

    an exponential family in :math:`(\sum y'^2, \sum y')` whose natural
    parameter of :math:`\sum y'` is :math:`(\mu - \theta_0)/\sigma^2`,
    equal to :math:`-1/2` exactly when :math:`\theta = \theta_0`; the UMPU
    test conditions on :math:`r^2 = \sum y'^2` (Lehmann's theory). Given
    :math:`r`, the direction of :math:`y'` lies on the sphere with density
    :math:`\propto \exp(-r\sqrt n\,t/2)`, :math:`t = \sum y'/(r\sqrt n)`
    the cosine of its angle to :math:`(1,\dots,1)`; as the uniform law of
    that cosine is :math:`\propto (1 - t^2)^{(n-3)/2}`, with :math:`t =
    \cos\phi` and :math:`a = r\sqrt n/2`,

    .. math:: P(T \le t_{obs} \mid r) = \frac{\int_{\phi_{obs}}^{\pi}
              e^{-a\cos\phi}\sin^{n-2}\phi\,d\phi}
              {\int_0^\pi e^{-a\cos\phi}\sin^{n-2}\phi\,d\phi},

    free of :math:`\sigma`. Here :math:`\phi_{obs} =
    \mathrm{atan2}(\sqrt{n-1}\,s, \sqrt n(\bar y - \theta_0))` and
    :math:`r^2 = (n-1)s^2 + n(\bar y - \theta_0)^2`. The integrals are
    computed relative to the integrand's peak (log scale, no overflow) by
    Gauss-Legendre panels placed around the mode
    :math:`\cos\phi^* = -2a/(m + \sqrt{m^2 + 4a^2})`, ``m = n - 2``.
    The CDF decreases in :math:`\theta_0`.
    """
    m = n - 2
    rn = np.sqrt(n)
    d, spread = rn * (ybar - theta0), np.sqrt(n - 1) * s
    a = 0.5 * rn * float(np.hypot(spread, d))
    phi_obs = float(np.arctan2(spread, d))
    cos_mode = -2 * a / (m + np.sqrt(m * m + 4 * a * a))
    phi_mode = float(np.arccos(cos_mode))
    width = 1.0 / np.sqrt(m / (1 - cos_mode**2) - a * cos_mode)
    edges = np.clip(phi_mode + width * _WIDTHS, 0.0, np.pi)
    edges = np.unique(np.concatenate([edges, [0.0, np.pi, phi_obs]]))
    log_peak = float(_log_integrand(np.array(phi_mode), a, m))
    parts = _panel_sums(edges, a, m, log_peak)
    above = float(parts[edges[:-1] >= phi_obs].sum())
    return above / float(parts.sum())


def mvue_mean(n: int, ybar: float, s: float) -> float:
    r"""Minimum-variance unbiased estimate of the lognormal mean,
    :math:`e^{\bar y}\,{}_0F_1(;\tfrac{n-1}{2};\tfrac{(n-1)^2 s^2}{4n})`
    (Finney 1941, from memory; checked here: with
    :math:`S^2 = (n-1)s^2 \sim \sigma^2\chi^2_{n-1}`,
    :math:`E[S^{2k}] = (2\sigma^2)^k ((n-1)/2)_k`, so the series has
    expectation :math:`e^{(n-1)\sigma^2/(2n)}`, and
    :math:`E[e^{\bar y}] = e^{\mu + \sigma^2/(2n)}`)."""
    series = float(hyp0f1((n - 1) / 2, (n - 1) ** 2 * s * s / (4 * n)))
    return float(np.exp(ybar + np.log(series)))


def _land_limit(n: int, ybar: float, s: float, prob: float) -> float | None:
    """The theta0 where the conditional CDF equals ``prob``, on the arithmetic scale."""
    centre = ybar + 0.5 * s * s
    se = np.sqrt(s * s / n + s**4 / (2 * (n + 1)))
    theta = _decreasing_root(lambda t0: land_cdf(t0, n, ybar, s) - prob, centre, se,
                             "Land's limit for the mean")
    with np.errstate(over="ignore"):
        value = float(np.exp(theta))
    return value if np.isfinite(value) else None


def mean_land(values: ArrayLike, *, confidence: float = 0.70, level: float = 0.95) -> Bounded:
    r"""Arithmetic mean of a lognormal with Land's exact limits.

    Estimate: the MVUE (:func:`mvue_mean`). A limit is the
    :math:`\theta_0` at which :func:`land_cdf` equals the tail probability:
    the one-sided upper limit where it equals ``1 - confidence``, the
    two-sided interval where it equals :math:`(1 \pm \mathrm{level})/2`
    (lower limit at the larger); each is returned as :math:`e^{\theta_0}`
    (Land 1971, Ann Math Stat 42:1187, from memory).
    """
    _check_probabilities(confidence, level)
    n, ybar, s = log_summary(values)
    lower = _land_limit(n, ybar, s, (1 + level) / 2)
    upper = _land_limit(n, ybar, s, (1 - level) / 2)
    ucl = _land_limit(n, ybar, s, 1 - confidence)
    note = "" if None not in (upper, ucl) else "an upper limit exceeds the float range"
    return Bounded(estimate=mvue_mean(n, ybar, s), lower=lower, upper=upper, ucl=ucl,
                   level=level, confidence=confidence,
                   method=f"arithmetic mean, MVUE (Finney 1941, from memory); {LAND_SOURCE}",
                   note=note)
