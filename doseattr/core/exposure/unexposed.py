r"""The unexposed share: a point mass at zero exposure, estimated from data.

With weights ``w_i`` the share is the weighted proportion of exact zeros,

.. math::

    \hat u = \frac{\sum_{x_i = 0} w_i}{\sum_i w_i},

and the positive values (with their weights) describe the exposed part.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.exposure.base import FloatArray
from doseattr.errors import ModelError


def _weights(weights: ArrayLike | None, n: int) -> FloatArray:
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
    if w.shape != (n,) or not np.all(np.isfinite(w) & (w > 0)):
        raise ModelError(f"weights must be {n} positive numbers, one per value")
    return w


def estimate_unexposed(values: ArrayLike, weights: ArrayLike | None = None) -> tuple[float, FloatArray, FloatArray]:
    """Split data into the unexposed share and the exposed values.

    Returns ``(share, positive_values, positive_weights)``; ModelError on
    negative or non-finite values, or when every value is zero.
    """
    x = np.asarray(values, dtype=float)
    if x.ndim != 1 or x.size == 0 or not np.all(np.isfinite(x)):
        raise ModelError("values must be a non-empty list of finite numbers")
    if np.any(x < 0):
        raise ModelError(f"exposure values cannot be negative (number {int(np.argmax(x < 0)) + 1} is)")
    w = _weights(weights, x.size)
    zero = x == 0
    if zero.all():
        raise ModelError("every value is zero: nobody in the data is exposed")
    return float(w[zero].sum() / w.sum()), x[~zero], w[~zero]


def unexposed_from_count(unexposed: int, total: int) -> float:
    """Share ``unexposed / total`` from counts (``0 <= unexposed < total``)."""
    if not (float(unexposed).is_integer() and float(total).is_integer() and 0 <= unexposed < total):
        raise ModelError(f"need whole counts with 0 <= unexposed < total, got {unexposed} of {total}")
    return unexposed / total
