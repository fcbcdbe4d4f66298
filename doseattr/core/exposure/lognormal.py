r"""The lognormal family, parameterised by geometric mean and GSD.

``X = exp(T)`` with ``T ~ N(mu, s)``, ``mu = ln GM``, ``s = ln GSD``:

.. math::

    F(x) = \Phi\left(\frac{\ln x - \mu}{s}\right), \qquad
    E[X; a < X \le b] = e^{\mu + s^2/2}
        \left[\Phi\left(\tfrac{\ln b - \mu - s^2}{s}\right)
             - \Phi\left(\tfrac{\ln a - \mu - s^2}{s}\right)\right]

(Aitchison & Brown, The Lognormal Distribution, 1957, from memory; the partial mean
follows from completing the square). Internal parameters are
``(ln GM, ln ln GSD)``.
"""

from __future__ import annotations

from types import MappingProxyType
from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import log_ndtr, ndtr, ndtri

from doseattr.core.curves.base import Growth
from doseattr.core.exposure.base import (
    MIN_RELATIVE_LOG_SPREAD,
    Z_BREAKS,
    Family,
    FloatArray,
    log1p_square,
    pcol,
)
from doseattr.core.exposure.tilt import merge, positive_rate, refuse
from doseattr.errors import ModelError

_LOG_SQRT_2PI = 0.5 * np.log(2 * np.pi)


def ndtr_between(lo: ArrayLike, hi: ArrayLike) -> FloatArray:
    """Phi(hi) - Phi(lo) for lo <= hi, computed on the side of zero that
    keeps precision (upper tail via Phi(-lo) - Phi(-hi))."""
    lo, hi = np.asarray(lo, float), np.asarray(hi, float)
    return cast(FloatArray, np.where(lo > 0, ndtr(-lo) - ndtr(-hi), ndtr(hi) - ndtr(lo)))


def _log(x: ArrayLike) -> FloatArray:
    with np.errstate(divide="ignore"):
        return cast(FloatArray, np.log(np.asarray(x, dtype=float)))


class LogNormal(Family):
    """Lognormal with public parameters ``gm`` (> 0) and ``gsd`` (> 1)."""

    name = "lognormal"
    param_names = ("gm", "gsd")
    dose_params = ("gm",)
    bounds = MappingProxyType({"gm": (0.0, np.inf), "gsd": (1.0, np.inf)})

    @staticmethod
    def _mu_s(params: ArrayLike) -> tuple[FloatArray, FloatArray]:
        return np.log(pcol(params, 0)), np.log(pcol(params, 1))

    def to_internal(self, params: ArrayLike) -> FloatArray:
        p = np.asarray(params, dtype=float)
        return np.stack([np.log(p[..., 0]), np.log(np.log(p[..., 1]))], axis=-1)

    def from_internal(self, theta: ArrayLike) -> FloatArray:
        th = np.asarray(theta, dtype=float)
        return np.stack([np.exp(th[..., 0]), np.exp(np.exp(th[..., 1]))], axis=-1)

    def check(self, params: ArrayLike) -> None:
        p = np.asarray(params, dtype=float)
        gm, gsd = p[..., 0], p[..., 1]
        if not np.all(np.isfinite(gm) & (gm > 0)):
            raise ModelError(f"lognormal: gm must be a positive number, got {gm}")
        if not np.all(np.isfinite(gsd) & (gsd > 1)):
            raise ModelError(f"lognormal: gsd must be greater than 1 (a GSD of 1 means no spread), got {gsd}")

    def log_density_log(self, t: ArrayLike, params: ArrayLike) -> FloatArray:
        mu, s = self._mu_s(params)
        z = np.subtract(t, mu, dtype=float)  # in place from here: a hot path
        z *= 1.0 / s
        z *= z
        z *= -0.5
        z -= np.log(s) + _LOG_SQRT_2PI
        return z

    def _z(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        mu, s = self._mu_s(params)
        return (_log(x) - mu) / s

    def cdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return cast(FloatArray, ndtr(self._z(x, params)))

    def sf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return cast(FloatArray, ndtr(-self._z(x, params)))

    def logcdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return cast(FloatArray, log_ndtr(self._z(x, params)))

    def logsf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return cast(FloatArray, log_ndtr(-self._z(x, params)))

    def ppf(self, q: ArrayLike, params: ArrayLike) -> FloatArray:
        mu, s = self._mu_s(params)
        return cast(FloatArray, np.exp(mu + s * ndtri(np.asarray(q, dtype=float))))

    def mean(self, params: ArrayLike) -> FloatArray:
        p = np.asarray(params, dtype=float)
        s = np.log(p[..., 1])
        return cast(FloatArray, p[..., 0] * np.exp(0.5 * s * s))

    def log_sd(self, params: ArrayLike) -> float:
        """ln GSD."""
        return float(np.log(np.asarray(params, dtype=float)[1]))

    def narrow_spread_problem(self, params: ArrayLike, mean: float) -> str | None:
        """The lognormal compares ln GSD with |ln GM| and names the GSD needed."""
        gm, gsd = (float(v) for v in np.asarray(params, dtype=float))
        need = MIN_RELATIVE_LOG_SPREAD * abs(np.log(gm))
        if np.log(gsd) >= need:
            return None
        return (f"gsd {gsd!r} is too close to 1 for gm {gm:g}: a log-scale spread below 1e-6 x "
                f"|ln gm| cannot be resolved in double precision; give gsd >= "
                f"{np.exp(need) * (1 + 1e-12):.10g}")

    def partial_mean(self, a: ArrayLike, b: ArrayLike, params: ArrayLike) -> FloatArray:
        mu, s = self._mu_s(params)
        za = (_log(a) - mu) / s - s
        zb = (_log(b) - mu) / s - s
        return cast(FloatArray, np.exp(mu + 0.5 * s * s) * ndtr_between(za, zb))

    def scipy(self, params: ArrayLike) -> Any:
        from scipy import stats

        gm, gsd = np.asarray(params, dtype=float)
        return stats.lognorm(s=np.log(gsd), scale=gm)

    def from_moments(self, mean: float, sd: float) -> FloatArray:
        r""":math:`s^2 = \ln(1 + CV^2)`, :math:`\mu = \ln m - s^2/2`."""
        s2 = log1p_square(sd / mean)
        return np.array([mean * np.exp(-0.5 * s2), np.exp(np.sqrt(s2))])

    def start(self, x: FloatArray, w: FloatArray) -> FloatArray:
        """Log-scale weighted mean and SD (the MLE when nothing is censored)."""
        return self.closed_form_mle(x, w)

    def closed_form_mle(self, x: FloatArray, w: FloatArray) -> FloatArray:
        r"""Weighted MLE: :math:`\hat\mu = \sum w_i \ln x_i / \sum w_i`,
        :math:`\hat s^2 = \sum w_i (\ln x_i - \hat\mu)^2 / \sum w_i`
        (the normal MLE on the log scale; divisor the sum of weights)."""
        y = np.log(x)
        mu = np.average(y, weights=w)
        s = np.sqrt(np.average((y - mu) ** 2, weights=w))
        if not s > 0:
            raise ModelError(f"lognormal: all values are equal ({np.exp(mu):g}); "
                             "a spread is needed to fit a distribution")
        return np.array([np.exp(mu), np.exp(s)])

    def log_terms_scores(self, x: FloatArray, params: ArrayLike, *,
                         censored: bool) -> tuple[FloatArray, FloatArray]:
        r"""Analytic terms and scores in the internal parameters
        :math:`(\mu, \eta = \ln s)`, with :math:`z = (\ln x - \mu)/s`
        (derived here): a detect has :math:`\ln f = -z^2/2 - \eta - \ln
        \sqrt{2\pi} - \ln x` with gradient :math:`(z/s,\; z^2 - 1)`; a limit
        has :math:`\ln \Phi(z)` with gradient :math:`(-r/s,\; -r z)`,
        :math:`r = \varphi(z)/\Phi(z)` (the inverse Mills ratio, from the
        log CDF so that it stays finite far in the lower tail)."""
        p = np.asarray(params, dtype=float)
        mu, s = float(np.log(p[0])), float(np.log(p[1]))
        y = _log(x)
        z = (y - mu) / s
        if censored:
            terms = cast(FloatArray, log_ndtr(z))
            r = np.exp(-0.5 * z * z - _LOG_SQRT_2PI - terms)
            return terms, np.stack([-r / s, -r * z], axis=1)
        terms = -0.5 * z * z - (np.log(s) + _LOG_SQRT_2PI) - y
        return terms, np.stack([z / s, z * z - 1.0], axis=1)

    def detect_summary(self, x: FloatArray, w: FloatArray) -> FloatArray:
        r"""``[W, ybar, m2]``: :math:`W = \sum w`, :math:`\bar y = \sum w \ln x / W`,
        :math:`m_2 = \sum w (\ln x - \bar y)^2` (two passes, no cancellation)."""
        y = np.log(x)
        total = float(np.sum(w))
        ybar = float(np.dot(w, y)) / total
        return np.array([total, ybar, float(np.dot(w, (y - ybar) ** 2))])

    def summary_loglik(self, summary: FloatArray, params: ArrayLike) -> tuple[float, FloatArray]:
        r""":math:`\sum w \ln f = -W\bar y - W(\ln s + \ln\sqrt{2\pi}) - Q/(2s^2)`,
        :math:`Q = m_2 + W(\bar y - \mu)^2`, with gradient
        :math:`(W(\bar y - \mu)/s^2,\; Q/s^2 - W)` in :math:`(\mu, \ln s)`
        (derived here)."""
        total, ybar, m2 = (float(v) for v in summary)
        p = np.asarray(params, dtype=float)
        mu, s = float(np.log(p[0])), float(np.log(p[1]))
        q = m2 + total * (ybar - mu) ** 2
        value = -total * ybar - total * (np.log(s) + _LOG_SQRT_2PI) - q / (2 * s * s)
        return float(value), np.array([total * (ybar - mu) / s**2, q / s**2 - total])

    def information_at_mle(self, x: FloatArray, w: FloatArray,
                           params: FloatArray) -> FloatArray:
        r"""At the MLE, :math:`\mathrm{diag}(W/s^2,\; 2W)` in
        :math:`(\mu, \ln s)`, :math:`W = \sum w` (derived here: the cross
        term is :math:`-2\sum w (y - \hat\mu)/s^2 = 0` and
        :math:`-\partial^2\ell/\partial(\ln s)^2 = 2\sum w (y - \hat\mu)^2/s^2 = 2W`)."""
        total, s = float(np.sum(w)), float(np.log(params[1]))
        return np.diag([total / s**2, 2 * total])

    def log_breaks(self, params: ArrayLike) -> FloatArray:
        mu, s = self._mu_s(params)
        return cast(FloatArray, mu + s * Z_BREAKS)

    def tilted_log_breaks(self, params: ArrayLike, growth: Growth) -> FloatArray:
        """Power growth ``x^b``: ``x^b f(x)`` is proportional to the lognormal
        density with ``mu + b s^2`` (complete the square). Exponential growth
        diverges (the lognormal moment generating function is infinite for
        any positive argument)."""
        own = self.log_breaks(params)
        if growth.kind == "bounded":
            return own
        rate = positive_rate(growth)
        if growth.kind == "exp":
            refuse(rate > 0, "a log-linear curve extended over a lognormal tail has no finite mean: "
                   "the lognormal moment generating function diverges")
            rate = np.zeros_like(rate)
        mu, s = self._mu_s(params)
        return merge(own, mu + rate * s * s + s * Z_BREAKS)
