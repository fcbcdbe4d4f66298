r"""What the weights of a weighted fit mean, and the covariance that follows.

Two meanings (:data:`WEIGHT_MEANINGS`):

``"frequency"``
    Each weight counts identical observations (relative to the others; the
    fitter normalises weights to sum to the number of values). The
    covariance is the inverse weighted observed information :math:`A^{-1}`.
``"importance"``
    Population (survey, sampling) weights: how many people a value stands
    for, not extra measurements. The covariance of the weighted maximum
    likelihood estimate is the sandwich (robust) estimator for weighted
    likelihoods (Binder 1983, Int Stat Rev 51:279, from memory):

    .. math::

        V = A^{-1} B A^{-1}, \qquad
        A = -\sum_i w_i \nabla^2 \ell_i(\hat\theta), \qquad
        B = \sum_i w_i^2\, s_i s_i^{\mathsf T}, \quad s_i = \nabla \ell_i(\hat\theta),

    with :math:`\ell_i` the log-likelihood contribution of value ``i``
    (its log density, or its log CDF when it is a detection limit).
    :math:`V` does not change when every weight is multiplied by the same
    constant.

The Kish effective sample size (Kish 1965, Survey Sampling, from memory)
:math:`n_{\mathrm{eff}} = (\sum w_i)^2 / \sum w_i^2` says how many equally
weighted values carry the same information about a weighted mean.
"""

from __future__ import annotations

from typing import Literal, cast

import numpy as np

from doseattr.core.exposure.base import FloatArray
from doseattr.errors import ModelError

WeightMeaning = Literal["frequency", "importance"]

#: What weights may mean (see module docstring).
WEIGHT_MEANINGS: tuple[WeightMeaning, ...] = ("frequency", "importance")

def check_meaning(meaning: str) -> WeightMeaning:
    """``meaning`` itself when it is one of :data:`WEIGHT_MEANINGS`; ModelError otherwise."""
    if meaning not in WEIGHT_MEANINGS:
        raise ModelError(f"weights must be \"frequency\" or \"importance\", got {meaning!r}")
    return cast(WeightMeaning, meaning)


def kish_effective_n(w: FloatArray) -> float:
    r"""Kish effective sample size :math:`(\sum w)^2 / \sum w^2` (Kish 1965,
    Survey Sampling, from memory); ``n`` when all weights are equal."""
    w = np.asarray(w, dtype=float)
    return float(w.sum() ** 2 / np.dot(w, w))


def sandwich(bread: FloatArray, s: FloatArray, w: FloatArray) -> FloatArray | None:
    r""":math:`A^{-1} B A^{-1}` with ``bread`` :math:`= A^{-1}` (the inverse
    weighted observed information, the model-based covariance) and
    :math:`B = \sum_i w_i^2 s_i s_i^{\mathsf T}` from the score rows ``s``
    (Binder 1983, Int Stat Rev 51:279, from memory); ``None`` when a score
    or the result is not finite."""
    if not np.all(np.isfinite(s)):
        return None
    ws = s * np.asarray(w, dtype=float)[:, None]
    v = bread @ (ws.T @ ws) @ bread
    v = 0.5 * (v + v.T)
    return v if np.all(np.isfinite(v)) else None
