"""Maximising a log-likelihood over a family's internal parameters.

Shared by measurement fits (:mod:`.fit`) and grouped-data fits
(:mod:`.summary`). ``scipy.optimize.minimize`` does the search (BFGS, with a
Nelder-Mead restart if BFGS stops away from a stationary point);
central differences (:func:`central_hessian`) give the observed
information, whose inverse is the asymptotic covariance of the internal
parameters.

A log-likelihood that returns its exact gradient (measurement fits,
:mod:`.likelihood`) goes to :func:`search_with_gradient` instead: Newton
steps on the observed information when the caller gives it
(:func:`newton_search`, no scipy), else or if they fail BFGS on that
gradient, no finite differences.
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


_EPS = float(np.finfo(float).eps)


def central_gradient(f: LogLik, theta: FloatArray) -> FloatArray:
    r"""Gradient of ``f`` by central differences,
    :math:`(f(\theta + h_k e_k) - f(\theta - h_k e_k)) / (2 h_k)` with
    :math:`h_k = \epsilon^{1/3} \max(|\theta_k|, 0.1) / 2` (error
    :math:`O(h^2)`; Nocedal & Wright 2006, Numerical Optimization, sec. 8.1,
    from memory)."""
    theta = np.asarray(theta, dtype=float)
    steps = _EPS ** (1.0 / 3.0) * np.maximum(np.abs(theta), 0.1) / 2.0
    grad = np.zeros(theta.size)
    for k, h in enumerate(steps):
        e = np.zeros(theta.size)
        e[k] = h
        grad[k] = (f(theta + e) - f(theta - e)) / (2 * h)
    return grad


def central_hessian(f: LogLik, theta: FloatArray) -> FloatArray:
    r"""Hessian of ``f`` by central differences of values,

    .. math:: H_{jk} = \frac{f(\theta + h_j e_j + h_k e_k) - f(\theta + h_j e_j - h_k e_k)
              - f(\theta - h_j e_j + h_k e_k) + f(\theta - h_j e_j - h_k e_k)}{4 h_j h_k}

    with :math:`h_j = \epsilon^{1/4} \max(|\theta_j|, 0.1)` (Ridout 2009,
    Am Stat 63:66, eq. 9; from memory), symmetric by construction."""
    theta = np.asarray(theta, dtype=float)
    h = _EPS ** (1.0 / 4.0) * np.maximum(np.abs(theta), 0.1)
    ee = np.diag(h)
    n = theta.size
    hess = np.outer(h, h)
    for i in range(n):
        for j in range(i, n):
            hess[i, j] = ((f(theta + ee[i] + ee[j]) - f(theta + ee[i] - ee[j]))
                          - (f(theta - ee[i] + ee[j]) - f(theta - ee[i] - ee[j]))) / (4.0 * hess[i, j])
            hess[j, i] = hess[i, j]
    return cast(FloatArray, hess)


def _stationary(neg: LogLik, theta: FloatArray) -> bool:
    value = neg(theta)
    if not np.isfinite(value):
        return False
    grad = central_gradient(neg, theta)
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
    info = central_hessian(_negative(loglik), np.asarray(theta, dtype=float))
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


#: A log-likelihood that returns its gradient too: ``theta -> (value, gradient)``.
ValueGrad = Callable[[FloatArray], tuple[float, FloatArray]]


#: Largest gradient component of ``loglik / scale`` at which a search stops.
GTOL = 1e-10


class _Converged(Exception):
    """Raised from inside a search as soon as a point meets :data:`GTOL`:
    there the log-likelihood is flat to rounding, and line searches would
    only spend passes over the data failing to decrease it further."""

    def __init__(self, theta: FloatArray) -> None:
        super().__init__()
        self.theta = theta


def _negative_scaled(value_grad: ValueGrad, scale: float) -> Callable[[FloatArray], tuple[float, FloatArray]]:
    def neg(theta: FloatArray) -> tuple[float, FloatArray]:
        theta = np.array(theta, dtype=float)
        with np.errstate(all="ignore"):
            value, grad = value_grad(theta)
        if not (np.isfinite(value) and np.all(np.isfinite(grad))):
            return np.inf, np.zeros_like(theta)
        if np.max(np.abs(grad)) <= GTOL * scale:
            raise _Converged(theta)
        return -value / scale, -np.asarray(grad, dtype=float) / scale
    return neg


def _minimize(neg: Callable[[FloatArray], tuple[float, FloatArray]], theta0: FloatArray,
              method: str, options: dict[str, object]) -> tuple[FloatArray, float]:
    from scipy.optimize import minimize

    try:
        if method == "BFGS":
            res = minimize(neg, theta0, jac=True, method="BFGS", options=options)
        else:
            res = minimize(lambda th: neg(th)[0], theta0, method=method, options=options)
    except _Converged as done:
        return done.theta, 0.0
    return cast(FloatArray, res.x), float(res.fun)


def stationary_with_gradient(value_grad: ValueGrad, theta: FloatArray) -> bool:
    """The test of :func:`maximise` (largest gradient component below
    1e-4 x max(1, |loglik|)) with the exact gradient."""
    with np.errstate(all="ignore"):
        value, grad = value_grad(np.asarray(theta, dtype=float))
    return bool(np.isfinite(value) and np.all(np.isfinite(grad))
                and np.max(np.abs(grad)) < 1e-4 * max(1.0, abs(value)))


def _inverse_hessian_seed(info: FloatArray | None, scale: float) -> FloatArray | None:
    """``scale`` x the inverse of ``info`` when that has a Cholesky factor
    (the test BFGS applies), else ``None``."""
    inv, _ = invert_information(info)
    if inv is None:
        return None
    seed = 0.5 * (inv + inv.T) * scale
    try:
        np.linalg.cholesky(seed)
    except np.linalg.LinAlgError:
        return None
    return cast(FloatArray, seed)


#: Newton steps :func:`newton_search` takes before it gives up.
NEWTON_STEPS = 50


def newton_search(value_grad: ValueGrad, info: Callable[[FloatArray], FloatArray],
                  theta0: FloatArray, *, scale: float) -> FloatArray | None:
    r"""Newton's method on the log-likelihood with step halving:
    :math:`\theta \leftarrow \theta + t\,I(\theta)^{-1}\nabla\ell(\theta)`, ``info``
    giving the observed information :math:`I`, and :math:`t = 1, 1/2, \ldots`
    the first that does not lower :math:`\ell` (beyond rounding); Nocedal &
    Wright 2006, Numerical Optimization, ch. 3 (from memory).

    Returns the first point whose largest gradient component is within
    :data:`GTOL` ``x scale`` (the stopping rule of :func:`search_with_gradient`),
    or ``None`` when the information is not positive definite, a step finds
    no increase, or :data:`NEWTON_STEPS` steps do not get there: the caller
    then searches by BFGS. Needs no ``scipy.optimize`` (start-up time)."""
    theta = np.array(theta0, dtype=float)
    with np.errstate(all="ignore"):
        value, grad = value_grad(theta)
        for _ in range(NEWTON_STEPS):
            if not (np.isfinite(value) and np.all(np.isfinite(grad))):
                return None
            if np.max(np.abs(grad)) <= GTOL * scale:
                return theta
            step = _newton_step(info(theta), np.asarray(grad, dtype=float))
            if step is None:
                return None
            moved = _halve_until_no_loss(value_grad, theta, step, value)
            if moved is None:
                return None
            theta, value, grad = moved
    return None


def _newton_step(info: FloatArray, grad: FloatArray) -> FloatArray | None:
    """``info^{-1} grad`` when ``info`` is finite and positive definite."""
    info = 0.5 * (info + info.T)
    if not np.all(np.isfinite(info)):
        return None
    try:
        np.linalg.cholesky(info)
    except np.linalg.LinAlgError:
        return None
    return cast(FloatArray, np.linalg.solve(info, grad))


def _halve_until_no_loss(value_grad: ValueGrad, theta: FloatArray, step: FloatArray,
                         value: float) -> tuple[FloatArray, float, FloatArray] | None:
    """``theta + t step`` for the first ``t = 1, 1/2, ...`` (30 tries) whose
    log-likelihood is finite and not below ``value`` beyond rounding."""
    floor = value - 1e-12 * max(1.0, abs(value))
    t = 1.0
    for _ in range(30):
        new = theta + t * step
        new_value, new_grad = value_grad(new)
        if np.isfinite(new_value) and new_value >= floor:
            return new, float(new_value), np.asarray(new_grad, dtype=float)
        t /= 2.0
    return None


def search_with_gradient(value_grad: ValueGrad, theta0: FloatArray, *, scale: float,
                         what: str, info0: FloatArray | None = None,
                         info: Callable[[FloatArray], FloatArray] | None = None) -> FloatArray:
    """Where ``value_grad`` peaks, by BFGS on the exact gradient of
    ``loglik / scale`` (``scale`` the total weight, so that the tolerance
    :data:`GTOL` is relative to the per-value log-likelihood; the search
    stops at the first point within it), with a
    Nelder-Mead restart as in :func:`maximise` if BFGS stops away from a
    stationary point; FitError naming ``what`` if none is found.

    ``info0``, the observed information at ``theta0`` when known, seeds the
    BFGS inverse Hessian (when positive definite), so the first steps are
    Newton steps rather than steepest descent. ``info``, a function giving
    the observed information, lets :func:`newton_search` try first (BFGS
    only if it fails)."""
    theta0 = np.asarray(theta0, dtype=float)
    if info is not None:
        found = newton_search(value_grad, info, theta0, scale=scale)
        if found is not None and stationary_with_gradient(value_grad, found):
            return found
    neg = _negative_scaled(value_grad, scale)
    options: dict[str, object] = {"gtol": GTOL}
    seed = _inverse_hessian_seed(info0, scale)
    if seed is not None:
        options["hess_inv0"] = seed
    with np.errstate(invalid="ignore", over="ignore"):
        theta, fun = _minimize(neg, theta0, "BFGS", options)
        if not stationary_with_gradient(value_grad, theta):
            start = theta if np.isfinite(fun) else theta0
            theta, _ = _minimize(neg, start, "Nelder-Mead",
                                 {"xatol": 1e-10, "fatol": 1e-14, "maxiter": 10000})
            theta, _ = _minimize(neg, theta, "BFGS", {"gtol": GTOL})
    if not stationary_with_gradient(value_grad, theta):
        raise FitError(f"{what}: the maximum-likelihood search did not converge "
                       f"(stopped at internal parameters {np.round(theta, 4).tolist()}); "
                       "check the data for outliers or try another family")
    return theta


def invert_information(info: FloatArray | None) -> tuple[FloatArray | None, tuple[str, ...]]:
    """The inverse of a symmetrised observed information when it is finite
    and positive definite; ``None`` with a warning otherwise."""
    if info is not None:
        info = 0.5 * (info + info.T)
        if np.all(np.isfinite(info)) and np.all(np.linalg.eigvalsh(info) > 0):
            return cast(FloatArray, np.linalg.inv(info)), ()
    return None, (NOT_POSITIVE,)
