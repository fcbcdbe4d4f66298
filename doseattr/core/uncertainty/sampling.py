"""Draws of every uncertain input, each from a Generator passed in.

* Curve coefficients: the curve's own draws when it came as sampled curves,
  otherwise the multivariate normal approximation N(coef, cov) of the fit
  (asymptotic normality of GLS / maximum-likelihood estimates). A linear
  ERR entered with an asymmetric CI maps those normal draws onto its shifted
  lognormal (:class:`~doseattr.core.curves.published.ShiftedLogCurve`), so
  the draws' percentiles are the published limits.
* Exposure parameters: the asymptotic normal of the maximum-likelihood fit
  on the internal (log) scale, ``theta ~ N(theta_hat, I^-1)``, mapped back,
  which keeps positive parameters positive. Distributions entered as
  numbers have no sampling error and stay fixed.
* Empirical exposure: a weighted bootstrap of the rows (none for a census,
  whose points are the whole population), kept as a :class:`Resample` that
  replays the same resamples chunk by chunk instead of a draws x values
  array. A census with an exposure-model
  error (``error_gsd``) keeps its points and draws one multiplicative
  lognormal factor per draw for all of them (:func:`model_error_factors`).
* Minimum-risk level: uniform over ``[low, high]``.
* Observed cases: optionally Poisson with the observed count as mean.
"""

from __future__ import annotations

import copy
from collections.abc import Iterator
from dataclasses import dataclass, replace
from typing import cast

import numpy as np
from numpy.typing import NDArray

from doseattr.core.curves.base import Curve
from doseattr.core.curves.published import ShiftedLogCurve
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.empirical import EmpiricalExposure

FloatArray = NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class Resample:
    """A weighted bootstrap of an empirical exposure that can be replayed:
    the generator as it stood before the resamples were drawn, so every
    :meth:`chunks` gives the same ``draws`` resamples
    (:meth:`~doseattr.core.exposure.empirical.EmpiricalExposure.bootstrap_chunks`).
    ``kept``, when set, holds those chunks already computed (small
    bootstraps: see :data:`KEEP_ELEMENTS`)."""

    exposure: EmpiricalExposure
    draws: int
    start: np.random.Generator
    kept: tuple[tuple[slice, FloatArray], ...] | None = None

    def chunks(self) -> Iterator[tuple[slice, FloatArray]]:
        """``(rows, W)``: the weights ``W (k, U)`` on the distinct values of
        the draws ``rows``, from a copy of the starting generator."""
        if self.kept is not None:
            return iter(self.kept)
        return self.exposure.bootstrap_chunks(copy.deepcopy(self.start), self.draws)


#: A bootstrap whose weights on the distinct values (draws x U) fit in this
#: many numbers (64 MiB) is resampled once and kept, not replayed for every
#: quantity that uses it.
KEEP_ELEMENTS = 1 << 23


@dataclass(frozen=True)
class ExposureDraws:
    """Exposure draws: ``params (D, k)`` for a family, or ``values`` and
    ``weights (D, n)`` (or ``(1, n)``, shared by every draw) for the
    empirical path, whose values draw ``d`` multiplies by ``scale[d]`` when
    ``scale (D,)`` is set (an exposure-model error); ``varies`` says whether
    the draws carry any uncertainty. A bootstrapped empirical exposure has
    ``resample`` set, with ``values`` and ``weights (1, U)`` its distinct
    values and their point weights; its per-draw weights come from
    ``resample.chunks()``."""

    params: FloatArray | None = None
    values: FloatArray | None = None
    weights: FloatArray | None = None
    varies: bool = False
    scale: FloatArray | None = None
    resample: Resample | None = None


def curve_draws(curve: Curve, n: int, rng: np.random.Generator) -> FloatArray:
    r"""Coefficient draws ``(n, p)``.

    A curve supplied as sampled draws is used as it is when ``n`` equals
    the number of draws, and resampled with replacement otherwise. A
    :class:`~doseattr.core.curves.published.ShiftedLogCurve` draws
    :math:`b + side \cdot s \cdot (e^{side \cdot \sigma Z} - 1)` from the
    same standard normals ``Z`` the normal path would use.
    """
    if curve.draws is not None:
        k = curve.draws.shape[0]
        idx = np.arange(n) if n == k else rng.integers(0, k, size=n)
        return np.asarray(curve.draws[idx], dtype=float)
    draws = rng.multivariate_normal(curve.coef, curve.cov, size=n, method="eigh")
    if isinstance(curve, ShiftedLogCurve):
        # the same normal numbers, standardised, then mapped monotonically
        return curve.from_normal((draws - curve.coef) / np.sqrt(curve.cov[0, 0]))
    return draws


def exposure_draws(exposure: Exposure | EmpiricalExposure, n: int,
                   rng: np.random.Generator) -> ExposureDraws:
    """Exposure parameter draws (see module docstring)."""
    if isinstance(exposure, EmpiricalExposure):
        if exposure.census:
            fixed = fixed_exposure(exposure, n)
            if exposure.error_gsd is None:
                return fixed
            assert exposure.error_seed is not None
            return replace(fixed, varies=True,
                           scale=model_error_factors(exposure.error_gsd, exposure.error_seed, n))
        return bootstrap_draws(exposure, n, rng)
    cov = None if exposure.fit is None else exposure.fit.cov_internal
    if cov is None:
        return ExposureDraws(params=np.broadcast_to(exposure.params, (n, exposure.params.size)))
    theta = exposure.family.to_internal(exposure.params)
    df = small_sample_df(exposure)
    if df is None:
        draws = rng.multivariate_normal(theta, cov, size=n, method="eigh")
    else:
        draws = multivariate_t(theta, cov * _hc1(exposure), df, n, rng)
    return ExposureDraws(params=exposure.family.from_internal(draws), varies=True)


def bootstrap_draws(exposure: EmpiricalExposure, n: int,
                    rng: np.random.Generator) -> ExposureDraws:
    """The weighted bootstrap of ``exposure`` (its ``bootstrap`` method) as
    a :class:`Resample`: ``rng`` is copied, then advanced past the numbers
    the resamples take, so the draws after it are those after
    ``exposure.bootstrap(rng, n)``."""
    start = copy.deepcopy(rng)
    values, weights, _ = exposure.points
    kept = None
    if int(n) * values.size <= KEEP_ELEMENTS:
        kept = tuple(exposure.bootstrap_chunks(rng, n))  # advances rng as skip_bootstrap does
    else:
        exposure.skip_bootstrap(rng, n)
    return ExposureDraws(values=values[None, :], weights=weights[None, :],
                         varies=exposure.values.size > 1,
                         resample=Resample(exposure, int(n), start, kept))


def model_error_factors(gsd: float, seed: int, n: int) -> FloatArray:
    r"""Factors :math:`f_d = e^{\ln(GSD)\,Z_d}`, :math:`d < n`, with
    :math:`Z_d` the first ``n`` standard normals of
    ``numpy.random.default_rng(seed)``: a stream of its own, so every
    exposure with the same seed (each zone of a grid, and the pooled
    population) gets the same factors in a run, and the first ``n`` factors
    do not depend on how many are drawn.

    The factor multiplies every cell: a common, fully correlated error of
    the exposure model (its overall level), not independent per-cell
    errors, which would average out over many cells. Its median is 1 (the
    model is taken to be right in the geometric mean) and its mean
    :math:`e^{\ln^2(GSD)/2}` (lognormal mean).
    """
    z = np.random.default_rng(seed).standard_normal(int(n))
    return cast(FloatArray, np.exp(np.log(gsd) * z))


def small_sample_df(exposure: Exposure) -> float | None:
    """Degrees of freedom for an importance-weighted fit's draws: the Kish
    effective sample size less the number of parameters (``None`` for
    other fits, whose draws stay normal)."""
    fit = exposure.fit
    if fit is None or fit.weights_meaning != "importance" or fit.effective_n is None:
        return None
    return max(float(fit.effective_n) - exposure.params.size, 3.0)


def _hc1(exposure: Exposure) -> float:
    """n_eff / (n_eff - p): the small-sample factor of a sandwich covariance
    (MacKinnon & White 1985, J Econometrics 29:305, HC1; from memory)."""
    fit = exposure.fit
    assert fit is not None and fit.effective_n is not None
    p = exposure.params.size
    return float(fit.effective_n) / max(float(fit.effective_n) - p, 1.0)


def multivariate_t(mean: FloatArray, scale: FloatArray, df: float, n: int,
                   rng: np.random.Generator) -> FloatArray:
    r"""``n`` draws of a multivariate t with location ``mean``, scale matrix
    ``scale`` and ``df`` degrees of freedom: :math:`\mu + Z\sqrt{\nu/W}`,
    :math:`Z \sim N(0, \Sigma)`, :math:`W \sim \chi^2_\nu` (Kotz &
    Nadarajah 2004, Multivariate t Distributions; from memory)."""
    z = rng.multivariate_normal(np.zeros_like(mean), scale, size=n, method="eigh")
    w = rng.chisquare(df, size=n)
    return cast(FloatArray, mean + z * np.sqrt(df / w)[:, None])


def fixed_exposure(exposure: Exposure | EmpiricalExposure, n: int) -> ExposureDraws:
    """The exposure at its point estimate, repeated ``n`` times."""
    if isinstance(exposure, EmpiricalExposure):
        return ExposureDraws(values=exposure.values[None, :], weights=exposure.weights[None, :])
    return ExposureDraws(params=np.broadcast_to(exposure.params, (n, exposure.params.size)))


def minimum_risk_draws(low: float, high: float, n: int, rng: np.random.Generator) -> FloatArray:
    """Uniform draws on ``[low, high]`` (all equal when ``low == high``)."""
    assert 0 <= low <= high
    if low == high:
        return np.full(n, float(low))
    return rng.uniform(low, high, size=n)


#: Mean count from which Poisson draws use the normal approximation.
NORMAL_FROM = 1e12


def case_draws(cases: FloatArray, n: int, rng: np.random.Generator, poisson: bool) -> FloatArray:
    """Observed cases per stratum ``(S,)`` -> draws ``(S, n)``; Poisson
    variation around the observed count when ``poisson`` is true.

    numpy's Poisson sampler takes means up to about 9.2e18 (int64); from
    :data:`NORMAL_FROM` on, the normal approximation N(lambda, lambda) is used,
    whose error in distribution is of order lambda^(-1/2) < 1e-6 there
    (the central limit theorem for Poisson counts; from memory)."""
    cases = np.asarray(cases, dtype=float)
    if not poisson:
        return np.broadcast_to(cases[:, None], (cases.size, n))
    big = cases >= NORMAL_FROM
    if not big.any():
        return rng.poisson(cases[:, None], size=(cases.size, n)).astype(float)
    out = np.empty((cases.size, n))
    out[~big] = rng.poisson(cases[~big, None], size=(int((~big).sum()), n))
    lam = cases[big, None]
    out[big] = np.maximum(lam + np.sqrt(lam) * rng.standard_normal((int(big.sum()), n)), 0.0)
    return out
