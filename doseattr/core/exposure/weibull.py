r"""The Weibull family with shape ``k`` and scale ``lambda`` (data's unit).

With ``E = (x/\lambda)^k``, which is standard exponential:

.. math::

    F(x) = 1 - e^{-E}, \qquad
    E[X; a < X \le b] = \lambda\,\Gamma(1 + 1/k)\,[P(1 + 1/k, E_b) - P(1 + 1/k, E_a)]

(Johnson, Kotz & Balakrishnan 1994, ch. 21, from memory; the partial mean by the
substitution ``E = (x/lambda)^k``). Internal parameters are
``(ln k, ln lambda)``.
"""

from __future__ import annotations

from collections.abc import Callable
from types import MappingProxyType
from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import gammaln

from doseattr.core.curves.base import Growth
from doseattr.core.exposure.base import (
    Z_BREAKS,
    FloatArray,
    PositiveFamily,
    log1p_square,
    pcol,
    pool,
)
from doseattr.core.exposure.gamma import gamma_between
from doseattr.core.exposure.incomplete_gamma import LOWER_P, UPPER_Q, log_gamma_break_quantiles
from doseattr.core.exposure.tilt import merge, positive_rate, refuse
from doseattr.errors import ModelError

#: log of the standard-exponential quantiles at the probabilities of Z_BREAKS.
LOG_E_BREAKS = np.log(np.concatenate([-np.log1p(-LOWER_P), -np.log(UPPER_Q)]))

#: ln E[e^{cX}] above this is not representable; treated as divergent.
_LOG_MAX_MGF = 700.0


class Weibull(PositiveFamily):
    """Weibull with public parameters ``shape`` and ``scale`` (both > 0)."""

    name = "weibull"
    param_names = ("shape", "scale")
    dose_params = ("scale",)
    bounds = MappingProxyType({"shape": (0.0, np.inf), "scale": (0.0, np.inf)})

    @staticmethod
    def _u(x_or_t: ArrayLike, params: ArrayLike, *, log_scale: bool) -> tuple[FloatArray, FloatArray]:
        """``k`` and ``u = ln E = k (ln x - ln lambda)``."""
        k = pcol(params, 0)
        t = np.asarray(x_or_t, dtype=float)
        if not log_scale:
            with np.errstate(divide="ignore"):
                t = np.log(t)
        u = np.subtract(t, np.log(pcol(params, 1)))
        u *= k
        return k, u

    def log_density_log(self, t: ArrayLike, params: ArrayLike) -> FloatArray:
        r"""log density of ``T = ln X``: :math:`\ln k + u - e^u`."""
        k, u = self._u(t, params, log_scale=True)
        with np.errstate(over="ignore"):
            e = np.exp(u)
        u -= e  # in place: a hot path
        u += np.log(k)
        return u

    def _e(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        u = self._u(x, params, log_scale=False)[1]
        with np.errstate(over="ignore"):
            return np.exp(u)

    def cdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return -np.expm1(-self._e(x, params))

    def sf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return np.exp(-self._e(x, params))

    def logcdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return _log1m_exp_neg(self._u(x, params, log_scale=False)[1])

    def logsf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return -self._e(x, params)

    def ppf(self, q: ArrayLike, params: ArrayLike) -> FloatArray:
        e = -np.log1p(-np.asarray(q, dtype=float))
        return cast(FloatArray, pcol(params, 1) * e ** (1.0 / pcol(params, 0)))

    def mean(self, params: ArrayLike) -> FloatArray:
        p = np.asarray(params, dtype=float)
        return cast(FloatArray, p[..., 1] * np.exp(gammaln(1 + 1 / p[..., 0])))

    def log_sd(self, params: ArrayLike) -> float:
        r""":math:`\pi / (k\sqrt 6)` (Johnson, Kotz & Balakrishnan 1994, from memory)."""
        return float(np.pi / (float(np.asarray(params, dtype=float)[0]) * np.sqrt(6.0)))

    def partial_mean(self, a: ArrayLike, b: ArrayLike, params: ArrayLike) -> FloatArray:
        k = pcol(params, 0)
        ea, eb = self._e(a, params), self._e(b, params)
        full = pcol(params, 1) * np.exp(gammaln(1 + 1 / k))
        return cast(FloatArray, full * gamma_between(1 + 1 / k, ea, eb))

    def scipy(self, params: ArrayLike) -> Any:
        from scipy import stats

        k, lam = np.asarray(params, dtype=float)
        return stats.weibull_min(c=k, scale=lam)

    def from_moments(self, mean: float, sd: float) -> FloatArray:
        r"""Solve :math:`\ln(1 + CV^2) = \ln\Gamma(1 + 2/k) - 2\ln\Gamma(1 + 1/k)`
        for ``k`` (brentq on ``ln k``), then ``scale = mean / Gamma(1 + 1/k)``."""
        from scipy.optimize import brentq

        target = log1p_square(sd / mean)

        def gap(logk: float) -> float:
            k = np.exp(logk)
            return cast(float, gammaln(1 + 2 / k) - 2 * gammaln(1 + 1 / k) - target)

        lo, hi = np.log(0.02), np.log(1000.0)
        if not gap(lo) > 0 > gap(hi):
            raise ModelError("weibull: no shape between 0.02 and 1000 gives a coefficient of "
                             f"variation of {sd / mean:g}")
        k = np.exp(brentq(gap, lo, hi, xtol=1e-14, rtol=1e-14))
        return np.array([k, mean / np.exp(gammaln(1 + 1 / k))])

    def log_terms_scores(self, x: FloatArray, params: ArrayLike, *,
                         censored: bool) -> tuple[FloatArray, FloatArray]:
        r"""Analytic terms and scores in ``(ln k, ln lambda)``, with
        :math:`u = k(\ln x - \ln\lambda)` and :math:`E = e^u` (derived
        here; :math:`\partial u/\partial \ln k = u`,
        :math:`\partial u/\partial \ln\lambda = -k`): a detect has
        :math:`\ln f = \ln k + u - E - \ln x` with gradient
        :math:`(1 + u - uE,\; k(E - 1))`; a limit has
        :math:`\ln(1 - e^{-E})` (:meth:`logcdf`) with gradient
        :math:`g\,(u, -k)`, :math:`g = E e^{-E} / (1 - e^{-E})`, which is 1
        as :math:`E \to 0` and 0 as :math:`E \to \infty`."""
        k = float(np.asarray(params, dtype=float)[0])
        with np.errstate(divide="ignore"):
            y = np.log(x)
        u = k * (y - np.log(float(np.asarray(params, dtype=float)[1])))
        with np.errstate(over="ignore", invalid="ignore"):
            e = np.exp(u)
            if censored:
                terms = _log1m_exp_neg(u)
                g = np.where(u < -30, 1.0, np.where(e > 800, 0.0, e * np.exp(-e) / -np.expm1(-e)))
                return terms, np.stack([g * u, -g * k], axis=1)
            terms = np.log(k) + u - e - y
            return terms, np.stack([1.0 + u - u * e, k * (e - 1.0)], axis=1)

    def uncensored_mle(self, x: FloatArray, w: FloatArray) -> FloatArray | None:
        r"""Weighted MLE through the profile in the shape (derived here):
        for fixed ``k`` the scale is :math:`\hat\lambda^k = \sum w x^k / W`,
        and ``k`` solves

        .. math:: g(k) = 1/k + \bar y - \frac{\sum w x^k y}{\sum w x^k} = 0,
                  \qquad y = \ln x, \quad \bar y = \sum w y / W,

        with :math:`g'(k) = -1/k^2 - \mathrm{Var}_k(y)` (variance under
        weights :math:`w x^k`) below zero, so the root is unique (the usual
        Weibull likelihood equations; Johnson, Kotz & Balakrishnan 1994,
        ch. 21, from memory). Equal values are pooled first (one term with
        their summed weight); each Newton step (bisection when it leaves
        the bracket) is one pass over the distinct values. ``None`` when the
        iteration does not settle."""
        y, wu = pool(np.log(x), w)
        total = float(wu.sum())
        ybar = float(np.dot(wu, y)) / total
        c = y - float(y.max())
        if not float(c.min()) < 0:
            return None
        k = float(self.start(x, w)[0])
        lo, hi = 0.0, np.inf
        for _ in range(200):
            t = wu * np.exp(k * c)
            s0 = float(t.sum())
            m1 = float(np.dot(t, y)) / s0
            var = float(np.dot(t, (y - m1) ** 2)) / s0
            g = 1 / k + ybar - m1
            if g > 0:
                lo = k
            else:
                hi = k
            step = g / (1 / k**2 + var)
            new = k + step
            if not lo < new < hi:
                new = 0.5 * (lo + hi) if np.isfinite(hi) else 2 * k
            elif abs(step) <= 1e-12 * k:
                k = new
                break
            k = new
        else:
            return None
        t = wu * np.exp(k * c)
        log_lam = float(y.max()) + float(np.log(t.sum() / total)) / k
        return np.array([k, np.exp(log_lam)])

    def log_breaks(self, params: ArrayLike) -> FloatArray:
        k, lam = pcol(params, 0), pcol(params, 1)
        return cast(FloatArray, np.log(lam) + LOG_E_BREAKS / k)

    def tilted_log_breaks(self, params: ArrayLike, growth: Growth) -> FloatArray:
        r"""Power growth ``x^b``: in ``E = (x/lambda)^k``, ``x^b f`` is
        proportional to the Gamma(1 + b/k, 1) density of ``E``.
        Exponential growth ``e^{cx}``: shape < 1 diverges; shape 1 is the
        exponential distribution (finite for :math:`c\lambda < 1`, tilted scale
        :math:`\lambda/(1 - c\lambda)`); shape > 1 converges, see
        :func:`_exp_tilt_breaks`."""
        own = self.log_breaks(params)
        if growth.kind == "bounded":
            return own
        rate = positive_rate(growth)
        k, lam = pcol(params, 0), pcol(params, 1)
        if growth.kind == "power":
            log_e = log_gamma_break_quantiles((1 + rate / k)[..., 0])
            return merge(own, np.log(lam) + log_e / k)
        return merge(own, _exp_tilt_breaks(k, lam, rate))


def _log1m_exp_neg(u: FloatArray) -> FloatArray:
    r""":math:`\ln(1 - e^{-E})` at :math:`E = e^u`: ``log(-expm1(-E))`` for
    ``E`` up to ln 2 and ``log1p(-exp(-E))`` above, each where it keeps
    full precision (Maechler 2012, "Accurately computing log(1 - exp(-|a|))",
    from memory); for ``u < -30`` it is ``u`` (``ln E`` to double precision,
    which also covers ``E`` underflowing to zero)."""
    u = np.asarray(u, dtype=float)
    with np.errstate(over="ignore", divide="ignore"):
        e = np.exp(u)
        near = np.log(-np.expm1(-e))
        far = np.log1p(-np.exp(-e))
    return cast(FloatArray, np.where(u < -30, u, np.where(e <= np.log(2.0), near, far)))


def _exp_tilt_breaks(k: FloatArray, lam: FloatArray, c: FloatArray) -> FloatArray:
    r"""Breakpoints for :math:`e^{cx} f(x)`, Weibull ``f``; inputs broadcast
    like ``(D, 1)`` columns, result ``(D, K)`` or ``(K,)``.

    For shape > 1, :math:`\ln[e^{cx} f]` in ``t = ln x`` is concave with its
    mode where :math:`E = 1 + cx/k` and curvature
    :math:`-(k^2 + (k-1)cx)`; breakpoints are mode + Z_BREAKS / sqrt(curvature)
    (Laplace's approximation), with the last one moved out, if needed, to
    where :math:`E - cx = L`, :math:`L = 40 + \ln(k/(k-1))`: beyond that point
    the mass of :math:`e^{cx} f` is below :math:`\frac{k}{k-1}e^{-L}`
    (substitute ``u = E - cx``; derived here).
    """
    k, lam, c = np.broadcast_arrays(k, lam, c)
    shape = k.shape[:-1] + (len(Z_BREAKS),)
    k, lam, c = k.ravel(), lam.ravel(), c.ravel()
    unit = np.abs(k - 1) < 1e-12
    tilted = c > 0
    refuse(tilted & (k < 1) & ~unit, "a log-linear curve extended over a Weibull tail with shape < 1 "
           "has no finite mean: exp(c x) outgrows the tail")
    refuse(tilted & unit & (c * lam >= 1), "a log-linear curve extended over an exponential "
           "(Weibull shape 1) tail has no finite mean when slope x scale >= 1")
    out = np.empty((k.size, len(Z_BREAKS)))
    laplace = tilted & ~unit
    out[laplace] = _laplace_breaks(k[laplace], lam[laplace], c[laplace])
    rest = ~laplace
    scale = np.where(unit & tilted, lam / (1 - np.where(unit & tilted, c * lam, 0.0)), lam)
    out[rest] = np.log(scale[rest])[:, None] + LOG_E_BREAKS / k[rest][:, None]
    return out.reshape(shape)


def _fixed_point(u0: FloatArray, step: Callable[[FloatArray], FloatArray],
                 iterations: int = 500) -> FloatArray:
    u = u0
    for _ in range(iterations):
        u = step(u)
    return u


def _laplace_breaks(k: FloatArray, lam: FloatArray, c: FloatArray) -> FloatArray:
    """Rows of breakpoints for shape > 1 (1-D inputs)."""
    loglam = np.log(lam)
    log_peak = np.log(c) + (np.log(c * lam / k) / (k - 1) + loglam) + np.log1p(-1 / k)
    refuse(log_peak > np.log(_LOG_MAX_MGF), "a log-linear curve extended over this Weibull tail gives an "
           "expected relative risk beyond floating-point range (over e^700)")
    u_asym = (np.log(c / k) + k * loglam) / (k - 1)
    mode = _fixed_point(np.maximum(loglam, u_asym), lambda u: loglam + np.log1p(c * np.exp(u) / k) / k)
    big = 40.0 + np.log(k / (k - 1))
    u_asym = (np.log(c) + k * loglam) / (k - 1)
    top = _fixed_point(np.maximum(loglam + np.log(big) / k, u_asym),
                       lambda u: loglam + np.log(c * np.exp(u) + big) / k)
    sd = 1.0 / np.sqrt(k * k + (k - 1) * c * np.exp(mode))
    breaks: FloatArray = mode[:, None] + sd[:, None] * Z_BREAKS
    breaks[:, -1] = np.maximum(breaks[:, -1], top)
    return breaks
