"""Generalized least squares fit of a curve to category-level log RRs.

The curve passes through the reference (log RR = 0 at the model's reference
dose), so there is no intercept (Greenland & Longnecker 1992, Am J Epidemiol
135:1301).
"""

from __future__ import annotations

from typing import cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import Curve, CurveFit, CurveModel, FloatArray
from doseattr.core.curves.covariance import LogRRCovariance
from doseattr.errors import FitError, ModelError

#: p-value of the goodness-of-fit Q statistic below which the fit is flagged.
POOR_FIT_P = 0.05


def fit_curve(model: CurveModel, doses: ArrayLike, log_rr: ArrayLike,
              covariance: LogRRCovariance, *, max_dose: float | None = None,
              data_max: float | None = None) -> Curve:
    r"""Fit ``model`` to non-reference log RRs by generalized least squares.

    Linear models (``log RR = X b``):

    .. math:: \hat b = (X' V^{-1} X)^{-1} X' V^{-1} y, \qquad
              \operatorname{cov}(\hat b) = (X' V^{-1} X)^{-1}

    Nonlinear models minimise :math:`r' V^{-1} r`, :math:`r = y - f(x; b)`,
    with ``scipy.optimize.least_squares`` on Cholesky-whitened residuals
    (within the model's ``bounds`` when it declares them);
    :math:`\operatorname{cov}(\hat b) = (J' V^{-1} J)^{-1}` at the optimum.
    Goodness of fit: :math:`Q = r' V^{-1} r \sim \chi^2_{n-p}`
    (Greenland & Longnecker 1992).

    Parameters
    ----------
    model
        The curve model; its ``reference_dose`` is the reference band's dose.
    doses, log_rr
        Assigned dose and reported log RR of each non-reference band ``(n,)``.
    covariance
        Covariance of ``log_rr`` (:mod:`doseattr.core.curves.covariance`).
    max_dose, data_max
        Passed to :class:`Curve`; ``data_max`` defaults to ``max(doses)``.
    """
    x, y, v = _validate(model, doses, log_rr, covariance.cov)
    chol = _cholesky(v)
    coef, cov = (_fit_linear if model.linear else _fit_nonlinear)(model, x, y, chol)
    data_max = float(np.max(x)) if data_max is None else float(data_max)
    check_curve(model, coef, dose_range(model, x, data_max, max_dose))
    fitted = model.log_rr(x, coef)
    fit = _diagnostics(model, x, y, v, fitted, chol, covariance.method)
    return Curve(model, coef, cov, max_dose=max_dose, data_max=data_max,
                 source="fitted", fit=fit, notes=covariance.notes)


def _validate(model: CurveModel, doses: ArrayLike, log_rr: ArrayLike,
              v: ArrayLike) -> tuple[FloatArray, FloatArray, FloatArray]:
    x = np.atleast_1d(np.asarray(doses, dtype=float))
    y = np.atleast_1d(np.asarray(log_rr, dtype=float))
    v = np.atleast_2d(np.asarray(v, dtype=float))
    n, p = x.size, len(model.param_names)
    if y.shape != (n,) or v.shape != (n, n):
        raise ModelError(f"doses {x.shape}, log RRs {y.shape} and covariance {v.shape} disagree")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y)) and np.all(np.isfinite(v))):
        raise ModelError("doses, log RRs and their covariance must be finite numbers")
    if n < p:
        raise ModelError(
            f"the {model.name} model has {p} parameters but only {n} non-reference bands; "
            f"use a model with fewer parameters")
    return x, y, v


def _cholesky(v: FloatArray) -> FloatArray:
    try:  # numpy's, not scipy.linalg's: check loads no scipy.linalg (start-up time)
        return cast(FloatArray, np.linalg.cholesky(v))
    except np.linalg.LinAlgError:
        raise ModelError("covariance of the log RRs is not positive definite") from None


def _whiten(chol: FloatArray, a: FloatArray) -> FloatArray:
    """``L^{-1} a`` for ``V = L L'`` (``L`` a few bands across: a general
    solve costs nothing and needs no scipy.linalg)."""
    return cast(FloatArray, np.linalg.solve(chol, a))


def _fit_linear(model: CurveModel, x: FloatArray, y: FloatArray,
                chol: FloatArray) -> tuple[FloatArray, FloatArray]:
    xw, yw = _whiten(chol, model.basis(x)), _whiten(chol, y)
    cov = _inverse_information(model, x, xw)
    return cast(FloatArray, np.linalg.lstsq(xw, yw, rcond=None)[0]), cov


def _fit_nonlinear(model: CurveModel, x: FloatArray, y: FloatArray,
                   chol: FloatArray) -> tuple[FloatArray, FloatArray]:
    from scipy.optimize import least_squares

    yw = _whiten(chol, y)

    def residual(b: FloatArray) -> FloatArray:
        return _whiten(chol, model.log_rr(x, b)) - yw

    bounds = getattr(model, "bounds", None)
    start = model.start(x, y)
    if bounds is None:
        options = dict(method="lm")
    else:
        start = np.clip(start, np.add(bounds[0], 1e-8), bounds[1])
        options = dict(method="trf", bounds=bounds)
    res = least_squares(residual, start, x_scale="jac", xtol=1e-12, ftol=1e-12, gtol=1e-12,
                        max_nfev=2000 * start.size, **options)
    if not res.success or not np.all(np.isfinite(res.x)):
        raise FitError(
            f"{model.name} model fit did not converge ({res.message}); the data may not "
            f"identify all its parameters: try a model with fewer")
    return res.x, _inverse_information(model, x, res.jac)


def _inverse_information(model: CurveModel, x: FloatArray, jw: FloatArray) -> FloatArray:
    """``(J_w' J_w)^{-1}`` for whitened Jacobian (or design) ``J_w = L^{-1} J``;
    refuses a rank-deficient ``J_w`` (parameters not identified)."""
    if np.linalg.matrix_rank(jw) < jw.shape[1]:
        raise ModelError(
            f"the {model.name} model's parameters are not identified by doses {x}; "
            f"use a model with fewer parameters (or fewer knots)")
    with np.errstate(over="ignore", invalid="ignore"):
        info = jw.T @ jw
    if not np.all(np.isfinite(info)):
        raise ModelError(f"the {model.name} model's information matrix overflows the float "
                         f"range at doses {x}; the doses are too large for this model")
    cov = np.linalg.inv(info)
    return (cov + cov.T) / 2.0


def dose_range(model: CurveModel, doses: FloatArray, data_max: float | None,
               max_dose: float | None) -> FloatArray:
    """Doses a curve is used over: reference, bands, data maximum and either
    ``max_dose`` or, when the formula is extended without limit, ``inf``."""
    top = np.inf if max_dose is None else max_dose
    extra = [] if data_max is None else [data_max]
    return cast(FloatArray, np.r_[model.reference_dose, doses, extra, top])


def check_curve(model: CurveModel, coef: FloatArray, doses: FloatArray) -> None:
    """Run ``model.check`` and, where the model has one, its ``check_doses``."""
    model.check(coef)
    check_doses = getattr(model, "check_doses", None)
    if check_doses is not None:
        check_doses(coef, doses)


def _diagnostics(model: CurveModel, x: FloatArray, y: FloatArray, v: FloatArray,
                 fitted: FloatArray, chol: FloatArray, method: str) -> CurveFit:
    from scipy.special import chdtrc  # scipy.stats.chi2.sf without scipy.stats

    rw = _whiten(chol, y - fitted)
    q = float(rw @ rw)
    df = x.size - len(model.param_names)
    p_value = float(chdtrc(df, q)) if df > 0 else None
    warnings: tuple[str, ...] = ()
    if p_value is not None and p_value < POOR_FIT_P:
        warnings = (f"the {model.name} model fits the category estimates poorly "
                    f"(Q = {q:.3g} on {df} df, p = {p_value:.2g}); consider the spline model",)
    return CurveFit(doses=x, log_rr=y, log_rr_covariance=v, fitted_log_rr=fitted,
                    covariance_method=method, q=q, df=df, p_value=p_value, warnings=warnings)
