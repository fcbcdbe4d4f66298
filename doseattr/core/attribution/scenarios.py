"""Exposure-reduction scenarios: transforms g(x) of each person's exposure.

Each scenario gives the transformed exposure, the doses in the original
exposure where the transformed risk has a kink (so quadrature panels can be
split there), and how it changes the upper-tail growth of the risk.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.curves.base import Growth
from doseattr.errors import ModelError

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class Scenario:
    """Base class; subclasses define :meth:`apply`, :meth:`preimage`."""

    value: float
    name: str = ""
    kind: ClassVar[str] = "scenario"

    @classmethod
    def value_problem(cls, value: float) -> str | None:
        """Why ``value`` cannot be this scenario's setting (``None``: it can);
        the analysis layer shows it against the scenario's key."""
        return None

    def apply(self, x: FloatArray, minimum_risk: ArrayLike) -> FloatArray:
        """Counterfactual exposure g(x)."""
        raise NotImplementedError

    def preimage(self, points: FloatArray) -> FloatArray:
        """Original exposures x whose g(x) equals each of ``points``."""
        raise NotImplementedError

    def own_kinks(self) -> FloatArray:
        """Kinks the transform itself adds (in the original exposure)."""
        return np.zeros((0,))

    def growth(self, growth: Growth) -> Growth:
        """Upper-tail growth of RR(g(x)) given that of RR(x)."""
        return growth

    def describe(self, unit: str = "") -> str:
        return f"{self.kind} {self.value:g} {unit}".strip()


@dataclass(frozen=True)
class Cap(Scenario):
    """Exposure capped at a limit value: g(x) = min(x, L)."""

    kind: ClassVar[str] = "cap"

    @classmethod
    def value_problem(cls, value: float) -> str | None:
        return None if value > 0 else f"cap is a limit value and must be above 0, got {value:g}"

    def __post_init__(self) -> None:
        if not (np.isfinite(self.value) and self.value >= 0):
            raise ModelError(f"cap must be a non-negative number, got {self.value}")

    def apply(self, x: FloatArray, minimum_risk: ArrayLike) -> FloatArray:
        return np.minimum(x, self.value)

    def preimage(self, points: FloatArray) -> FloatArray:
        return np.where(points < self.value, points, self.value)

    def own_kinks(self) -> FloatArray:
        return np.array([self.value])

    def growth(self, growth: Growth) -> Growth:
        return Growth.bounded()

    def describe(self, unit: str = "") -> str:
        return f"exposure capped at {self.value:g} {unit}".strip()


@dataclass(frozen=True)
class Scale(Scenario):
    """Everyone's exposure multiplied by s in (0, 1]: g(x) = s x."""

    kind: ClassVar[str] = "scale"

    @classmethod
    def value_problem(cls, value: float) -> str | None:
        if 0 < value <= 1:
            return None
        return (f"scale multiplies everyone's exposure and must be in (0, 1] (0.8 is a 20% cut), "
                f"got {value:g}")

    def __post_init__(self) -> None:
        if not (0 < self.value <= 1):
            raise ModelError(f"scale must be in (0, 1], got {self.value}")

    def apply(self, x: FloatArray, minimum_risk: ArrayLike) -> FloatArray:
        return self.value * x

    def preimage(self, points: FloatArray) -> FloatArray:
        return points / self.value

    def growth(self, growth: Growth) -> Growth:
        if growth.kind == "exp":
            return Growth("exp", growth.rate * self.value)
        return growth

    def describe(self, unit: str = "") -> str:
        return f"exposure scaled by {self.value:g} ({(1 - self.value):.0%} cut)"


@dataclass(frozen=True)
class ReduceBy(Scenario):
    """Exposure lowered by d, not below the minimum-risk level m:
    g(x) = max(x - d, m) (people already at or below m keep their level,
    which carries no excess risk)."""

    kind: ClassVar[str] = "reduce_by"

    @classmethod
    def value_problem(cls, value: float) -> str | None:
        if value > 0:
            return None
        return f"reduce_by is an amount of exposure removed and must be above 0, got {value:g}"

    def __post_init__(self) -> None:
        if not (np.isfinite(self.value) and self.value >= 0):
            raise ModelError(f"reduce_by must be a non-negative number, got {self.value}")

    def apply(self, x: FloatArray, minimum_risk: ArrayLike) -> FloatArray:
        return np.maximum(x - self.value, minimum_risk)

    def preimage(self, points: FloatArray) -> FloatArray:
        return points + self.value

    def describe(self, unit: str = "") -> str:
        return f"exposure lowered by {self.value:g} {unit}".strip()


SCENARIO_KINDS: dict[str, type[Scenario]] = {"cap": Cap, "scale": Scale, "reduce_by": ReduceBy}


@dataclass(frozen=True)
class Comply(Scale):
    r"""Compliance with a limit value ``limit``: everyone's exposure scaled
    by :math:`s = \min(1, L / P_{95})`, so that the 95th percentile
    ``p95`` of the exposure distribution falls to the limit (no change when
    it is already at or below it). A scale is the reduction that keeps the
    distribution's shape (its GSD for a lognormal), which is what lowering
    every source of exposure by one share does; built with
    :meth:`from_percentile`."""

    kind: ClassVar[str] = "comply"
    limit: float = np.inf
    p95: float = 0.0

    @classmethod
    def from_percentile(cls, limit: float, p95: float, name: str = "") -> Comply:
        """The scenario for limit ``limit`` and a 95th percentile ``p95``."""
        if not (limit > 0 and p95 > 0 and np.isfinite(limit) and np.isfinite(p95)):
            raise ModelError(f"comply needs a limit and a 95th percentile above 0, got {limit:g} "
                             f"and {p95:g}")
        return cls(min(1.0, limit / p95), name=name, limit=limit, p95=p95)

    def describe(self, unit: str = "") -> str:
        u = f" {unit}" if unit else ""
        if self.value >= 1.0:
            return (f"compliance with the limit {self.limit:.4g}{u}: already met (95th "
                    f"percentile {self.p95:.4g}{u}), no change")
        return (f"compliance with the limit {self.limit:.4g}{u}: exposure x {self.value:.4g} "
                f"(95th percentile {self.p95:.4g}{u} to the limit)")
