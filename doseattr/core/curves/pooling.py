r"""Two-stage pooling of dose-response coefficients across studies.

Stage one fits each study's curve (:func:`doseattr.core.curves.fit.fit_curve`),
giving coefficients :math:`b_i` ``(p,)`` and their covariance :math:`S_i`.
Stage two, here, pools them under

.. math:: b_i \sim N(\mu, S_i + T), \qquad i = 1, \dots, k

with :math:`T` the between-study covariance (``T = 0``: fixed effect). The
pooled estimate is the generalized least squares mean

.. math:: \hat\mu = \Big(\sum V_i^{-1}\Big)^{-1} \sum V_i^{-1} b_i, \qquad
          \operatorname{cov}(\hat\mu) = \Big(\sum V_i^{-1}\Big)^{-1},
          \qquad V_i = S_i + \hat T

``T`` by DerSimonian & Laird (1986, Control Clin Trials 7:177), its
multivariate extension (Jackson, White & Thompson 2010, Stat Med 29:1282),
or restricted maximum likelihood (:mod:`doseattr.core.curves.pooling_reml`).
All from memory; the moment identities are derived in the docstrings.

A pooled curve describes the average population of the studies; a new
population's curve varies about it with covariance :math:`T` as well
(:meth:`Pooled.predictive_covariance`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import FloatArray
from doseattr.core.curves.pooling_reml import (
    reml_multivariate,
    reml_univariate,
    restricted_log_likelihood,
)
from doseattr.errors import ModelError

METHODS = ("random-effects", "fixed")
TAU_METHODS = ("reml", "dl")
#: Relative asymmetry of a study's covariance tolerated (then symmetrised).
_SYMMETRY_RTOL = 1e-8


@dataclass(frozen=True)
class Pooled:
    r"""Pooled coefficients of ``k`` studies.

    Attributes
    ----------
    coefficients, covariance
        :math:`\hat\mu` ``(p,)`` and its covariance ``(p, p)``.
    tau2
        Between-study variance :math:`\hat\tau^2` (a float) when ``p == 1``,
        the between-study covariance :math:`\hat T` ``(p, p)`` otherwise;
        0 for the fixed-effect method.
    q, df, p_value
        Cochran's heterogeneity statistic about the fixed-effect mean
        :math:`Q = \sum (b_i - \hat\mu_{FE})' S_i^{-1} (b_i - \hat\mu_{FE})`,
        :math:`\chi^2` on ``df = p (k - 1)`` under homogeneity (the
        multivariate generalisation of Cochran's Q; from memory).
    i2
        :math:`I^2 = \max(0, (Q - df)/Q)` (Higgins & Thompson 2002, Stat Med
        21:1539); for ``p > 1`` the multivariate generalisation of the same
        formula on the multivariate Q (Jackson, White & Riley 2012, Stat Med
        31:3805; from memory). 0 when ``Q == 0``.
    weights
        Each study's share of the pooled estimate, summing to 1:
        :math:`\mathrm{tr}(A^{-1} V_i^{-1})/p`, :math:`A = \sum V_j^{-1}`,
        the trace share of the matrix weight study ``i`` gets in
        :math:`\hat\mu = \sum (A^{-1}V_i^{-1}) b_i`. For ``p == 1`` it is
        :math:`w_i / \sum w_j` with :math:`w_i = 1/(v_i + \tau^2)`.
    method, tau_method
        ``"random-effects"`` or ``"fixed"``; ``"reml"``, ``"dl"`` or ``None``
        (fixed effect).
    converged
        Whether the REML search converged (``True`` for closed forms).
    restricted_loglik
        :math:`\ell_R(\hat T)` (:func:`~doseattr.core.curves.pooling_reml.restricted_log_likelihood`).
    names
        Study labels, in order.
    notes
        Plain-language remarks for the report.
    """

    coefficients: FloatArray
    covariance: FloatArray
    tau2: float | FloatArray
    q: float
    df: int
    p_value: float
    i2: float
    weights: FloatArray
    method: str
    tau_method: str | None
    converged: bool
    restricted_loglik: float
    names: tuple[str, ...]
    notes: tuple[str, ...] = ()

    @property
    def between_covariance(self) -> FloatArray:
        """:math:`\\hat T` as a ``(p, p)`` array whatever ``p``."""
        p = self.coefficients.size
        return cast(FloatArray, np.asarray(self.tau2, dtype=float).reshape(p, p))

    def predictive_covariance(self) -> FloatArray:
        r"""Covariance of a new population's coefficients about
        :math:`\hat\mu`: :math:`\operatorname{cov}(\hat\mu) + \hat T`
        ``(p, p)`` (the predictive distribution of random-effects
        meta-analysis; Higgins, Thompson & Spiegelhalter 2009, J R Stat Soc A
        172:137, from memory, there with a t rather than normal quantile)."""
        return cast(FloatArray, self.covariance + self.between_covariance)


def pool(coefficients: Sequence[ArrayLike], covariances: Sequence[ArrayLike], *,
         method: str = "random-effects", tau_method: str = "reml",
         names: Sequence[str] | None = None) -> Pooled:
    r"""Pool per-study coefficient vectors by fixed or random effects.

    Parameters
    ----------
    coefficients
        ``k >= 2`` vectors :math:`b_i` of the same length ``p``.
    covariances
        Their positive definite covariances :math:`S_i` ``(p, p)``.
    method
        ``"random-effects"`` (default) or ``"fixed"`` (``T = 0``; GLS
        :math:`(\sum S_i^{-1})^{-1}\sum S_i^{-1} b_i`).
    tau_method
        ``"reml"`` (default; :func:`~doseattr.core.curves.pooling_reml.reml_univariate`
        for ``p == 1``, :func:`~doseattr.core.curves.pooling_reml.reml_multivariate`
        otherwise) or ``"dl"`` (:func:`dl_tau2` for ``p == 1``,
        :func:`dl_multivariate` otherwise).
    names
        Study labels for messages and notes (default ``"study 1"``, ...).
    """
    from scipy.special import chdtrc  # scipy.stats.chi2.sf without scipy.stats

    labels = _labels(names, len(coefficients))
    b, s = _validate(coefficients, covariances, labels)
    _check_choice(method, tau_method)
    k, p = b.shape
    s_inv = _inverse(s)
    b_fe, cov_fe = _gls(b, s_inv)
    q = _cochran_q(b, s_inv, b_fe)
    df = p * (k - 1)
    t, converged, notes = np.zeros((p, p)), True, list[str]()
    if method == "random-effects":
        t, converged, notes = _between(b, s, s_inv, tau_method)
    v_inv = _inverse(s + t)
    mu, cov = (b_fe, cov_fe) if method == "fixed" else _gls(b, v_inv)
    weights = np.einsum("ij,kji->k", cov, v_inv) / p
    notes += _general_notes(k, p, q, df, method)
    return Pooled(coefficients=mu, covariance=cov, tau2=float(t[0, 0]) if p == 1 else t,
                  q=q, df=df, p_value=float(chdtrc(df, q)), i2=i_squared(q, df),
                  weights=weights, method=method,
                  tau_method=tau_method if method == "random-effects" else None,
                  converged=converged, restricted_loglik=restricted_log_likelihood(b, s, t),
                  names=labels, notes=tuple(notes))


def nonlinearity_test(pooled: Pooled, indices: Sequence[int]) -> tuple[float, int, float]:
    r"""Wald test that the pooled coefficients ``indices`` are all zero.

    .. math:: W = \hat\mu_I' \operatorname{cov}(\hat\mu)_{II}^{-1} \hat\mu_I
              \sim \chi^2_{|I|}

    For a restricted cubic spline the indices are its non-linear terms
    (``RestrictedCubicSpline.nonlinear_index``): a test of linearity of the
    pooled curve (Wald test; common practice). Returns ``(W, df, p)`` like
    :func:`doseattr.core.curves.spline.nonlinearity_test`.
    """
    from scipy.special import chdtrc  # scipy.stats.chi2.sf without scipy.stats

    idx = np.asarray(indices, dtype=int).ravel()
    p = pooled.coefficients.size
    if idx.size == 0 or np.unique(idx).size != idx.size or np.any((idx < 0) | (idx >= p)):
        raise ModelError(f"coefficient indices {list(idx)} must be distinct and in 0..{p - 1}; "
                         f"give the positions of the non-linear terms")
    b = pooled.coefficients[idx]
    try:
        chol = np.linalg.cholesky(pooled.covariance[np.ix_(idx, idx)])
    except np.linalg.LinAlgError:
        raise ModelError("the pooled covariance of these coefficients is not positive "
                         "definite; no Wald test") from None
    z = np.linalg.solve(chol, b)
    w = float(z @ z)
    return w, int(idx.size), float(chdtrc(idx.size, w))


def i_squared(q: float, df: int) -> float:
    """:math:`I^2 = \\max(0, (Q - df)/Q)` (Higgins & Thompson 2002); 0 at Q = 0."""
    return max(0.0, (q - df) / q) if q > 0 else 0.0


def dl_tau2(b: FloatArray, v: FloatArray) -> float:
    r"""DerSimonian-Laird :math:`\tau^2` for one coefficient:

    .. math:: \hat\tau^2 = \max\Big(0, \frac{Q - (k-1)}
              {\sum w_i - \sum w_i^2 / \sum w_i}\Big), \qquad w_i = 1/v_i

    (DerSimonian & Laird 1986, from memory).
    """
    w = 1.0 / v
    mu = (w @ b) / w.sum()
    q = float(w @ (b - mu) ** 2)
    return max(0.0, (q - (b.size - 1)) / float(w.sum() - (w ** 2).sum() / w.sum()))


def dl_moment_matrix(b: FloatArray, s_inv: FloatArray) -> FloatArray:
    r"""Unbiased, untruncated moment estimate of ``T`` for ``p`` coefficients.

    With :math:`W_i = S_i^{-1}`, :math:`W = \sum W_i`, :math:`\hat\mu_{FE}`
    the fixed-effect mean and the ``(p, p)`` matrix
    :math:`Q = \sum_i W_i (b_i - \hat\mu_{FE})(b_i - \hat\mu_{FE})'`,

    .. math:: E[Q] = (k-1) I + B T, \qquad B = W - \sum_i W_i W^{-1} W_i

    (derived here by expanding :math:`b_i - \hat\mu_{FE}` about
    :math:`\mu`; Jackson, White & Thompson 2010 use this identity, from
    memory), so :math:`\tilde T = B^{-1}(Q - (k-1)I)` has expectation
    :math:`T`. ``B`` is positive definite when ``k >= 2``
    (:math:`W^{-1/2}BW^{-1/2} = I - \sum M_i^2`, :math:`M_i \le I`). For
    ``p == 1`` it is the DerSimonian-Laird estimate before truncation.
    """
    k, p = b.shape
    w = s_inv.sum(axis=0)
    w_inv = np.linalg.inv(w)
    d = b - w_inv @ np.einsum("kij,kj->i", s_inv, b)
    q = np.einsum("kij,kj,kl->il", s_inv, d, d)
    bmat = w - np.einsum("kij,jl,klm->im", s_inv, w_inv, s_inv)
    return cast(FloatArray, np.linalg.solve((bmat + bmat.T) / 2.0, q - (k - 1) * np.eye(p)))


def dl_multivariate(b: FloatArray, s_inv: FloatArray) -> FloatArray:
    r"""Multivariate DerSimonian-Laird ``T`` (Jackson, White & Thompson 2010):
    :func:`dl_moment_matrix`, made symmetric, its negative eigenvalues set to
    0 so that ``T`` is positive semidefinite (from memory)."""
    t = dl_moment_matrix(b, s_inv)
    lam, vec = np.linalg.eigh((t + t.T) / 2.0)
    return cast(FloatArray, (vec * np.maximum(lam, 0.0)) @ vec.T)


def _between(b: FloatArray, s: FloatArray, s_inv: FloatArray,
             tau_method: str) -> tuple[FloatArray, bool, list[str]]:
    p = b.shape[1]
    v = s[:, 0, 0]
    if p == 1:
        start = dl_tau2(b[:, 0], v)
        if tau_method == "dl":
            return np.array([[start]]), True, _boundary_note(start == 0.0)
        tau2, converged = reml_univariate(b[:, 0], v, start)
        return np.array([[tau2]]), converged, _boundary_note(tau2 == 0.0) + _reml_note(converged)
    t0 = dl_multivariate(b, s_inv)
    if tau_method == "dl":
        return t0, True, _rank_note(t0)
    fit = reml_multivariate(b, s, t0)
    return fit.t, fit.converged, _rank_note(fit.t) + _reml_note(fit.converged, fit.message)


def _boundary_note(zero: bool) -> list[str]:
    if not zero:
        return []
    return ["the between-study variance is estimated as 0: the studies agree within their "
            "own uncertainty, so random effects give the fixed-effect estimate"]


def _rank_note(t: FloatArray) -> list[str]:
    rank = int(np.sum(np.linalg.eigvalsh(t) > 0.0))
    if rank == t.shape[0]:
        return []
    if rank == 0:
        return _boundary_note(True)
    return [f"the between-study covariance is singular (rank {rank} of {t.shape[0]}): "
            f"some combinations of coefficients show no heterogeneity"]


def _reml_note(converged: bool, message: str = "") -> list[str]:
    if converged:
        return []
    detail = f" ({message})" if message else ""
    return [f"the REML search for the between-study variance did not converge{detail}; "
            f"treat the random-effects estimate with caution or use tau_method 'dl'"]


def _general_notes(k: int, p: int, q: float, df: int, method: str) -> list[str]:
    from scipy.special import chdtrc  # scipy.stats.chi2.sf without scipy.stats

    notes = []
    if method == "random-effects" and p > 1 and k < p + 2:
        notes.append(f"only {k} studies for {p * (p + 1) // 2} between-study (co)variances: "
                     f"the between-study covariance is poorly determined")
    elif method == "random-effects" and k < 5:
        notes.append(f"only {k} studies: the between-study variance is imprecise")
    if method == "fixed" and q > df and chdtrc(df, q) < 0.05:
        notes.append(f"the studies differ more than their own uncertainty allows "
                     f"(Q = {q:.3g} on {df} df); the fixed-effect interval is too narrow, "
                     f"consider random effects")
    return notes


def _gls(b: FloatArray, v_inv: FloatArray) -> tuple[FloatArray, FloatArray]:
    cov = np.linalg.inv(v_inv.sum(axis=0))
    cov = (cov + cov.T) / 2.0
    return cast(FloatArray, cov @ np.einsum("kij,kj->i", v_inv, b)), cast(FloatArray, cov)


def _cochran_q(b: FloatArray, s_inv: FloatArray, b_fe: FloatArray) -> float:
    d = b - b_fe
    return float(np.einsum("ki,kij,kj->", d, s_inv, d))


def _inverse(s: FloatArray) -> FloatArray:
    inv = np.linalg.inv(s)
    return cast(FloatArray, (inv + np.swapaxes(inv, 1, 2)) / 2.0)


def _check_choice(method: str, tau_method: str) -> None:
    if method not in METHODS:
        raise ModelError(f"pooling method {method!r} is not one of {', '.join(METHODS)}")
    if tau_method not in TAU_METHODS:
        raise ModelError(f"between-study variance method {tau_method!r} is not one of "
                         f"{', '.join(TAU_METHODS)}")


def _labels(names: Sequence[str] | None, k: int) -> tuple[str, ...]:
    if names is None:
        return tuple(f"study {i + 1}" for i in range(k))
    if len(names) != k:
        raise ModelError(f"{len(names)} study names for {k} studies; give one name per study")
    return tuple(str(n) for n in names)


def _validate(coefficients: Sequence[ArrayLike], covariances: Sequence[ArrayLike],
              labels: tuple[str, ...]) -> tuple[FloatArray, FloatArray]:
    k = len(coefficients)
    if k < 2:
        raise ModelError(f"pooling needs at least 2 studies, got {k}; "
                         f"use the single study's curve as it is")
    if len(covariances) != k:
        raise ModelError(f"{k} coefficient vectors but {len(covariances)} covariance "
                         f"matrices; give one covariance per study")
    b = [np.atleast_1d(np.asarray(c, dtype=float)) for c in coefficients]
    p = b[0].size
    s = [_study_covariance(cov, bi, p, name, labels[0])
         for cov, bi, name in zip(covariances, b, labels)]
    return np.stack(b), np.stack(s)


def _study_covariance(cov: ArrayLike, b: FloatArray, p: int, name: str,
                      first: str) -> FloatArray:
    s = np.atleast_2d(np.asarray(cov, dtype=float))
    if b.shape != (p,):
        raise ModelError(f"{name}: coefficients have shape {b.shape}, {first}'s ({p},); "
                         f"fit every study with the same model (and knots)")
    if s.shape != (p, p):
        raise ModelError(f"{name}: covariance has shape {s.shape}, expected ({p}, {p}) "
                         f"for its {p} coefficients")
    if not (np.all(np.isfinite(b)) and np.all(np.isfinite(s))):
        raise ModelError(f"{name}: coefficients and their covariance must be finite numbers")
    if np.max(np.abs(s - s.T)) > _SYMMETRY_RTOL * np.max(np.abs(s)):
        raise ModelError(f"{name}: covariance of the coefficients is not symmetric; "
                         f"check the matrix entered")
    s = (s + s.T) / 2.0
    try:
        np.linalg.cholesky(s)
    except np.linalg.LinAlgError:
        raise ModelError(f"{name}: covariance of the coefficients is not positive definite; "
                         f"refit the study's curve or correct its covariance") from None
    return cast(FloatArray, s)
