r"""Cumulative exposure from work histories, and the 8-hour TWA.

Each job of a worker has a start date, an end date and an intensity (an
8-hour time-weighted average concentration). A job is the half-open
period ``[start, end)``: ``end`` is the first day no longer in the job, so
``end - start`` is its length in days (pass ``end_inclusive=True`` when the
dates give the last day worked). Only exposure before the cutoff
``as_of - lag_years`` counts (a lag, because recent exposure cannot yet
have caused disease; common practice in occupational epidemiology):

.. math::

    \mathrm{cumulative} = \sum_{\mathrm{jobs}} c_j\, \frac{\max(0,\ \min(e_j, \mathrm{cutoff}) - s_j)}{365.25},

in intensity x years, with duration the same sum without ``c_j`` and the
duration-weighted mean intensity their ratio (0 for a worker with no
time before the cutoff).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.exposure.base import FloatArray
from doseattr.errors import ModelError

DAYS_PER_YEAR = 365.25
MINUTES_8H = 480.0


@dataclass(frozen=True)
class WorkerExposure:
    """Per-worker totals, in the order of ``workers`` (sorted ids)."""

    workers: np.ndarray
    cumulative: FloatArray
    duration_years: FloatArray

    @property
    def mean_intensity(self) -> FloatArray:
        """cumulative / duration (0 where the duration is 0)."""
        d = self.duration_years
        return np.divide(self.cumulative, d, out=np.zeros_like(d), where=d > 0)


def _days(dates: ArrayLike, name: str) -> FloatArray:
    """Dates (numpy datetime64) as float days since 1970-01-01."""
    d = np.asarray(dates)
    if not np.issubdtype(d.dtype, np.datetime64):
        raise ModelError(f"{name} must be dates (numpy datetime64), got {d.dtype}")
    if np.any(np.isnat(d)):
        raise ModelError(f"{name}: row {int(np.argmax(np.isnat(d))) + 1} has no date")
    return d.astype("datetime64[s]").astype(np.int64) / 86400.0


def _check_rows(ids: np.ndarray, start: FloatArray, end: FloatArray, intensity: FloatArray) -> None:
    """ModelError for end before start, bad intensities, or overlapping jobs
    of one worker (rows numbered from 1 in the order given)."""
    if not (ids.shape == start.shape == end.shape == intensity.shape) or ids.ndim != 1 or ids.size == 0:
        raise ModelError("worker, start, end and intensity must be non-empty and of equal length")
    bad = np.flatnonzero(end < start)
    if bad.size:
        raise ModelError(f"row {bad[0] + 1} (worker {str(ids[bad[0]])!r}): the job ends before it starts")
    bad = np.flatnonzero(~np.isfinite(intensity) | (intensity < 0))
    if bad.size:
        raise ModelError(f"row {bad[0] + 1} (worker {str(ids[bad[0]])!r}): intensity must be a number >= 0")
    order = np.lexsort((start, ids))
    same = ids[order][1:] == ids[order][:-1]
    clash = np.flatnonzero(same & (start[order][1:] < end[order][:-1]))
    if clash.size:
        a, b = sorted(order[[clash[0], clash[0] + 1]] + 1)
        raise ModelError(f"worker {str(ids[order][clash[0]])!r}: jobs in rows {a} and {b} overlap; "
                         "a worker can hold one job at a time (split or merge the periods)")


def cumulative_exposure(worker: ArrayLike, start: ArrayLike, end: ArrayLike, intensity: ArrayLike, *,
                        as_of: np.datetime64, lag_years: float = 0.0,
                        end_inclusive: bool = False) -> WorkerExposure:
    """Cumulative exposure (intensity x years) per worker (module docstring)."""
    ids = np.asarray(worker)
    s, e = _days(start, "start"), _days(end, "end") + (1.0 if end_inclusive else 0.0)
    c = np.asarray(intensity, dtype=float)
    _check_rows(ids, s, e, c)
    if not (np.isfinite(lag_years) and lag_years >= 0):
        raise ModelError(f"lag_years must be a number >= 0, got {lag_years}")
    cutoff = _days(np.asarray([as_of]), "as_of")[0] - lag_years * DAYS_PER_YEAR
    years = np.maximum(0.0, np.minimum(e, cutoff) - s) / DAYS_PER_YEAR
    workers, code = np.unique(ids, return_inverse=True)
    # bincount with weights sums them as floats
    return WorkerExposure(workers,
                          cast(FloatArray, np.bincount(code, weights=c * years, minlength=workers.size)),
                          cast(FloatArray, np.bincount(code, weights=years, minlength=workers.size)))


def twa_8h(concentrations: ArrayLike, minutes: ArrayLike) -> float:
    r"""8-hour time-weighted average :math:`\sum_i C_i t_i / 480` (``t_i`` in
    minutes; unsampled time of the shift counts as zero exposure).

    Common practice in occupational hygiene; the UK HSE guidance EH40
    defines the 8-hour TWA this way (from memory).
    """
    conc = np.asarray(concentrations, dtype=float)
    mins = np.asarray(minutes, dtype=float)
    if conc.shape != mins.shape or conc.ndim != 1 or conc.size == 0:
        raise ModelError("concentrations and minutes must be non-empty lists of equal length")
    if not (np.all(np.isfinite(conc) & (conc >= 0)) and np.all(np.isfinite(mins) & (mins >= 0))):
        raise ModelError("concentrations and minutes must be numbers >= 0")
    return float(np.dot(conc, mins) / MINUTES_8H)
