"""The dose assigned to each exposure band of a study table.

Category-level estimates refer to bands (lower, upper]; a curve is fitted at
one dose per band. Rules, in the order a table usually needs them:

``"given"``
    The table's own dose for the band (its reported mean or median), where
    present; otherwise the ``"midpoint"`` rule.
``"midpoint"``
    ``(lower + upper) / 2``.
open-ended top band (``upper = inf``)
    ``lower`` plus half the width of the band below it, i.e. the midpoint
    the band would have if it were as wide as its neighbour (common
    practice in dose-response meta-analysis; no single source).
``"band-mean"`` / ``"band-median"``
    Mean or median of an exposure distribution within each band
    (:func:`distribution_doses`); the distribution is passed in as numbers
    or callables, so this module does not depend on the exposure package.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal, cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import FloatArray
from doseattr.errors import ModelError

TableRule = Literal["given", "midpoint"]
DistributionRule = Literal["band-mean", "band-median"]
#: Bands holding less probability than this fall back to the midpoint rule.
MIN_BAND_MASS = 1e-12


@dataclass(frozen=True)
class BandDoses:
    """Assigned doses ``(B,)``, the rule used for each band, and notes."""

    doses: FloatArray
    rule_used: tuple[str, ...]
    notes: tuple[str, ...] = ()


def assign_doses(lower: ArrayLike, upper: ArrayLike, given: ArrayLike | None = None, *,
                 rule: TableRule = "given") -> BandDoses:
    r"""Assign a dose to each band from its limits (and given doses).

    .. math:: d_i = \frac{l_i + u_i}{2}, \qquad
              d_{top} = l_{top} + \frac{u_{below} - l_{below}}{2}
              \quad (u_{top} = \infty)

    Parameters
    ----------
    lower, upper
        Band limits ``(B,)`` in table order; ``upper`` may be ``inf`` for
        the open-ended top band.
    given
        Doses reported by the table (NaN where absent), used by ``"given"``.
    rule
        ``"given"`` or ``"midpoint"`` (``given`` is then ignored).
    """
    lo, up = _limits(lower, upper)
    if rule not in ("given", "midpoint"):
        raise ModelError(f"unknown dose rule {rule!r}; use 'given' or 'midpoint'")
    g = np.full(lo.shape, np.nan) if rule == "midpoint" or given is None else \
        np.asarray(given, dtype=float)
    if g.shape != lo.shape:
        raise ModelError(f"given doses {g.shape} do not match the bands {lo.shape}")
    doses, used = np.empty(lo.size), []
    for i in range(lo.size):
        doses[i], how = (g[i], "given") if np.isfinite(g[i]) else _table_dose(lo, up, i)
        used.append(how)
    return BandDoses(doses, tuple(used), _open_notes(lo, up, doses, used))


def _table_dose(lo: FloatArray, up: FloatArray, i: int) -> tuple[float, str]:
    if np.isfinite(up[i]):
        return (lo[i] + up[i]) / 2.0, "midpoint"
    below = np.flatnonzero(np.isfinite(up) & (up <= lo[i]) & (np.arange(lo.size) != i))
    if below.size == 0:
        raise ModelError(
            f"band {i + 1} ({lo[i]:g} and above) is open-ended with no band below it; "
            f"give its dose")
    j = below[np.argmax(up[below])]
    return lo[i] + (up[j] - lo[j]) / 2.0, "open-ended"


def _open_notes(lo: FloatArray, up: FloatArray, doses: FloatArray,
                used: list[str]) -> tuple[str, ...]:
    return tuple(
        f"band {i + 1} ({lo[i]:g} and above) is open-ended: dose {doses[i]:g} = lower limit "
        f"plus half the width of the band below (common practice)"
        for i, u in enumerate(used) if u == "open-ended")


def _limits(lower: ArrayLike, upper: ArrayLike) -> tuple[FloatArray, FloatArray]:
    lo = np.atleast_1d(np.asarray(lower, dtype=float))
    up = np.atleast_1d(np.asarray(upper, dtype=float))
    if lo.ndim != 1 or lo.shape != up.shape:
        raise ModelError("band lower and upper limits must be 1-D and of equal length")
    if not np.all(np.isfinite(lo)):
        raise ModelError("every band needs a finite lower limit (use 0 for the lowest band)")
    bad = np.flatnonzero(np.isnan(up) | (up < lo))
    if bad.size:
        i = bad[0]
        raise ModelError(f"band {i + 1}: upper limit {up[i]:g} is below its lower limit {lo[i]:g}")
    return lo, up


def band_mean_doses(mass: ArrayLike, partial_mean: ArrayLike) -> FloatArray:
    r"""Band means from band probabilities and partial means.

    .. math:: \bar x_i = \frac{E[X;\ l_i < X \le u_i]}{P(l_i < X \le u_i)}
    """
    mass = np.asarray(mass, dtype=float)
    partial = np.asarray(partial_mean, dtype=float)
    if np.any(mass < MIN_BAND_MASS):
        raise ModelError("a band holds no probability under the exposure distribution")
    return cast(FloatArray, partial / mass)


def distribution_doses(lower: ArrayLike, upper: ArrayLike, *, rule: DistributionRule,
                       cdf: Callable[[FloatArray], FloatArray],
                       partial_mean: Callable[[FloatArray, FloatArray], FloatArray] | None = None,
                       ppf: Callable[[FloatArray], FloatArray] | None = None) -> BandDoses:
    r"""Band mean or band median of an exposure distribution.

    .. math::
        \text{band-mean: } \frac{E[X;\ l < X \le u]}{F(u) - F(l)}, \qquad
        \text{band-median: } F^{-1}\!\left(\frac{F(l) + F(u)}{2}\right)

    Bands with (almost) no probability fall back to the table rule (midpoint
    or open-ended) with a note.

    Parameters
    ----------
    lower, upper
        Band limits ``(B,)``; ``upper`` may be ``inf``.
    cdf
        ``F(x)`` of the exposure, vectorised.
    partial_mean
        ``E[X; a < X <= b]`` (vectorised over ``a``, ``b``), for ``"band-mean"``.
    ppf
        ``F^{-1}(q)``, for ``"band-median"``.
    """
    lo, up = _limits(lower, upper)
    f_lo, f_up = np.asarray(cdf(lo), dtype=float), np.asarray(cdf(up), dtype=float)
    mass = f_up - f_lo
    ok = mass >= MIN_BAND_MASS
    if rule == "band-mean":
        if partial_mean is None:
            raise ModelError("band-mean doses need the partial mean of the exposure")
        value = np.asarray(partial_mean(lo, up), dtype=float) / np.where(ok, mass, 1.0)
    elif rule == "band-median":
        if ppf is None:
            raise ModelError("band-median doses need the quantile function of the exposure")
        value = np.asarray(ppf((f_lo + f_up) / 2.0), dtype=float)
    else:
        raise ModelError(f"unknown dose rule {rule!r}; use 'band-mean' or 'band-median'")
    fallback = assign_doses(lo, up, rule="midpoint")
    doses = np.where(ok, value, fallback.doses)
    used = tuple(rule if k else f for k, f in zip(ok, fallback.rule_used))
    notes = tuple(f"band {i + 1} holds almost no probability under the exposure distribution; "
                  f"its {fallback.rule_used[i]} dose was used" for i in np.flatnonzero(~ok))
    return BandDoses(doses, used, notes)
