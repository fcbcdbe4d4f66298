"""The contract every relative-risk curve model follows.

A model is mostly declared: its parameter names, the log relative risk as a
function of dose and coefficients, how fast it grows in the upper tail, and
where it has kinks. Fitting (:mod:`doseattr.core.curves.fit`), evaluation with
a flat extension beyond ``max_dose``, and pointwise intervals are shared.

Broadcasting convention used throughout the core
------------------------------------------------
``coef`` has shape ``(p,)`` for one curve or ``(D, p)`` for ``D`` draws.
``x`` has shape ``(N,)`` (shared doses) or ``(D, N)`` (doses per draw).
``log_rr(x, coef)`` returns shape ``(N,)`` for one curve and ``(D, N)``
for draws. Models read parameter ``k`` as ``coef[..., k, None]``, which
broadcasts against both forms of ``x``.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from typing import Any, ClassVar, Literal, cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.errors import ModelError

FloatArray = NDArray[np.float64]
GrowthKind = Literal["bounded", "power", "exp"]


@dataclass(frozen=True)
class Growth:
    """Upper-tail behaviour of RR(x) as x grows without bound.

    ``kind == "power"``: RR(x) grows no faster than C x**rate.
    ``kind == "exp"``: RR(x) grows no faster than C exp(rate * x).
    ``kind == "bounded"``: RR(x) stays below a constant; ``rate`` is zero.
    ``rate`` has shape ``(D,)`` (one value per draw) or ``()``.
    The integration engine uses it to place its upper limit and to refuse
    expectations that diverge.
    """

    kind: GrowthKind
    rate: FloatArray

    @staticmethod
    def bounded() -> Growth:
        return Growth("bounded", np.zeros(()))


def param(coef: ArrayLike, k: int) -> FloatArray:
    """Parameter ``k`` of ``coef`` shaped to broadcast against doses."""
    return np.asarray(coef, dtype=float)[..., k, None]


class CurveModel(ABC):
    """A relative-risk model: log RR(x) relative to a reference dose.

    Subclasses set ``name`` and ``param_names`` and write :meth:`log_rr`,
    :meth:`growth`; linear-in-coefficient models also write :meth:`basis`,
    which lets the fitter use closed-form generalized least squares.
    Instances are immutable: they hold the reference dose and any fixed
    settings (offset, knots), never fitted values.
    """

    name: ClassVar[str]
    linear: ClassVar[bool] = False
    #: Whether the model can be fitted to a study's bands (the published
    #: shapes and the curve given as points are entered, not fitted).
    fits_table: ClassVar[bool] = True
    #: A published shape entered with its coefficients: the fixed settings
    #: it requires (beside the optional ``threshold``).
    shape_settings: ClassVar[tuple[str, ...] | None] = None
    #: Fixed settings that are doses (they scale with a change of unit).
    dose_settings: ClassVar[tuple[str, ...]] = ()

    def __init__(self, *, reference_dose: float = 0.0) -> None:
        self.reference_dose = float(reference_dose)

    @property
    @abstractmethod
    def param_names(self) -> tuple[str, ...]:
        """Names of the coefficients, in order."""

    @abstractmethod
    def log_rr(self, x: ArrayLike, coef: ArrayLike) -> FloatArray:
        """log RR(x) relative to ``reference_dose``; zero there."""

    def basis(self, x: ArrayLike) -> FloatArray:
        """Design matrix ``(N, p)`` with ``log_rr(x, b) == basis(x) @ b``.

        Only for models with ``linear = True``.
        """
        raise NotImplementedError(f"{self.name} is not linear in its coefficients")

    @abstractmethod
    def growth(self, coef: ArrayLike) -> Growth:
        """Upper-tail growth of RR for these coefficients."""

    def kinks(self, coef: ArrayLike) -> FloatArray:
        """Doses where log RR is not smooth (knots, thresholds).

        Shape ``(K,)`` shared by all draws, or ``(D, K)``. The integration
        engine splits its panels there. Default: none.
        """
        return np.zeros((0,))

    def check(self, coef: ArrayLike) -> None:
        """Raise :class:`ModelError` if ``coef`` gives no valid curve."""
        coef = np.asarray(coef, dtype=float)
        if not np.all(np.isfinite(coef)):
            raise ModelError(f"{self.name}: coefficients must be finite, got {coef}")

    def start(self, x: FloatArray, y: FloatArray) -> FloatArray:
        """Starting values for nonlinear fitting (non-linear models only)."""
        return np.zeros(len(self.param_names))

    def describe(self) -> str:
        """One line with the formula, for reports."""
        return self.name


def minus(symbol: str, value: float, *, bracket: bool = True) -> str:
    """``"(x - 5)"`` for a formula, or ``"x"`` alone when ``value`` is 0
    (never ``x - 0``); without brackets when ``bracket`` is false."""
    if value == 0:
        return symbol
    text = f"{symbol} - {value:g}" if value > 0 else f"{symbol} + {-value:g}"
    return f"({text})" if bracket else text


@dataclass(frozen=True)
class CurveFit:
    """Diagnostics of a curve fitted to category-level estimates.

    Attributes
    ----------
    doses
        Assigned dose of each non-reference band, shape ``(n,)``.
    log_rr
        Reported log RR of each non-reference band.
    log_rr_covariance
        The covariance of ``log_rr`` that the fit used ``(n, n)``.
    covariance_method
        ``"counts"``, ``"effective-counts"`` or ``"independent"``.
    q, df, p_value
        Goodness-of-fit statistic ``Q = r' V^-1 r`` with ``df = n - p``
        and its chi-square p-value (NaN-free: ``p_value`` is ``None`` when
        ``df == 0``).
    """

    doses: FloatArray
    log_rr: FloatArray
    log_rr_covariance: FloatArray
    fitted_log_rr: FloatArray
    covariance_method: str
    q: float
    df: int
    p_value: float | None
    warnings: tuple[str, ...] = ()
    extra: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Curve:
    """A relative-risk curve ready for attribution.

    Attributes
    ----------
    model
        The :class:`CurveModel`.
    coef, cov
        Coefficient estimates ``(p,)`` and their covariance ``(p, p)``.
    max_dose
        RR is held at RR(max_dose) beyond this dose; ``None`` extends the
        model formula without limit.
    data_max
        Highest dose supported by data (assigned dose of the top band, or
        the published range); beyond it results are extrapolation.
    source
        ``"fitted"`` or ``"entered"``.
    fit
        Fit diagnostics when fitted from category-level estimates.
    draws
        Optional explicit coefficient draws ``(D, p)`` (curves supplied as
        sampled draws); used instead of a normal approximation.
    """

    model: CurveModel
    coef: FloatArray
    cov: FloatArray
    max_dose: float | None = None
    data_max: float | None = None
    source: str = "entered"
    fit: CurveFit | None = None
    draws: FloatArray | None = None
    notes: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        p = len(self.model.param_names)
        assert np.shape(self.coef) == (p,), (np.shape(self.coef), p)
        assert np.shape(self.cov) == (p, p), np.shape(self.cov)

    def log_rr(self, x: ArrayLike, coef: ArrayLike | None = None) -> FloatArray:
        """log RR with the flat extension beyond ``max_dose`` applied."""
        x = np.asarray(x, dtype=float)
        if self.max_dose is not None:
            x = np.minimum(x, self.max_dose)
        return self.model.log_rr(x, self.coef if coef is None else coef)

    def rr(self, x: ArrayLike, coef: ArrayLike | None = None) -> FloatArray:
        return np.exp(self.log_rr(x, coef))

    def growth(self, coef: ArrayLike | None = None) -> Growth:
        if self.max_dose is not None:
            return Growth.bounded()
        return self.model.growth(self.coef if coef is None else coef)

    def kinks(self, coef: ArrayLike | None = None) -> FloatArray:
        k = np.asarray(self.model.kinks(self.coef if coef is None else coef), dtype=float)
        if self.max_dose is None:
            return k
        extra = np.full(k.shape[:-1] + (1,), self.max_dose)
        return np.concatenate([k, extra], axis=-1)

    def log_rr_se(self, x: ArrayLike, step: float = 1e-6) -> FloatArray:
        """Delta-method standard error of log RR(x) (central differences)."""
        x = np.atleast_1d(np.asarray(x, dtype=float))
        p = len(self.coef)
        grad = np.empty((x.size, p))
        for k in range(p):
            h = step * max(1.0, abs(self.coef[k]))
            up, dn = self.coef.copy(), self.coef.copy()
            up[k] += h
            dn[k] -= h
            grad[:, k] = (self.log_rr(x, up) - self.log_rr(x, dn)) / (2 * h)
        var = np.einsum("ij,jk,ik->i", grad, self.cov, grad)
        return cast(FloatArray, np.sqrt(np.maximum(var, 0.0)))

    def rr_interval(self, x: ArrayLike, level: float = 0.95) -> tuple[FloatArray, FloatArray, FloatArray]:
        """RR(x) with a pointwise Wald interval on the log scale."""
        from scipy.special import ndtri  # scipy.stats.norm.ppf without scipy.stats

        z = ndtri(0.5 + level / 2)
        lr = self.log_rr(x)
        se = self.log_rr_se(x)
        return np.exp(lr), np.exp(lr - z * se), np.exp(lr + z * se)


def as_coef_draws(coef: ArrayLike) -> FloatArray:
    """Return ``coef`` as a 2-D ``(D, p)`` array."""
    coef = np.asarray(coef, dtype=float)
    return coef[None, :] if coef.ndim == 1 else coef


def require_positive(value: float, what: str) -> None:
    if not (np.isfinite(value) and value > 0):
        raise ModelError(f"{what} must be a positive number, got {value}")
