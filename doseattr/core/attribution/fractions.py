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

from functools import lru_cache
from typing import cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.attribution.engine import (
    LOG_DOSE_WIDTH,
    NARROW_SHARE,
    Excess,
    LogRisk,
    Rows,
    columns,
    expected_excess,
)
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale, Scenario
from doseattr.core.attribution.standard import standard_for
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
                           kinks=_kinks(curve, coef, m, scenario, (family, params)),
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


#: Smallest log RR at every node of a column for which :func:`_excess_m`
#: forms the excess as ``exp(t) - 1`` (derived here): with the exponential's
#: result :math:`e^t (1 + \delta)`, :math:`|\delta| \le 2^{-52}` (under one
#: unit in the last place), and the subtraction's rounding (none while
#: :math:`e^t \le 2`, by Sterbenz's lemma; at most :math:`2^{-53}` above), the
#: relative error in :math:`e^t - 1` is at most
#: :math:`2^{-52} / (1 - e^{-t}) + 2^{-53}`: for :math:`t \ge 1/16`,
#: 17 x 2^-52 (about 3.8e-15). These values are positive and so are the
#: rule's weights, so a panel's sum keeps that relative bound.
_EXP_MINUS_ONE = 1.0 / 16.0
#: That bound, relative (:data:`_EXP_MINUS_ONE`).
EXP_MINUS_ONE_ERROR = 17 * 2.0**-52


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

    def excess(x: FloatArray, rows: Rows, out: FloatArray, inside: bool = False) -> FloatArray:
        # y - m, y = min(max(g(x), m), x*), as max(g(x) - m, 0) capped at x* - m;
        # the engine's nodes (inside) need no holding for the scenarios named here
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
            inside = False
        if not inside:
            np.maximum(out, 0.0, out=out)
            if high < np.inf:
                np.minimum(out, np.maximum(high - low, 0.0), out=out)
        out *= factor[rows, None]
        if exponential:
            _expm1_by_columns(out)
        return out

    return excess


def _expm1_by_columns(t: FloatArray) -> None:
    """``expm1(t)`` in place, as ``exp(t) - 1`` in the trailing columns of
    ``t`` ``(r, N)`` where every value is at least 1/16 (within
    :data:`EXP_MINUS_ONE_ERROR` relative there, :data:`_EXP_MINUS_ONE`; for
    about two thirds of expm1's time). The engine's columns are a panel's
    nodes in order, so for a rising curve those columns are the panel's
    upper ones."""
    ok = t.min(axis=0, initial=np.inf) >= _EXP_MINUS_ONE
    # the column after the last one holding a t below 1/16
    first = 0 if ok.all() else t.shape[1] - int(np.argmin(ok[::-1]))
    if first == t.shape[1]:
        np.expm1(t, out=t)
        return
    upper = t[:, first:]
    np.exp(upper, out=upper)
    upper -= 1.0
    if first:
        lower = t[:, :first]
        np.expm1(lower, out=lower)


def _growth(curve: Curve, coef: FloatArray, scenario: Scenario | None) -> Growth:
    g = curve.growth(coef)
    return g if scenario is None else scenario.growth(g)


def _kinks(curve: Curve, coef: FloatArray, m: FloatArray, scenario: Scenario | None,
           exposure: tuple[Family, FloatArray]) -> FloatArray:
    """Doses in the original exposure where RR_m(g(x)) has a kink, and the
    graded breaks below a steep curve's flat point, placed for the draws'
    ``exposure`` (family and parameters ``(D, k)``)."""
    d = coef.shape[0]
    k = np.asarray(curve.kinks(coef), dtype=float)
    k = np.broadcast_to(k, (d, k.shape[-1]))
    flat = _flat_from(curve, scenario if isinstance(scenario, Cap) else None)
    graded = _graded_below_flat(curve, coef, flat, m, scenario, exposure)
    points = columns(k, m[:, None], graded)
    start = m[:, None] if scenario is None else scenario.preimage(m[:, None])
    # a falling curve drops steeply from RR_m = 1 just above m's pre-image
    # (at the curve's rate in x: finer than needed under a scale)
    falling = _graded(_exp_rate(curve, -coef), start, (1,)) if curve.model.linear else None
    if scenario is not None:
        own = np.broadcast_to(scenario.own_kinks(), (d, scenario.own_kinks().size))
        points = columns(scenario.preimage(points), own)
    return points if falling is None else columns(points, falling)


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


#: Distances from a kink ``k`` on the log scale, in units of 1/(r k), of the
#: fixed graded breakpoints of :func:`_graded` (a falling curve's, above the
#: pre-image of the minimum-risk level).
_GRADED = np.array([1.0, 2.0, 4.0, 8.0, 16.0, 32.0])


def _graded_below_flat(curve: Curve, coef: FloatArray, flat: float | None, m: FloatArray,
                       scenario: Scenario | None,
                       exposure: tuple[Family, FloatArray]) -> FloatArray:
    r"""Breakpoints graded towards the flat point ``D = flat`` from below,
    per draw, for curves that grow exponentially (rate :math:`c`) before
    being held flat, in the scenario's dose :math:`y = g(x)` (``max_dose``,
    or a cap below it, whose pre-image is the identity below it); the
    caller maps them to the exposure. ``(D, 0)`` when no draw is steep
    (:math:`cD \le 1`). Placed by :func:`_breaks` from the local shape of
    the integrand at ``D`` (derived here):

    with :math:`u = \ln D - \ln y \ge 0`, the log of the integrand
    :math:`\mathrm{expm1}(L)\, f_T` on the log-dose scale is, up to a
    constant and to second order in the density,

    .. math:: \varphi(u) = -s_c (1 - e^{-u}) - \lambda u - \kappa u^2/2,

    with :math:`s_c = cD / (1 - e^{-c(D - m)})` the log-slope of
    :math:`\mathrm{expm1}(c(y - m))` at :math:`D` (for a log-linear curve,
    whose :math:`\ln RR = c D e^{-u}` makes the first term exact once
    :math:`RR \gg 1`), and :math:`\lambda`, :math:`\kappa` the slope and
    negated curvature of the exposure's log density at :math:`\ln D`
    (:func:`_density_slopes`). Where the density falls steeply at ``D``
    the net decay :math:`s_c + \lambda` is much slower than :math:`s_c`
    (most fixed breaks at :math:`j/(cD)` were wasted there), but the
    curvature is still about :math:`s_c`: the panels are sized by the
    larger of the two and weighted by :math:`e^{\varphi}`. Only breaks
    within the window :math:`[\ln m, \ln D]` are placed, and a panel is
    sized for 16 nodes only where it is wide enough that the engine surely
    gives it 16 (``wide``: above a quarter of the widest possible body
    panel, :data:`LOG_DOSE_WIDTH` or the window).
    """
    d = coef.shape[0]
    none = np.zeros((d, 0))
    if flat is None or flat <= 0:
        return none
    rate = _exp_rate(curve, coef)
    cd = rate * flat
    # m is often one level for all draws: its window once
    low = np.minimum(m[:1] if m.strides == (0,) else m, flat)
    steep = (cd > 1.0) & (low < flat)
    if not np.any(steep):
        return none
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        width = np.broadcast_to(np.log(flat) - np.log(low), (d,))
        slope = cd / -np.expm1(rate * (low - flat))
    if not np.all(steep):
        slope = np.where(steep, slope, 0.0)
    lam, kap = _density_slopes(exposure, flat, scenario, d)
    # a panel this wide on the log-dose scale surely gets the full rule
    wide = np.minimum(width, LOG_DOSE_WIDTH) * (_WIDE_SHARE * 1.02)
    u = _breaks(slope, lam, kap, wide, width)
    if u.shape[1] == 0:
        return none
    return cast(FloatArray, flat * np.exp(-u))


#: Design tolerance of each graded panel, relative to the integral of the
#: boundary layer below the flat point (:func:`_breaks`).
GRADE_TOL = 1e-12
#: Most graded breaks below a flat point (enough for :math:`cD` near 700,
#: where :math:`RR` overflows).
GRADE_MAX = 10
#: The engine gives the full rule to panels wider than this share of its
#: narrowest body panel (``expected_excess``: 16 nodes, else 8).
_WIDE_SHARE = NARROW_SHARE
#: Grids of the capacity tables: the curve's local rate and the tolerance.
_R_GRID = np.geomspace(0.05, 1e4, 49)
_TOL_GRID = np.geomspace(1e-16, 1.0, 33)
_LOG_R0, _LOG_R_STEP = float(np.log(_R_GRID[0])), float(np.log(_R_GRID[1] / _R_GRID[0]))
_LOG_T0, _LOG_T_STEP = float(np.log(_TOL_GRID[0])), float(np.log(_TOL_GRID[1] / _TOL_GRID[0]))
#: Step on the log-dose scale of the finite differences of :func:`_density_slopes`.
_DELTA = 1e-3


def _rule_sum(n: int, r: FloatArray, x: FloatArray, sub: int = 1) -> FloatArray:
    r""":math:`\int_0^{x/r} e^{r (e^{-s} - 1)} ds` by the ``n``-point
    Gauss-Legendre rule on ``sub`` equal pieces, for rates ``r`` ``(R,)``
    and spans ``x`` ``(X,)`` in units of ``1/r``: ``(R, X)``."""
    xi, wi = np.polynomial.legendre.leggauss(n)
    span = x[None, :] / r[:, None]
    total = np.zeros_like(span)
    for j in range(sub):
        s = span[..., None] * ((j + (xi + 1) / 2) / sub)
        total += (wi * np.exp(r[:, None, None] * np.expm1(-s))).sum(axis=-1) * (span / (2 * sub))
    return total


@lru_cache(maxsize=1)
def _capacity_tables() -> tuple[FloatArray, FloatArray]:
    r"""Capacities :math:`X_n(r, \tau)` of the 16- and 8-node rules, each
    flattened from ``(len(_R_GRID), len(_TOL_GRID))``: the largest
    :math:`r\Delta` for which the rule's relative error on
    :math:`\int_0^\Delta e^{r(e^{-s} - 1)} ds` (the curve's factor of the
    integrand over a panel starting where its log-slope is ``r``) stays
    within :math:`\tau`, for every shorter span too. The errors are the
    rule's own against a 24-node rule on 8 pieces (derived here, computed
    once); the last column (:math:`\tau = 1`) is unbounded."""
    x = np.geomspace(0.02, 400.0, 240)
    ref = _rule_sum(24, _R_GRID, x, sub=8)
    tables = []
    for n in (16, 8):
        err = np.maximum.accumulate(np.abs(_rule_sum(n, _R_GRID, x) / ref - 1.0), axis=1)
        idx = (err[:, None, :] <= _TOL_GRID[None, :, None]).sum(axis=2) - 1
        cap = np.where(idx >= 0, x[np.maximum(idx, 0)], 0.0)
        cap[:, -1] = np.inf
        tables.append(cap.ravel())
    return tables[0], tables[1]


def _breaks(cd: FloatArray, lam: FloatArray, kap: FloatArray, wide: FloatArray,
            end: FloatArray) -> FloatArray:
    r"""Distances :math:`u` below :math:`\ln D` ``(D, k)`` of the graded
    breaks (0 for a draw with fewer), placed panel by panel from
    :math:`u = 0` (derived here, in the notation of
    :func:`_graded_below_flat`, with ``cd`` :math:`= s_c`).

    A panel starting at :math:`p` is sized for the rate
    :math:`r = \max(s_c e^{-p}, |s_c e^{-p} + \lambda + \kappa p|) +
    \sqrt{|\kappa|}`: the larger of the curve's log-slope there (its
    factor's curvature is as large, whatever the density does) and the net
    log-slope of the integrand, plus the density's curvature scale; an
    exponential or Gaussian factor of that rate is resolved like the
    curve's factor. It spans :math:`X_n(r, \tau)/r` (:func:`_capacity_tables`), with the
    16-node capacity where that span is at least ``wide`` (the engine then
    uses 16 nodes) and the 8-node one where it is not or where the rest of
    the window is narrower than ``wide``. Its tolerance is
    :math:`\tau = \mathrm{GRADE\_TOL} / \omega` with :math:`\omega`
    the panel's share of the boundary layer,

    .. math:: \omega = \min\left(1, \frac{e^{\min(\varphi(p), 0)}\, a}
              {\max(s_c e^{-p} + \lambda + \kappa p,\ 1)}\right), \qquad
              a = \max(s_c + \lambda,\ \sqrt{s_c + |\kappa|},\ 1),

    the panel's integral (its start's value over the net decay rate) over
    the layer's (width :math:`1/a`; at least :math:`1/\sqrt{s_c}` where
    the density's fall cancels the curve's rise). So the panels widen
    geometrically as the integrand decays (:math:`\omega` falls like
    :math:`e^{\varphi}`) and as the curve's rate :math:`s_c e^{-p}` falls;
    the breaks stop at the window's end ``end``, once :math:`\tau \ge 1`
    (the rest is negligible) or once the curve's rate :math:`s_c e^{-p}`
    has fallen below 1 (its factor is then smooth on the log scale and the
    body's panels resolve the rest), at most :data:`GRADE_MAX`. The model
    error of each panel is at most :math:`\mathrm{GRADE\_TOL}` of the
    layer; the rules' actual errors are checked against quadrature in
    ``tests/test_attribution_steep_grading.py`` (about 1e-12 relative at
    worst, as with the fixed grading this replaced).
    """
    d = cd.shape[0]
    t16, t8 = _capacity_tables()
    root = np.sqrt(np.abs(kap))
    half_kap = 0.5 * kap
    log_layer = np.log(np.maximum(np.maximum(cd + lam, np.sqrt(cd + np.abs(kap))), 1.0))
    top_j = (np.log(GRADE_TOL) - _LOG_T0) / _LOG_T_STEP
    nt = _TOL_GRID.size
    # the first panel's share of the layer is 1 (ln a >= ln max(net, 1) at p = 0)
    first_j = int(min(top_j, nt - 1))
    p = np.zeros(d)
    alive = cd > 1.0
    cols = []
    for n in range(GRADE_MAX):
        if n == 0:
            ce, lin, phi = cd, lam, np.zeros(d)
        else:
            ce = np.exp(-p)
            ce *= cd
            lin = kap * p
            lin += lam
            phi = half_kap * p
            phi += lam
            phi *= p
            np.subtract(ce - cd, phi, out=phi)
            np.minimum(phi, 0.0, out=phi)
            # the curve's factor has flattened out: the body's panels take over
            alive &= ce >= 1.0
            if not alive.any():
                break
        net = ce + lin
        r = np.abs(net)
        np.maximum(r, ce, out=r)
        r += root
        np.maximum(r, _R_GRID[0], out=r)
        i = np.log(r)
        i -= _LOG_R0
        i *= 1 / _LOG_R_STEP
        np.minimum(i, _R_GRID.size - 1, out=i)
        # floors: the grid's rate and tolerance at or below the draw's
        k = i.astype(np.intp)
        k *= nt
        k += first_j if n == 0 else _tolerance_index(net, phi, log_layer, top_j, nt)
        span = t16[k]
        # the 8-node rule where the panel, or the rest of the window, is narrow
        narrow = (span < wide * r) | (end - p < wide)
        if narrow.any():
            span = np.where(narrow, t8[k], span)
        span /= r
        span += p
        alive &= span < end
        if not alive.any():
            break
        p = np.where(alive, span, p)
        cols.append(np.where(alive, p, 0.0))
    # column-major, as the engine's kinks (engine.columns)
    return np.stack(cols).T if cols else np.zeros((d, 0))


def _tolerance_index(net: FloatArray, phi: FloatArray, log_layer: FloatArray, top_j: float,
                     nt: int) -> NDArray[np.intp]:
    r"""The floor of a panel's index in the tolerance grid of
    :func:`_capacity_tables`, from :math:`\ln\omega = \min(\varphi + \ln a
    - \ln\max(net, 1), 0)` (:func:`_breaks`; ``net`` is overwritten)."""
    np.maximum(net, 1.0, out=net)
    log_share = np.log(net)
    np.subtract(phi, log_share, out=log_share)
    log_share += log_layer
    np.minimum(log_share, 0.0, out=log_share)
    j = top_j - log_share * (1 / _LOG_T_STEP)
    np.minimum(j, nt - 1, out=j)
    return j.astype(np.intp)


def _density_slopes(exposure: tuple[Family, FloatArray], flat: float,
                    scenario: Scenario | None, d: int) -> tuple[FloatArray, FloatArray]:
    r"""Slope :math:`\lambda` and negated curvature :math:`\kappa` ``(D,)``
    of the exposure's log density on the scale :math:`t_y = \ln y` of the
    scenario's dose at :math:`y = D` (``flat``).

    With :math:`t_x = \ln g^{-1}(e^{t_y})`, :math:`J = dt_x/dt_y` and
    :math:`J' = d^2 t_x/dt_y^2` (1 and 0 for a cap or a scale; for
    reduce_by :math:`J = D/(D + v)`), by the chain rule
    :math:`\lambda = \lambda_x J` and
    :math:`\kappa = \kappa_x J^2 - \lambda_x J'`, where :math:`\lambda_x,
    \kappa_x` are those of :math:`\ln f_T(t_x)` in closed form
    (:func:`_log_density_slopes`), or for another family by finite
    differences of ``log_density_log`` (step :data:`_DELTA`); :math:`J`,
    :math:`J'` by finite differences of the pre-image (one dose, shared by
    all draws). Non-finite values (no density there) count as 0."""
    family, params = exposure
    y = flat * np.exp(np.array([-2 * _DELTA, -_DELTA, 0.0]))
    x = y if scenario is None else np.asarray(scenario.preimage(y), dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        tx = np.log(x)
        jac = (3 * tx[2] - 4 * tx[1] + tx[0]) * (0.5 / _DELTA)
        jac2 = (tx[2] - 2 * tx[1] + tx[0]) * (1 / _DELTA**2)
    slopes = _log_density_slopes(family, params, float(tx[2]))
    if slopes is None or not (np.isfinite(jac) and np.isfinite(jac2)):
        f = family.log_density_log(np.broadcast_to(tx, (d, 3)), params)
        lam = (3 * f[:, 2] - 4 * f[:, 1] + f[:, 0]) * (0.5 / _DELTA)
        kap = (2 * f[:, 1] - f[:, 2] - f[:, 0]) * (1 / _DELTA**2)
    else:
        lam_x, kap_x = slopes
        lam, kap = lam_x * jac, kap_x * (jac * jac) - lam_x * jac2
    lam, kap = np.broadcast_to(lam, (d,)), np.broadcast_to(kap, (d,))
    ok = np.isfinite(lam) & np.isfinite(kap)
    if ok.all():
        return lam, kap
    return np.where(ok, lam, 0.0), np.where(ok, kap, 0.0)


def _log_density_slopes(family: Family, params: FloatArray,
                        t: float) -> tuple[FloatArray, FloatArray] | None:
    r"""First derivative and negated second derivative of :math:`\ln f_T(t)`,
    the log density of :math:`T = \ln X`, per draw, in closed form (derived
    here from each density): lognormal :math:`-(t - \mu)/s^2` and
    :math:`1/s^2`; gamma (shape :math:`k`, scale :math:`\theta`,
    :math:`\ln f_T = k t - e^t/\theta + C`) :math:`k - e^t/\theta` and
    :math:`e^t/\theta`; Weibull (shape :math:`k`, scale :math:`\lambda`,
    :math:`E = (e^t/\lambda)^k`, :math:`\ln f_T = \ln E - E + C`)
    :math:`k(1 - E)` and :math:`k^2 E`. ``None`` for other families."""
    p0, p1 = params[:, 0], params[:, 1]
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        if family.name == "lognormal":
            # (ln GM, ln GSD), kept by the engine's standard for these draws
            mu, s = (v[:, 0] for v in standard_for(family).affine(params))
            kap = 1.0 / (s * s)
            return (mu - t) * kap, kap
        if family.name == "gamma":
            e = np.exp(t) / p1
            return p0 - e, e
        if family.name == "weibull":
            e = np.exp(p0 * (t - np.log(p1)))
            return p0 - p0 * e, p0 * p0 * e
    return None


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
    (the log-exposure slope of :math:`r x` is :math:`r k` at :math:`k`,
    so the integrand changes by a factor e within :math:`1/(r k)` of the
    kink on the log scale). ``(D, 0)`` when no draw has
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
    return columns(*(points * np.exp(side * steps) for side in sides))


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
