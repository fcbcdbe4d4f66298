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
    standard error of the draws' mean, sd / sqrt(D); ``lower_mcse`` and
    ``upper_mcse`` are those of the two limits (:func:`quantile_mcse`),
    which say how much each limit would move with another seed.
    """

    estimate: float
    lower: float
    upper: float
    mcse: float
    mean: float
    lower_mcse: float = 0.0
    upper_mcse: float = 0.0


def summarise(estimate: float, draws: ArrayLike, level: float = 0.95) -> Interval:
    """Percentile interval of ``draws`` around ``estimate``."""
    d = np.asarray(draws, dtype=float)
    assert d.ndim == 1 and d.size >= 2 and np.all(np.isfinite(d)), "draws must be finite"
    q_lo, q_hi = (1 - level) / 2, (1 + level) / 2
    lo, hi = np.quantile(d, [q_lo, q_hi])
    ordered = np.sort(d)
    return Interval(float(estimate), float(lo), float(hi),
                    float(np.std(d, ddof=1) / np.sqrt(d.size)), float(np.mean(d)),
                    quantile_mcse(ordered, q_lo), quantile_mcse(ordered, q_hi))


def quantile_mcse(ordered: ArrayLike, q: float) -> float:
    r"""Monte Carlo standard error of the sample ``q``-quantile of ``n`` draws.

    The number of draws below the true quantile is Binomial(n, q), so the
    order statistics at ranks :math:`nq \mp \sqrt{nq(1-q)}` bracket it by
    about one standard error on each side (the distribution-free interval
    for a quantile from order statistics; Conover 1999, Practical
    Nonparametric Statistics, section 3.2, from memory):

    .. math:: \mathrm{MCSE}(\hat x_q) \approx
              \tfrac12\,\bigl(x_{(\lceil nq + s\rceil)} - x_{(\lfloor nq - s\rfloor)}\bigr),
              \qquad s = \sqrt{nq(1-q)}.

    ``ordered`` must be sorted ascending; ranks are clipped to the sample.
    """
    x = np.asarray(ordered, dtype=float)
    n = x.size
    s = np.sqrt(n * q * (1.0 - q))
    low = int(np.clip(np.floor(n * q - s), 1, n)) - 1
    high = int(np.clip(np.ceil(n * q + s), 1, n)) - 1
    return float(0.5 * (x[high] - x[low]))
