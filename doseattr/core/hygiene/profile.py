r"""Profile-likelihood limits for statistics of an exposure distribution.

For non-detects (left-censored values), frequency weights, or the gamma and
Weibull families, the limits of a statistic ``g`` (exceedance fraction at a
limit, a percentile, the arithmetic mean) are the values where the
profile deviance :math:`D(g) = 2(\ell_{max} - \ell_p(g))` reaches the
chi-square point: :math:`\chi^2_{1}(\mathrm{level})` for each end of the
two-sided interval, :math:`z_c^2` for the one-sided upper limit at ``c``
(Venzon & Moolgavkar 1988, Appl Stat 37:87, from memory). The
log-likelihood is the weighted, left-censored one of
:func:`doseattr.core.exposure.fit.measurement_loglik`; its weights are
normalised to sum to the number of values, so the chi-square calibration
treats the data as that many measurements.

Every family here is a scale family: with the shape fixed, a target value
of ``g`` fixes the scale in closed form (quantile: ``scale = q /
q_1(shape)``; exceedance ``F`` at ``L``: ``scale = L / isf_1(F, shape)``;
mean: ``scale = m / mean_1(shape)``, the subscript 1 meaning scale 1), so
the profile is a one-dimensional maximisation over the shape.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.optimize import brentq, minimize_scalar
from scipy.special import expit, gammainccinv, gammaincinv, log_expit, ndtri

from doseattr.core.exposure.base import Family, FloatArray
from doseattr.core.exposure.fit import Measurements, measurement_loglik
from doseattr.core.exposure.mle import maximise
from doseattr.core.exposure.registry import get_family
from doseattr.core.hygiene.bounds import Bounded
from doseattr.errors import ModelError

PROFILE_SOURCE = "profile likelihood (Venzon & Moolgavkar 1988, Appl Stat 37:87, from memory)"
#: Distances from the estimate, on the search coordinate (log or logit of
#: g), at which the deviance is tried; the last is the search range.
_STEPS = 0.05 * 2.0 ** np.arange(14)
#: Half-width of the search over the shape's internal coordinate.
_SHAPE_RANGE = 8.0


@dataclass(frozen=True)
class Target:
    """A statistic g searched on a coordinate ``u`` (log or logit of g).

    ``coordinate`` gives ``u`` for public parameters, ``back`` turns ``u``
    into ``g``, and ``scale`` gives the scale fixing ``u`` for a member with
    scale 1 (``standard``).
    """

    name: str
    coordinate: Callable[[Family, FloatArray], float]
    back: Callable[[float], float]
    scale: Callable[[Family, FloatArray, float], float]
    #: Ends of the range of g (``None``: unbounded above).
    ends: tuple[float, float | None] = (0.0, None)


def _axes(family: Family) -> tuple[int, int]:
    """Indices of the scale and shape among the public parameters."""
    scale = family.param_names.index(family.dose_params[0])
    return scale, 1 - scale


def _standard(family: Family, v: float) -> FloatArray:
    """Public parameters with scale 1 and the shape's internal coordinate ``v``."""
    i_scale, i_shape = _axes(family)
    theta = np.zeros(2)
    theta[i_shape] = v
    params = family.from_internal(theta)
    params[i_scale] = 1.0
    return params


def _with_scale(family: Family, standard: FloatArray, scale: float) -> FloatArray:
    params = standard.copy()
    params[_axes(family)[0]] = scale
    return params


def standard_isf(family: Family, standard: FloatArray, u: float) -> float:
    r"""``x`` with :math:`\mathrm{logit}\,P(X > x) = u` for a scale-1 member,
    accurate for exceedance fractions near 0 and near 1 (each tail is
    inverted from its own probability, ``expit(u)`` or ``expit(-u)``)."""
    shape = float(standard[_axes(family)[1]])
    f, c = float(expit(u)), float(expit(-u))
    if family.name == "lognormal":
        z = -float(ndtri(f)) if u < 0 else float(ndtri(c))
        return float(np.exp(np.log(shape) * z))
    if family.name == "gamma":
        return float(gammainccinv(shape, f) if u < 0 else gammaincinv(shape, c))
    if family.name == "weibull":
        return float((-log_expit(u)) ** (1.0 / shape))
    return float(family.scipy(standard).isf(f))


def _log(v: float) -> float:
    with np.errstate(divide="ignore"):
        return float(np.log(v))


def _exp(u: float) -> float:
    with np.errstate(over="ignore"):
        return float(np.exp(u))


def _ratio(a: float, b: float) -> float:
    """``a / b`` for positive ``a``, infinite when ``b`` underflowed to 0."""
    return a / b if b > 0 else np.inf


def percentile_target(p: float) -> Target:
    """The ``p`` quantile, searched on the log scale."""
    return Target(
        f"{100 * p:g}th percentile",
        lambda fam, params: _log(float(fam.ppf(p, params)[0])), _exp,
        lambda fam, std, u: _ratio(_exp(u), float(fam.ppf(p, std)[0])))


def mean_target() -> Target:
    """The arithmetic mean, searched on the log scale."""
    return Target("arithmetic mean", lambda fam, params: _log(float(fam.mean(params))), _exp,
                  lambda fam, std, u: _ratio(_exp(u), float(fam.mean(std))))


def exceedance_target(limit: float) -> Target:
    """``P(X > limit)``, searched on the logit scale (``ln sf - ln cdf``)."""
    def coordinate(fam: Family, params: FloatArray) -> float:
        return float(fam.logsf(limit, params)[0] - fam.logcdf(limit, params)[0])

    return Target("exceedance fraction", coordinate, lambda u: float(expit(u)),
                  lambda fam, std, u: _ratio(limit, standard_isf(fam, std, u)), (0.0, 1.0))


def mle(family: Family, data: Measurements) -> tuple[FloatArray, float]:
    """Maximum-likelihood public parameters and the log-likelihood there
    (closed form when the family has one and nothing is censored)."""
    def loglik(theta: FloatArray) -> float:
        return measurement_loglik(family, family.from_internal(theta), data)

    closed = family.closed_form_mle(data.x, data.w) if data.detected.all() else None
    if closed is not None:
        return closed, measurement_loglik(family, closed, data)
    start = family.to_internal(family.start(data.x, data.w))
    best = maximise(loglik, start, what=f"{family.name} fit")
    return family.from_internal(best.theta), best.loglik


class Profile:
    """The profile log-likelihood of one target over one dataset."""

    def __init__(self, family: Family, data: Measurements, target: Target) -> None:
        self.family, self.data, self.target = family, data, target
        self.params, self.lmax = mle(family, data)
        self.v_hat = float(family.to_internal(self.params)[_axes(family)[1]])
        self.u_hat = target.coordinate(family, self.params)
        self.g_hat = target.back(self.u_hat)
        self.at_edge = False
        self.v_last = self.v_hat

    def _loglik(self, v: float, u: float) -> float:
        std = _standard(self.family, v)
        with np.errstate(all="ignore"):
            scale = self.target.scale(self.family, std, u)
            if not (np.isfinite(scale) and scale > 0):
                return -np.inf
            value = measurement_loglik(self.family, _with_scale(self.family, std, scale), self.data)
        return value if np.isfinite(value) else -np.inf

    def loglik(self, u: float) -> float:
        """:math:`\\ell_p` at coordinate ``u``, maximised over the shape's
        internal coordinate: first within 1 of the last maximiser, then, if
        that window's edge is hit, over the full range about the MLE."""
        v, best = self._maximise(u, self.v_last - 1.0, self.v_last + 1.0)
        if v is None:
            v, best = self._maximise(u, self.v_hat - _SHAPE_RANGE, self.v_hat + _SHAPE_RANGE)
            if v is None:
                self.at_edge = True
        if v is not None and np.isfinite(best):
            self.v_last = v
        self.lmax = max(self.lmax, best)
        return best

    def _maximise(self, u: float, lo: float, hi: float) -> tuple[float | None, float]:
        """Maximiser (``None`` when on an edge of ``[lo, hi]``) and maximum."""
        # The shape may wander where the likelihood is zero (+inf below);
        # the search's parabolic steps then meet inf - inf, which it survives.
        with np.errstate(all="ignore"):
            res = minimize_scalar(lambda v: -self._loglik(v, u), bounds=(lo, hi),
                                  method="bounded", options={"xatol": 1e-9})
        v = float(res.x)
        return (None if min(v - lo, hi - v) < 1e-3 else v), -float(res.fun)

    def deviance(self, u: float) -> float:
        """:math:`D` at coordinate ``u``."""
        return 2.0 * (self.lmax - self.loglik(u))

    def limit(self, crit: float, side: int) -> tuple[float | None, str]:
        """The ``g`` beyond the estimate (``side`` +1 above, -1 below) where
        the deviance reaches ``crit``. When it is not reached within the
        search range the end of the range of g (0, 1 or ``None`` for
        unbounded) is returned, with a note."""
        u0 = self.u_hat
        if not np.isfinite(u0):
            return None, f"the estimate of the {self.target.name} is not finite"
        inner = u0
        for step in _STEPS:
            outer = u0 + side * step
            if self.deviance(outer) >= crit:
                return self._root(crit, min(inner, outer), max(inner, outer))
            inner = outer
        end = self.target.ends[0 if side < 0 else 1]
        shown = "unbounded" if end is None else f"{end:g}"
        return end, (f"the {'upper' if side > 0 else 'lower'} profile limit of the "
                     f"{self.target.name} is not reached within {_STEPS[-1]:g} of the estimate "
                     f"on the {'logit' if self.target.ends[1] else 'log'} scale: reported as "
                     f"{shown}")

    def _root(self, crit: float, lo: float, hi: float) -> tuple[float, str]:
        u = brentq(lambda w: self.deviance(w) - crit, lo, hi, xtol=1e-10, rtol=1e-10)
        if abs(self.deviance(u) - crit) > 1e-3 * crit:
            return self.target.back(u), (f"the profile deviance of the {self.target.name} jumps "
                                         "at a limit (floating-point range): that limit is "
                                         "approximate")
        return self.target.back(u), ""


def profile_bounds(family: str | Family, data: Measurements, target: Target, *,
                   confidence: float = 0.70, level: float = 0.95) -> Bounded:
    """Estimate (at the MLE), two-sided profile interval at ``level`` and
    one-sided upper limit at ``confidence`` of ``target``."""
    if not 0.5 < confidence < 1 or not 0 < level < 1:
        raise ModelError(f"confidence must lie in (0.5, 1) and level in (0, 1), got "
                         f"{confidence} and {level}")
    prof = Profile(get_family(family), data, target)
    two_sided = float(stats.chi2.ppf(level, 1))
    one_sided = float(ndtri(confidence)) ** 2
    lower, n1 = prof.limit(two_sided, -1)
    upper, n2 = prof.limit(two_sided, +1)
    ucl, n3 = prof.limit(one_sided, +1)
    notes = [n for n in (n1, n2, n3) if n]
    fitted = measurement_loglik(prof.family, prof.params, data)
    if prof.lmax > fitted + 1e-6:
        notes.append(f"the profile search found a log-likelihood {prof.lmax - fitted:.2g} above "
                     "the fit's: the fit had not fully converged, limits may be slightly off")
    if prof.at_edge:
        notes.append("the profile maximum over the shape reached its search range")
    return Bounded(estimate=prof.g_hat, lower=lower, upper=upper, ucl=ucl, level=level,
                   confidence=confidence,
                   method=f"{target.name} at the {prof.family.name} MLE; {PROFILE_SOURCE}",
                   note="; ".join(dict.fromkeys(notes)))
