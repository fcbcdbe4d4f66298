r"""The weighted, left-censored measurement log-likelihood with its exact
gradient, over pooled data.

Equal detected values, and equal detection limits, give identical terms,
so each distinct one enters once with its summed weight (:class:`Pooled`);
where the family has sufficient statistics for its densities (lognormal:
weighted sums of ``ln x`` and ``ln^2 x``; gamma: of ``x`` and ``ln x``) the
detects enter through them alone. One evaluation is one pass over the
distinct values that remain: the family's
:meth:`~doseattr.core.exposure.base.Family.log_terms_scores` gives each
term and its gradient together, and

.. math::

    \ell(\theta) = \sum_{\mathrm{detects}} w_i \ln f(x_i; \theta)
                 + \sum_{\mathrm{limits}} w_i \ln F(x_i; \theta), \qquad
    \nabla \ell = \sum w_i \nabla(\cdot).

The observed information is the central difference of the exact gradient
(step :math:`\epsilon^{1/3}\max(1, |\theta_j|)`, error :math:`O(h^2)`;
Nocedal & Wright 2006, Numerical Optimization, sec. 8.1, from memory),
symmetrised.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import cast

import numpy as np
from numpy.typing import NDArray

from doseattr.core.exposure.base import Family, FloatArray, pool


@dataclass(frozen=True)
class Pooled:
    """Distinct detected values and distinct detection limits, each with its
    summed weight; ``total`` is the sum of all weights. When the family has
    sufficient statistics for detects (``summary``,
    :meth:`~doseattr.core.exposure.base.Family.detect_summary`), they stand
    for the detects, and ``detects`` is empty."""

    detects: FloatArray
    detect_weights: FloatArray
    limits: FloatArray
    limit_weights: FloatArray
    total: float
    summary: FloatArray | None = None


def pool_measurements(family: Family, x: FloatArray, detected: NDArray[np.bool_],
                      w: FloatArray) -> Pooled:
    """Pool equal values within the limits, and within the detects unless
    the family summarises them."""
    summary = family.detect_summary(x[detected], w[detected])
    if summary is None:
        dx, dw = pool(x[detected], w[detected])
    else:
        dx, dw = np.empty(0), np.empty(0)
    cx, cw = pool(x[~detected], w[~detected])
    return Pooled(dx, dw, cx, cw, float(np.sum(w)), summary)


def value_and_gradient(family: Family, theta: FloatArray, data: Pooled) -> tuple[float, FloatArray]:
    """:math:`\\ell(\\theta)` and :math:`\\nabla \\ell(\\theta)` at internal
    parameters ``theta`` (module docstring)."""
    params = family.from_internal(theta)
    value, grad = 0.0, np.zeros(len(theta))
    if data.summary is not None:
        value, grad = family.summary_loglik(data.summary, params)
    for x, w, censored in ((data.detects, data.detect_weights, False),
                           (data.limits, data.limit_weights, True)):
        if x.size:
            terms, scores = family.log_terms_scores(x, params, censored=censored)
            value += float(np.dot(w, terms))
            grad += w @ scores
    return value, grad


def observed_information(family: Family, theta: FloatArray, data: Pooled) -> FloatArray:
    """Minus the Hessian of :math:`\\ell` at ``theta`` by central differences
    of the exact gradient, symmetrised (module docstring)."""
    theta = np.asarray(theta, dtype=float)
    steps = np.finfo(float).eps ** (1 / 3) * np.maximum(1.0, np.abs(theta))
    rows = []
    with np.errstate(all="ignore"):
        for j, h in enumerate(steps):
            e = np.zeros_like(theta)
            e[j] = h
            up = value_and_gradient(family, theta + e, data)[1]
            down = value_and_gradient(family, theta - e, data)[1]
            rows.append(-(up - down) / (2 * h))
    info = np.array(rows, dtype=float)
    return cast(FloatArray, 0.5 * (info + info.T))
