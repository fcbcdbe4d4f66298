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

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.attribution.engine import expected_excess
from doseattr.core.attribution.scenarios import Scenario
from doseattr.core.curves.base import Curve, as_coef_draws
from doseattr.core.exposure.base import Exposure, Family

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
    coef = as_coef_draws(coef)
    params = np.atleast_2d(np.asarray(params, dtype=float))
    d = max(coef.shape[0], params.shape[0], np.size(unexposed), np.size(minimum_risk))
    coef = np.broadcast_to(coef, (d, coef.shape[1]))
    params = np.broadcast_to(params, (d, params.shape[1]))
    m = np.broadcast_to(np.asarray(minimum_risk, dtype=float), (d,))
    u = np.broadcast_to(np.asarray(unexposed, dtype=float), (d,))
    assert np.all(m >= 0) and np.all((u >= 0) & (u < 1))

    def log_rr(x: FloatArray, rows: slice) -> FloatArray:
        c, mm = coef[rows], m[rows, None]
        y = x if scenario is None else scenario.apply(x, mm)
        return curve.log_rr(np.maximum(y, mm), c) - curve.log_rr(mm, c)

    if getattr(family, "empirical", False):
        body = _empirical_excess(log_rr, family, d)
    else:
        body = expected_excess(log_rr, family, params,
                               growth=_growth(curve, coef, scenario),
                               kinks=_kinks(curve, coef, m, scenario))
    return (1.0 - u) * body


def _empirical_excess(log_rr, family, d: int) -> FloatArray:
    """Weighted mean of RR_m - 1 over individual values (no fitted family)."""
    x = np.broadcast_to(np.asarray(family.values, dtype=float), (d, len(family.values)))
    w = np.asarray(family.weights, dtype=float)
    return np.expm1(log_rr(x, slice(0, d))) @ (w / w.sum())


def _growth(curve: Curve, coef: FloatArray, scenario: Scenario | None):
    g = curve.growth(coef)
    return g if scenario is None else scenario.growth(g)


def _kinks(curve: Curve, coef: FloatArray, m: FloatArray, scenario: Scenario | None) -> FloatArray:
    """Doses in the original exposure where RR_m(g(x)) has a kink."""
    d = coef.shape[0]
    k = np.asarray(curve.kinks(coef), dtype=float)
    k = np.broadcast_to(k, (d, k.shape[-1]))
    points = np.concatenate([k, m[:, None]], axis=1)
    if scenario is None:
        return points
    own = np.broadcast_to(scenario.own_kinks(), (d, scenario.own_kinks().size))
    return np.concatenate([scenario.preimage(points), own], axis=1)


def expected_rr(curve: Curve, exposure: Exposure, minimum_risk: float = 0.0,
                scenario: Scenario | None = None) -> float:
    """:math:`E[RR_m(g(X))]` at the point estimates."""
    return 1.0 + float(excess_draws(curve, curve.coef, exposure.family, exposure.params,
                                    exposure.unexposed, minimum_risk, scenario)[0])


def paf_from_excess(excess0: ArrayLike) -> FloatArray:
    r""":math:`PAF = 1 - 1/E = (E - 1)/E` from the excess :math:`E - 1`."""
    e0 = np.asarray(excess0, dtype=float)
    return e0 / (1.0 + e0)


def pif_from_excess(excess0: ArrayLike, excess_g: ArrayLike) -> FloatArray:
    r""":math:`PIF = 1 - E_g/E = (E - E_g)/E` from the two excesses."""
    e0, eg = np.asarray(excess0, dtype=float), np.asarray(excess_g, dtype=float)
    return (e0 - eg) / (1.0 + e0)


def paf(curve: Curve, exposure: Exposure, minimum_risk: float = 0.0) -> float:
    """Population attributable fraction of the current exposure distribution
    against everyone at the minimum-risk level."""
    return float(paf_from_excess(expected_rr(curve, exposure, minimum_risk) - 1.0))


def pif(curve: Curve, exposure: Exposure, scenario: Scenario,
        minimum_risk: float = 0.0) -> float:
    """Potential impact fraction of an exposure-reduction scenario."""
    e0 = expected_rr(curve, exposure, minimum_risk) - 1.0
    eg = expected_rr(curve, exposure, minimum_risk, scenario) - 1.0
    return float(pif_from_excess(e0, eg))
