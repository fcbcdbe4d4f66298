r"""Population attributable and potential impact fractions for a continuous
exposure, against a minimum-risk level.

With a minimum-risk level :math:`m` the relative risk used for attribution is

.. math:: RR_m(x) = RR(\max(x, m)) / RR(m),

so nobody gains from going below :math:`m`. Writing
:math:`E_g = E[RR_m(g(X))]` for a scenario :math:`g` (identity for the
current exposure), the comparative-risk-assessment fractions (World Health
Report 2002, ch. 2; Murray et al. 2003, Popul Health Metr 1:1, from memory)
are

.. math::
    PAF = 1 - \frac{1}{E_{id}}, \qquad PIF_g = 1 - \frac{E_g}{E_{id}}.

Both are computed from the expected excess :math:`E_g - 1` so that small
fractions keep their relative precision. The unexposed share :math:`u` is a
point mass at zero exposure, where :math:`RR_m = 1` for any :math:`m \ge 0`.
"""

from __future__ import annotations

from typing import cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.attribution.engine import Excess, LogRisk, Rows, expected_excess
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale, Scenario
from doseattr.core.curves.base import Curve, Growth, as_coef_draws
from doseattr.core.curves.linear import RR_FLOOR, LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.base import Exposure, Family
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.errors import FloatRangeError

FloatArray = NDArray[np.float64]


def excess_draws(curve: Curve, coef: ArrayLike, family: Family, params: ArrayLike,
                 unexposed: ArrayLike, minimum_risk: ArrayLike,
                 scenario: Scenario | None = None) -> FloatArray:
    r"""Expected excess relative risk :math:`E[RR_m(g(X))] - 1` per draw.

    Parameters
    ----------
    curve
        Curve whose model, ``max_dose`` and kinks are used.
    coef
        Coefficients ``(p,)`` or per draw ``(D, p)``.
    family, params
        Exposure family and parameters ``(k,)`` or ``(D, k)``.
    unexposed, minimum_risk
        Scalars or per-draw arrays ``(D,)``.
    scenario
        Exposure transform; ``None`` for the current exposure.
    """
    coef, m, u, d = _draw_arrays(coef, unexposed, minimum_risk, np.shape(np.atleast_2d(params))[0])
    params = np.broadcast_to(np.atleast_2d(np.asarray(params, dtype=float)), (d, np.shape(params)[-1]))
    body = expected_excess(_log_rr_m(curve, coef, m, scenario), family, params,
                           growth=_growth(curve, coef, scenario),
                           kinks=_kinks(curve, coef, m, scenario),
                           flat_from=_flat_from(curve, scenario),
                           zero_below=m if scenario is None else scenario.preimage(m),
                           excess=_excess_m(curve, coef, m, scenario))
    return (1.0 - u) * body


def empirical_excess_draws(curve: Curve, coef: ArrayLike, values: ArrayLike, weights: ArrayLike,
                           unexposed: ArrayLike, minimum_risk: ArrayLike,
                           scenario: Scenario | None = None, *,
                           scale: ArrayLike | None = None) -> FloatArray:
    r"""Expected excess for weighted exposure values (no fitted family):
    :math:`(1-u)\sum_i w_i\,(RR_m(g(f_d x_i)) - 1)`, with ``values`` and
    ``weights`` of shape ``(n,)`` or per draw ``(D, n)`` (bootstrap), and
    ``scale`` the factors :math:`f_d` ``(D,)`` of an exposure-model error
    (``None``: 1). Computed in chunks of draws (:func:`weighted_rows`)."""
    values = np.atleast_2d(np.asarray(values, dtype=float))
    weights = np.atleast_2d(np.asarray(weights, dtype=float))
    f = None if scale is None else np.asarray(scale, dtype=float).ravel()
    coef, m, u, d = _draw_arrays(coef, unexposed, minimum_risk,
                                 max(values.shape[0], 0 if f is None else f.size))
    log_rr = _log_rr_m(curve, coef, m, scenario)
    body = weighted_rows(lambda x, rows: np.expm1(log_rr(x, rows)), values, weights, d, f)
    if not np.all(np.isfinite(body)):
        raise FloatRangeError("the expected RR overflows the float range (about 1.8e308): the "
                              "relative risk is too large over the exposure values; check the "
                              "curve's coefficients and units")
    return cast(FloatArray, (1.0 - u) * body)


#: Elements (draws x points) evaluated at once by :func:`weighted_rows`.
CHUNK_ELEMENTS = 1 << 16


def weighted_rows(fn: LogRisk, values: FloatArray, weights: FloatArray, d: int,
                  scale: FloatArray | None = None) -> FloatArray:
    r""":math:`\sum_i w_{di}\, fn(f_d x_{di}) / \sum_i w_{di}` for draws
    :math:`d < D`, with ``values``/``weights`` ``(1, n)`` (shared) or
    ``(D, n)`` and ``scale`` :math:`f` ``(D,)`` or ``None`` (1).

    Draws are taken in chunks of about :data:`CHUNK_ELEMENTS` / ``n``, so
    the temporaries stay O(chunk x n) however many draws there are; each
    draw's sum is the same as over all draws at once. Overflow and invalid
    results are left as inf/nan for the caller to refuse.
    """
    n = values.shape[1]
    step = max(1, CHUNK_ELEMENTS // max(n, 1))
    out = np.empty(d)
    shared = np.sum(weights, axis=1) if weights.shape[0] == 1 else None  # as each row's sum
    with np.errstate(over="ignore", invalid="ignore"):
        for start in range(0, d, step):
            rows = slice(start, min(start + step, d))
            x, w = _rows(values, rows), _rows(weights, rows)
            if scale is not None:
                x = x * scale[rows, None]
            total = np.sum(w, axis=1) if shared is None else shared
            out[rows] = np.sum(fn(x, rows) * w, axis=1) / total
    return out


def _rows(a: FloatArray, rows: slice) -> FloatArray:
    """Rows ``rows`` of a ``(D, n)`` array, or its one row repeated."""
    k = rows.stop - rows.start
    return a[rows] if a.shape[0] > 1 else np.broadcast_to(a, (k, a.shape[1]))


def _draw_arrays(coef: ArrayLike, unexposed: ArrayLike, minimum_risk: ArrayLike,
                 n_exposure: int) -> tuple[FloatArray, FloatArray, FloatArray, int]:
    """Broadcast coefficients, unexposed share and minimum-risk level to a
    common number of draws ``D``."""
    coef = as_coef_draws(coef)
    d = max(coef.shape[0], n_exposure, np.size(unexposed), np.size(minimum_risk))
    coef = np.broadcast_to(coef, (d, coef.shape[1]))
    m = np.broadcast_to(np.asarray(minimum_risk, dtype=float), (d,))
    u = np.broadcast_to(np.asarray(unexposed, dtype=float), (d,))
    assert np.all(m >= 0) and np.all((u >= 0) & (u < 1))
    return coef, m, u, d


def _log_rr_m(curve: Curve, coef: FloatArray, m: FloatArray, scenario: Scenario | None) -> LogRisk:
    """The function ``(x, rows) -> ln RR_m(g(x))`` for draws ``rows``."""

    top = np.inf if curve.max_dose is None else curve.max_dose

    def log_rr(x: FloatArray, rows: Rows) -> FloatArray:
        c, mm = coef[rows], np.minimum(m[rows, None], top)
        y = x if scenario is None else scenario.apply(x, mm)
        # one pass for both the minimum-risk floor and the flat extension
        # (np.maximum alone without a top: the same values, a third of the cost)
        lifted = np.maximum(y, mm) if top == np.inf else np.clip(y, mm, top)
        base = curve.model.log_rr(mm, c)
        out = curve.model.log_rr(lifted, c)
        return out - base if np.any(base) else out  # ln RR(m) = 0 (m at the reference)

    return log_rr


def _excess_m(curve: Curve, coef: FloatArray, m: FloatArray,
              scenario: Scenario | None) -> Excess | None:
    r"""The function ``(x, rows, out) -> expm1(ln RR_m(g(x)))`` for draws
    ``rows``, in a direct form for the models that have one (``None`` for
    the others), for the engine's nodes:

    * linear excess, :math:`RR = 1 + b(x - x_{ref})`:
      :math:`RR_m(y) - 1 = b\,(y - m)/(1 + b(m - x_{ref}))` (no logarithm
      and no exponential; only where RR stays above ``RR_FLOOR`` over
      :math:`[m, x^*]`, so that the model's floor never applies);
    * log-linear, :math:`\ln RR = b(x - x_{ref})`: :math:`\mathrm{expm1}(b(y - m))`;

    with :math:`y = \min(\max(g(x), m), x^*)`, ``x*`` the ``max_dose``."""
    model = curve.model
    top = np.inf if curve.max_dose is None else float(curve.max_dose)
    mm = np.minimum(m, top)
    if type(model) is LinearExcess:
        b = coef[:, 0]
        rr_m = 1.0 + b * (mm - model.reference_dose)
        with np.errstate(over="ignore", invalid="ignore"):
            rr_top = np.where(b == 0, 1.0, 1.0 + b * (top - model.reference_dose))
        if not (np.all(rr_m > RR_FLOOR) and np.all(rr_top > RR_FLOOR)):
            return None
        factor = b / rr_m
    elif type(model) is LogLinear:
        factor = coef[:, 0]
    else:
        return None
    exponential = type(model) is LogLinear

    high = min(top, scenario.value) if type(scenario) is Cap else top
    scaled = isinstance(scenario, Scale) and type(scenario).apply is Scale.apply

    def excess(x: FloatArray, rows: Rows, out: FloatArray) -> FloatArray:
        # y - m, y = min(max(g(x), m), x*), as max(g(x) - m, 0) capped at x* - m
        low = mm[rows, None]
        if scenario is None or type(scenario) is Cap:
            np.subtract(x, low, out=out)
        elif scaled:
            np.multiply(x, scenario.value, out=out)
            out -= low
        elif type(scenario) is ReduceBy:
            np.subtract(x, low + scenario.value, out=out)
        else:
            np.subtract(scenario.apply(x, low), low, out=out)
        np.maximum(out, 0.0, out=out)
        if high < np.inf:
            np.minimum(out, np.maximum(high - low, 0.0), out=out)
        out *= factor[rows, None]
        if exponential:
            np.expm1(out, out=out)
        return out

    return excess


def _growth(curve: Curve, coef: FloatArray, scenario: Scenario | None) -> Growth:
    g = curve.growth(coef)
    return g if scenario is None else scenario.growth(g)


def _kinks(curve: Curve, coef: FloatArray, m: FloatArray, scenario: Scenario | None) -> FloatArray:
    """Doses in the original exposure where RR_m(g(x)) has a kink."""
    d = coef.shape[0]
    k = np.asarray(curve.kinks(coef), dtype=float)
    k = np.broadcast_to(k, (d, k.shape[-1]))
    flat = _flat_from(curve, scenario if isinstance(scenario, Cap) else None)
    points = np.concatenate([k, m[:, None], _graded_below_flat(curve, coef, flat)], axis=1)
    start = m[:, None] if scenario is None else scenario.preimage(m[:, None])
    # a falling curve drops steeply from RR_m = 1 just above m's pre-image
    # (at the curve's rate in x: finer than needed under a scale)
    falling = _graded(_exp_rate(curve, -coef), start, (1,)) if curve.model.linear else None
    if scenario is not None:
        own = np.broadcast_to(scenario.own_kinks(), (d, scenario.own_kinks().size))
        points = np.concatenate([scenario.preimage(points), own], axis=1)
    return points if falling is None else np.concatenate([points, falling], axis=1)


def _flat_from(curve: Curve, scenario: Scenario | None) -> float | None:
    """Exposure beyond which RR_m(g(x)) no longer changes: the pre-image of
    ``max_dose`` under the scenario, or a cap, whichever comes first."""
    points = []
    if curve.max_dose is not None:
        top = np.array([curve.max_dose])
        points.append(float((top if scenario is None else scenario.preimage(top))[0]))
    if isinstance(scenario, Cap):
        points.append(scenario.value)
    return min(points) if points else None


#: Distances below ln(max_dose), in units of 1/(c max_dose), of the graded
#: breakpoints placed under a steep exponential curve held flat there.
_GRADED = np.array([1.0, 2.0, 4.0, 8.0, 16.0, 32.0])


def _graded_below_flat(curve: Curve, coef: FloatArray, flat: float | None) -> FloatArray:
    r"""Breakpoints graded towards the flat point ``D = flat`` from below
    for curves that grow exponentially before being held flat (at
    ``max_dose``, or at a cap below it: a cap's pre-image is the identity
    below it, so the breaks serve in either dose).

    On the log-exposure scale :math:`\ln RR(e^t)` has slope :math:`c\,x`
    for :math:`RR \sim e^{cx}`, so with :math:`c D \gg 1` nearly all of
    the integrand sits within a few :math:`1/(cD)` below :math:`\ln D`.
    Breaks at :math:`\ln D - j/(cD)`, j = 1, 2, 4, ..., 32, resolve it.
    """
    d = coef.shape[0]
    if flat is None or flat <= 0:
        return np.zeros((d, 0))
    g = curve.model.growth(coef)
    if g.kind != "exp":
        return np.zeros((d, 0))
    cd = np.broadcast_to(np.maximum(np.asarray(g.rate, dtype=float), 0.0), (d,)) * flat
    if np.all(cd <= 1.0):
        return np.zeros((d, 0))
    steps = _GRADED / np.maximum(cd, 1.0)[:, None]
    return flat * np.exp(-steps)


def _exp_rate(curve: Curve, coef: FloatArray) -> FloatArray:
    """Rate ``(D,)`` of the curve's exponential growth at ``coef``, 0 for
    the draws that do not grow and for curves of another kind."""
    d = coef.shape[0]
    g = curve.model.growth(coef)
    if g.kind != "exp":
        return np.zeros(d)
    return np.broadcast_to(np.maximum(np.asarray(g.rate, dtype=float), 0.0), (d,))


def _graded(rate: FloatArray, points: FloatArray, sides: tuple[int, ...],
            grades: FloatArray = _GRADED, reach: float | None = None) -> FloatArray:
    r"""Breakpoints graded towards each of ``points`` ``(D, K)`` from above
    (side 1) and/or below (side -1), for a log RR of slope ``rate`` ``(D,)``
    in the dose there: :math:`k\,e^{\pm j/(r k)}`, j in ``grades``
    (the log-exposure slope of :math:`r x` is :math:`r k` at :math:`k`;
    see :func:`_graded_below_flat`). ``(D, 0)`` when no draw has
    :math:`r k > 1` (the integrand is not steep on the log scale there).
    With ``reach``, only the breaks that lie within ``reach`` of their
    point on the log scale for some draw with :math:`r k > 1`."""
    cd = rate[:, None] * points
    if not np.any(cd > 1.0):
        return np.zeros((points.shape[0], 0))
    steps = grades / np.maximum(cd, 1.0)[..., None]
    if reach is not None:
        # only the (point, grade) columns some steep draw needs
        keep = np.any((cd[..., None] > 1.0) & (steps <= reach), axis=0)
        steps = steps[:, keep]
        points = points[:, np.nonzero(keep)[0]]
    else:
        steps, points = steps.reshape(points.shape[0], -1), np.repeat(points, grades.size, axis=1)
    parts = [points * np.exp(side * steps) for side in sides]
    return np.concatenate(parts, axis=1)


def expected_rr(curve: Curve, exposure: Exposure | EmpiricalExposure, minimum_risk: float = 0.0,
                scenario: Scenario | None = None) -> float:
    """:math:`E[RR_m(g(X))]` at the point estimates."""
    return 1.0 + _point_excess(curve, exposure, minimum_risk, scenario)


def _point_excess(curve: Curve, exposure: Exposure | EmpiricalExposure, minimum_risk: float,
                  scenario: Scenario | None = None) -> float:
    """:math:`E[RR_m(g(X))] - 1` at the point estimates, kept as an excess
    so that a tiny PAF keeps its relative precision."""
    if isinstance(exposure, EmpiricalExposure):
        excess = empirical_excess_draws(curve, curve.coef, exposure.values, exposure.weights,
                                        exposure.unexposed, minimum_risk, scenario)
    else:
        excess = excess_draws(curve, curve.coef, exposure.family, exposure.params,
                              exposure.unexposed, minimum_risk, scenario)
    return float(excess[0])


def paf_from_excess(excess0: ArrayLike) -> FloatArray:
    r""":math:`PAF = 1 - 1/E = (E - 1)/E` from the excess :math:`E - 1`."""
    e0 = np.asarray(excess0, dtype=float)
    _refuse_zero_rr(e0)
    return e0 / (1.0 + e0)


#: Expected RR below which the quadrature's rounding (about 1e-15) dominates.
_UNRESOLVED_RR = 1e-12


def _refuse_zero_rr(e0: FloatArray) -> None:
    """An expected RR of 0 in double precision leaves no fraction to form; the
    quadrature resolves E[RR] to about 1e-15 absolute, so values below
    :data:`_UNRESOLVED_RR` count as 0."""
    if np.any(1.0 + e0 <= _UNRESOLVED_RR):
        raise FloatRangeError("the expected RR underflows to 0 in double precision (the curve "
                              "lowers the risk by a factor beyond the float range); check the "
                              "curve's coefficients and units")


def pif_from_excess(excess0: ArrayLike, excess_g: ArrayLike) -> FloatArray:
    r""":math:`PIF = 1 - E_g/E = (E - E_g)/E` from the two excesses."""
    e0, eg = np.asarray(excess0, dtype=float), np.asarray(excess_g, dtype=float)
    _refuse_zero_rr(e0)
    return cast(FloatArray, (e0 - eg) / (1.0 + e0))


def paf(curve: Curve, exposure: Exposure | EmpiricalExposure, *, minimum_risk: float) -> float:
    r"""Population attributable fraction of the current exposure
    distribution against everyone at the minimum-risk level ``minimum_risk``
    (keyword-only, no default: the level is a choice the caller states).

    Computed from the excess :math:`e = E[RR_m(X)] - 1` as :math:`e/(1+e)`,
    so a PAF of 1e-16 keeps full relative precision."""
    return float(paf_from_excess(_point_excess(curve, exposure, minimum_risk)))


def pif(curve: Curve, exposure: Exposure | EmpiricalExposure, scenario: Scenario, *,
        minimum_risk: float) -> float:
    """Potential impact fraction of an exposure-reduction scenario."""
    e0 = _point_excess(curve, exposure, minimum_risk)
    eg = _point_excess(curve, exposure, minimum_risk, scenario)
    return float(pif_from_excess(e0, eg))
