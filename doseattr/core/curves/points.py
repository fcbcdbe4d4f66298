"""Curves given as points: log RR linearly interpolated between doses.

For curves published as tables of (dose, RR, CI) or as sampled draws on a
dose grid. Coefficients are the log RRs at the points, so the model is
linear with hat-function basis (piecewise-linear interpolation weights).
"""

from __future__ import annotations

from typing import Literal, cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import Curve, CurveModel, FloatArray, Growth
from doseattr.core.curves.covariance import var_log_rr_from_ci
from doseattr.core.curves.fit import check_curve, dose_range
from doseattr.errors import ModelError

Beyond = Literal["flat", "refuse"]


class PointsCurve(CurveModel):
    r"""Piecewise-linear log RR through points :math:`(d_k, c_k)`.

    .. math:: \log RR(x) = \sum_k c_k\,(h_k(x) - h_k(x_{ref})),

    :math:`h_k` the hat function equal to 1 at :math:`d_k` and 0 at the other
    points (``numpy.interp`` of the unit vectors). Below the first point the
    curve is flat; beyond the last point it is flat (``beyond="flat"``) or
    refused (``beyond="refuse"``, :class:`ModelError`). Kinks at every point.
    The reference dose must lie within the points.

    The hat functions sum to one, so data identify only differences of the
    coefficients: the model is for curves entered as points
    (:func:`points_curve`, :func:`curve_from_draws`), not for fitting.
    """

    fits_table = False

    name = "points"
    linear = True

    def __init__(self, *, reference_dose: float = 0.0, points: ArrayLike,
                 beyond: Beyond = "flat") -> None:
        super().__init__(reference_dose=reference_dose)
        d = np.asarray(points, dtype=float)
        if d.ndim != 1 or d.size < 2 or not np.all(np.isfinite(d)) or np.any(np.diff(d) <= 0):
            raise ModelError(f"curve points need at least 2 increasing doses, got {points!s}")
        if not d[0] <= self.reference_dose <= d[-1]:
            raise ModelError(f"reference dose {self.reference_dose:g} lies outside the curve's "
                             f"points {d[0]:g} to {d[-1]:g}")
        if beyond not in ("flat", "refuse"):
            raise ModelError(f"beyond must be 'flat' or 'refuse', got {beyond!r}")
        self.points, self.beyond = d, beyond

    @property
    def param_names(self) -> tuple[str, ...]:
        return tuple(f"log_rr_at_{d:g}" for d in self.points)

    def _hats(self, x: ArrayLike) -> FloatArray:
        """Interpolation weights, shape ``x.shape + (K,)``."""
        x = np.asarray(x, dtype=float)
        if self.beyond == "refuse" and np.any(x > self.points[-1]):
            raise ModelError(f"the curve is given only up to dose {self.points[-1]:g}; "
                             f"set max_dose to at most that or allow a flat extension")
        eye = np.eye(self.points.size)
        return cast(FloatArray, np.stack([np.interp(x, self.points, e) for e in eye], axis=-1))

    def basis(self, x: ArrayLike) -> FloatArray:
        return self._hats(x) - self._hats(self.reference_dose)

    def log_rr(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        return cast(FloatArray, np.einsum("...nk,...k->...n", self.basis(x),
                                          np.asarray(coef, dtype=float)))

    def growth(self, coef: ArrayLike) -> Growth:
        return Growth.bounded()

    def kinks(self, coef: ArrayLike) -> FloatArray:
        return self.points.copy()

    def check_doses(self, coef: ArrayLike, doses: ArrayLike) -> None:
        """In ``"refuse"`` mode, raise if the curve is used beyond its last point."""
        self._hats(doses)

    def describe(self) -> str:
        return (f"log RR interpolated linearly between {self.points.size} points "
                f"({self.points[0]:g} to {self.points[-1]:g}), {self.beyond} beyond")


def points_curve(doses: ArrayLike, rr: ArrayLike, lower: ArrayLike | None = None,
                 upper: ArrayLike | None = None, *, reference_dose: float = 0.0,
                 level: float = 0.95, beyond: Beyond = "flat",
                 max_dose: float | None = None) -> Curve:
    r"""A curve from a table of (dose, RR, CI).

    Coefficients are :math:`\log RR_k`; their covariance is diagonal with
    :math:`((\log hi_k - \log lo_k)/(2 z))^2` (CIs missing, e.g. at the
    reference point, give zero variance). Correlation between points is not
    published and is set to zero; a note says so.
    """
    d = np.asarray(doses, dtype=float)
    model = PointsCurve(reference_dose=reference_dose, points=d, beyond=beyond)
    rr = np.asarray(rr, dtype=float)
    if rr.shape != d.shape or not np.all(np.isfinite(rr) & (rr > 0)):
        raise ModelError("curve points need one positive RR per dose")
    _require_unit_rr_at_reference(model, rr)
    var = np.zeros(d.size)
    notes: tuple[str, ...] = ()
    if lower is not None and upper is not None:
        lo, hi = np.asarray(lower, dtype=float), np.asarray(upper, dtype=float)
        has = np.isfinite(lo) & np.isfinite(hi)
        var[has] = var_log_rr_from_ci(rr[has], lo[has], hi[has], level)
        notes = ("pointwise CIs treated as independent between points "
                 "(their correlation is not given)",)
    coef = np.log(rr)
    check_curve(model, coef, dose_range(model, d, d[-1], max_dose))
    return Curve(model, coef, np.diag(var), max_dose=max_dose, data_max=float(d[-1]),
                 source="entered", notes=notes)


def curve_from_draws(doses: ArrayLike, rr_draws: ArrayLike, *, reference_dose: float = 0.0,
                     beyond: Beyond = "flat", max_dose: float | None = None) -> Curve:
    """A curve from RR draws ``(D, K)`` on a dose grid ``(K,)``.

    ``coef`` is the log of the pointwise median RR, ``Curve.draws`` the log
    draws (used as they are by the uncertainty analysis), ``cov`` their
    sample covariance (``numpy.cov``).
    """
    d = np.asarray(doses, dtype=float)
    model = PointsCurve(reference_dose=reference_dose, points=d, beyond=beyond)
    rr = np.asarray(rr_draws, dtype=float)
    if rr.ndim != 2 or rr.shape[1] != d.size or rr.shape[0] < 2:
        raise ModelError(f"RR draws must be (draws, {d.size} doses) with at least 2 draws, "
                         f"got {rr.shape}")
    if not np.all(np.isfinite(rr) & (rr > 0)):
        raise ModelError("RR draws must be positive numbers")
    coef, log_draws = np.log(np.median(rr, axis=0)), np.log(rr)
    check_curve(model, coef, dose_range(model, d, d[-1], max_dose))
    return Curve(model, coef, np.atleast_2d(np.cov(log_draws, rowvar=False)),
                 max_dose=max_dose, data_max=float(d[-1]), source="entered", draws=log_draws)


def _require_unit_rr_at_reference(model: PointsCurve, rr: FloatArray) -> None:
    at_ref = np.flatnonzero(model.points == model.reference_dose)
    if at_ref.size and not np.isclose(rr[at_ref[0]], 1.0, rtol=0, atol=1e-9):
        raise ModelError(f"the RR at the reference dose {model.reference_dose:g} must be 1, "
                         f"got {rr[at_ref[0]]:g}")
