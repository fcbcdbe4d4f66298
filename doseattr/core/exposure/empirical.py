r"""An empirical exposure distribution: weighted points instead of a family.

The distribution puts weight ``w_i`` (normalised to sum to 1) on each value
``x_i >= 0``; zeros in the data are ordinary points. As for
:class:`~doseattr.core.exposure.base.Exposure`, ``unexposed`` is an extra
point mass at zero (0 unless set, e.g. with ``dataclasses.replace``), so

.. math::

    E[h(X)] = u\,h(0) + (1 - u) \sum_i w_i\, h(x_i).

The attribution engine sums over the points; :meth:`EmpiricalExposure.bootstrap`
gives resampled points for uncertainty, and
:meth:`EmpiricalExposure.bootstrap_chunks` the same resamples a few draws at a
time as weights on the distinct values (:attr:`EmpiricalExposure.points`), so
that memory stays bounded by chunk x distinct values however many draws.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from functools import cached_property
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.exposure.base import Alternative, ExposureFit, FloatArray
from doseattr.core.exposure.sandwich import check_meaning, kish_effective_n
from doseattr.errors import ModelError


class EmpiricalFamily:
    """Marker standing where a parametric exposure has its Family."""

    name: ClassVar[str] = "empirical"
    param_names: ClassVar[tuple[str, ...]] = ()

    def __repr__(self) -> str:
        return "EmpiricalFamily()"


EMPIRICAL = EmpiricalFamily()


@dataclass(frozen=True)
class EmpiricalExposure:
    """Weighted exposure values (build with :func:`empirical`).

    ``weights_meaning`` is ``"frequency"``, ``"importance"`` or ``None``
    (no weights given); it sets what :meth:`bootstrap` resamples.
    """

    values: FloatArray
    weights: FloatArray
    unexposed: float = 0.0
    source: str = "measurements"
    notes: tuple[str, ...] = ()
    weights_meaning: str | None = None
    #: True when the points describe the whole population rather than a
    #: sample of it (a mixture of known distributions, a census grid): they
    #: are not bootstrapped and carry no sampling uncertainty.
    census: bool = False
    #: Geometric standard deviation of a multiplicative exposure-model error
    #: shared by every point (census only; ``None``: no such error): each
    #: Monte Carlo draw ``d`` multiplies every value by
    #: ``f_d = exp(ln(error_gsd) Z_d)``, ``Z_d`` standard normal drawn from
    #: ``numpy.random.default_rng(error_seed)``, so exposures with the same
    #: seed (the zones of one grid) get the same factors
    #: (:func:`doseattr.core.uncertainty.sampling.model_error_factors`).
    error_gsd: float | None = None
    error_seed: int | None = None
    alternatives: ClassVar[tuple[Alternative, ...]] = ()

    def __post_init__(self) -> None:
        assert 0.0 <= self.unexposed < 1.0, self.unexposed
        assert self.values.shape == self.weights.shape and np.isclose(self.weights.sum(), 1.0)
        assert self.error_gsd is None or (self.census and self.error_gsd >= 1.0
                                          and self.error_seed is not None), self.error_gsd

    @property
    def family(self) -> EmpiricalFamily:
        return EMPIRICAL

    @property
    def params(self) -> FloatArray:
        return np.zeros(0)

    @property
    def parameters(self) -> dict[str, float]:
        return {}

    @property
    def fit(self) -> ExposureFit:
        n = self.values.size
        kish = None if self.weights_meaning is None else kish_effective_n(self.weights)
        method = "census (weighted points)" if self.census else "empirical (weighted values)"
        return ExposureFit(method=method, n=n, detected=n, values=self.values,
                           detected_mask=np.ones(n, bool), weights=self.weights,
                           weights_meaning=self.weights_meaning, effective_n=kish)

    @property
    def zero_share(self) -> float:
        """Total probability at zero: ``unexposed`` plus zeros in the data."""
        return self.unexposed + (1 - self.unexposed) * float(self.weights[self.values == 0].sum())

    def mean(self) -> float:
        return (1 - self.unexposed) * float(np.dot(self.weights, self.values))

    def cdf(self, x: ArrayLike) -> FloatArray:
        """P(X <= x), including the point mass ``unexposed``."""
        x = np.asarray(x, dtype=float)
        below = (self.values <= x[..., None]) @ self.weights
        return np.where(x >= 0, self.unexposed + (1 - self.unexposed) * below, 0.0)

    def sf(self, x: ArrayLike) -> FloatArray:
        return 1.0 - self.cdf(x)

    @cached_property
    def points(self) -> tuple[FloatArray, FloatArray, NDArray[np.intp] | None]:
        r"""The distinct values ``(U,)``, their summed weights ``(U,)`` and
        each row's index into them ``(n,)``.

        Rows with equal values collapse into one point carrying the sum of
        their weights, so :math:`\sum_i w_i h(x_i) = \sum_u W_u h(x_u)`
        exactly (up to rounding): any expectation needs ``h`` only at the
        ``U`` distinct values, ascending. When the values are already
        distinct the points are the rows themselves, in their order, and the
        index is ``None`` (the identity)."""
        values, inverse = np.unique(self.values, return_inverse=True)
        if values.size == self.values.size:
            return self.values, self.weights, None
        weights = np.bincount(inverse, weights=self.weights, minlength=values.size).astype(float)
        return values, weights, inverse.ravel()

    def bootstrap_chunks(self, rng: np.random.Generator, draws: int
                         ) -> Iterator[tuple[slice, FloatArray]]:
        r"""The resamples of :meth:`bootstrap`, a few draws at a time, as
        weights on the distinct values (:attr:`points`).

        Yields ``(rows, W)`` with ``W`` of shape ``(k, U)`` for the draws
        ``rows``: :math:`W_{du} = \sum_{j: x_{i_{dj}} = x_u} \omega_{dj} /
        \sum_j \omega_{dj}`, the resampled weights :math:`\omega_{dj}` of
        the ``n`` rows :math:`i_{dj}` drawn in draw ``d`` summed at each
        distinct value. The generator calls are those of :meth:`bootstrap`
        split by rows of draws, which numpy's Generator answers with the
        same numbers (``integers`` and ``random`` fill arrays element by
        element from one stream), so ``sum_u W_du h(x_u)`` is draw ``d``'s
        weighted mean of :meth:`bootstrap` up to rounding, at
        O(chunk x (n + U)) memory instead of O(draws x n). Each chunk counts
        how often each row was drawn (``bincount``), times its weight
        (importance weights), summed over the rows of each distinct value.
        """
        values, _, inverse = self.points
        n, u = self.values.size, values.size
        kept = None if self._frequency() or np.all(self.weights == self.weights[0]) else self.weights
        for rows, idx in self._resampled_rows(rng, int(draws), indices=True):
            assert idx is not None
            k = rows.stop - rows.start
            idx += (n * np.arange(k))[:, None]
            w = np.bincount(idx.ravel(), minlength=k * n).reshape(k, n).astype(float)
            del idx
            if kept is not None:
                w *= kept
            if inverse is not None:  # rows -> distinct values
                cells = (inverse + (u * np.arange(k))[:, None]).ravel()
                w = np.bincount(cells, weights=w.ravel(), minlength=k * u).reshape(k, u)
            w /= w.sum(axis=1, keepdims=True)
            yield rows, w

    def skip_bootstrap(self, rng: np.random.Generator, draws: int) -> None:
        """Advance ``rng`` past the numbers :meth:`bootstrap` would draw,
        in chunks (no draws x n array), without resampling anything."""
        for _ in self._resampled_rows(rng, int(draws), indices=False):
            pass

    #: Rows (draws x values) resampled at once by :meth:`bootstrap_chunks`.
    CHUNK_ELEMENTS: ClassVar[int] = 1 << 20

    def _frequency(self) -> bool:
        n = self.values.size
        return self.weights_meaning == "frequency" and not np.allclose(self.weights, 1.0 / n)

    def _resampled_rows(self, rng: np.random.Generator, draws: int, *, indices: bool
                        ) -> Iterator[tuple[slice, NDArray[np.intp] | None]]:
        """``(rows, idx)`` per chunk of draws: the row indices ``(k, n)``
        drawn as :meth:`bootstrap` draws them (``numpy``'s ``choice`` with
        ``p`` is ``searchsorted`` of the normalised cumulative weights on
        ``random`` numbers); with ``indices`` false only the numbers are
        drawn (``idx`` ``None``)."""
        n = self.values.size
        step = max(1, self.CHUNK_ELEMENTS // n)
        frequency = self._frequency()
        cdf = np.cumsum(self.weights)
        cdf /= cdf[-1]
        for start in range(0, draws, step):
            rows = slice(start, min(start + step, draws))
            shape = (rows.stop - rows.start, n)
            if frequency:
                uniform = rng.random(shape)
                yield rows, cdf.searchsorted(uniform, side="right") if indices else None
            else:
                idx = rng.integers(0, n, size=shape)
                yield rows, idx if indices else None

    def bootstrap(self, rng: np.random.Generator, draws: int) -> tuple[FloatArray, FloatArray]:
        r"""Resampled points, ``(values, weights)`` each of shape ``(draws, n)``.

        Importance weights (and equal weights): the ``n`` rows are drawn
        uniformly with replacement, each keeping its weight, and the weights
        are renormalised per draw: the with-replacement bootstrap of the
        sampled units of a survey (Efron 1979, Ann Stat 7:1; Rao & Wu 1988,
        JASA 83:231, with the rescaling they add left out; both from
        memory). For a weighted mean its variance is
        :math:`\sum_i w_i^2 (x_i - ar x_w)^2 / (\sum w)^2`, the sandwich
        (linearisation) variance, so unequal weights widen the interval as
        the Kish effective sample size says.

        Frequency weights (each weight counts identical values, the total
        normalised to ``n``): ``n`` rows are drawn with probabilities
        proportional to the weights and weighted equally, which is the
        ordinary bootstrap of the ``n`` values the weights stand for; a
        weighted mean then varies as :math:`\mathrm{Var}_w(x) / n`, the
        frequency-weight variance of the parametric fit. (Keeping the
        weights would give the importance-weight variance, too wide for
        frequency weights.)

        Survey design (strata, clusters) is ignored; ``unexposed`` stays fixed.

        This holds ``draws x n`` arrays; the Monte Carlo uses
        :meth:`bootstrap_chunks`, which draws the same numbers in bounded
        memory.
        """
        n = self.values.size
        if self._frequency():
            idx = rng.choice(n, size=(int(draws), n), p=self.weights)
            return self.values[idx], np.full(idx.shape, 1.0 / n)
        idx = rng.integers(0, n, size=(int(draws), n))
        w = self.weights[idx]
        return self.values[idx], w / w.sum(axis=1, keepdims=True)


def empirical(values: ArrayLike, weights: ArrayLike | None = None, *, unexposed: float = 0.0,
              source: str = "measurements",
              weight_meaning: str = "importance") -> EmpiricalExposure:
    """Build an :class:`EmpiricalExposure`; ModelError on negative or
    non-finite values, non-positive weights, ``unexposed`` outside [0, 1),
    or a ``weight_meaning`` other than ``"frequency"``/``"importance"``
    (ignored without ``weights``)."""
    meaning = None if weights is None else check_meaning(weight_meaning)
    x = np.asarray(values, dtype=float)
    if x.ndim != 1 or x.size == 0 or not np.all(np.isfinite(x)) or np.any(x < 0):
        raise ModelError("empirical exposure needs a non-empty list of finite values >= 0")
    w = np.ones(x.size) if weights is None else np.asarray(weights, dtype=float)
    if w.shape != x.shape or not np.all(np.isfinite(w) & (w > 0)):
        raise ModelError(f"weights must be {x.size} positive numbers, one per value")
    if not 0 <= unexposed < 1:
        raise ModelError(f"unexposed share must be in [0, 1), got {unexposed}")
    return EmpiricalExposure(x, w / w.sum(), float(unexposed), source, weights_meaning=meaning)


def lognormal_mixture(gm: ArrayLike, gsd: ArrayLike, shares: ArrayLike, *, nodes: int = 64,
                      source: str = "strata") -> EmpiricalExposure:
    r"""The mixture :math:`\sum_k s_k \,\mathrm{LN}(\ln GM_k, \ln^2 GSD_k)`
    as weighted points, for the population of several strata.

    Each component is put at the probabilists' Gauss-Hermite nodes
    :math:`z_j` with weights :math:`w_j` (normalised to 1;
    :func:`numpy.polynomial.hermite_e.hermegauss`): points
    :math:`GM_k\,GSD_k^{z_j}` with weights :math:`s_k w_j`, so that
    :math:`E[h(X)] = \sum_k s_k \sum_j w_j h(GM_k GSD_k^{z_j})`, exact for
    :math:`h(e^{\mu+\sigma z})` polynomial in :math:`z` up to degree
    ``2 nodes - 1`` and accurate for smooth ``h`` (Abramowitz & Stegun
    1964, 25.4.46; from memory). The points are a census (``census``):
    not resampled for uncertainty.
    """
    from numpy.polynomial.hermite_e import hermegauss

    g = np.atleast_1d(np.asarray(gm, dtype=float))
    s = np.atleast_1d(np.asarray(gsd, dtype=float))
    w = np.atleast_1d(np.asarray(shares, dtype=float))
    if not (g.shape == s.shape == w.shape and np.all(g > 0) and np.all(s > 1) and np.all(w > 0)):
        raise ModelError("a lognormal mixture needs GM > 0, GSD > 1 and shares > 0 per stratum")
    z, wz = hermegauss(int(nodes))
    wz = wz / wz.sum()
    values = (g[:, None] * np.exp(np.log(s)[:, None] * z[None, :])).ravel()
    weights = ((w / w.sum())[:, None] * wz[None, :]).ravel()
    keep = weights > 0
    return EmpiricalExposure(values[keep], weights[keep] / weights[keep].sum(), 0.0, source,
                             census=True)
