"""Summaries of Monte Carlo draws."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike


@dataclass(frozen=True)
class Interval:
    """A point estimate with the percentile interval of its draws.

    ``estimate`` is the value at the point estimates of all inputs (not the
    mean of the draws); ``lower``/``upper`` are the (1 - level)/2 and
    (1 + level)/2 percentiles of the draws; ``mcse`` is the Monte Carlo
    standard error of the draws' mean, sd / sqrt(D), which says how much
    the Monte Carlo summary would move with another seed.
    """

    estimate: float
    lower: float
    upper: float
    mcse: float
    mean: float


def summarise(estimate: float, draws: ArrayLike, level: float = 0.95) -> Interval:
    """Percentile interval of ``draws`` around ``estimate``."""
    d = np.asarray(draws, dtype=float)
    assert d.ndim == 1 and d.size >= 2 and np.all(np.isfinite(d)), "draws must be finite"
    lo, hi = np.quantile(d, [(1 - level) / 2, (1 + level) / 2])
    return Interval(float(estimate), float(lo), float(hi),
                    float(np.std(d, ddof=1) / np.sqrt(d.size)), float(np.mean(d)))
