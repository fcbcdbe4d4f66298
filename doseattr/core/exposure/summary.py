r"""Exposure distributions from published summaries.

- :func:`from_parameters`, :func:`from_gm_gsd`: parameters as entered.
- :func:`from_mean_sd`: method of moments (each family's ``from_moments``).
- :func:`from_percentiles`: the member whose quantiles pass through the given
  percentiles, exactly for two, by least squares on the log scale for more:
  :math:`\min_\theta \sum_i [\ln Q(p_i; \theta) - \ln x_i]^2`.
- :func:`fit_bins`: grouped (interval-censored) maximum likelihood from
  counts or shares per band ``[lower, upper)``, the top band possibly open:
  :math:`\ell(\theta) = \sum_j n_j \ln[F(u_j) - F(l_j)]`
  (multinomial likelihood of grouped data; e.g. Kendall & Stuart, The
  Advanced Theory of Statistics, vol. 2, ch. on grouped data - from memory).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import ndtri

from doseattr.core.exposure.base import Exposure, ExposureFit, Family, FloatArray, check_usable
from doseattr.core.exposure.mle import maximise
from doseattr.core.exposure.registry import get_family
from doseattr.errors import ModelError


def from_parameters(family: str | Family, params: Mapping[str, float], *, source: str = "entered") -> Exposure:
    """The family with public parameters given by name, e.g.
    ``{"shape": 2.0, "scale": 1.5}``; ModelError on missing or extra names."""
    fam = get_family(family)
    if set(params) != set(fam.param_names):
        raise ModelError(f"{fam.name} takes parameters {', '.join(fam.param_names)}; "
                         f"got {', '.join(map(str, params)) or 'none'}")
    vector = np.array([float(params[n]) for n in fam.param_names])
    fam.check(vector)
    check_usable(fam, vector)
    return Exposure(fam, vector, source=source)


def from_gm_gsd(gm: float, gsd: float) -> Exposure:
    """Lognormal with geometric mean ``gm`` and geometric SD ``gsd`` (> 1)."""
    return from_parameters("lognormal", {"gm": gm, "gsd": gsd}, source="gm-gsd")


def _positive(value: float, what: str) -> float:
    if not (np.isfinite(value) and value > 0):
        raise ModelError(f"{what} must be a positive number, got {value}")
    return float(value)


def from_mean_sd(family: str | Family, mean: float, sd: float) -> Exposure:
    """The member with this arithmetic mean and standard deviation
    (formulas in each family's ``from_moments``)."""
    fam = get_family(family)
    params = fam.from_moments(_positive(mean, "mean"), _positive(sd, "sd"))
    if not np.all(np.isfinite(params) & (params > 0)):
        shown = ", ".join(f"{n} {v:.6g}" for n, v in zip(fam.param_names, params))
        raise ModelError(f"sd / mean = {sd / mean:.3g} gives {fam.name} parameters outside the "
                         f"float range ({shown}); give an sd nearer the mean")
    fam.check(params)
    check_usable(fam, params)
    return Exposure(fam, params, source="mean-sd")


def _percentile_table(percentiles: Mapping[float, float]) -> tuple[FloatArray, FloatArray]:
    if len(percentiles) < 2:
        raise ModelError("give at least two percentiles (for example the median and the 95th)")
    pct = np.array(sorted(percentiles), dtype=float)
    x = np.array([float(percentiles[p]) for p in sorted(percentiles)])
    if not np.all((pct > 0) & (pct < 100)):
        raise ModelError(f"percentiles must lie strictly between 0 and 100, got {pct.tolist()}")
    if not np.all(np.isfinite(x) & (x > 0)):
        raise ModelError(f"percentile values must be positive numbers, got {x.tolist()}")
    if np.any(np.diff(x) <= 0):
        raise ModelError(f"percentile values must increase with the percentile, got {dict(zip(pct, x))}")
    return pct / 100.0, x


def from_percentiles(family: str | Family, percentiles: Mapping[float, float]) -> Exposure:
    """The member through the given percentiles, ``{pct: value}`` with
    ``0 < pct < 100`` (module docstring). ModelError when two percentiles
    cannot be matched exactly."""
    from scipy.optimize import least_squares

    fam = get_family(family)
    p, x = _percentile_table(percentiles)
    z = ndtri(p[[0, -1]])
    s = (np.log(x[-1]) - np.log(x[0])) / (z[1] - z[0])
    with np.errstate(over="ignore", invalid="ignore"):
        mean = x[0] * np.exp(-s * z[0] + 0.5 * s * s)
        start = fam.to_internal(fam.from_moments(mean, mean * np.sqrt(np.expm1(s * s))))
    if not np.all(np.isfinite(start)):
        raise ModelError(f"the percentiles {x[0]:g} and {x[-1]:g} are too far apart: a "
                         f"{fam.name} through them has a mean or spread beyond the float range; "
                         "check the values and their unit")

    def residuals(theta: FloatArray) -> FloatArray:
        with np.errstate(all="ignore"):
            r = np.log(fam.ppf(p, fam.from_internal(theta))) - np.log(x)
        return np.where(np.isfinite(r), r, 1e6)

    res = least_squares(residuals, start, xtol=1e-15, ftol=1e-15, gtol=1e-15)
    rms = float(np.sqrt(np.mean(res.fun ** 2)))
    if p.size == 2 and rms > 1e-8:
        raise ModelError(f"no {fam.name} distribution has these two percentiles "
                         f"(closest misses by {rms:.2g} on the log scale); try another family")
    params = fam.from_internal(res.x)
    fam.check(params)
    check_usable(fam, params, "check the percentiles and their unit")
    notes = () if p.size == 2 else (f"least-squares fit to {p.size} percentiles: RMS log-scale residual {rms:.3g}",)
    return Exposure(fam, params, source="percentiles", notes=notes)


def log_band_prob(family: Family, lower: FloatArray, upper: FloatArray, params: ArrayLike) -> FloatArray:
    r"""``ln[F(upper) - F(lower)]`` computed from the side of the median that
    keeps precision: :math:`\ln F(u) + \ln(1 - e^{\ln F(l) - \ln F(u)})`
    below it, the same with survival functions above it."""
    lo = np.where(lower > 0, lower, 1.0)
    hi = np.where(np.isfinite(upper), upper, 1.0)
    cdf_lo = np.where(lower > 0, family.logcdf(lo, params), -np.inf)
    cdf_hi = np.where(np.isfinite(upper), family.logcdf(hi, params), 0.0)
    sf_lo = np.where(lower > 0, family.logsf(lo, params), 0.0)
    sf_hi = np.where(np.isfinite(upper), family.logsf(hi, params), -np.inf)
    with np.errstate(divide="ignore"):
        left = cdf_hi + _log1mexp(cdf_lo - cdf_hi)
        right = sf_lo + _log1mexp(sf_hi - sf_lo)
    return np.where(cdf_lo > np.log(0.5), right, left)


def _log1mexp(a: FloatArray) -> FloatArray:
    """ln(1 - e^a) for a <= 0 (Maechler 2012, CRAN note "Accurately computing
    log(1 - exp(-|a|))"; from memory)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(a > -np.log(2), np.log(-np.expm1(a)), np.log1p(-np.exp(a)))


def _bands(lower: ArrayLike, upper: ArrayLike, counts: ArrayLike) -> tuple[FloatArray, FloatArray, FloatArray]:
    lo, hi, n = (np.asarray(v, dtype=float).ravel() for v in (lower, upper, counts))
    if not lo.size == hi.size == n.size:
        raise ModelError("lower, upper and counts must have the same length")
    if not (np.all(np.isfinite(lo)) and np.all(lo >= 0) and np.all(hi > lo)):
        raise ModelError("each band needs 0 <= lower < upper (upper may be inf for an open top band)")
    order = np.argsort(lo)
    lo, hi, n = lo[order], hi[order], n[order]
    if np.any(lo[1:] < hi[:-1]):
        raise ModelError("bands overlap: each band is [lower, upper) and must end where or before the next begins")
    if not (np.all(np.isfinite(n)) and np.all(n >= 0)):
        raise ModelError("counts (or shares) must be non-negative numbers")
    if np.sum(n > 0) < 3:
        raise ModelError("at least three bands with a positive count are needed to fit two parameters")
    return lo, hi, n


def fit_bins(family: str | Family, lower: ArrayLike, upper: ArrayLike, counts: ArrayLike, *,
             total: float | None = None) -> Exposure:
    r"""Grouped maximum likelihood from counts (or shares) per band.

    .. math:: \ell(\theta) = \sum_j n_j \ln[F(u_j; \theta) - F(l_j; \theta)]

    Bands are ``[lower, upper)``, disjoint, ``upper`` may be ``inf``; regions
    outside every band are taken to hold nobody. ``counts`` are numbers of
    people, or shares summing to 1 (not 100). ``total`` rescales either to
    that many people. The covariance (inverse observed information) needs
    counts: shares without ``total`` give none, with a warning.
    """
    fam = get_family(family)
    lo, hi, n = _bands(lower, upper, counts)
    if total is not None:
        n = n * (_positive(total, "total") / n.sum())
    occupied = n > 0

    def loglik(theta: FloatArray) -> float:
        lp = log_band_prob(fam, lo[occupied], hi[occupied], fam.from_internal(theta))
        return float(np.dot(n[occupied], lp))

    mid = np.where(np.isfinite(hi), 0.5 * (lo + hi), 1.5 * lo)
    start = fam.to_internal(fam.start(mid[occupied], n[occupied]))
    best = maximise(loglik, start, what=f"{fam.name} fit to banded data")
    shares = total is None and n.sum() <= 1 + 1e-9
    warns = ("shares without a total number of people: no standard errors; give the total",) if shares else ()
    fit = ExposureFit(method="grouped maximum likelihood", loglik=best.loglik,
                      aic=2 * len(fam.param_names) - 2 * best.loglik, n=0 if shares else round(n.sum()),
                      values=lo, upper=hi, weights=n, cov_internal=None if shares else best.cov,
                      warnings=warns + best.warnings)
    params = fam.from_internal(best.theta)
    fam.check(params)
    return Exposure(fam, params, fit=fit, source="bands")
