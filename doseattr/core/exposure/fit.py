r"""Weighted, left-censored maximum likelihood for exposure measurements.

Each value ``x_i`` with weight ``w_i`` contributes its log density when it
was detected and the log probability of lying below it when it is a
detection limit (left censoring; Cohen 1959, Technometrics 1:217, from memory; Helsel,
Statistics for Censored Environmental Data, 2nd ed. 2012):

.. math::

    \ell(\theta) = \sum_{i\,\mathrm{detected}} w_i \ln f(x_i; \theta)
                 + \sum_{i\,\mathrm{censored}} w_i \ln F(x_i; \theta).

Weights are normalised to sum to the number of values. What they mean sets
the covariance of the internal parameters
(:mod:`doseattr.core.exposure.sandwich`): frequency weights keep the inverse
weighted observed information, whose standard errors reflect the number of
measurements; importance (population) weights take the sandwich
:math:`A^{-1} B A^{-1}` of Binder (1983, Int Stat Rev 51:279, from memory),
whose standard errors reflect the unequal weights (about the Kish
effective sample size). Several detection limits in one dataset need
nothing special.

Cost: fully observed data take the family's
:meth:`~doseattr.core.exposure.base.Family.uncensored_mle` (lognormal in
closed form, gamma from two weighted sums, Weibull by a Newton root of its
profile equation, one pass over the distinct values per step); censored
data a BFGS search on the exact gradient over pooled data
(:mod:`doseattr.core.exposure.likelihood`), each evaluation one pass over
the distinct values (the limits only, for families whose detects have
sufficient statistics).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.exposure.base import Exposure, ExposureFit, Family, FloatArray, check_usable
from doseattr.core.exposure.gof import goodness_of_fit
from doseattr.core.exposure.likelihood import (
    observed_information,
    pool_measurements,
    value_and_gradient,
)
from doseattr.core.exposure.mle import (
    Maximum,
    invert_information,
    search_with_gradient,
)
from doseattr.core.exposure.registry import FAMILIES, get_family
from doseattr.core.exposure.sandwich import check_meaning, kish_effective_n, sandwich
from doseattr.errors import ConvergenceError, FitError, ModelError


@dataclass(frozen=True)
class Measurements:
    """Validated measurements: positive ``x``, ``detected`` mask and weights
    ``w`` normalised to sum to ``len(x)``."""

    x: FloatArray
    detected: NDArray[np.bool_]
    w: FloatArray

    @property
    def n_censored(self) -> int:
        return int(np.sum(~self.detected))


def _as_vector(values: ArrayLike, name: str) -> FloatArray:
    v = np.asarray(values, dtype=float)
    if v.ndim != 1 or v.size == 0:
        raise ModelError(f"{name} must be a non-empty list of numbers, got shape {v.shape}")
    if not np.all(np.isfinite(v)):
        raise ModelError(f"{name} must be finite numbers; number {int(np.argmin(np.isfinite(v))) + 1} is not")
    return v


def prepare(values: ArrayLike, detected: ArrayLike | None = None,
            weights: ArrayLike | None = None) -> Measurements:
    """Validate measurements (ModelError on anything a fit cannot use)."""
    x = _as_vector(values, "values")
    bad = np.flatnonzero(x <= 0)
    if bad.size:
        raise ModelError(f"values must be positive; {bad.size} are zero or negative (first: number {bad[0] + 1}). "
                         "Zeros usually mean 'unexposed': split them off with estimate_unexposed")
    d = np.ones(x.size, bool) if detected is None else np.asarray(detected, dtype=bool)
    w = np.ones(x.size) if weights is None else _as_vector(weights, "weights")
    if d.shape != x.shape or w.shape != x.shape:
        raise ModelError(f"values ({x.size}), detected and weights must have the same length")
    if np.any(w <= 0):
        raise ModelError(f"weights must be positive; number {int(np.argmax(w <= 0)) + 1} is not "
                         "(drop zero-weight rows)")
    if not d.any():
        raise ModelError("every value is a non-detect: a distribution cannot be fitted to detection limits alone")
    if d.sum() < 3:
        raise ModelError(f"only {int(d.sum())} detected values: at least 3 are needed to fit a distribution")
    return Measurements(x, d, w * (x.size / w.sum()))


def measurement_loglik(family: Family, params: ArrayLike, data: Measurements) -> float:
    """The weighted left-censored log-likelihood (module docstring)."""
    d = data.detected
    dens = family.logpdf(data.x[d], params)
    below = family.logcdf(data.x[~d], params)
    return float(np.dot(data.w[d], dens) + np.dot(data.w[~d], below))


def measurement_terms(family: Family, params: ArrayLike, data: Measurements) -> FloatArray:
    """Each value's unweighted contribution to :func:`measurement_loglik`:
    its log density when detected, its log CDF when a detection limit."""
    d = data.detected
    out = np.empty(data.x.size)
    out[d] = family.logpdf(data.x[d], params)
    out[~d] = family.logcdf(data.x[~d], params)
    return out


def _maximum(family: Family, data: Measurements) -> Maximum:
    """The maximum of :func:`measurement_loglik`: for fully observed data
    the family's :meth:`~doseattr.core.exposure.base.Family.uncensored_mle`
    when it has one (with its closed-form information when it has that),
    otherwise Newton steps (then, if they fail, BFGS) on the exact gradient over the pooled data
    (:mod:`doseattr.core.exposure.likelihood`); the covariance is the
    inverse observed information, from the exact gradient unless in closed
    form."""
    if data.detected.all():
        closed = family.uncensored_mle(data.x, data.w)
        if closed is not None:
            theta = family.to_internal(closed)
            info = family.information_at_mle(data.x, data.w, closed)
            if info is None:
                pooled = pool_measurements(family, data.x, data.detected, data.w)
                info = observed_information(family, theta, pooled)
            cov, warns = invert_information(info)
            return Maximum(theta, measurement_loglik(family, closed, data), cov, warns)
    pooled = pool_measurements(family, data.x, data.detected, data.w)

    def value_grad(theta: FloatArray) -> tuple[float, FloatArray]:
        return value_and_gradient(family, theta, pooled)

    def information(theta: FloatArray) -> FloatArray:
        return observed_information(family, theta, pooled)

    start = family.to_internal(family.start(data.x, data.w))
    theta = search_with_gradient(value_grad, start, scale=pooled.total, what=f"{family.name} fit",
                                 info0=information(start), info=information)
    cov, warns = invert_information(observed_information(family, theta, pooled))
    return Maximum(theta, measurement_loglik(family, family.from_internal(theta), data), cov, warns)


def measurement_scores(family: Family, params: ArrayLike, data: Measurements) -> FloatArray:
    """Each value's gradient of its :func:`measurement_terms` entry with
    respect to the internal parameters, shape ``(n, p)`` (exact, from
    :meth:`~doseattr.core.exposure.base.Family.log_terms_scores`)."""
    d = data.detected
    out = np.empty((data.x.size, len(family.param_names)))
    out[d] = family.log_terms_scores(data.x[d], params, censored=False)[1]
    if not d.all():
        out[~d] = family.log_terms_scores(data.x[~d], params, censored=True)[1]
    return out


def robust_covariance(family: Family, data: Measurements, best: Maximum) -> Maximum:
    """``best`` with its covariance replaced by the sandwich for importance
    weights (:func:`~doseattr.core.exposure.sandwich.sandwich`), with the
    exact per-value scores (:func:`measurement_scores`)."""
    if best.cov is None:
        return best
    with np.errstate(all="ignore"):
        s = measurement_scores(family, family.from_internal(best.theta), data)
    cov = sandwich(best.cov, s, data.w)
    if cov is None:
        return replace(best, cov=None, warnings=best.warnings + (
            "the per-value scores are not finite at the fit: no sandwich covariance, the fit "
            "has no standard errors",))
    return replace(best, cov=cov)


def _method(data: Measurements) -> str:
    extra = [w for w, on in (("left-censored", data.n_censored > 0),
                             ("weighted", not np.allclose(data.w, 1.0))) if on]
    return "maximum likelihood" + (f" ({', '.join(extra)})" if extra else "")


def _warnings(data: Measurements) -> tuple[str, ...]:
    n, c = data.x.size, data.n_censored
    if 2 * c > n:
        return (f"{c} of {n} values are below detection limits: the fitted distribution rests "
                "mostly on its assumed shape; compare families and read the Q-Q plot",)
    return ()


def fit_measurements(family: str | Family, values: ArrayLike, *, detected: ArrayLike | None = None,
                     weights: ArrayLike | None = None,
                     weight_meaning: str = "frequency") -> Exposure:
    """Fit ``family`` to measurements by weighted, left-censored ML.

    Parameters
    ----------
    family
        A family name (``"lognormal"``, ``"gamma"``, ``"weibull"``) or instance.
    values
        Positive measurements; where ``detected`` is false the value is the
        detection limit of a non-detect.
    detected
        Boolean mask, default all true.
    weights
        Positive weights, normalised here to sum to ``len(values)``.
    weight_meaning
        ``"frequency"`` (each weight counts identical values: covariance
        from the inverse observed information) or ``"importance"``
        (population weights: the sandwich covariance). Ignored without
        ``weights``.

    Returns
    -------
    Exposure
        With ``fit`` holding loglik, AIC (``2p - 2 loglik``), counts, data,
        ``cov_internal`` (covariance on the internal scale, as
        ``weight_meaning`` says), ``weights_meaning`` and ``effective_n``
        (Kish; both ``None`` without weights), a goodness-of-fit summary and
        warnings.
    """
    meaning = check_meaning(weight_meaning) if weights is not None else None
    fam = get_family(family)
    data = prepare(values, detected, weights)
    try:
        best = _maximum(fam, data)
    except ConvergenceError as exc:
        raise FitError(str(exc)) from None
    if meaning == "importance":
        best = robust_covariance(fam, data, best)
    params = fam.from_internal(best.theta)
    fam.check(params)
    check_usable(fam, params, "check the largest values (and their unit) or use "
                 "family = \"empirical\"")
    fit = ExposureFit(
        method=_method(data), loglik=best.loglik, aic=2 * len(params) - 2 * best.loglik,
        n=data.x.size, detected=int(data.detected.sum()), censored=data.n_censored,
        values=data.x, detected_mask=data.detected, weights=data.w, cov_internal=best.cov,
        warnings=_warnings(data) + best.warnings, weights_meaning=meaning,
        effective_n=None if meaning is None else kish_effective_n(data.w))
    fit = replace(fit, gof=goodness_of_fit(Exposure(fam, params, fit=fit)))
    return Exposure(fam, params, fit=fit, source="measurements")


def fit_best(values: ArrayLike, *, detected: ArrayLike | None = None, weights: ArrayLike | None = None,
             families: tuple[str, ...] | None = None,
             weight_meaning: str = "frequency") -> Exposure:
    """Fit each family (default: every registered one, :data:`FAMILIES`) and
    keep the one with the lowest AIC (``weight_meaning`` as for
    :func:`fit_measurements`).

    The others go to ``Exposure.alternatives`` as ``(family, params, fit)``;
    a family whose search fails to converge is skipped with a note.
    """
    check_meaning(weight_meaning)
    fits: list[Exposure] = []
    failed: list[str] = []
    for name in tuple(FAMILIES) if families is None else families:
        try:
            fits.append(fit_measurements(name, values, detected=detected, weights=weights,
                                         weight_meaning=weight_meaning))
        except (ConvergenceError, ModelError) as err:
            failed.append(f"{name} not fitted: {err}")
    if not fits:
        raise FitError("no exposure family could be fitted: " + "; ".join(failed))
    fits.sort(key=_aic)
    best, rest = fits[0], fits[1:]
    table = ", ".join(f"{e.family.name} {_aic(e):.2f}" for e in fits)
    notes = (f"family chosen by lowest AIC ({table})",) + tuple(failed)
    return Exposure(best.family, best.params, fit=best.fit, source="measurements",
                    alternatives=tuple((e.family, e.params, e.fit) for e in rest), notes=notes)


def _aic(exposure: Exposure) -> float:
    """The AIC of a fit made by :func:`fit_measurements` (which always sets it)."""
    assert exposure.fit is not None and exposure.fit.aic is not None
    return exposure.fit.aic
