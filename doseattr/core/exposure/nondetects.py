r"""Non-detects: plotting positions for censored data, and substitution.

Plotting positions follow Hirsch & Stedinger (1987, Water Resources
Research 23:715, from memory) as set out by Helsel (Statistics for Censored
Environmental Data, 2nd ed., 2012) for regression on order statistics.
With sorted detection limits :math:`DL_1 < \dots < DL_m` (preceded by the
smallest value when a detect lies below :math:`DL_1`), :math:`A_j` the
detects in :math:`[DL_j, DL_{j+1})`, :math:`B_j` the values below
:math:`DL_j` (non-detects at or below it count), :math:`C_j` the
non-detects at :math:`DL_j`:

.. math::

    P_{e,m+1} = 0, \qquad
    P_{e,j} = P_{e,j+1} + \frac{A_j}{A_j + B_j}(1 - P_{e,j+1}),

a detect of rank ``r`` in its interval plots at
:math:`(1 - P_{e,j}) + (P_{e,j} - P_{e,j+1})\, r / (A_j + 1)`, a non-detect
of rank ``r`` at its limit at :math:`(1 - P_{e,j})\, r / (C_j + 1)`; the
non-detect positions are then sorted and given to the non-detects in
increasing order of their limits. statsmodels has this method
(``statsmodels.imputation.ros``) built on pandas, which the core does not
use, so it is written here in numpy and checked against statsmodels in
the tests. Unlike statsmodels, non-detects above the largest detect are
kept. Without non-detects the positions are ``r / (n + 1)``.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.exposure.base import FloatArray
from doseattr.errors import ModelError


def _checked(values: ArrayLike, detected: ArrayLike) -> tuple[FloatArray, np.ndarray]:
    x = np.asarray(values, dtype=float)
    d = np.asarray(detected, dtype=bool)
    if x.ndim != 1 or d.shape != x.shape:
        raise ModelError(f"values and detected must be 1-D and of equal length, got {x.shape} and {d.shape}")
    if not np.all(np.isfinite(x)):
        raise ModelError("values must be finite numbers")
    return x, d


def _ranks_within(groups: np.ndarray, keys: FloatArray) -> FloatArray:
    """Rank 1, 2, ... of each element within its group, in order of ``keys``."""
    by_key = np.argsort(keys, kind="stable")
    order = by_key[np.argsort(groups[by_key], kind="stable")]  # = np.lexsort((keys, groups))
    g = groups[order]
    ranks = np.empty(groups.size)
    ranks[order] = np.arange(groups.size) - np.searchsorted(g, g, side="left") + 1
    return ranks


def _exceedance(x: FloatArray, d: np.ndarray, limits: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
    r"""P_e per limit (with the trailing 0), and the counts A and C.

    The counts come from the sorted detects and sorted non-detects by
    binary search (``np.searchsorted``), so the cost is
    :math:`O(n \log n)` whatever the number of limits; the recursion for
    :math:`P_e` is one step per limit."""
    det, cen = np.sort(x[d]), np.sort(x[~d])
    upper = np.append(limits[1:], np.inf)
    det_below = np.searchsorted(det, limits, side="left")
    a = (np.searchsorted(det, upper, side="left") - det_below).astype(float)
    cen_at_or_below = np.searchsorted(cen, limits, side="right")
    b = (cen_at_or_below + det_below).astype(float)
    c = (cen_at_or_below - np.searchsorted(cen, limits, side="left")).astype(float)
    pe = [0.0] * (limits.size + 1)
    for j, (aj, bj) in reversed(list(enumerate(zip(a.tolist(), b.tolist())))):
        pe[j] = pe[j + 1] + aj / (aj + bj) * (1 - pe[j + 1])
    return np.array(pe), a, c


def ros_plotting_positions(values: ArrayLike, detected: ArrayLike) -> FloatArray:
    """Plotting positions (probabilities in (0, 1)) of left-censored data,
    in the order given; formula in the module docstring."""
    x, d = _checked(values, detected)
    if d.all():
        return _ranks_within(np.zeros(x.size, int), x) / (x.size + 1)
    limits = np.unique(x[~d])
    if x.min() < limits[0]:
        limits = np.insert(limits, 0, x.min())
    pe, a, c = _exceedance(x, d, limits)
    j = np.searchsorted(limits, x, side="right") - 1
    rank = _ranks_within(j * 2 + ~d, x)
    pos = np.where(d, (1 - pe[j]) + (pe[j] - pe[j + 1]) * rank / (a[j] + 1),
                   (1 - pe[j]) * rank / (c[j] + 1))
    cen = np.flatnonzero(~d)
    pos[cen[np.argsort(x[cen], kind="stable")]] = np.sort(pos[cen])
    return pos


def substitute_nondetects(values: ArrayLike, detected: ArrayLike, fraction: float) -> FloatArray:
    """Replace each non-detect by ``fraction`` x its detection limit.

    For comparison only (for example with ``fraction = 0.5``, "LOD/2", or
    ``1/sqrt(2)``): substitution is common practice but biases means and
    spreads by an amount that depends on the arbitrary fraction (Helsel
    2006, Chemosphere 65:2434, from memory; Helsel 2012). The fits in
    :mod:`.fit` treat non-detects by censored likelihood instead.
    """
    x, d = _checked(values, detected)
    if not 0 <= fraction <= 1:
        raise ModelError(f"fraction must be between 0 and 1 (e.g. 0.5 for LOD/2), got {fraction}")
    return np.where(d, x, fraction * x)
