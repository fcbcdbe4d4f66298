r"""The gamma family with shape ``k`` and scale ``theta`` (in the data's unit).

.. math::

    f(x) = \frac{x^{k-1} e^{-x/\theta}}{\Gamma(k)\,\theta^k}, \qquad
    F(x) = P(k, x/\theta), \qquad
    E[X; a < X \le b] = k\theta\,[P(k+1, b/\theta) - P(k+1, a/\theta)]

with ``P`` the regularized lower incomplete gamma function (Johnson, Kotz
& Balakrishnan, Continuous Univariate Distributions vol. 1, 2nd ed. 1994,
ch. 17, from memory; the partial mean because ``x f(x; k, theta) = k theta f(x; k+1, theta)``).
Internal parameters are ``(ln k, ln theta)``.
"""

from __future__ import annotations

from types import MappingProxyType
from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import digamma, gammainc, gammaincc, gammaincinv, gammaln, polygamma

from doseattr.core.curves.base import Growth
from doseattr.core.exposure.base import FloatArray, PositiveFamily, pcol
from doseattr.core.exposure.incomplete_gamma import (
    dlog_gammainc_da,
    log_gamma_break_quantiles,
    log_gammainc,
    log_gammaincc,
)
from doseattr.core.exposure.tilt import merge, positive_rate, refuse

_HALF_LOG_2PI = 0.5 * np.log(2 * np.pi)


#: Shapes above which :func:`stirling_correction` takes the asymptotic series.
_SERIES_SHAPE = 10.0


def stirling_correction(k: ArrayLike, log_k: ArrayLike | None = None) -> FloatArray:
    r""":math:`c(k) = \ln\Gamma(k) - (k - \tfrac12)\ln k + k - \tfrac12\ln 2\pi`;
    for ``k > 10`` by its asymptotic series :math:`\sum_n B_{2n} / (2n(2n-1)
    k^{2n-1}) = 1/(12k) - 1/(360k^3) + 1/(1260k^5) - 1/(1680k^7) +
    1/(1188k^9) - 691/(360360k^{11}) + 1/(156k^{13})` (Abramowitz & Stegun
    1964, 6.1.40, from memory; the next term, :math:`3617/(122400k^{15})`,
    is below 3e-17 there), which avoids the cancellation of the direct
    difference (a few units of 1e-15 at ``k = 10``). Each form is evaluated
    only where it is taken; ``log_k``, if given, is ``ln k``."""
    k = np.asarray(k, dtype=float)
    big = k > _SERIES_SHAPE
    if not big.any():
        return _stirling_direct(k, np.log(k) if log_k is None else np.asarray(log_k, dtype=float))
    if big.all():
        return _stirling_series(k)
    out = np.empty(k.shape)
    out[big] = _stirling_series(k[big])
    small = ~big
    out[small] = _stirling_direct(k[small], np.log(k[small]))
    return out


def _stirling_direct(k: FloatArray, log_k: FloatArray) -> FloatArray:
    c = gammaln(k)
    c -= (k - 0.5) * log_k
    c += k
    c -= _HALF_LOG_2PI
    return cast(FloatArray, c)


#: The coefficients of :func:`stirling_correction`'s series, in ``1/k^(2n-1)``.
_STIRLING = (1 / 12, -1 / 360, 1 / 1260, -1 / 1680, 1 / 1188, -691 / 360360, 1 / 156)


def _stirling_series(k: FloatArray) -> FloatArray:
    """The series of :func:`stirling_correction`, in Horner form in ``1/k^2``."""
    r = 1.0 / k
    r2 = r * r
    total = np.full_like(r, _STIRLING[-1])
    for c in _STIRLING[-2::-1]:
        total *= r2
        total += c
    return cast(FloatArray, total * r)


def gamma_between(a: ArrayLike, lo: ArrayLike, hi: ArrayLike) -> FloatArray:
    """P(a, hi) - P(a, lo) for lo <= hi, on the survival side above the mean
    ``a`` to keep precision in the upper tail."""
    a, lo, hi = (np.asarray(v, dtype=float) for v in (a, lo, hi))
    return cast(FloatArray, np.where(lo > a, gammaincc(a, lo) - gammaincc(a, hi),
                                     gammainc(a, hi) - gammainc(a, lo)))


class Gamma(PositiveFamily):
    """Gamma with public parameters ``shape`` and ``scale`` (both > 0)."""

    name = "gamma"
    param_names = ("shape", "scale")
    dose_params = ("scale",)
    bounds = MappingProxyType({"shape": (0.0, np.inf), "scale": (0.0, np.inf)})

    def log_density_log(self, t: ArrayLike, params: ArrayLike) -> FloatArray:
        r"""log density of ``T = ln X``: :math:`k u - e^u - \ln\Gamma(k)`,
        ``u = t - ln theta``, written about the mode ``u = ln k`` as

        .. math:: -k\,(\mathrm{expm1}(v) - v) + \tfrac12 \ln k
                  - \tfrac12 \ln 2\pi - c(k), \qquad v = u - \ln k,

        with :math:`c(k) = \ln\Gamma(k) - (k - \tfrac12)\ln k + k -
        \tfrac12 \ln 2\pi` (Stirling's correction). The terms ``k u``,
        ``e^u`` and ``ln Gamma(k)`` each grow like ``k ln k`` and cancel; this
        form keeps full precision for a large shape (a narrow distribution)."""
        k = pcol(params, 0)
        v = np.subtract(t, np.log(pcol(params, 1)) + np.log(k), dtype=float)  # in place: hot path
        with np.errstate(over="ignore", invalid="ignore"):
            e: FloatArray = np.expm1(v)
            e -= v
        e *= -k
        e += 0.5 * np.log(k) - _HALF_LOG_2PI - stirling_correction(k)
        return e

    @staticmethod
    def _ky(x: ArrayLike, params: ArrayLike) -> tuple[FloatArray, FloatArray]:
        return pcol(params, 0), np.asarray(x, dtype=float) / pcol(params, 1)

    def cdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return cast(FloatArray, gammainc(*self._ky(x, params)))

    def sf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return cast(FloatArray, gammaincc(*self._ky(x, params)))

    def logcdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return log_gammainc(*self._ky(x, params))

    def logsf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return log_gammaincc(*self._ky(x, params))

    def ppf(self, q: ArrayLike, params: ArrayLike) -> FloatArray:
        q = np.asarray(q, dtype=float)
        return cast(FloatArray, pcol(params, 1) * gammaincinv(pcol(params, 0), q))

    def mean(self, params: ArrayLike) -> FloatArray:
        p = np.asarray(params, dtype=float)
        return cast(FloatArray, p[..., 0] * p[..., 1])

    def log_sd(self, params: ArrayLike) -> float:
        r""":math:`\sqrt{\psi_1(k)}` (Johnson, Kotz & Balakrishnan 1994, from memory)."""
        return float(np.sqrt(polygamma(1, float(np.asarray(params, dtype=float)[0]))))

    def partial_mean(self, a: ArrayLike, b: ArrayLike, params: ArrayLike) -> FloatArray:
        k, theta = pcol(params, 0), pcol(params, 1)
        lo, hi = np.asarray(a, dtype=float) / theta, np.asarray(b, dtype=float) / theta
        return k * theta * gamma_between(k + 1, lo, hi)

    def scipy(self, params: ArrayLike) -> Any:
        from scipy import stats

        k, theta = np.asarray(params, dtype=float)
        return stats.gamma(a=k, scale=theta)

    def from_moments(self, mean: float, sd: float) -> FloatArray:
        r""":math:`k = 1/CV^2`, :math:`\theta = sd^2/mean`."""
        return np.array([(mean / sd) ** 2, sd * sd / mean])

    def log_terms_scores(self, x: FloatArray, params: ArrayLike, *,
                         censored: bool) -> tuple[FloatArray, FloatArray]:
        r"""Terms and scores in ``(ln k, ln theta)``, with ``y = x/theta``
        (derived here): a detect has the gradient
        :math:`(k(\ln y - \psi(k)),\; y - k)`; a limit, with
        :math:`\ell = \ln P(k, y)`, has
        :math:`\partial \ell/\partial \ln\theta = -y^k e^{-y} / (\Gamma(k) P)`
        and :math:`\partial \ell/\partial \ln k = k\,\partial \ell/\partial k`
        from :func:`~doseattr.core.exposure.incomplete_gamma.dlog_gammainc_da`."""
        k, theta = (float(v) for v in np.asarray(params, dtype=float))
        y = np.asarray(x, dtype=float) / theta
        with np.errstate(divide="ignore"):
            ly = np.log(y)
        if censored:
            terms = log_gammainc(k, y)
            with np.errstate(over="ignore", invalid="ignore"):
                d_scale = -np.exp(k * ly - y - gammaln(k) - terms)
            d_shape = k * dlog_gammainc_da(k, y)
            return terms, np.stack([d_shape, d_scale], axis=1)
        terms = self.logpdf(x, params)
        return terms, np.stack([k * (ly - digamma(k)), y - k], axis=1)

    def uncensored_mle(self, x: FloatArray, w: FloatArray) -> FloatArray | None:
        r"""Weighted MLE from the sufficient statistics :math:`\bar x = \sum w x / W`
        and :math:`\bar y = \sum w \ln x / W`: ``k`` solves
        :math:`\ln k - \psi(k) = s`, :math:`s = \ln \bar x - \bar y`, and
        :math:`\theta = \bar x / k` (Choi & Wette 1969, Technometrics
        11:683, from memory). ``s`` is computed as
        :math:`\mathrm{log1p}(\sum w\,\mathrm{expm1}(\ln x - \bar y) / W)`,
        which keeps its precision for a narrow spread. Newton steps in
        :math:`\ln k` from the approximation
        :math:`k_0 = (3 - s + \sqrt{(s - 3)^2 + 24 s}) / (12 s)` (Minka 2002,
        "Estimating a gamma distribution", from memory); the left side
        falls strictly in ``k``, so the root is unique. ``None`` when the
        values are all equal or the iteration does not settle."""
        total = float(np.sum(w))
        ly = np.log(x)
        ybar = float(np.dot(w, ly)) / total
        s = float(np.log1p(np.dot(w, np.expm1(ly - ybar)) / total))
        if not s > 0:
            return None
        k = (3 - s + np.sqrt((s - 3) ** 2 + 24 * s)) / (12 * s)
        for _ in range(100):
            gap = np.log(k) - digamma(k) - s
            slope = 1 - k * polygamma(1, k)
            step = -gap / slope
            k = k * np.exp(step)
            if abs(step) <= 1e-12:
                break
        else:
            return None
        return np.array([k, np.exp(ybar + s) / k])

    def detect_summary(self, x: FloatArray, w: FloatArray) -> FloatArray:
        r"""``[W, xbar, ybar]``: the total weight and the weighted means of
        ``x`` and ``ln x``."""
        total = float(np.sum(w))
        return np.array([total, float(np.dot(w, x)) / total, float(np.dot(w, np.log(x))) / total])

    def summary_loglik(self, summary: FloatArray, params: ArrayLike) -> tuple[float, FloatArray]:
        r""":math:`\sum w \ln f = W[(k-1)\bar y - \bar x/\theta - \ln\Gamma(k) - k\ln\theta]`
        with gradient :math:`W\,(k(\bar y - \psi(k) - \ln\theta),\; \bar x/\theta - k)`
        in ``(ln k, ln theta)`` (derived here)."""
        total, xbar, ybar = (float(v) for v in summary)
        k, theta = (float(v) for v in np.asarray(params, dtype=float))
        lt = float(np.log(theta))
        value = total * ((k - 1) * ybar - xbar / theta - float(gammaln(k)) - k * lt)
        grad = total * np.array([k * (ybar - float(digamma(k)) - lt), xbar / theta - k])
        return value, grad

    def information_at_mle(self, x: FloatArray, w: FloatArray,
                           params: FloatArray) -> FloatArray:
        r"""At the MLE, :math:`W \begin{pmatrix} k^2\psi_1(k) & k \\ k & k
        \end{pmatrix}` in ``(ln k, ln theta)``, :math:`W = \sum w` (derived
        here from :math:`\ell/W = (k-1)\bar y - \bar x/\theta - \ln\Gamma(k)
        - k\ln\theta`, using :math:`\bar y - \psi(k) - \ln\theta = 0` and
        :math:`\bar x/\theta = k` there)."""
        total, k = float(np.sum(w)), float(params[0])
        return total * np.array([[k * k * float(polygamma(1, k)), k], [k, k]])

    def log_breaks(self, params: ArrayLike) -> FloatArray:
        p = np.asarray(params, dtype=float)
        return cast(FloatArray, np.log(p[..., 1, None]) + log_gamma_break_quantiles(p[..., 0]))

    def tilted_log_breaks(self, params: ArrayLike, growth: Growth) -> FloatArray:
        r"""Power growth ``x^b``: ``x^b f`` is proportional to Gamma(k + b, theta).
        Exponential growth ``e^{cx}``: proportional to Gamma(k, theta/(1 - c theta)),
        finite only when :math:`c\theta < 1`, and then
        :math:`E[e^{cX}] = (1 - c\theta)^{-k}` (the gamma moment generating function)."""
        own = self.log_breaks(params)
        if growth.kind == "bounded":
            return own
        rate = positive_rate(growth)[..., 0]
        p = np.asarray(params, dtype=float)
        k, theta = np.broadcast_arrays(p[..., 0], p[..., 1], rate)[:2]
        if growth.kind == "power":
            return merge(own, self.log_breaks(np.stack([k + rate, theta], axis=-1)))
        ct = rate * p[..., 1]
        refuse(ct >= 1, "a log-linear curve extended over a gamma tail has no finite mean when "
               "slope x scale >= 1: the gamma moment generating function diverges there")
        return merge(own, self.log_breaks(np.stack([k, theta / (1 - ct)], axis=-1)))
