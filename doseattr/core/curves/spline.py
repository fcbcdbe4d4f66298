"""Restricted cubic spline dose-response through the reference dose."""

from __future__ import annotations

from typing import cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.curves.base import Curve, CurveModel, FloatArray, Growth
from doseattr.errors import ModelError

#: Default knot positions as quantiles of the assigned doses, by number of
#: knots (Harrell, Regression Modeling Strategies, 2nd ed. 2015, section 2.4.5).
HARRELL_QUANTILES: dict[int, tuple[float, ...]] = {
    3: (0.10, 0.50, 0.90),
    4: (0.05, 0.35, 0.65, 0.95),
    5: (0.05, 0.275, 0.50, 0.725, 0.95),
}


def default_knots(doses: ArrayLike, n_knots: int = 3) -> FloatArray:
    """Knots at Harrell's default quantiles of ``doses`` (``numpy.quantile``,
    linear interpolation). Raises :class:`ModelError` if they are not distinct."""
    if n_knots not in HARRELL_QUANTILES:
        raise ModelError(f"default knots exist for 3, 4 or 5 knots, not {n_knots}; "
                         f"give the knots explicitly")
    knots: FloatArray = np.quantile(np.asarray(doses, dtype=float), HARRELL_QUANTILES[n_knots])
    if np.any(np.diff(knots) <= 0):
        raise ModelError(f"the doses {np.unique(doses)} give repeated knots {knots}; "
                         f"use fewer knots or give them explicitly")
    return knots


#: Largest knot span whose cube (and the squared span dividing it) stays a
#: float: the cube root of the largest float, about 5.6e102.
MAX_KNOT_SPAN = float(np.finfo(float).max) ** (1.0 / 3.0) / 10.0


def _cube_plus(z: FloatArray) -> FloatArray:
    return cast(FloatArray, np.maximum(z, 0.0) ** 3)


class RestrictedCubicSpline(CurveModel):
    r"""Restricted (natural) cubic spline in dose, log RR = 0 at the reference.

    With knots :math:`t_1 < \dots < t_k` (Harrell 2015, section 2.4.5, with his
    normalisation by :math:`(t_k - t_1)^2`):

    .. math::
        s_1(x) = x, \qquad
        s_{j+1}(x) = \frac{(x - t_j)_+^3
          - (x - t_{k-1})_+^3 \frac{t_k - t_j}{t_k - t_{k-1}}
          + (x - t_k)_+^3 \frac{t_{k-1} - t_j}{t_k - t_{k-1}}}{(t_k - t_1)^2},
        \quad j = 1, \dots, k - 2

    and :math:`\log RR(x) = \sum_j b_j\,(s_j(x) - s_j(x_{ref}))`. The curve is
    linear below :math:`t_1` and above :math:`t_k`; above :math:`t_k` it is
    evaluated as its value at :math:`t_k` plus the tail slope
    :math:`b_1 + \sum_j b_{j+1}\,3 (t_k - t_j)(t_{k-1} - t_j)/(t_k - t_1)^2`
    times :math:`x - t_k`, which avoids cancelling large cubes. RR therefore
    grows exponentially with the tail slope.
    """

    name = "spline"
    linear = True

    def __init__(self, *, reference_dose: float = 0.0, knots: ArrayLike) -> None:
        super().__init__(reference_dose=reference_dose)
        t = np.asarray(knots, dtype=float)
        if t.ndim != 1 or t.size < 3 or not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
            raise ModelError(f"spline knots must be at least 3 increasing numbers, got {knots!s}")
        if np.max(np.abs(t - t[0])) >= MAX_KNOT_SPAN:
            raise ModelError(f"spline knots span {t[0]:g} to {t[-1]:g}; the basis uses cubes of "
                             f"dose differences, which overflow beyond a span of "
                             f"{MAX_KNOT_SPAN:.3g}: check the doses' unit")
        self.knots = t

    @property
    def param_names(self) -> tuple[str, ...]:
        return ("linear",) + tuple(f"cubic{j}" for j in range(1, self.knots.size - 1))

    @property
    def nonlinear_index(self) -> NDArray[np.intp]:
        """Indices of the coefficients that make the curve non-linear."""
        return np.arange(1, self.knots.size - 1)

    def _tail_derivative(self) -> FloatArray:
        t = self.knots
        return cast(FloatArray,
                    np.r_[1.0, 3.0 * (t[-1] - t[:-2]) * (t[-2] - t[:-2]) / (t[-1] - t[0]) ** 2])

    def _raw_basis(self, x: ArrayLike) -> FloatArray:
        """``(s_1(x), ..., s_{k-1}(x))`` with shape ``x.shape + (k - 1,)``."""
        t = self.knots
        x = np.asarray(x, dtype=float)[..., None]
        xc = np.minimum(x, t[-1])
        tj, span = t[:-2], t[-1] - t[-2]
        cubic = (_cube_plus(xc - tj) - _cube_plus(xc - t[-2]) * (t[-1] - tj) / span
                 + _cube_plus(xc - t[-1]) * (t[-2] - tj) / span) / (t[-1] - t[0]) ** 2
        tail = np.maximum(x - t[-1], 0.0) * self._tail_derivative()
        return cast(FloatArray, np.concatenate([xc, cubic], axis=-1) + tail)

    def basis(self, x: ArrayLike) -> FloatArray:
        return self._raw_basis(x) - self._raw_basis(self.reference_dose)

    def log_rr(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        return cast(FloatArray, np.einsum("...nk,...k->...n", self.basis(x),
                                          np.asarray(coef, dtype=float)))

    def tail_slope(self, coef: ArrayLike) -> FloatArray:
        """d log RR / dx beyond the last knot, shape ``()`` or ``(D,)``."""
        return cast(FloatArray, np.asarray(coef, dtype=float) @ self._tail_derivative())

    def growth(self, coef: ArrayLike) -> Growth:
        slope = self.tail_slope(coef)
        if np.all(slope <= 0):
            return Growth.bounded()
        return Growth("exp", np.maximum(slope, 0.0))

    def kinks(self, coef: ArrayLike) -> FloatArray:
        return self.knots.copy()

    def describe(self) -> str:
        knots = ", ".join(f"{k:g}" for k in self.knots)
        return f"restricted cubic spline in dose, knots {knots}, RR = 1 at {self.reference_dose:g}"


def nonlinearity_test(curve: Curve) -> tuple[float, int, float]:
    r"""Wald test that all non-linear spline coefficients are zero.

    .. math:: W = b_{NL}' \, \operatorname{cov}(b_{NL})^{-1} b_{NL}
              \sim \chi^2_{k-2}

    (Wald test of linearity; Harrell 2015, section 2.4.5). Returns
    ``(W, df, p)``.
    """
    from scipy.special import chdtrc  # scipy.stats.chi2.sf without scipy.stats

    model = curve.model
    if not isinstance(model, RestrictedCubicSpline):
        raise ModelError(f"the non-linearity test needs a spline curve, not {model.name}")
    idx = model.nonlinear_index
    b, cov = curve.coef[idx], curve.cov[np.ix_(idx, idx)]
    try:
        w = float(b @ np.linalg.solve(cov, b))
    except np.linalg.LinAlgError:
        raise ModelError("the spline coefficients' covariance is singular; "
                         "no non-linearity test") from None
    df = int(idx.size)
    return w, df, float(chdtrc(df, w))
