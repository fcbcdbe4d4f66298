"""The record every occupational-exposure statistic is returned in."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Bounded:
    """A point estimate with a two-sided interval and a one-sided upper limit.

    Attributes
    ----------
    estimate
        The point estimate (which one: see ``method``).
    lower, upper
        Two-sided confidence interval at ``level`` (equal tails).
    ucl
        One-sided upper confidence limit at ``confidence`` (for a percentile:
        the upper tolerance limit, UTL).
    level, confidence
        Coverage of the interval and of the one-sided limit.
    method
        Short text naming the method and its source.
    note
        Why a bound is ``None`` or sits on a boundary of the parameter space
        (empty when every bound was found).
    """

    estimate: float | None
    lower: float | None
    upper: float | None
    ucl: float | None
    level: float
    confidence: float
    method: str
    note: str = ""
