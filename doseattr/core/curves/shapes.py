"""Published fine-particle curve shapes with a threshold.

Both act on the dose above a counterfactual threshold ``cf``,
:math:`z = \\max(0, x - cf)`, so RR = 1 up to ``cf`` and the curve has a kink
there. The fixed shape settings and the published parameter values are
**from memory** in this project (see the methods guide): check them against
the papers' supplements before use.
"""

from __future__ import annotations

from typing import ClassVar, cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import CurveModel, FloatArray, Growth, minus, param
from doseattr.core.curves.logistic import expit
from doseattr.errors import ModelError


def _positive(value: float, what: str, model: str) -> float:
    value = float(value)
    if not (np.isfinite(value) and value > 0):
        raise ModelError(f"{model}: setting '{what}' must be positive, got {value}")
    return value


class _ThresholdShape(CurveModel):
    """Shared threshold handling: ``z = max(0, x - threshold)``."""

    fits_table = False
    shape_settings: ClassVar[tuple[str, ...] | None] = ()
    dose_settings: ClassVar[tuple[str, ...]] = ("threshold",)

    def __init__(self, *, reference_dose: float = 0.0, threshold: float = 0.0) -> None:
        super().__init__(reference_dose=reference_dose)
        self.threshold = float(threshold)
        if not np.isfinite(self.threshold):
            raise ModelError(f"{self.name}: threshold must be a finite dose")

    def excess_dose(self, x: ArrayLike) -> FloatArray:
        return np.maximum(np.asarray(x, dtype=float) - self.threshold, 0.0)

    def kinks(self, coef: ArrayLike) -> FloatArray:
        return np.array([self.threshold])


class SaturatingExponential(_ThresholdShape):
    r"""Saturating exponential ("integrated exposure-response") shape.

    .. math:: RR(z) = 1 + \alpha\,\bigl(1 - e^{-\gamma z^{\delta}}\bigr),
              \qquad z = \max(0, x - cf)

    Burnett et al. (2014), Environ Health Perspect 122:397 (form from memory).
    ``log RR`` is taken relative to the reference dose. Coefficients
    ``(alpha, gamma, delta)`` with ``gamma > 0``, ``delta > 0`` and
    ``alpha > -1``; RR is bounded by ``1 + alpha``.
    """

    name = "saturating-exponential"
    linear = False
    param_names = ("alpha", "gamma", "delta")
    #: Box for nonlinear fitting (``scipy.optimize.least_squares`` bounds).
    bounds = ((-1.0 + 1e-9, 1e-12, 1e-6), (np.inf, np.inf, np.inf))

    def _log_rr_abs(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        a, g, d = param(coef, 0), param(coef, 1), param(coef, 2)
        saturation = -np.expm1(-g * self.excess_dose(x) ** d)
        return np.log1p(a * saturation)

    def log_rr(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        return self._log_rr_abs(x, coef) - self._log_rr_abs(np.array([self.reference_dose]), coef)

    def check(self, coef: ArrayLike) -> None:
        super().check(coef)
        c = np.asarray(coef, dtype=float).reshape(-1, 3)
        if np.any(c[:, 0] <= -1) or np.any(c[:, 1] <= 0) or np.any(c[:, 2] <= 0):
            raise ModelError("saturating-exponential: need alpha > -1, gamma > 0 and delta > 0")

    def growth(self, coef: ArrayLike) -> Growth:
        return Growth.bounded()

    def kinks(self, coef: ArrayLike) -> FloatArray:
        """The threshold and a mesh graded towards it, ``cf (1 + 8^-j)``,
        j = -1..6 (out to 9 cf, so the panels beyond the finest ones also
        grow only eightfold from one to the next): ``z^delta`` is not smooth at the threshold (an infinite
        slope for ``delta < 1``, an infinite higher derivative for other
        non-integer ``delta``), and graded panels keep a fixed rule accurate
        there. With no threshold, ``x^delta`` is smooth on the log scale."""
        if self.threshold <= 0:
            return np.array([self.threshold])
        return self.threshold * (1.0 + np.concatenate([[0.0], 8.0 ** -np.arange(-1, 7)]))

    def start(self, x: FloatArray, y: FloatArray) -> FloatArray:
        """alpha twice the largest excess RR, delta 1, gamma so the curve is
        half saturated at the median excess dose (a heuristic start)."""
        alpha = max(2.0 * float(np.expm1(np.max(y))), 0.1)
        z = float(np.median(self.excess_dose(x)))
        return np.array([alpha, np.log(2.0) / max(z, 1e-8), 1.0])

    def describe(self) -> str:
        return f"RR = 1 + alpha (1 - exp(-gamma z^delta)), {_z(self.threshold)}"


class LogLogisticWeighted(_ThresholdShape):
    r"""Logistic-weighted log-linear-in-log-dose shape.

    .. math:: \log RR(z) = \theta\,
              \frac{\log(z/\alpha + 1)}{1 + \exp(-(z - \mu)/\nu)},
              \qquad z = \max(0, x - cf)

    Burnett et al. (2018), PNAS 115:9592 (form from memory). Settings
    ``scale`` (alpha), ``midpoint`` (mu), ``spread`` (nu) and ``threshold``
    (cf) are fixed; ``theta`` is the uncertain coefficient, so the model is
    linear with basis :math:`w(z)\log(z/\alpha + 1) - w(z_{ref})\log(z_{ref}/\alpha + 1)`.
    For large ``z`` the weight tends to 1 and RR grows like
    :math:`(z/\alpha)^\theta` (power ``theta``).
    """

    name = "log-logistic-weighted"
    linear = True
    param_names = ("theta",)
    shape_settings = ("scale", "midpoint", "spread")
    dose_settings = ("threshold", "scale", "midpoint", "spread")

    def __init__(self, *, reference_dose: float = 0.0, threshold: float = 0.0,
                 scale: float, midpoint: float, spread: float) -> None:
        super().__init__(reference_dose=reference_dose, threshold=threshold)
        self.scale = _positive(scale, "scale", self.name)
        self.spread = _positive(spread, "spread", self.name)
        self.midpoint = float(midpoint)

    def _shape(self, x: ArrayLike) -> FloatArray:
        z = self.excess_dose(x)
        return cast(FloatArray, expit((z - self.midpoint) / self.spread) * np.log1p(z / self.scale))

    def basis(self, x: ArrayLike) -> FloatArray:
        return (self._shape(x) - self._shape(self.reference_dose))[..., None]

    def log_rr(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        return param(coef, 0) * (self._shape(x) - self._shape(self.reference_dose))

    def growth(self, coef: ArrayLike) -> Growth:
        theta = np.asarray(coef, dtype=float)[..., 0]
        if np.all(theta <= 0):
            return Growth.bounded()
        return Growth("power", np.maximum(theta, 0.0))

    def describe(self) -> str:
        return (f"log RR = theta log(z/{self.scale:g} + 1) / (1 + exp(-{minus('z', self.midpoint)}"
                f"/{self.spread:g})), {_z(self.threshold)}")


def _z(threshold: float) -> str:
    """``"z = max(0, x - t)"``; ``"z = x"`` for a threshold of 0 (exposures
    are not negative)."""
    return "z = x" if threshold == 0 else f"z = max(0, {minus('x', threshold, bracket=False)})"
