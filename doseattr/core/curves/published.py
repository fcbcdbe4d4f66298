"""Curves entered as published: an RR per increment, an excess relative risk,
an exponent, or coefficients with their covariance or draws."""

from __future__ import annotations

from dataclasses import dataclass
from typing import cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import Curve, CurveModel, FloatArray
from doseattr.core.curves.covariance import var_log_rr_from_ci
from doseattr.core.curves.fit import check_curve, dose_range
from doseattr.core.curves.registry import make_model
from doseattr.errors import ModelError

#: Relative asymmetry of a CI about its estimate above which a note is added.
ASYMMETRY_NOTE = 0.1
#: Relative asymmetry below which an ERR's CI counts as symmetric and the
#: draws stay normal (the shifted-log limits then differ from the normal
#: ones by less than this share of the CI width).
SYMMETRIC_TOL = 1e-9


@dataclass(frozen=True)
class ShiftedLogCurve(Curve):
    r"""A linear ERR curve whose slope is drawn on a shifted log scale.

    With the published ERR :math:`b` and CI :math:`(lo, hi)` longer on one
    side, write (for a CI longer above, ``side = +1``) :math:`a = b - lo`,
    :math:`u = hi - b`, :math:`d = u - a > 0`; mirror everything for a CI
    longer below (``side = -1``). On the scale :math:`\log(\beta + c)` with

    .. math:: c = \frac{a u}{d} - b, \quad \log(lo + c) = \log\frac{a^2}{d},
              \quad \log(b + c) = \log\frac{a u}{d}, \quad
              \log(hi + c) = \log\frac{u^2}{d}

    the CI is symmetric about the estimate (solve
    :math:`(b + c)^2 = (lo + c)(hi + c)`; derived here). So
    :math:`\log(\beta + c) \sim N(\log(b + c), \sigma^2)` with
    :math:`\sigma = \log(u/a)/z` puts the median at :math:`b` and the
    :math:`(1 \mp level)/2` quantiles at the published limits:

    .. math:: \beta = b + \text{side}\,\frac{a u}{d}\,
              \operatorname{expm1}(\text{side}\,\sigma Z), \quad Z \sim N(0, 1)

    increasing in :math:`Z` on both sides, so the draws keep the order of
    the normal draws they are made from (a three-parameter, shifted
    lognormal: Aitchison & Brown 1957, *The Lognormal Distribution*, from
    memory). As :math:`d \to 0` this tends to :math:`b + (u/z) Z`, the
    normal draws. ``scale`` is :math:`a u/d` per unit dose and ``log_sd`` is
    :math:`\sigma`; ``cov`` keeps the half-width standard error for
    reporting.
    """

    side: float = 1.0
    scale: float = 0.0
    log_sd: float = 0.0

    def from_normal(self, z: ArrayLike) -> FloatArray:
        """Slope draws ``(n, 1)`` from standard normal draws ``z``."""
        z = np.asarray(z, dtype=float).reshape(-1, 1)
        move = self.side * np.expm1(self.side * self.log_sd * z)
        return cast(FloatArray, self.coef[0] + self.scale * move)

    def rr_interval(self, x: ArrayLike,
                    level: float = 0.95) -> tuple[FloatArray, FloatArray, FloatArray]:
        """RR(x) with the pointwise interval at the slope's quantiles (the RR
        is monotone in the slope), so the published limits come back."""
        from scipy.special import ndtri  # scipy.stats.norm.ppf without scipy.stats

        z = ndtri(0.5 + level / 2)
        ends = self.from_normal([-z, z])
        at = [self.rr(x, coef=e) for e in ends]
        return self.rr(x), np.minimum(*at), np.maximum(*at)


def symmetrizing_scale(value: float, lo: float, hi: float,
                       level: float = 0.95) -> tuple[float, float, float] | None:
    """``(side, a u / d, sigma)`` of :class:`ShiftedLogCurve` for an estimate
    and its CI, or ``None`` when the CI is symmetric (within
    :data:`SYMMETRIC_TOL` of its width)."""
    from scipy.special import ndtri  # scipy.stats.norm.ppf without scipy.stats

    below, above = value - lo, hi - value
    if abs(above - below) <= SYMMETRIC_TOL * (hi - lo) or min(below, above) <= 0:
        return None
    side = 1.0 if above > below else -1.0
    a, u = (below, above) if side > 0 else (above, below)
    d = u - a
    z = ndtri(0.5 + level / 2.0)
    return side, a * u / d, float(np.log1p(d / a) / z)


def published_curve(model: str | CurveModel, *, rr: float | None = None,
                    err: float | None = None, exponent: float | None = None,
                    per: float = 1.0, ci: tuple[float, float] | None = None,
                    reference_dose: float = 0.0, max_dose: float | None = None,
                    offset: float = 0.0, level: float = 0.95,
                    data_max: float | None = None) -> Curve:
    r"""A one-parameter curve from a published estimate and its CI.

    - ``"log-linear"``: :math:`b = \log(RR)/per`,
      :math:`se = (\log hi - \log lo) / (2 z)/per` (CI of the RR).
    - ``"linear"``: :math:`b = ERR/per`, :math:`se = (hi - lo)/(2 z)/per`
      with the CI on the ERR scale; ``rr`` may be given instead
      (:math:`ERR = RR - 1`, CI of the RR). A CI asymmetric about the ERR
      gives a :class:`ShiftedLogCurve`, whose draws reproduce both limits.
    - ``"power"``: :math:`b` = ``exponent``, :math:`se = (hi - lo)/(2 z)`;
      ``offset`` is the dose offset ``c`` of :class:`Power`.

    :math:`z = \Phi^{-1}((1 + level)/2)`. Without ``ci`` the curve carries
    no uncertainty (zero covariance) and a note says so. Common practice for
    entering published estimates; the CI is assumed symmetric on the scale
    named above, except for the linear model's (see :class:`ShiftedLogCurve`).
    """
    if not (np.isfinite(per) and per > 0):
        raise ModelError(f"'per' must be a positive dose increment, got {per}")
    name = model if isinstance(model, str) else model.name
    if name == "log-linear":
        coef, var = _log_linear(rr, ci, level)
    elif name == "linear":
        coef, var = _linear(rr, err, ci, level)
    elif name == "power":
        if per != 1.0:
            raise ModelError("the power model's exponent has no dose increment; leave 'per' at 1")
        coef, var = _on_scale("exponent", exponent, ci, level)
    else:
        raise ModelError(f"published estimates support models 'log-linear', 'linear' and "
                         f"'power', not {name!r}; give coefficients with entered_curve")
    settings = {"offset": offset} if name == "power" else {}
    obj = model if not isinstance(model, str) else make_model(
        name, reference_dose=reference_dose, **settings)
    notes = _notes(name, ci, rr, err, exponent)
    slope, slope_se = coef / per, np.sqrt(var) / per
    if not np.isfinite(slope):
        raise ModelError(f"the estimate per unit dose ({coef:g} / per {per:g}) overflows the "
                         "float range (about 1.8e308); give the estimate per a larger dose "
                         "increment or check its units")
    if not np.isfinite(slope_se * slope_se):
        raise ModelError(f"the standard error from ci ({slope_se:.3g} per unit dose) has a "
                         f"square beyond the float range; it must be below "
                         f"{np.sqrt(np.finfo(float).max):.3g}: check ci and per")
    curve = entered_curve(obj, [slope], cov=[[slope_se * slope_se]], max_dose=max_dose,
                          data_max=data_max, notes=notes)
    skew = None if name != "linear" or ci is None else _linear_skew(rr, err, ci, level)
    if skew is None:
        return curve
    side, scale, log_sd = skew
    shift = scale - side * coef          # c of ShiftedLogCurve, on the ERR scale
    note = (f"the published CI of the excess relative risk is asymmetric about the estimate; "
            f"its draws are made on the scale log({'' if side > 0 else '-'}ERR + {shift:.4g}) "
            f"(ERR per {per:g}), where the CI is symmetric: a shifted lognormal with median at "
            f"the estimate and the published limits as its {(1 - level) / 2:.1%} and "
            f"{(1 + level) / 2:.1%} percentiles (the standard error shown is the CI "
            f"half-width over z)")
    return ShiftedLogCurve(curve.model, curve.coef, curve.cov, max_dose=curve.max_dose,
                           data_max=curve.data_max, source=curve.source,
                           notes=(*curve.notes, note), side=side, scale=scale / per,
                           log_sd=log_sd)


def _linear_skew(rr: float | None, err: float | None, ci: tuple[float, float],
                 level: float) -> tuple[float, float, float] | None:
    """Shifted-log parameters of an entered ERR (or RR - 1) and its CI, on the ERR scale."""
    shift = 0.0 if err is not None else 1.0
    value = err if err is not None else cast(float, rr) - 1.0
    return symmetrizing_scale(float(value), ci[0] - shift, ci[1] - shift, level)


def entered_curve(model: CurveModel, coef: ArrayLike, *, cov: ArrayLike | None = None,
                  se: ArrayLike | None = None, draws: ArrayLike | None = None,
                  max_dose: float | None = None, data_max: float | None = None,
                  notes: tuple[str, ...] = ()) -> Curve:
    """A curve with given coefficients and either their covariance, standard
    errors (independent) or explicit draws ``(D, p)``.

    With draws and no covariance, the covariance is the draws' sample
    covariance (``numpy.cov``).
    """
    coef = np.atleast_1d(np.asarray(coef, dtype=float))
    p = len(model.param_names)
    if coef.shape != (p,):
        raise ModelError(f"the {model.name} model takes {p} coefficients "
                         f"{model.param_names}, got {coef.size}")
    draws = None if draws is None else _draws(draws, p)
    cov = _covariance(p, cov, se, draws)
    check_curve(model, coef, dose_range(model, np.zeros(0), data_max, max_dose))
    return Curve(model, coef, cov, max_dose=max_dose, data_max=data_max,
                 source="entered", draws=draws, notes=tuple(notes))


def _log_linear(rr: float | None, ci: tuple[float, float] | None,
                level: float) -> tuple[float, float]:
    if rr is None or not (np.isfinite(rr) and rr > 0):
        raise ModelError(f"the log-linear model needs a positive 'rr' per increment, got {rr}")
    if ci is None:
        return float(np.log(rr)), 0.0
    return float(np.log(rr)), float(var_log_rr_from_ci(rr, ci[0], ci[1], level))


def _linear(rr: float | None, err: float | None, ci: tuple[float, float] | None,
            level: float) -> tuple[float, float]:
    if (rr is None) == (err is None):
        raise ModelError("the linear model needs exactly one of 'err' (excess relative risk) "
                         "or 'rr' per increment")
    if rr is not None:
        err = rr - 1.0
        ci = None if ci is None else (ci[0] - 1.0, ci[1] - 1.0)
    return _on_scale("excess relative risk", err, ci, level)


def _on_scale(what: str, value: float | None, ci: tuple[float, float] | None,
              level: float) -> tuple[float, float]:
    r"""Estimate and variance :math:`((hi - lo)/(2 z))^2` from a symmetric CI."""
    from scipy.special import ndtri  # scipy.stats.norm.ppf without scipy.stats

    if value is None or not np.isfinite(value):
        raise ModelError(f"a finite {what} is required, got {value}")
    if ci is None:
        return float(value), 0.0
    lo, hi = (float(c) for c in ci)
    if not (np.isfinite(lo) and np.isfinite(hi) and lo < hi and lo <= value <= hi):
        raise ModelError(f"CI ({lo:g}, {hi:g}) of the {what} must have lower < upper "
                         f"and contain the estimate {value:g}")
    z = ndtri(0.5 + level / 2.0)
    se = (hi - lo) / (2.0 * z)
    if not np.isfinite(se) or se >= np.sqrt(np.finfo(float).max):
        raise ModelError(f"the standard error from the CI ({se:.3g}) has a square beyond the "
                         f"float range; it must be below {np.sqrt(np.finfo(float).max):.3g}: "
                         "check ci")
    return float(value), se * se


def _notes(name: str, ci: tuple[float, float] | None, rr: float | None,
           err: float | None, exponent: float | None) -> tuple[str, ...]:
    if ci is None:
        return ("no confidence interval given: the curve carries no uncertainty",)
    lo, hi = (float(c) for c in ci)
    if name == "log-linear":
        assert rr is not None  # _log_linear refused a missing rr
        lo, hi, value = np.log(lo), np.log(hi), np.log(rr)
    else:
        value = next(v for v in (err, rr, exponent) if v is not None)
    if name != "linear" and abs((hi - value) - (value - lo)) > ASYMMETRY_NOTE * (hi - lo):
        return ("the published CI is asymmetric about the estimate; its half-width was "
                "used as a normal standard error",)
    return ()


def _draws(draws: ArrayLike, p: int) -> FloatArray:
    d = np.asarray(draws, dtype=float)
    d = d[:, None] if d.ndim == 1 and p == 1 else d
    if d.ndim != 2 or d.shape[1] != p or d.shape[0] < 2 or not np.all(np.isfinite(d)):
        raise ModelError(f"draws must be a finite (D, {p}) array with D >= 2, got {d.shape}")
    return d


def _covariance(p: int, cov: ArrayLike | None, se: ArrayLike | None,
                draws: FloatArray | None) -> FloatArray:
    if cov is not None and se is not None:
        raise ModelError("give either a covariance or standard errors, not both")
    if se is not None:
        se = np.atleast_1d(np.asarray(se, dtype=float))
        cov = np.diag(se**2) if se.shape == (p,) else None
        if cov is None:
            raise ModelError(f"need {p} standard errors, got {se.size}")
    elif cov is None:
        cov = np.zeros((p, p)) if draws is None else np.atleast_2d(np.cov(draws, rowvar=False))
    cov = np.atleast_2d(np.asarray(cov, dtype=float))
    if cov.shape != (p, p) or not np.all(np.isfinite(cov)) or not np.allclose(cov, cov.T):
        raise ModelError(f"covariance must be a finite symmetric ({p}, {p}) matrix")
    if np.any(np.linalg.eigvalsh(cov) < -1e-12 * max(1.0, np.abs(cov).max())):
        raise ModelError("covariance must be positive semi-definite")
    return cov
