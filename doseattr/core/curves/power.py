"""Power relative-risk model: RR = ((x + c) / (x_ref + c))^b."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import CurveModel, FloatArray, Growth, param
from doseattr.errors import ModelError


class Power(CurveModel):
    r"""Power model with an optional dose offset ``c``.

    .. math:: RR(x) = \left(\frac{x + c}{x_{ref} + c}\right)^{b}, \qquad
              \log RR(x) = b \log\frac{x + c}{x_{ref} + c}

    With ``c = 1`` and ``x_ref = 0`` this is the form ``(1 + x)^b`` used by
    Park et al. (2002, Occup Environ Med 59:36, Table 1). Linear in ``b``
    with basis ``log((x + c)/(x_ref + c))``. RR grows like ``x^b``.
    """

    name = "power"
    linear = True
    param_names = ("exponent",)

    def __init__(self, *, reference_dose: float = 0.0, offset: float = 0.0) -> None:
        super().__init__(reference_dose=reference_dose)
        self.offset = float(offset)
        if not np.isfinite(self.offset) or self.reference_dose + self.offset <= 0:
            raise ModelError(
                f"power model: reference dose + offset must be positive, got "
                f"{self.reference_dose:g} + {self.offset:g}; set an offset such as 1 "
                f"(RR = ((x + 1)/(x_ref + 1))^b)")

    def _log_ratio(self, x: ArrayLike) -> FloatArray:
        shifted = np.asarray(x, dtype=float) + self.offset
        if np.any(shifted <= 0):
            raise ModelError(
                f"power model: dose + offset must be positive, got dose {np.min(x):g} with "
                f"offset {self.offset:g}; set an offset (e.g. 1) or a positive minimum dose")
        return np.log(shifted / (self.reference_dose + self.offset))

    def log_rr(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        return param(coef, 0) * self._log_ratio(x)

    def basis(self, x: ArrayLike) -> FloatArray:
        return self._log_ratio(x)[:, None]

    def growth(self, coef: ArrayLike) -> Growth:
        b = np.asarray(coef, dtype=float)[..., 0]
        if np.all(b <= 0):
            return Growth.bounded()
        return Growth("power", np.maximum(b, 0.0))

    def check_doses(self, coef: ArrayLike, doses: ArrayLike) -> None:
        """Raise :class:`ModelError` if some dose + offset is not positive."""
        self._log_ratio(doses)

    def describe(self) -> str:
        c, r = self.offset, self.reference_dose
        top = "x" if c == 0 else f"(x + {c:g})"
        return f"RR = ({top} / {r + c:g})^exponent"
