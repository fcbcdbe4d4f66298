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

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats
from scipy.special import gammainc, gammaincc, gammaincinv, gammaln

from doseattr.core.curves.base import Growth
from doseattr.core.exposure.base import PositiveFamily, FloatArray, pcol
from doseattr.core.exposure.incomplete_gamma import (log_gamma_break_quantiles, log_gammainc,
                                                     log_gammaincc)
from doseattr.core.exposure.tilt import merge, positive_rate, refuse


def gamma_between(a: ArrayLike, lo: ArrayLike, hi: ArrayLike) -> FloatArray:
    """P(a, hi) - P(a, lo) for lo <= hi, on the survival side above the mean
    ``a`` to keep precision in the upper tail."""
    a, lo, hi = (np.asarray(v, dtype=float) for v in (a, lo, hi))
    return np.where(lo > a, gammaincc(a, lo) - gammaincc(a, hi), gammainc(a, hi) - gammainc(a, lo))


class Gamma(PositiveFamily):
    """Gamma with public parameters ``shape`` and ``scale`` (both > 0)."""

    name = "gamma"
    param_names = ("shape", "scale")

    def log_density_log(self, t: ArrayLike, params: ArrayLike) -> FloatArray:
        r"""log density of ``T = ln X``: :math:`k u - e^u - \ln\Gamma(k)`,
        ``u = t - ln theta``."""
        k = pcol(params, 0)
        u = np.subtract(t, np.log(pcol(params, 1)), dtype=float)  # in place from here: a hot path
        with np.errstate(over="ignore"):
            e = np.exp(u)
        u *= k
        u -= e
        u -= gammaln(k)
        return u

    @staticmethod
    def _ky(x: ArrayLike, params: ArrayLike) -> tuple[FloatArray, FloatArray]:
        return pcol(params, 0), np.asarray(x, dtype=float) / pcol(params, 1)

    def cdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return gammainc(*self._ky(x, params))

    def sf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return gammaincc(*self._ky(x, params))

    def logcdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return log_gammainc(*self._ky(x, params))

    def logsf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        return log_gammaincc(*self._ky(x, params))

    def ppf(self, q: ArrayLike, params: ArrayLike) -> FloatArray:
        return pcol(params, 1) * gammaincinv(pcol(params, 0), np.asarray(q, dtype=float))

    def mean(self, params: ArrayLike) -> FloatArray:
        p = np.asarray(params, dtype=float)
        return p[..., 0] * p[..., 1]

    def partial_mean(self, a: ArrayLike, b: ArrayLike, params: ArrayLike) -> FloatArray:
        k, theta = pcol(params, 0), pcol(params, 1)
        lo, hi = np.asarray(a, dtype=float) / theta, np.asarray(b, dtype=float) / theta
        return k * theta * gamma_between(k + 1, lo, hi)

    def scipy(self, params: ArrayLike):
        k, theta = np.asarray(params, dtype=float)
        return stats.gamma(a=k, scale=theta)

    def from_moments(self, mean: float, sd: float) -> FloatArray:
        r""":math:`k = 1/CV^2`, :math:`\theta = sd^2/mean`."""
        return np.array([(mean / sd) ** 2, sd * sd / mean])

    def log_breaks(self, params: ArrayLike) -> FloatArray:
        p = np.asarray(params, dtype=float)
        return np.log(p[..., 1, None]) + log_gamma_break_quantiles(p[..., 0])

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
