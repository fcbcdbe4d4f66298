r"""Impact and averted fractions: the health impact function applied to each
person's own exposure.

Against a minimum-risk level :math:`m`, with
:math:`RR_m(x) = RR(\max(x, m))/RR(m)` (held flat above ``max_dose``) and
:math:`L = \ln RR_m`, the share of cases that each person's excess exposure
causes, averaged over the population, is the impact fraction

.. math:: IF = E\left[1 - \frac{1}{RR_m(X)}\right]
             = (1-u)\,E_{exposed}\left[-\mathrm{expm1}(-L(X))\right],

and for a scenario :math:`g`, with :math:`L_g(x) = \ln RR_m(g(x))`, the
averted fraction

.. math:: AF_g = E\left[1 - \frac{RR_m(g(X))}{RR_m(X)}\right]
               = (1-u)\,E_{exposed}\left[-\mathrm{expm1}(L_g(X) - L(X))\right].

This is the attributable share of the health impact function used in
air-quality assessment, :math:`\Delta y = y\,(1 - e^{-\beta \Delta x})` for a
log-linear RR with the observed rate :math:`y` (Ostro 2004, WHO
Environmental Burden of Disease Series No. 5, from memory), applied here at
each person's own exposure instead of at a population-mean concentration.
Künzli et al. (2000), Lancet 356:795 (from memory) is the classic such
assessment; as recalled, it derives the rate at the reference level from the
observed rate, which is the route of the comparative-risk fractions in
:mod:`doseattr.core.attribution.fractions`, and is cited for the contrast.

The two differ in what they hold fixed: PAF lets the rate rise with exposure
from the rate at minimum risk (rate :math:`y_m RR_m(x)`), IF gives every
person the population's observed rate and removes their own excess. By
Jensen's inequality (:math:`1/r` is convex on :math:`r > 0`)
:math:`E[1/RR_m] \ge 1/E[RR_m]`, so :math:`IF \le PAF`; they agree to first
order in the excess risk (the gap is :math:`b^2 \mathrm{Var}(X)` for
:math:`RR = 1 + bx`).

The unexposed share :math:`u` sits at zero exposure; every scenario in
:mod:`doseattr.core.attribution.scenarios` maps 0 to at most :math:`m`
(cap: 0, scale: 0, reduce_by: :math:`m`), so :math:`L = L_g = 0` there and
the unexposed add nothing to either fraction.

Both are expectations of :math:`\mathrm{expm1}(h(X))` with
:math:`h = -L` (IF) or :math:`h = L_g - L` (AF), negated, so the engine
that integrates the expected excess risk integrates them too, and a tiny
fraction keeps its relative precision.
"""

from __future__ import annotations

from typing import cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.attribution.engine import LogRisk, Rows, expected_excess
from doseattr.core.attribution.fractions import (
    _draw_arrays,
    _exp_rate,
    _flat_from,
    _graded,
    _log_rr_m,
    weighted_rows,
)
from doseattr.core.attribution.scenarios import Scenario
from doseattr.core.curves.base import Curve, Growth
from doseattr.core.exposure.base import Exposure, Family
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.errors import FloatRangeError

FloatArray = NDArray[np.float64]


def impact_draws(curve: Curve, coef: ArrayLike, family: Family, params: ArrayLike,
                 unexposed: ArrayLike, minimum_risk: ArrayLike,
                 scenario: Scenario | None = None) -> FloatArray:
    r"""Impact fraction (``scenario`` ``None``) or averted fraction of
    ``scenario`` per draw, over an exposure family.

    :math:`-(1-u)\,E_{exposed}[\mathrm{expm1}(h(X))]` by the engine of
    :func:`doseattr.core.attribution.engine.expected_excess`, with
    :math:`h = -L` or :math:`L_g - L`. Arguments and shapes as
    :func:`doseattr.core.attribution.fractions.excess_draws`; returns ``(D,)``.

    The engine is told where ``h`` has kinks (those of :math:`L` and of
    :math:`L_g`), the dose beyond which it is constant (the larger of the
    two flat-from points, none if either keeps changing) and how fast
    :math:`e^h` grows (:func:`_ratio_growth`): for an increasing curve
    :math:`e^h \le 1`, so the fraction is finite even where :math:`E[RR]`
    is not (a log-linear curve over a lognormal tail).
    """
    coef, m, u, d = _draw_arrays(coef, unexposed, minimum_risk, np.shape(np.atleast_2d(params))[0])
    params = np.broadcast_to(np.atleast_2d(np.asarray(params, dtype=float)), (d, np.shape(params)[-1]))
    body = expected_excess(_log_ratio(curve, coef, m, scenario), family, params,
                           growth=_ratio_growth(curve, coef, scenario),
                           kinks=_ratio_kinks(curve, coef, m, scenario),
                           flat_from=_ratio_flat_from(curve, scenario),
                           zero_below=m if scenario is None else np.minimum(m, scenario.preimage(m)))
    return cast(FloatArray, -(1.0 - u) * body)


def empirical_impact_draws(curve: Curve, coef: ArrayLike, values: ArrayLike, weights: ArrayLike,
                           unexposed: ArrayLike, minimum_risk: ArrayLike,
                           scenario: Scenario | None = None, *,
                           scale: ArrayLike | None = None) -> FloatArray:
    r"""Impact or averted fraction for weighted exposure values:
    :math:`-(1-u)\sum_i w_i\,\mathrm{expm1}(h(f_d x_i)) / \sum_i w_i`, with
    ``values`` and ``weights`` of shape ``(n,)`` or per draw ``(D, n)`` and
    ``scale`` the factors :math:`f_d` ``(D,)`` of an exposure-model error
    (``None``: 1); in chunks of draws
    (:func:`doseattr.core.attribution.fractions.weighted_rows`)."""
    values = np.atleast_2d(np.asarray(values, dtype=float))
    weights = np.atleast_2d(np.asarray(weights, dtype=float))
    f = None if scale is None else np.asarray(scale, dtype=float).ravel()
    coef, m, u, d = _draw_arrays(coef, unexposed, minimum_risk,
                                 max(values.shape[0], 0 if f is None else f.size))
    ratio = _log_ratio(curve, coef, m, scenario)
    body = weighted_rows(lambda x, rows: -np.expm1(ratio(x, rows)), values, weights, d, f)
    if not np.all(np.isfinite(body)):
        raise FloatRangeError("the risk ratio 1/RR overflows the float range (about 1.8e308): "
                              "the curve lowers the risk by too large a factor over the "
                              "exposure values; check the curve's coefficients and units")
    return cast(FloatArray, (1.0 - u) * body)


def impact_fraction(curve: Curve, exposure: Exposure | EmpiricalExposure, *,
                    minimum_risk: float) -> float:
    r""":math:`IF = E[1 - 1/RR_m(X)]` at the point estimates
    (``minimum_risk`` keyword-only, no default, as for
    :func:`doseattr.core.attribution.fractions.paf`)."""
    return _point(curve, exposure, minimum_risk, None)


def averted_fraction(curve: Curve, exposure: Exposure | EmpiricalExposure, scenario: Scenario, *,
                     minimum_risk: float) -> float:
    r""":math:`AF_g = E[1 - RR_m(g(X))/RR_m(X)]` at the point estimates."""
    return _point(curve, exposure, minimum_risk, scenario)


def _point(curve: Curve, exposure: Exposure | EmpiricalExposure, minimum_risk: float,
           scenario: Scenario | None) -> float:
    if isinstance(exposure, EmpiricalExposure):
        out = empirical_impact_draws(curve, curve.coef, exposure.values, exposure.weights,
                                     exposure.unexposed, minimum_risk, scenario)
    else:
        out = impact_draws(curve, curve.coef, exposure.family, exposure.params,
                           exposure.unexposed, minimum_risk, scenario)
    return float(out[0])


def _log_ratio(curve: Curve, coef: FloatArray, m: FloatArray, scenario: Scenario | None) -> LogRisk:
    """The function ``(x, rows) -> L_g(x) - L(x)`` (``-L(x)`` without a
    scenario) for draws ``rows``."""
    current = _log_rr_m(curve, coef, m, None)
    target = None if scenario is None else _log_rr_m(curve, coef, m, scenario)

    def h(x: FloatArray, rows: Rows) -> FloatArray:
        if target is None:
            return -current(x, rows)
        return target(x, rows) - current(x, rows)

    return h


def _signed_rate(curve: Curve, coef: FloatArray) -> Growth:
    r"""Growth of :math:`RR` with a signed rate: negative when :math:`RR`
    falls in the upper tail as :math:`e^{-|r|x}` or :math:`x^{-|r|}`.

    Models report only growth, with the rate floored at 0. For models whose
    log RR is linear in the coefficients (``model.linear``),
    :math:`\ln RR(x; -c) = -\ln RR(x; c)`, so the decay of :math:`RR` is the
    growth of the model at ``-coef``. The other models (linear excess risk,
    saturating exponential) keep :math:`RR` bounded away from 0 over any
    valid range, so their decay rate is 0.
    """
    if curve.max_dose is not None:
        return Growth.bounded()
    up = curve.model.growth(coef)
    down = curve.model.growth(-coef) if curve.model.linear else Growth.bounded()
    if up.kind == "bounded" and down.kind == "bounded":
        return Growth.bounded()
    kind = up.kind if up.kind != "bounded" else down.kind
    return Growth(kind, _rate(up) - _rate(down))


def _rate(g: Growth) -> FloatArray:
    return np.zeros(()) if g.kind == "bounded" else np.asarray(g.rate, dtype=float)


def _ratio_growth(curve: Curve, coef: ArrayLike, scenario: Scenario | None) -> Growth:
    r"""Upper-tail growth of :math:`e^h = RR_m(g(x))/RR_m(x)` (``1/RR_m(x)``
    without a scenario), for the engine's tail panels and its refusal of
    divergent expectations.

    With :math:`RR` growing (signed) at rate :math:`r` in the curve's kind
    (:func:`_signed_rate`, exact asymptotic rates for the models here) and
    :math:`RR \circ g` at rate :math:`r_g` (:meth:`Scenario.growth`; 0 when
    bounded, as for a cap or no scenario, where :math:`RR_m(g) \le`
    a constant), :math:`e^h` grows at :math:`r_g - r`, floored at 0:

    * no scenario or a cap: :math:`-r`, so an increasing curve gives rate 0
      (:math:`1/RR_m \le 1`) and a decreasing one the growth of :math:`1/RR`;
    * scale ``s``, exponential kind: :math:`(s-1)r`; power kind: 0
      (:math:`RR(sx)/RR(x) \to s^r`);
    * reduce_by: 0 (:math:`e^{-rd}` or :math:`(1 - d/x)^r` tend to constants).

    A rate of 0 keeps the kind, which the engine treats as bounded.
    """
    coef = np.asarray(coef, dtype=float)
    own = _signed_rate(curve, coef)
    if own.kind == "bounded":
        return own
    rate_g = np.zeros(()) if scenario is None else _rate(scenario.growth(own))
    return Growth(own.kind, np.maximum(rate_g - _rate(own), 0.0))


def _ratio_kinks(curve: Curve, coef: FloatArray, m: FloatArray,
                 scenario: Scenario | None) -> FloatArray:
    r"""Kinks of ``h``: those of ``L`` and, with a scenario, of ``L_g``,
    and for a curve steep on the log-exposure scale graded breaks on both
    sides of each (:func:`doseattr.core.attribution.fractions._graded`, at
    the curve's rate either way, so rising and falling curves alike).

    Unlike :math:`\mathrm{expm1}(L_g)`, whose steep part lies only below
    its flat point, :math:`e^h` can turn steeply on either side of a kink:
    it falls from 1 just above ``m`` or a cap (rising curve), peaks at
    ``max_dose`` and falls beyond it under a scale or a reduction (falling
    curve), or rises to a plateau at the pre-image of ``m`` (falling curve,
    reduction)."""
    d = coef.shape[0]
    k = np.asarray(curve.kinks(coef), dtype=float)
    k = np.broadcast_to(k, (d, k.shape[-1]))
    top = [] if curve.max_dose is None else [np.full((d, 1), float(curve.max_dose))]
    points = np.concatenate([k, m[:, None], *top], axis=1)
    if scenario is not None:
        own = np.broadcast_to(scenario.own_kinks(), (d, scenario.own_kinks().size))
        points = np.concatenate([points, scenario.preimage(points), own], axis=1)
    rate = _exp_rate(curve, coef)
    if curve.model.linear:
        rate = np.maximum(rate, _exp_rate(curve, -coef))
    return np.concatenate([points, _graded(rate, points, (-1, 1), _RATIO_GRADES, _RATIO_REACH)], axis=1)


#: Grades of :func:`_ratio_kinks`, further out than those below a flat
#: point: under a scale the slope of ``h`` on one side of a kink can be a
#: small share of the curve's (:math:`(1-s)\,|c|` below ``max_dose``).
_RATIO_GRADES = np.array([1.0, 2.0, 4.0, 8.0, 16.0, 32.0, 64.0, 128.0, 256.0])
#: Log-exposure distance beyond which a kink's graded breaks are left out
#: (the body's own panels resolve a slope of h that is not steep there).
_RATIO_REACH = 2.0


def _ratio_flat_from(curve: Curve, scenario: Scenario | None) -> float | None:
    """Dose beyond which ``h`` is constant: both ``L`` and ``L_g`` must be,
    so the larger of their flat-from points (``None`` if either has none)."""
    current = _flat_from(curve, None)
    if scenario is None or current is None:
        return current
    target = _flat_from(curve, scenario)
    return None if target is None else max(current, target)
