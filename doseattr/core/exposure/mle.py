"""Maximising a log-likelihood over a family's internal parameters.

Shared by measurement fits (:mod:`.fit`) and grouped-data fits
(:mod:`.summary`). ``scipy.optimize.minimize`` does the search (BFGS, with a
Nelder-Mead restart if BFGS stops away from a stationary point);
``statsmodels.tools.numdiff`` gives the observed information, whose inverse
is the asymptotic covariance of the internal parameters.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import cast

import numpy as np

from doseattr.core.exposure.base import FloatArray
from doseattr.errors import FitError

LogLik = Callable[[FloatArray], float]


@dataclass(frozen=True)
class Maximum:
    """Where a log-likelihood peaks, with its covariance (or ``None``)."""

    theta: FloatArray
    loglik: float
    cov: FloatArray | None
    warnings: tuple[str, ...] = ()


def _negative(loglik: LogLik) -> LogLik:
    def neg(theta: FloatArray) -> float:
        with np.errstate(all="ignore"):
            value = loglik(np.asarray(theta, dtype=float))
        return -value if np.isfinite(value) else np.inf
    return neg


def _stationary(neg: LogLik, theta: FloatArray) -> bool:
    from statsmodels.tools.numdiff import approx_fprime

    value = neg(theta)
    if not np.isfinite(value):
        return False
    grad = approx_fprime(theta, neg, centered=True)
    return bool(np.all(np.isfinite(grad)) and np.max(np.abs(grad)) < 1e-4 * max(1.0, abs(value)))


def _search(neg: LogLik, theta0: FloatArray) -> FloatArray:
    # Trial steps may leave the region where the likelihood is finite; neg
    # returns inf there and the finite-difference gradients of scipy then
    # meet inf - inf, which is expected and handled (stationarity is checked).
    with np.errstate(invalid="ignore", over="ignore"):
        return _bfgs_then_simplex(neg, theta0)


def _bfgs_then_simplex(neg: LogLik, theta0: FloatArray) -> FloatArray:
    from scipy.optimize import minimize

    res = minimize(neg, theta0, method="BFGS", options={"gtol": 1e-9})
    if _stationary(neg, res.x):
        return cast(FloatArray, res.x)
    start = res.x if np.isfinite(res.fun) else theta0
    res = minimize(neg, start, method="Nelder-Mead",
                   options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 10000})
    res = minimize(neg, res.x, method="BFGS", options={"gtol": 1e-9})
    return cast(FloatArray, res.x)


#: Why a fit has no covariance.
NOT_POSITIVE = ("the observed information is not positive definite: the fit has no standard "
                "errors (parameters poorly determined by the data)")


def information(loglik: LogLik, theta: FloatArray) -> FloatArray | None:
    """Observed information (minus the Hessian of ``loglik``) at ``theta``,
    symmetrised; ``None`` when it is not finite and positive definite."""
    from statsmodels.tools.numdiff import approx_hess3

    info = approx_hess3(np.asarray(theta, dtype=float), _negative(loglik))
    info = 0.5 * (info + info.T)
    if np.all(np.isfinite(info)) and np.all(np.linalg.eigvalsh(info) > 0):
        return cast(FloatArray, info)
    return None


def covariance(loglik: LogLik, theta: FloatArray) -> tuple[FloatArray | None, tuple[str, ...]]:
    """Inverse observed information at ``theta``; ``None`` with a warning
    when the information is not positive definite."""
    info = information(loglik, theta)
    if info is not None:
        return cast(FloatArray, np.linalg.inv(info)), ()
    return None, (NOT_POSITIVE,)


def maximise(loglik: LogLik, theta0: FloatArray, *, what: str) -> Maximum:
    """Maximise ``loglik`` from ``theta0``; FitError (a ConvergenceError) naming ``what``
    if no stationary point is found."""
    neg = _negative(loglik)
    theta = _search(neg, np.asarray(theta0, dtype=float))
    if not _stationary(neg, theta):
        raise FitError(f"{what}: the maximum-likelihood search did not converge "
                       f"(stopped at internal parameters {np.round(theta, 4).tolist()}); "
                       "check the data for outliers or try another family")
    cov, warnings = covariance(loglik, theta)
    return Maximum(theta, -neg(theta), cov, warnings)
