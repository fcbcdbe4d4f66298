r"""The classic multi-category attributable fraction, and how far it is from
the continuous one.

With shares :math:`p_i` of the population in bands :math:`i` and relative
risks :math:`RR_i` (Rockhill, Newman & Weinberg 1998, Am J Public Health
88:15; Hanley 2001, J Epidemiol Community Health 55:508):

.. math::
    PAF = \frac{\sum_i p_i (RR_i - 1)}{1 + \sum_i p_i (RR_i - 1)}.

Levin's (1953) single-level formula is the case of one exposed band. The
category RRs are taken three ways: as the study reported them (only when
the bands are the study's own), the curve at each band's midpoint, and the
curve at each band's conditional mean exposure under the fitted
distribution.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.attribution.fractions import paf as continuous_paf
from doseattr.core.curves.base import Curve
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.empirical import EmpiricalExposure

AnyExposure = Exposure | EmpiricalExposure

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class CategoricalMethod:
    """One way of assigning band RRs, with the PAF it gives."""

    method: str
    rr: FloatArray
    paf: float
    difference: float


@dataclass(frozen=True)
class CategoricalComparison:
    """Bands ``[0, c1), [c1, c2), ..., [cK, inf)`` and the PAF per method.

    ``convergence`` holds ``(k, paf)`` for ``k`` equal-probability bands of
    the exposed population (RR at each band's mean); the unexposed share,
    if any, forms one more band at zero exposure.
    """

    cutpoints: FloatArray
    shares: FloatArray
    midpoints: FloatArray
    band_means: FloatArray
    methods: tuple[CategoricalMethod, ...]
    continuous_paf: float
    convergence: tuple[tuple[int, float], ...]

    @property
    def lower(self) -> FloatArray:
        return np.concatenate([[0.0], self.cutpoints])

    @property
    def upper(self) -> FloatArray:
        return np.concatenate([self.cutpoints, [np.inf]])


def multi_category_paf(shares: ArrayLike, rr: ArrayLike) -> float:
    r""":math:`\sum p_i(RR_i - 1) / (1 + \sum p_i(RR_i - 1))`."""
    p, r = np.asarray(shares, dtype=float), np.asarray(rr, dtype=float)
    assert p.shape == r.shape and np.all(p >= 0) and np.all(r > 0)
    excess = float(np.sum(p * (r - 1.0)))
    return excess / (1.0 + excess)


def band_shares(exposure: AnyExposure, cutpoints: ArrayLike) -> FloatArray:
    """Population share in each band, the unexposed in the first."""
    cuts = np.asarray(cutpoints, dtype=float)
    if isinstance(exposure, EmpiricalExposure):
        u = exposure.unexposed
        below = u + (1 - u) * _SortedPoints.of(exposure).mass_at_or_below(cuts)
        return _diff_shares(below)
    edges = np.concatenate([[0.0], cuts])
    return _diff_shares(exposure.cdf(edges[1:]))


def _diff_shares(below: FloatArray) -> FloatArray:
    below = np.minimum(below, 1.0)
    # weights normalised to 1 can sum to 1 + eps: clip rounding below zero
    return np.maximum(np.diff(np.concatenate([[0.0], below, [1.0]])), 0.0)


def band_means(exposure: AnyExposure, cutpoints: ArrayLike) -> FloatArray:
    r"""Conditional mean exposure in each band,
    :math:`E[X \mid a \le X < b] = (1-u)\,E[X; a < X \le b] / p`."""
    cuts = np.asarray(cutpoints, dtype=float)
    lo = np.concatenate([[0.0], cuts])
    hi = np.concatenate([cuts, [np.inf]])
    pm = (1 - exposure.unexposed) * _partial_mean(exposure, lo, hi)
    p = band_shares(exposure, cuts)
    return _conditional(pm, p, lo, hi)


def _conditional(pm: FloatArray, p: FloatArray, lo: FloatArray, hi: FloatArray) -> FloatArray:
    """``pm / p``, the band's middle where it holds no one."""
    middle = 0.5 * lo + 0.5 * np.where(np.isfinite(hi), hi, lo)  # halves first: no overflow
    return np.where(p > 0, pm / np.where(p > 0, p, 1.0), middle)


def _partial_mean(exposure: AnyExposure, lo: FloatArray, hi: FloatArray) -> FloatArray:
    """E[X; lo < X <= hi] of the exposed part (a weighted sum for values)."""
    if isinstance(exposure, EmpiricalExposure):
        return _SortedPoints.of(exposure).partial_mean(lo, hi)
    return exposure.family.partial_mean(lo, hi, exposure.params)


#: A cumulative weight within this relative distance below a quantile's
#: level counts as reaching it (sums of the same weights in another order
#: differ by rounding; the exact quantile is the smaller value).
_LEVEL_RTOL = 1e-10


@dataclass(frozen=True)
class _SortedPoints:
    """The distinct values of an empirical exposure, ascending, with their
    summed weights (:attr:`EmpiricalExposure.points`, one sort cached on
    the exposure) and the sums every band statistic needs."""

    x: FloatArray
    w: FloatArray
    cum: FloatArray
    wx: FloatArray

    @classmethod
    def of(cls, exposure: EmpiricalExposure) -> _SortedPoints:
        x, w, _ = exposure.points
        return cls(x, w, np.cumsum(w), w * x)

    def mass_at_or_below(self, c: FloatArray) -> FloatArray:
        r""":math:`\sum_i w_i [x_i \le c]` (each weight summed once, in order)."""
        idx = np.searchsorted(self.x, c, side="right")
        return np.where(idx > 0, self.cum[np.maximum(idx - 1, 0)], 0.0)

    def quantiles(self, q: FloatArray) -> FloatArray:
        """The smallest value whose cumulative weight reaches ``q`` of the
        total (the inverted weighted CDF)."""
        level = q * self.cum[-1] * (1 - _LEVEL_RTOL)
        idx = np.minimum(np.searchsorted(self.cum, level), self.cum.size - 1)
        return cast(FloatArray, self.x[idx])

    def partial_mean(self, lo: FloatArray, hi: FloatArray) -> FloatArray:
        r""":math:`\sum_i w_i x_i [lo < x_i \le hi]` per band, each band's
        sum taken over its own points (no difference of running sums, which
        would lose the digits of a band small beside the total)."""
        a = np.searchsorted(self.x, lo, side="right")
        b = np.searchsorted(self.x, hi, side="right")
        return _segment_sums(self.wx, a, b)


def _segment_sums(v: FloatArray, a: NDArray[np.intp], b: NDArray[np.intp]) -> FloatArray:
    """``v[a_j:b_j].sum()`` for each ``j`` (0 for an empty segment); a few
    bands, so a loop over them costs O(len(v)) for disjoint bands."""
    return np.array([float(v[i:j].sum()) if j > i else 0.0
                     for i, j in zip(a.tolist(), b.tolist())])


def _exposed_quantiles(exposure: AnyExposure, q: FloatArray) -> FloatArray:
    """Quantiles of the exposed part (inverted weighted CDF for values)."""
    if isinstance(exposure, EmpiricalExposure):
        return _SortedPoints.of(exposure).quantiles(q)
    return exposure.family.ppf(q, exposure.params)


def band_midpoints(cutpoints: ArrayLike) -> FloatArray:
    """Band midpoints; the open top band gets its lower limit plus half the
    width of the band below (common practice)."""
    cuts = np.asarray(cutpoints, dtype=float)
    lo = np.concatenate([[0.0], cuts])
    mids = 0.5 * (lo[:-1] + cuts)
    width_below = cuts[-1] - lo[-2]
    return np.concatenate([mids, [cuts[-1] + 0.5 * width_below]])


def rr_at(curve: Curve, doses: ArrayLike, minimum_risk: float) -> FloatArray:
    """:math:`RR_m` at the given doses."""
    d = np.maximum(np.asarray(doses, dtype=float), minimum_risk)
    return np.exp(curve.log_rr(d) - curve.log_rr(np.array([minimum_risk])))


def equal_probability_paf(curve: Curve, exposure: AnyExposure, bands: int,
                          minimum_risk: float) -> float:
    """Categorical PAF with ``bands`` equal-probability bands of the exposed:
    cutpoints at the exposed part's quantiles :math:`j/K`, RR at each band's
    conditional mean, the unexposed share one more band at RR 1."""
    return equal_probability_pafs(curve, exposure, (bands,), minimum_risk)[0]


def equal_probability_pafs(curve: Curve, exposure: AnyExposure, bands: Sequence[int],
                           minimum_risk: float) -> tuple[float, ...]:
    """:func:`equal_probability_paf` for each number of bands, the values
    of an empirical exposure sorted once for all of them."""
    if not isinstance(exposure, EmpiricalExposure):
        exposed = replace(exposure, unexposed=0.0)
        return tuple(_equal_probability(curve, exposure.unexposed, k, minimum_risk,
                                        lambda c: band_shares(exposed, c),
                                        lambda c: band_means(exposed, c),
                                        lambda q: _exposed_quantiles(exposure, q))
                     for k in bands)
    pts = _SortedPoints.of(exposure)

    def means(c: FloatArray) -> FloatArray:
        lo, hi = np.concatenate([[0.0], c]), np.concatenate([c, [np.inf]])
        return _conditional(pts.partial_mean(lo, hi), shares(c), lo, hi)

    def shares(c: FloatArray) -> FloatArray:
        return _diff_shares(pts.mass_at_or_below(c))

    return tuple(_equal_probability(curve, exposure.unexposed, k, minimum_risk,
                                    shares, means, pts.quantiles) for k in bands)


def _equal_probability(curve: Curve, unexposed: float, bands: int, minimum_risk: float,
                       shares: Callable[[FloatArray], FloatArray],
                       means: Callable[[FloatArray], FloatArray],
                       quantiles: Callable[[FloatArray], FloatArray]) -> float:
    """One equal-probability PAF from the exposed part's band shares, band
    means and quantiles."""
    cuts = quantiles(np.arange(1, bands) / bands)
    p = (1 - unexposed) * shares(cuts)
    rr = rr_at(curve, means(cuts), minimum_risk)
    return multi_category_paf(np.append(p, unexposed), np.append(rr, 1.0))


def _usable_cuts(cuts: FloatArray) -> FloatArray:
    """Cutpoints that bound bands: positive, finite, each once. Quantiles of
    a distribution with nearly all its mass at 0 (a gamma shape near 0)
    underflow to 0 or coincide; the smallest positive float stands in when
    none is left, so the lowest band still holds the mass near 0."""
    kept = np.unique(cuts[np.isfinite(cuts) & (cuts > 0)])
    return kept if kept.size else np.array([np.finfo(float).tiny])


def categorical_comparison(curve: Curve, exposure: AnyExposure, *, minimum_risk: float,
                           cutpoints: ArrayLike, reported_rr: ArrayLike | None = None,
                           max_bands: int = 20) -> CategoricalComparison:
    """Compare the multi-category PAF under each RR assignment with the
    continuous PAF.

    Parameters
    ----------
    cutpoints
        Increasing positive band limits ``c1 < ... < cK``.
    reported_rr
        The study's RRs for the ``K + 1`` bands, given only when the
        cutpoints are the study's own band limits.
    """
    cuts = _usable_cuts(np.asarray(cutpoints, dtype=float).reshape(-1))
    shares = band_shares(exposure, cuts)
    mids = band_midpoints(cuts)
    means = band_means(exposure, cuts)
    cont = continuous_paf(curve, exposure, minimum_risk=minimum_risk)
    assigned = []
    if reported_rr is not None:
        assigned.append(("reported", np.asarray(reported_rr, dtype=float)))
    assigned.append(("midpoint", rr_at(curve, mids, minimum_risk)))
    assigned.append(("band-mean", rr_at(curve, means, minimum_risk)))
    methods = tuple(
        CategoricalMethod(name, rr, multi_category_paf(shares, rr),
                          multi_category_paf(shares, rr) - cont)
        for name, rr in assigned)
    counts = range(2, max_bands + 1)
    convergence = tuple(zip(counts, equal_probability_pafs(curve, exposure, counts,
                                                           minimum_risk)))
    return CategoricalComparison(cuts, shares, mids, means, methods, cont, convergence)
