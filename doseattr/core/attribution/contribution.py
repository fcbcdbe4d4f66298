r"""Where the attributable burden comes from along the exposure axis.

The attributable fraction decomposes over exposure levels:

.. math::
    PAF = \int_0^\infty c(x)\,dx, \qquad
    c(x) = \frac{f(x)\,(RR_m(x) - 1)}{E[RR_m(X)]},

so :math:`c` is the density of the burden over exposure (it integrates to
the PAF; it is negative where a curve dips below its minimum-risk value).
The cumulative share :math:`C(x) = \int_0^x c / PAF` is computed with the
same quadrature as the PAF, by integrating
:math:`RR_m - 1` only up to each grid point.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from doseattr.core.attribution.engine import Rows, expected_excess
from doseattr.core.attribution.fractions import expected_rr
from doseattr.core.curves.base import Curve, Growth
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.empirical import EmpiricalExposure

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class Contribution:
    """Burden density ``density`` on the exposure grid ``x``; ``cumulative``
    is the share of the attributable excess arising below each ``x``;
    ``median`` the exposure below which half of it arises (``None`` when
    there is no excess)."""

    x: FloatArray
    density: FloatArray
    cumulative: FloatArray
    median: float | None
    paf: float


def burden_density(curve: Curve, exposure: Exposure | EmpiricalExposure, minimum_risk: float = 0.0, *,
                   points: int = 200, upper_quantile: float = 0.999) -> Contribution:
    """Density and cumulative share of the attributable burden on a grid
    from 0 to the ``upper_quantile`` of the exposed population."""
    if isinstance(exposure, EmpiricalExposure):
        return _empirical(curve, exposure, minimum_risk)
    top = float(exposure.family.ppf(np.array([upper_quantile]), exposure.params)[0])
    x = np.linspace(0.0, top, points)
    e_total = expected_rr(curve, exposure, minimum_risk)
    m = np.array([minimum_risk])
    lr = curve.log_rr(np.maximum(x[1:], minimum_risk)) - curve.log_rr(m)
    dens = np.concatenate([[0.0], exposure.pdf(x[1:]) * np.expm1(lr) / e_total])
    cum = _cumulative(curve, exposure, minimum_risk, x[1:])
    total = e_total - 1.0
    share = np.concatenate([[0.0], cum / total]) if total > 0 else np.zeros_like(x)
    return Contribution(x, dens, share, _median(x, share, total), total / e_total)


def _cumulative(curve: Curve, exposure: Exposure, m: float, cuts: FloatArray) -> FloatArray:
    r""":math:`(1-u) E[RR_m(X) - 1; X \le c]` for each cut ``c`` (one
    quadrature "draw" per cut, with the cut as a kink)."""
    d = cuts.size
    params = np.broadcast_to(exposure.params, (d, exposure.params.size))
    base = curve.log_rr(np.array([m]))

    def log_rr(x: FloatArray, rows: Rows) -> FloatArray:
        lr = curve.log_rr(np.maximum(x, m)) - base
        return np.where(x <= cuts[rows, None], lr, 0.0)

    kinks = np.concatenate([np.broadcast_to(curve.kinks(), (d, curve.kinks().size)),
                            np.full((d, 1), m), cuts[:, None]], axis=1)
    body = expected_excess(log_rr, exposure.family, params, growth=Growth.bounded(), kinks=kinks)
    return (1 - exposure.unexposed) * body


def _median(x: FloatArray, share: FloatArray, total: float) -> float | None:
    if total <= 0 or share[-1] < 0.5:
        return None
    return float(np.interp(0.5, np.maximum.accumulate(share), x))


def _empirical(curve: Curve, exposure: EmpiricalExposure, m: float) -> Contribution:
    """For the empirical path: the burden as point masses at the values,
    reported as a cumulative step function."""
    order = np.argsort(exposure.values)
    x = exposure.values[order]
    w = exposure.weights[order]
    w = (1 - exposure.unexposed) * w / w.sum()
    ex = np.expm1(curve.log_rr(np.maximum(x, m)) - curve.log_rr(np.array([m])))
    e_total = 1.0 + float(w @ ex)
    contrib = w * ex
    total = float(contrib.sum())
    share = np.cumsum(contrib) / total if total > 0 else np.zeros_like(x)
    return Contribution(x, contrib / e_total, share, _median(x, share, total), total / e_total)


#: Most points a summary of the contribution keeps (see :func:`summarise`).
SUMMARY_POINTS = 201


def summarise(c: Contribution, points: int = SUMMARY_POINTS) -> Contribution:
    r"""At most ``points`` points of ``c``, so its size does not grow with
    the data: ``c`` itself when it is that small (the parametric path's
    fixed grid), else the points at ranks :math:`k(n-1)/(p-1)`,
    :math:`k = 0..p-1`, rounded (a fixed grid of sample quantiles of the
    sorted values, first and last included), each moved to the last rank
    holding the same value, so that ``cumulative`` is the share at or
    below that value whatever the order within ties.

    ``x``, ``cumulative``, ``median`` and ``paf`` are ``c``'s own values at
    those points (exact). ``density`` becomes the share carried by the
    values in :math:`(x_{k-1}, x_k]` (the first point carries all up to
    it), :math:`\sum_{i \in (r_{k-1}, r_k]} c_i`, so the summary's
    densities add up to ``c``'s.
    """
    n = c.x.size
    if n <= points:
        return c
    grid = np.rint(np.linspace(0.0, n - 1.0, points)).astype(np.intp)
    idx = np.unique(np.searchsorted(c.x, c.x[grid], side="right") - 1)
    mass = np.diff(np.concatenate([[0.0], np.cumsum(c.density)[idx]]))
    return Contribution(c.x[idx], mass, c.cumulative[idx], c.median, c.paf)
