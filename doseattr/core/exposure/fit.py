r"""Weighted, left-censored maximum likelihood for exposure measurements.

Each value ``x_i`` with weight ``w_i`` contributes its log density when it
was detected and the log probability of lying below it when it is a
detection limit (left censoring; Cohen 1959, Technometrics 1:217, from memory; Helsel,
Statistics for Censored Environmental Data, 2nd ed. 2012):

.. math::

    \ell(\theta) = \sum_{i\,\mathrm{detected}} w_i \ln f(x_i; \theta)
                 + \sum_{i\,\mathrm{censored}} w_i \ln F(x_i; \theta).

Weights are normalised to sum to the number of values: they express how
much each value represents relative to the others (survey or sampling
weights), not extra sample size, so standard errors reflect the number of
measurements. Several detection limits in one dataset need nothing special.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.exposure.base import Exposure, ExposureFit, Family, FloatArray, check_usable
from doseattr.core.exposure.gof import goodness_of_fit
from doseattr.core.exposure.mle import Maximum, covariance, maximise
from doseattr.core.exposure.registry import FAMILIES, get_family
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


def _maximum(family: Family, data: Measurements) -> Maximum:
    def loglik(theta: FloatArray) -> float:
        return measurement_loglik(family, family.from_internal(theta), data)

    closed = family.closed_form_mle(data.x, data.w) if data.detected.all() else None
    if closed is not None:
        theta = family.to_internal(closed)
        cov, warns = covariance(loglik, theta)
        return Maximum(theta, loglik(theta), cov, warns)
    start = family.to_internal(family.start(data.x, data.w))
    return maximise(loglik, start, what=f"{family.name} fit")


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
                     weights: ArrayLike | None = None) -> Exposure:
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

    Returns
    -------
    Exposure
        With ``fit`` holding loglik, AIC (``2p - 2 loglik``), counts, data,
        ``cov_internal`` (inverse observed information on the internal scale),
        a goodness-of-fit summary and warnings.
    """
    fam = get_family(family)
    data = prepare(values, detected, weights)
    try:
        best = _maximum(fam, data)
    except ConvergenceError as exc:
        raise FitError(str(exc)) from None
    params = fam.from_internal(best.theta)
    fam.check(params)
    check_usable(fam, params, "check the largest values (and their unit) or use "
                 "family = \"empirical\"")
    fit = ExposureFit(
        method=_method(data), loglik=best.loglik, aic=2 * len(params) - 2 * best.loglik,
        n=data.x.size, detected=int(data.detected.sum()), censored=data.n_censored,
        values=data.x, detected_mask=data.detected, weights=data.w, cov_internal=best.cov,
        warnings=_warnings(data) + best.warnings)
    fit = replace(fit, gof=goodness_of_fit(Exposure(fam, params, fit=fit)))
    return Exposure(fam, params, fit=fit, source="measurements")


def fit_best(values: ArrayLike, *, detected: ArrayLike | None = None, weights: ArrayLike | None = None,
             families: tuple[str, ...] | None = None) -> Exposure:
    """Fit each family (default: every registered one, :data:`FAMILIES`) and
    keep the one with the lowest AIC.

    The others go to ``Exposure.alternatives`` as ``(family, params, fit)``;
    a family whose search fails to converge is skipped with a note.
    """
    fits: list[Exposure] = []
    failed: list[str] = []
    for name in tuple(FAMILIES) if families is None else families:
        try:
            fits.append(fit_measurements(name, values, detected=detected, weights=weights))
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
