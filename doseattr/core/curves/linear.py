"""Linear excess relative-risk model: RR = 1 + b (x - x_ref)."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import CurveModel, FloatArray, Growth, minus, param
from doseattr.errors import ModelError

#: Smallest RR the model evaluates to; below it the argument of log1p is
#: clipped so that log RR stays finite. :meth:`LinearExcess.check_doses` refuses
#: coefficients that reach it over the doses in use.
RR_FLOOR = float(np.finfo(float).eps)


class LinearExcess(CurveModel):
    r"""Linear excess relative risk (ERR) model.

    .. math:: RR(x) = 1 + b\,(x - x_{ref}), \qquad
              \log RR(x) = \operatorname{log1p}\bigl(b\,(x - x_{ref})\bigr)

    ``b`` is the excess relative risk per unit dose (e.g. Darby et al. 2005,
    BMJ 330:223, for residential radon). Not linear on the log scale, so it
    is fitted by nonlinear GLS of log RR. RR grows like ``x`` (power 1) for
    ``b > 0``. For ``b < 0`` RR reaches 0 at ``x_ref - 1/b``; there the
    argument is clipped at ``RR_FLOOR`` and :meth:`check_doses` refuses the range.
    """

    name = "linear"
    linear = False
    param_names = ("slope",)

    def excess(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        """``RR(x) - 1 = b (x - x_ref)`` (unclipped; ``inf`` where it passes
        the float range, which the expectations refuse)."""
        with np.errstate(over="ignore"):
            return param(coef, 0) * (np.asarray(x, dtype=float) - self.reference_dose)

    def log_rr(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        return np.log1p(np.maximum(self.excess(x, coef), RR_FLOOR - 1.0))

    def growth(self, coef: ArrayLike) -> Growth:
        b = np.asarray(coef, dtype=float)[..., 0]
        if np.all(b <= 0):
            return Growth.bounded()
        return Growth("power", np.where(b > 0, 1.0, 0.0))

    def check_doses(self, coef: ArrayLike, doses: ArrayLike) -> None:
        """Raise :class:`ModelError` if RR <= 0 anywhere over ``doses`` (one curve).

        ``doses`` may contain ``inf`` (formula extended without limit).
        """
        b = float(np.ravel(coef)[0])
        x = np.atleast_1d(np.asarray(doses, dtype=float)) - self.reference_dose
        with np.errstate(over="ignore", invalid="ignore"):
            lowest_excess = b * x.max() if b < 0 else b * x.min() if b > 0 else 0.0
        if 1.0 + lowest_excess <= RR_FLOOR:
            raise ModelError(
                f"linear model: RR = 1 + {b:.4g} (x - {self.reference_dose:g}) is not positive "
                f"over doses {x.min() + self.reference_dose:g} to "
                f"{x.max() + self.reference_dose:g}; it reaches 0 at "
                f"{self.reference_dose - 1.0 / b:g}: set max_dose below that or use the "
                f"log-linear model")

    def start(self, x: FloatArray, y: FloatArray) -> FloatArray:
        """Least-squares slope of ``exp(y) - 1`` on ``x - x_ref`` (no intercept)."""
        d = np.asarray(x, dtype=float) - self.reference_dose
        return np.array([np.dot(d, np.expm1(y)) / np.dot(d, d)])

    def describe(self) -> str:
        return f"RR = 1 + slope * {minus('x', self.reference_dose)}"
