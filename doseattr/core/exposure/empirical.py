r"""An empirical exposure distribution: weighted points instead of a family.

The distribution puts weight ``w_i`` (normalised to sum to 1) on each value
``x_i >= 0``; zeros in the data are ordinary points. As for
:class:`~doseattr.core.exposure.base.Exposure`, ``unexposed`` is an extra
point mass at zero (0 unless set, e.g. with ``dataclasses.replace``), so

.. math::

    E[h(X)] = u\,h(0) + (1 - u) \sum_i w_i\, h(x_i).

The attribution engine sums over the points; :meth:`EmpiricalExposure.bootstrap`
gives resampled points for uncertainty.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.exposure.base import Alternative, ExposureFit, FloatArray
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
    """Weighted exposure values (build with :func:`empirical`)."""

    values: FloatArray
    weights: FloatArray
    unexposed: float = 0.0
    source: str = "measurements"
    notes: tuple[str, ...] = ()
    alternatives: ClassVar[tuple[Alternative, ...]] = ()

    def __post_init__(self) -> None:
        assert 0.0 <= self.unexposed < 1.0, self.unexposed
        assert self.values.shape == self.weights.shape and np.isclose(self.weights.sum(), 1.0)

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
        return ExposureFit(method="empirical (weighted values)", n=n, detected=n, values=self.values,
                           detected_mask=np.ones(n, bool), weights=self.weights)

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

    def bootstrap(self, rng: np.random.Generator, draws: int) -> tuple[FloatArray, FloatArray]:
        """Resampled points, ``(values, weights)`` each of shape ``(draws, n)``.

        Rows are drawn with replacement, each keeping its weight, and the
        weights are renormalised per draw (Efron 1979, Ann Stat 7:1, from memory; applied
        to weighted rows). Survey design (strata, clusters) is ignored;
        ``unexposed`` stays fixed.
        """
        idx = rng.integers(0, self.values.size, size=(int(draws), self.values.size))
        w = self.weights[idx]
        return self.values[idx], w / w.sum(axis=1, keepdims=True)


def empirical(values: ArrayLike, weights: ArrayLike | None = None, *, unexposed: float = 0.0,
              source: str = "measurements") -> EmpiricalExposure:
    """Build an :class:`EmpiricalExposure`; ModelError on negative or
    non-finite values, non-positive weights, or ``unexposed`` outside [0, 1)."""
    x = np.asarray(values, dtype=float)
    if x.ndim != 1 or x.size == 0 or not np.all(np.isfinite(x)) or np.any(x < 0):
        raise ModelError("empirical exposure needs a non-empty list of finite values >= 0")
    w = np.ones(x.size) if weights is None else np.asarray(weights, dtype=float)
    if w.shape != x.shape or not np.all(np.isfinite(w) & (w > 0)):
        raise ModelError(f"weights must be {x.size} positive numbers, one per value")
    if not 0 <= unexposed < 1:
        raise ModelError(f"unexposed share must be in [0, 1), got {unexposed}")
    return EmpiricalExposure(x, w / w.sum(), float(unexposed), source)
