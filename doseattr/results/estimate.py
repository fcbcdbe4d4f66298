"""One layout for every estimate of a run: point value, 95% limits and the
Monte Carlo standard error."""

from __future__ import annotations

from dataclasses import dataclass

from doseattr.results.numbers import pct, sig


@dataclass(frozen=True)
class Estimate:
    """A point estimate with an optional interval and Monte Carlo error.

    ``estimate`` is the value at the point estimates of every input;
    ``lower``/``upper`` are the 2.5th and 97.5th percentiles of the Monte
    Carlo draws, ``mcse`` the Monte Carlo standard error of the draws'
    mean and ``lower_mcse``/``upper_mcse`` those of the two limits; all
    stay ``None`` until uncertainty is propagated.
    """

    estimate: float
    lower: float | None = None
    upper: float | None = None
    mcse: float | None = None
    lower_mcse: float | None = None
    upper_mcse: float | None = None

    @property
    def has_interval(self) -> bool:
        return self.lower is not None and self.upper is not None

    def text(self, percent: bool = True) -> str:
        """``"12.30%"`` or ``"12.30% (9.10% to 15.00%)"``."""
        f = pct if percent else sig
        if self.lower is None or self.upper is None:
            return f(self.estimate)
        return f"{f(self.estimate)} ({f(self.lower)} to {f(self.upper)})"
