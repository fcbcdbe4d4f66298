"""The contract every exposure family follows.

A family is declared by its public parameter names, a map to and from an
unconstrained internal vector (logs of positive parameters), and a handful
of formulas vectorised over parameter draws. The integration engine works on
the log-exposure scale ``t = ln x``, so every family gives the log density
of ``T = ln X``; it also gives breakpoints in ``t`` that cover the body and
both tails, and the upper limit needed when the integrand grows.

Broadcasting convention: ``params`` has shape ``(k,)`` or ``(D, k)``;
parameter ``j`` is read as ``params[..., j, None]`` (see :func:`pcol`) and
broadcasts against ``t`` or ``x`` of shape ``(N,)`` or ``(D, N)``.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar, TypeAlias, cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.curves.base import Growth
from doseattr.errors import ModelError

FloatArray = NDArray[np.float64]

#: Standard-normal points used as log-scale breakpoints; the outer ones
#: leave less than 1e-17 of probability outside.
Z_BREAKS = np.array([-8.6, -6.5, -4.8, -3.4, -2.2, -1.1, 0.0, 1.1, 2.2, 3.4, 4.8, 6.5, 8.6])


def log1p_square(x: float) -> float:
    r""":math:`\ln(1 + x^2)` without overflow of :math:`x^2` (for ``x`` past
    about 1.3e154): :math:`2 \ln x + \ln(1 + x^{-2})` there."""
    x = abs(float(x))
    if x < 1e150:
        return float(np.log1p(x * x))
    return float(2.0 * np.log(x) + np.log1p((1.0 / x) ** 2))


#: Narrowest log-scale spread (as a multiple of |ln median|) the fixed
#: quadrature resolves: nodes on t = ln x carry rounding of about
#: 2.2e-16 |ln median|, which must stay far below the spread (the engine
#: checks the recovered probability to 1e-9).
MIN_RELATIVE_LOG_SPREAD = 1e-6


def check_usable(fam: Family, params: FloatArray,
                 hint: str = "give a smaller spread or a smaller scale") -> None:
    r"""Refuse parameters the numerics cannot carry: a mean beyond the float
    range (about 1.8e308), or a spread of ``ln X`` too narrow to resolve in
    double precision (below 1e-6 x the magnitude of its centre: ``ln gsd``
    against ``ln gm`` for the lognormal; for gamma and Weibull the SD of
    ``ln X``, :math:`\sqrt{\psi_1(k)}` and :math:`\pi / (k\sqrt 6)`
    (Johnson, Kotz & Balakrishnan 1994, from memory), against ``ln mean``)."""
    with np.errstate(over="ignore", invalid="ignore"):
        mean = float(np.asarray(fam.mean(params)))
    if not np.isfinite(mean):
        shown = ", ".join(f"{n} {v:.6g}" for n, v in zip(fam.param_names, params))
        raise ModelError(f"{fam.name} with {shown} has a mean beyond the float range (about "
                         f"1.8e308); {hint}")
    problem = fam.narrow_spread_problem(params, mean)
    if problem is not None:
        raise ModelError(problem)


def pool(values: FloatArray, weights: FloatArray) -> tuple[FloatArray, FloatArray]:
    """The distinct ``values`` (sorted) and the summed ``weights`` of each:
    equal values contribute identical likelihood terms, so one term with
    their total weight stands for them."""
    uniq, inverse = np.unique(values, return_inverse=True)
    summed = np.bincount(inverse.ravel(), weights=weights, minlength=uniq.size)
    return uniq, summed.astype(float)


def pcol(params: ArrayLike, j: int) -> FloatArray:
    """Parameter ``j`` of ``params`` shaped to broadcast against ``x``."""
    return np.asarray(params, dtype=float)[..., j, None]


class Family(ABC):
    """An exposure distribution family on (0, inf).

    Subclasses write the formulas; :class:`Exposure` and the fitters in
    :mod:`doseattr.core.exposure.fit` supply everything else.

    Besides ``name`` and ``param_names`` a family declares ``dose_params``,
    the public parameters in the exposure's unit, and ``bounds``, the open
    interval ``(lower, upper)`` each public parameter must lie in (what
    :meth:`check` enforces). A change of unit ``x -> c x`` is a scale
    transform: the family is closed under it, with the dose parameters
    multiplied by ``c`` and the others unchanged (:meth:`in_unit`).
    """

    name: ClassVar[str]
    param_names: ClassVar[tuple[str, ...]]
    dose_params: ClassVar[tuple[str, ...]]
    bounds: ClassVar[Mapping[str, tuple[float, float]]]

    def in_unit(self, params: ArrayLike, factor: float) -> FloatArray:
        """Public parameters of ``factor * X`` when ``params`` are those of
        ``X`` (the exposure in a unit ``factor`` times smaller): the dose
        parameters times ``factor``, the others as they are."""
        scale = np.array([factor if n in self.dose_params else 1.0 for n in self.param_names])
        return cast(FloatArray, np.asarray(params, dtype=float) * scale)

    # -- parameterisation -------------------------------------------------
    @abstractmethod
    def to_internal(self, params: ArrayLike) -> FloatArray:
        """Public parameters -> unconstrained vector (same shape)."""

    @abstractmethod
    def from_internal(self, theta: ArrayLike) -> FloatArray:
        """Unconstrained vector -> public parameters (same shape)."""

    @abstractmethod
    def check(self, params: ArrayLike) -> None:
        """Raise ModelError naming the parameter if ``params`` is invalid."""

    # -- distribution -----------------------------------------------------
    @abstractmethod
    def log_density_log(self, t: ArrayLike, params: ArrayLike) -> FloatArray:
        """log density of T = ln X at ``t``."""

    def logpdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray:
        """log density of X at ``x > 0``; ``-inf`` at ``x <= 0`` (the
        families put no mass on a point)."""
        x = np.asarray(x, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            lx = np.log(x)
            out = self.log_density_log(lx, params) - lx
        return np.where(x > 0, out, -np.inf)

    @abstractmethod
    def cdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray: ...

    @abstractmethod
    def sf(self, x: ArrayLike, params: ArrayLike) -> FloatArray: ...

    @abstractmethod
    def logcdf(self, x: ArrayLike, params: ArrayLike) -> FloatArray: ...

    @abstractmethod
    def logsf(self, x: ArrayLike, params: ArrayLike) -> FloatArray: ...

    @abstractmethod
    def ppf(self, q: ArrayLike, params: ArrayLike) -> FloatArray: ...

    @abstractmethod
    def mean(self, params: ArrayLike) -> FloatArray: ...

    @abstractmethod
    def log_sd(self, params: ArrayLike) -> float:
        """Standard deviation of ln X (one parameter vector)."""

    def narrow_spread_problem(self, params: ArrayLike, mean: float) -> str | None:
        """Why the spread of ln X is too narrow for double precision
        (below :data:`MIN_RELATIVE_LOG_SPREAD` x |ln mean|), or ``None``."""
        p = np.asarray(params, dtype=float)
        spread = self.log_sd(p)
        need = MIN_RELATIVE_LOG_SPREAD * abs(np.log(mean))
        if spread >= need:
            return None
        return (f"{self.name} with {self.param_names[0]} {float(p[0]):.6g} is too narrow for its "
                f"mean {mean:.6g}: the SD of ln X, {spread:.3g}, is below 1e-6 x |ln mean| = "
                f"{need:.3g}, which double precision cannot resolve; give a larger spread (a "
                f"smaller {self.param_names[0]}, a larger sd)")

    @abstractmethod
    def partial_mean(self, a: ArrayLike, b: ArrayLike, params: ArrayLike) -> FloatArray:
        """E[X; a < X <= b] (``b`` may be ``inf``)."""

    @abstractmethod
    def scipy(self, params: ArrayLike) -> Any:
        """The frozen ``scipy.stats`` distribution for one parameter vector."""

    @abstractmethod
    def from_moments(self, mean: float, sd: float) -> FloatArray:
        """Public parameters of the member with this mean and standard
        deviation (method of moments); ModelError if there is none."""

    # -- fitting support --------------------------------------------------
    def start(self, x: FloatArray, w: FloatArray) -> FloatArray:
        """Starting public parameters for maximum likelihood: the moment
        estimates from positive values ``x`` with weights ``w``."""
        mean = float(np.average(x, weights=w))
        sd = float(np.sqrt(np.average((x - mean) ** 2, weights=w)))
        if not sd > 0:
            raise ModelError(f"{self.name}: all values are equal ({mean:g}); "
                             "a spread is needed to fit a distribution")
        return self.from_moments(mean, sd)

    def closed_form_mle(self, x: FloatArray, w: FloatArray) -> FloatArray | None:
        """Weighted maximum-likelihood public parameters in closed form for
        fully observed ``x``, or ``None`` when the family has none."""
        return None

    def uncensored_mle(self, x: FloatArray, w: FloatArray) -> FloatArray | None:
        """Weighted maximum-likelihood public parameters of fully observed
        ``x`` found without a general search (closed form, or a
        one-dimensional root on sufficient statistics), or ``None``; by
        default :meth:`closed_form_mle`."""
        return self.closed_form_mle(x, w)

    def detect_summary(self, x: FloatArray, w: FloatArray) -> FloatArray | None:
        """Sufficient statistics of detected values ``x`` with weights ``w``
        for :meth:`summary_loglik`, or ``None`` when the family has none
        of fixed size (then the values themselves are used)."""
        return None

    def summary_loglik(self, summary: FloatArray, params: ArrayLike) -> tuple[float, FloatArray]:
        """The detects' weighted log-likelihood and its gradient in the
        internal parameters, from :meth:`detect_summary` (in constant time)."""
        raise NotImplementedError(f"{self.name} has no detect summary")

    def information_at_mle(self, x: FloatArray, w: FloatArray,
                           params: FloatArray) -> FloatArray | None:
        """Observed information of the internal parameters at the weighted
        MLE ``params`` of fully observed ``x`` in closed form, or ``None``
        (then it is differentiated numerically)."""
        return None

    def log_terms_scores(self, x: FloatArray, params: ArrayLike, *,
                         censored: bool) -> tuple[FloatArray, FloatArray]:
        r"""Each value's log-likelihood term, :math:`\ln f(x_i)` (or
        :math:`\ln F(x_i)` when ``censored``: ``x`` are detection limits),
        shape ``(n,)``, and its gradient with respect to the internal
        parameters, shape ``(n, p)``, in one pass over ``x``.

        This default differentiates centrally (step
        :math:`\epsilon^{1/3} \max(1, |\theta_j|)`); the families override
        it with the analytic derivatives."""
        term = self.logcdf if censored else self.logpdf
        theta = self.to_internal(params)
        steps = np.finfo(float).eps ** (1 / 3) * np.maximum(1.0, np.abs(theta))
        cols = []
        for j, h in enumerate(steps):
            e = np.zeros_like(theta)
            e[j] = h
            up, down = term(x, self.from_internal(theta + e)), term(x, self.from_internal(theta - e))
            cols.append((up - down) / (2 * h))
        return term(x, params), np.stack(cols, axis=1)

    # -- integration support ---------------------------------------------
    @abstractmethod
    def log_breaks(self, params: ArrayLike) -> FloatArray:
        """Sorted breakpoints in ``t = ln x``, shape ``(K,)`` or ``(D, K)``.

        The first and last leave less than about 1e-16 of probability
        outside; between them the log density is smooth on each panel.
        """

    @abstractmethod
    def tilted_log_breaks(self, params: ArrayLike, growth: Growth) -> FloatArray:
        """Breakpoints covering the mass of ``RR(x) f(x)`` for an RR that
        grows as ``growth`` says (power or exponential), same shape rule.

        For power or exponential growth the result is the sorted union of
        :meth:`log_breaks` and the breakpoints of the tilted distribution
        (density proportional to the growth bound times ``f``), so ``2K``
        columns for every draw, broadcast over per-draw rates; a draw with
        rate <= 0 repeats its own breakpoints (empty panels). For bounded
        growth it is :meth:`log_breaks` itself.

        Raises :class:`doseattr.errors.DivergenceError` when
        ``E[RR(X)]`` is infinite for some draw, saying why.
        """


class PositiveFamily(Family):
    """A family whose public parameters are all positive: the internal
    vector is their logarithms."""

    def to_internal(self, params: ArrayLike) -> FloatArray:
        return cast(FloatArray, np.log(np.asarray(params, dtype=float)))

    def from_internal(self, theta: ArrayLike) -> FloatArray:
        return cast(FloatArray, np.exp(np.asarray(theta, dtype=float)))

    def check(self, params: ArrayLike) -> None:
        p = np.asarray(params, dtype=float)
        for j, pname in enumerate(self.param_names):
            v = p[..., j]
            if not np.all(np.isfinite(v) & (v > 0)):
                raise ModelError(f"{self.name}: {pname} must be a positive number, got {v}")


@dataclass(frozen=True)
class ExposureFit:
    """How an exposure distribution was obtained from data.

    ``values``/``detected``/``weights`` keep the data the fit used, for
    plots (``detected`` false marks a value that is a detection limit).
    ``cov_internal`` is the asymptotic covariance of the internal
    parameters (the inverse observed information, or the sandwich for
    importance weights: :mod:`doseattr.core.exposure.sandwich`), or
    ``None``. ``weights_meaning`` is ``"frequency"`` or ``"importance"``
    for weighted data and ``None`` for unweighted or grouped data;
    ``effective_n`` is then the Kish effective sample size.
    """

    method: str
    loglik: float | None = None
    aic: float | None = None
    n: int = 0
    detected: int = 0
    censored: int = 0
    values: FloatArray | None = None
    detected_mask: NDArray[np.bool_] | None = None
    weights: FloatArray | None = None
    upper: FloatArray | None = None
    cov_internal: FloatArray | None = None
    gof: dict[str, Any] = field(default_factory=dict)
    warnings: tuple[str, ...] = ()
    weights_meaning: str | None = None
    effective_n: float | None = None


#: Another family's fit to the same data: ``(family, params, fit)``.
Alternative: TypeAlias = tuple[Family, FloatArray, ExposureFit | None]


@dataclass(frozen=True)
class Exposure:
    """A population exposure distribution: a point mass ``unexposed`` at
    zero and the family with ``params`` for the rest.

    ``alternatives`` holds the other families' fits when several were tried
    (``family = "best"``), as ``(family, params, fit)`` tuples.
    """

    family: Family
    params: FloatArray
    unexposed: float = 0.0
    fit: ExposureFit | None = None
    source: str = "entered"
    alternatives: tuple[Alternative, ...] = ()
    notes: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        assert 0.0 <= self.unexposed < 1.0, self.unexposed
        assert np.shape(self.params) == (len(self.family.param_names),)

    @property
    def parameters(self) -> dict[str, float]:
        return {n: float(v) for n, v in zip(self.family.param_names, self.params)}

    def cdf(self, x: ArrayLike) -> FloatArray:
        """Population CDF including the point mass at zero."""
        x = np.asarray(x, dtype=float)
        body = np.where(x > 0, self.family.cdf(np.maximum(x, 1e-300), self.params), 0.0)
        return np.where(x >= 0, self.unexposed + (1 - self.unexposed) * body, 0.0)

    def ppf(self, q: ArrayLike) -> FloatArray:
        """Population quantile including the point mass at zero: 0 for
        ``q <= unexposed``, else the family's quantile at
        ``(q - unexposed) / (1 - unexposed)``."""
        q = np.asarray(q, dtype=float)
        body = np.clip((q - self.unexposed) / (1 - self.unexposed), 0.0, 1.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            inner = self.family.ppf(body, self.params)
        return np.where(q <= self.unexposed, 0.0, inner).reshape(q.shape)

    def sf(self, x: ArrayLike) -> FloatArray:
        x = np.asarray(x, dtype=float)
        body = np.where(x > 0, self.family.sf(np.maximum(x, 1e-300), self.params), 1.0)
        return np.where(x >= 0, (1 - self.unexposed) * body, 1.0)

    def pdf(self, x: ArrayLike) -> FloatArray:
        """Density of the exposed part, scaled by ``1 - unexposed``."""
        x = np.asarray(x, dtype=float)
        with np.errstate(divide="ignore"):
            lp = self.family.logpdf(np.where(x > 0, x, np.nan), self.params)
        return np.where(x > 0, (1 - self.unexposed) * np.exp(np.nan_to_num(lp, nan=-np.inf)), 0.0)
