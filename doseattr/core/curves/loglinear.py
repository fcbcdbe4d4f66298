"""Log-linear relative-risk model: log RR = b (x - x_ref)."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import CurveModel, FloatArray, Growth, minus, param


class LogLinear(CurveModel):
    r"""Log-linear (exponential) dose-response.

    .. math:: \log RR(x) = b\,(x - x_{ref})

    The standard trend model for category-level estimates (Greenland &
    Longnecker 1992, Am J Epidemiol 135:1301). RR grows exponentially when
    ``b > 0`` and is bounded otherwise.
    """

    name = "log-linear"
    linear = True
    param_names = ("slope",)

    def log_rr(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        return param(coef, 0) * (np.asarray(x, dtype=float) - self.reference_dose)

    def basis(self, x: ArrayLike) -> FloatArray:
        return (np.asarray(x, dtype=float) - self.reference_dose)[:, None]

    def growth(self, coef: ArrayLike) -> Growth:
        b = np.asarray(coef, dtype=float)[..., 0]
        if np.all(b <= 0):
            return Growth.bounded()
        return Growth("exp", np.maximum(b, 0.0))

    def describe(self) -> str:
        return f"RR = exp(slope * {minus('x', self.reference_dose)})"
