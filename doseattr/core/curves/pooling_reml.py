r"""Restricted maximum likelihood for the between-study covariance.

Model (two-stage pooling of dose-response coefficients): study ``i`` reports
coefficients :math:`b_i \sim N(\mu, S_i + T)` with :math:`S_i` its
within-study covariance and :math:`T` the between-study covariance. With
:math:`V_i = S_i + T` and the generalized least squares mean
:math:`\hat\mu(T) = (\sum V_i^{-1})^{-1} \sum V_i^{-1} b_i`, the restricted
log-likelihood is

.. math:: \ell_R(T) = -\tfrac12 \Big[\sum_i \log|V_i|
          + \log\Big|\sum_i V_i^{-1}\Big|
          + \sum_i r_i' V_i^{-1} r_i\Big] - \tfrac{(k-1)p}{2}\log 2\pi,
          \qquad r_i = b_i - \hat\mu(T)

(Jackson, Riley & White 2011, Stat Med 30:2481; Gasparrini, Armstrong &
Kenward 2012, Stat Med 31:3821; for one coefficient Viechtbauer 2005,
J Educ Behav Stat 30:261; all from memory). The term
:math:`+\tfrac12\log|X'X| = \tfrac p2 \log k` of some conventions is left
out: it does not depend on :math:`T`.

Arrays: ``b`` is ``(k, p)``, ``s`` is ``(k, p, p)``, ``t`` is ``(p, p)``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import cast

import numpy as np

from doseattr.core.curves.base import FloatArray

#: Eigenvalues of T (in units of the studies' average variances) below this
#: are set to 0: the estimate is on the boundary of the parameter space.
BOUNDARY = 1e-8
#: Range of the log diagonal of the Cholesky factor (scaled units): T
#: between exp(-2 * 30) and exp(2 * 8) times the average within-study variance.
_LOG_DIAG = (-30.0, 8.0)
_MAX_ITER = 500
#: Gradient tolerance of the search, per study (scaled units).
_GTOL = 1e-9


@dataclass(frozen=True)
class RemlFit:
    """REML estimate of the between-study covariance ``t`` ``(p, p)``."""

    t: FloatArray
    loglik: float
    converged: bool
    message: str


def _parts(b: FloatArray, s: FloatArray, t: FloatArray
           ) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, FloatArray]:
    """``V_i^{-1}``, ``log|V_i|``, ``A = sum V_i^{-1}``, ``A^{-1}``, residuals."""
    chol = np.linalg.cholesky(s + t)
    logdet = 2.0 * np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
    eye = np.broadcast_to(np.eye(b.shape[1]), s.shape)
    linv = np.linalg.solve(chol, eye)
    v_inv = np.swapaxes(linv, 1, 2) @ linv
    a = v_inv.sum(axis=0)
    a_inv = np.linalg.inv(a)
    a_inv = (a_inv + a_inv.T) / 2.0
    mu = a_inv @ np.einsum("kij,kj->i", v_inv, b)
    return v_inv, logdet, a, a_inv, b - mu


def restricted_log_likelihood(b: FloatArray, s: FloatArray, t: FloatArray) -> float:
    r""":math:`\ell_R(T)` of the module docstring, including the
    :math:`-\tfrac{(k-1)p}{2}\log 2\pi` constant."""
    k, p = b.shape
    v_inv, logdet, a, _, r = _parts(b, s, t)
    quad = float(np.einsum("ki,kij,kj->", r, v_inv, r))
    logdet_a = float(np.linalg.slogdet(a)[1])
    return float(-0.5 * (float(logdet.sum()) + logdet_a + quad)
                 - 0.5 * (k - 1) * p * np.log(2 * np.pi))


def restricted_gradient(b: FloatArray, s: FloatArray, t: FloatArray) -> FloatArray:
    r"""Derivative of :math:`\ell_R` with respect to the entries of ``T``:

    .. math:: \frac{\partial \ell_R}{\partial T} = \tfrac12 \sum_i
              \big[V_i^{-1} r_i r_i' V_i^{-1} - V_i^{-1}
              + V_i^{-1} A^{-1} V_i^{-1}\big], \qquad A = \sum_i V_i^{-1}

    (derived here: :math:`d\log|V| = \mathrm{tr}(V^{-1}dT)`,
    :math:`dA = -\sum V_i^{-1} dT V_i^{-1}`, and :math:`\hat\mu` minimises
    the quadratic form so its own change does not count).
    """
    v_inv, _, _, a_inv, r = _parts(b, s, t)
    u = np.einsum("kij,kj->ki", v_inv, r)
    g = np.einsum("ki,kj->ij", u, u) - v_inv.sum(axis=0) + np.einsum(
        "kij,jl,klm->im", v_inv, a_inv, v_inv)
    return cast(FloatArray, 0.25 * (g + g.T))


def _to_t(theta: FloatArray, p: int) -> tuple[FloatArray, FloatArray]:
    """``T = L L'`` from the lower triangle of ``L``, its diagonal logged
    (held within :data:`_LOG_DIAG`, against overflow)."""
    low = np.zeros((p, p))
    low[np.tril_indices(p)] = theta
    low[np.diag_indices(p)] = np.exp(np.clip(np.diag(low), *_LOG_DIAG))
    return low @ low.T, low


def _to_theta(t: FloatArray) -> FloatArray:
    low = np.linalg.cholesky(t)
    low[np.diag_indices(t.shape[0])] = np.log(np.diag(low))
    return cast(FloatArray, low[np.tril_indices(t.shape[0])])


def _optimise(b: FloatArray, s: FloatArray, start: FloatArray) -> tuple[FloatArray, float, bool, str]:
    from scipy.optimize import minimize

    p = b.shape[1]
    rows, cols = np.tril_indices(p)
    on_diag = rows == cols

    def objective(theta: FloatArray) -> tuple[float, FloatArray]:
        t, low = _to_t(theta, p)
        grad_low = 2.0 * restricted_gradient(b, s, t) @ low
        grad = grad_low[rows, cols]
        inside = (theta > _LOG_DIAG[0]) & (theta < _LOG_DIAG[1])
        grad[on_diag] *= low[rows[on_diag], cols[on_diag]] * inside[on_diag]
        return -restricted_log_likelihood(b, s, t), -grad

    theta0 = _to_theta(start)
    res = minimize(objective, theta0, jac=True, method="BFGS",
                   options=dict(maxiter=_MAX_ITER, gtol=_GTOL * b.shape[0]))
    t, _ = _to_t(res.x, p)
    # BFGS reports a loss of precision as failure even at a stationary point.
    converged = bool(res.success) or bool(np.max(np.abs(res.jac)) < 100 * _GTOL * b.shape[0])
    return t, -float(res.fun), converged, str(res.message)


def _starts(t0: FloatArray, p: int) -> list[FloatArray]:
    """The moment estimate with its eigenvalues floored, and a small
    multiple of the identity (scaled units)."""
    lam, vec = np.linalg.eigh(t0)
    floored = (vec * np.maximum(lam, 0.01)) @ vec.T
    return [floored, 0.1 * np.eye(p)]


def _clip_boundary(t: FloatArray) -> tuple[FloatArray, bool]:
    lam, vec = np.linalg.eigh((t + t.T) / 2.0)
    at_boundary = bool(np.any(lam < BOUNDARY))
    lam = np.where(lam < BOUNDARY, 0.0, lam)
    return cast(FloatArray, (vec * lam) @ vec.T), at_boundary


def reml_multivariate(b: FloatArray, s: FloatArray, start: FloatArray) -> RemlFit:
    r"""Maximise :math:`\ell_R(T)` over positive semidefinite ``T``.

    ``T = L L'`` with ``L`` lower triangular and its diagonal on the log scale
    (the log-Cholesky parametrisation; from memory), so every trial ``T`` is
    positive semidefinite. Coefficients are first scaled by the square root
    of their average within-study variance (REML is equivariant under this
    rescaling), then ``scipy.optimize.minimize`` (BFGS, the analytic
    gradient of :func:`restricted_gradient`) runs from ``start`` (the
    moment estimate, eigenvalues floored) and from ``0.1 I``; the higher
    optimum is kept. Eigenvalues of the scaled ``T`` below :data:`BOUNDARY`
    are set to 0 (the boundary of the parameter space).
    """
    scale = np.sqrt(np.mean(np.diagonal(s, axis1=1, axis2=2), axis=0))
    outer = np.outer(scale, scale)
    bs, ss = b / scale, s / outer
    fits = [_optimise(bs, ss, t0) for t0 in _starts(start / outer, b.shape[1])]
    t, _, converged, message = max(fits, key=lambda f: f[1])
    t, _ = _clip_boundary(t)
    return RemlFit(t * outer, restricted_log_likelihood(b, s, t * outer), converged, message)


def reml_univariate(b: FloatArray, v: FloatArray, start: float,
                    tol: float = 1e-12) -> tuple[float, bool]:
    r"""REML :math:`\tau^2 \ge 0` for one coefficient by Fisher scoring.

    With :math:`w_i = 1/(v_i + \tau^2)` and :math:`r_i = b_i - \hat\mu`, the
    score and expected information are (derived from :math:`\ell_R`; cf.
    Viechtbauer 2005, from memory)

    .. math:: U = \tfrac12\Big[\sum w_i^2 r_i^2 - \sum w_i
              + \frac{\sum w_i^2}{\sum w_i}\Big], \qquad
              I = \tfrac12\Big[\sum w_i^2 - \frac{2\sum w_i^3}{\sum w_i}
              + \Big(\frac{\sum w_i^2}{\sum w_i}\Big)^2\Big]

    Steps :math:`\tau^2 \leftarrow \max(0, \tau^2 + U/I)` are halved while
    they lower :math:`\ell_R`; :math:`\tau^2 = 0` with :math:`U \le 0` there
    is the boundary optimum. Returns ``(tau2, converged)``.
    """
    s = v[:, None, None]
    bb = b[:, None]
    scale = float(np.mean(v))
    tau2 = max(start, 0.0)
    ll = restricted_log_likelihood(bb, s, np.array([[tau2]]))
    for _ in range(_MAX_ITER):
        score, info = _score_info(b, v, tau2)
        if tau2 == 0.0 and score <= 0.0:
            return 0.0, True
        step = score / info
        for _ in range(60):
            new = max(tau2 + step, 0.0)
            ll_new = restricted_log_likelihood(bb, s, np.array([[new]]))
            if ll_new >= ll - 1e-13 * abs(ll):
                break
            step /= 2.0
        done = abs(new - tau2) <= tol * (scale + tau2)
        tau2, ll = new, ll_new
        if done:
            return tau2, True
    return tau2, False


def _score_info(b: FloatArray, v: FloatArray, tau2: float) -> tuple[float, float]:
    w = 1.0 / (v + tau2)
    sw, sw2, sw3 = w.sum(), (w ** 2).sum(), (w ** 3).sum()
    r = b - (w @ b) / sw
    score = 0.5 * (float(w ** 2 @ r ** 2) - sw + sw2 / sw)
    info = 0.5 * (sw2 - 2.0 * sw3 / sw + (sw2 / sw) ** 2)
    return float(score), float(info)
