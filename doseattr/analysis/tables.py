"""The study's band table and exposure measurements, read and checked row by
row (conventions in :mod:`doseattr.analysis.csvfile`: row N is line N of the
file, the header is row 1).

The other tables have their own modules and are re-exported here:
:mod:`~doseattr.analysis.curve_tables` (points, draws),
:mod:`~doseattr.analysis.exposure_tables` (bins, work histories) and
:mod:`~doseattr.analysis.burden_table` (strata).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from doseattr.analysis.burden_table import BurdenTable, read_burden
from doseattr.analysis.csvfile import (
    NON_DETECT_TEXT,
    SQRT_MAX,
    FloatArray,
    RawTable,
    Row,
    below_sqrt_max,
    cell_error,
    check_band_order,
    check_units,
    near_column,
    number,
    parse_numbers,
    read_raw,
    require_columns,
    shown,
)
from doseattr.analysis.curve_tables import (
    DrawsTable,
    PointsTable,
    read_draws_table,
    read_points_table,
)
from doseattr.analysis.exposure_tables import BinsTable, HistoriesTable, read_bins, read_histories
from doseattr.errors import InputError

__all__ = ["BinsTable", "BurdenTable", "DrawsTable", "HistoriesTable", "Measurements",
           "PointsTable", "StudyTable", "design_from_counts", "read_bins", "read_burden",
           "read_draws_table", "read_histories", "read_measurements", "read_points_table",
           "read_study_table"]

BAND_REQUIRED = ("lower", "upper", "rr", "ci_lower", "ci_upper")
COUNT_COLUMNS = ("cases", "controls", "person_time", "persons")
#: Which count column goes with ``cases`` for each study design.
DESIGN_TOTALS = {"case-control": "controls", "incidence-rate": "person_time",
                 "cumulative-incidence": "persons"}
TRUE_TEXT = ("true", "yes", "y", "1", "detected")
FALSE_TEXT = ("false", "no", "n", "0", "not detected", "nd")
#: The column of each row's detection limit, for non-detects written as
#: text (``ND``, ``n.d.``, ``<LOD``).
LOD_COLUMN = "lod"


@dataclass(frozen=True, eq=False)
class StudyTable:
    """The study's band estimates, checked.

    ``upper`` is ``inf`` for an open-ended top band; ``ci_lower`` and
    ``ci_upper`` are NaN for the reference band; ``dose`` is NaN where the
    table gives none. ``counts`` maps count columns present to arrays.
    """

    source: str
    lower: FloatArray
    upper: FloatArray
    rr: FloatArray
    ci_lower: FloatArray
    ci_upper: FloatArray
    dose: FloatArray
    reference: int
    counts: dict[str, FloatArray] = field(default_factory=dict)
    lines: tuple[int, ...] = ()
    notes: tuple[str, ...] = ()

    @property
    def n_bands(self) -> int:
        return len(self.rr)

    @property
    def has_dose(self) -> bool:
        return bool(np.any(np.isfinite(self.dose)))

    @property
    def cutpoints(self) -> FloatArray:
        """The study's band limits as cutpoints for the categorical
        comparison: the lower limit of every band but the first."""
        return self.lower[1:].copy()


@dataclass(frozen=True, eq=False)
class Measurements:
    """Exposure measurements, checked. ``detected`` false means ``values``
    holds the detection limit; ``weights`` is ``None`` when none given."""

    source: str
    values: FloatArray
    detected: NDArray[np.bool_]
    weights: FloatArray | None
    #: Each value's line in the file (a ``range`` when they follow one another).
    lines: Sequence[int] = ()
    notes: tuple[str, ...] = ()
    #: The ``worker`` column (an id per sample), or ``None`` without one.
    worker: NDArray[np.str_] | None = None

    @property
    def n(self) -> int:
        return len(self.values)

    @property
    def zeros(self) -> int:
        """Values of exactly 0: people with no exposure (the unexposed share)."""
        return int(np.sum(self.values == 0))


# -- the study's bands ------------------------------------------------------
def read_study_table(path: str | Path, source: str | None = None, *,
                     design: str | None = None) -> StudyTable:
    """Read and check a table of band estimates.

    Required columns: ``lower``, ``upper`` (empty for an open-ended top
    band), ``rr``, ``ci_lower``, ``ci_upper``. Optional: ``dose`` and the
    counts ``cases`` with ``controls`` (case-control), ``person_time``
    (incidence-rate) or ``persons`` (cumulative-incidence).

    Checks: numbers where numbers belong; limits of 0 or more; each band's
    upper limit above its lower; bands in increasing order without overlap;
    RR above 0; a CI that contains its RR (``ci_lower <= rr <= ci_upper``
    with ``ci_lower < ci_upper``); exactly one reference band (``rr`` 1
    with both CI cells empty); a given dose inside its band; counts above 0
    on every row when a count column is present.
    """
    raw = read_raw(path, source)
    require_columns(raw, BAND_REQUIRED, "a band table")
    check_units(raw, ("lower", "upper", "dose"))
    counts_present = [c for c in COUNT_COLUMNS if c in raw.columns]
    parsed = [_band_row(raw, row, counts_present) for row in raw.rows]
    n = len(parsed)
    arr = {k: np.array([p[k] for p in parsed], dtype=float)
           for k in ("lower", "upper", "rr", "ci_lower", "ci_upper", "dose")}
    check_band_order(raw, arr["lower"], arr["upper"])
    reference = _reference_index(raw, parsed)
    counts = {c: np.array([p[c] for p in parsed], dtype=float) for c in counts_present}
    _check_counts(raw, counts, design)
    notes = []
    gaps = [i for i in range(1, n) if arr["lower"][i] > arr["upper"][i - 1]]
    if gaps:
        i = gaps[0]
        notes.append(f"{raw.source}: bands leave gaps (row {raw.rows[i].line} starts at "
                     f"{arr['lower'][i]:g}, the band before ends at {arr['upper'][i - 1]:g}); "
                     "each band's lower limit is used as the cutpoint")
    return StudyTable(raw.source, arr["lower"], arr["upper"], arr["rr"], arr["ci_lower"],
                      arr["ci_upper"], arr["dose"], reference, counts,
                      tuple(r.line for r in raw.rows), tuple(notes))


def _band_row(raw: RawTable, row: Row, counts_present: list[str]) -> dict[str, float]:
    lower = number(raw, row, "lower")
    if lower < 0:
        raise cell_error(raw, row, "lower",
                         f"negative exposure {lower:g}; band limits must be 0 or more")
    upper = number(raw, row, "upper", required=False)
    if upper is None:
        upper = math.inf
    elif upper <= lower:
        raise cell_error(raw, row, "upper", f"upper limit {upper:g} is not above the lower limit "
                    f"{lower:g}")
    rr = number(raw, row, "rr")
    if rr <= 0:
        raise cell_error(raw, row, "rr", f"RR must be greater than 0, got {rr:g}")
    lo = number(raw, row, "ci_lower", required=False)
    hi = number(raw, row, "ci_upper", required=False)
    if (lo is None) != (hi is None):
        missing = "ci_lower" if lo is None else "ci_upper"
        raise cell_error(raw, row, missing, "one CI limit is empty; give both limits, or leave "
                         "both empty on the reference band (rr 1)")
    if lo is None and rr != 1:
        raise cell_error(raw, row, "ci_lower", f"the CI is empty but the RR is {rr:g}; only the "
                    "reference band (rr 1) has an empty CI")
    if lo is not None and hi is not None:
        if lo <= 0:
            raise cell_error(raw, row, "ci_lower", f"CI limit must be greater than 0, got {lo:g}")
        if not lo < hi:
            raise cell_error(raw, row, "ci_upper", f"CI upper limit {hi:g} is not above the lower "
                        f"limit {lo:g}")
        if not lo <= rr <= hi:
            col = "ci_lower" if rr < lo else "ci_upper"
            raise cell_error(raw, row, col,
                             f"the CI {lo:g} to {hi:g} does not contain its RR {rr:g}")
    dose = number(raw, row, "dose", required=False) if "dose" in raw.columns else None
    if dose is not None and not lower <= dose <= upper:
        raise cell_error(raw, row, "dose", f"dose {dose:g} lies outside its band "
                    f"[{lower:g}, {upper:g}]")
    out = {"lower": lower, "upper": upper, "rr": rr,
           "ci_lower": math.nan if lo is None else lo, "ci_upper": math.nan if hi is None else hi,
           "dose": math.nan if dose is None else dose}
    for c in counts_present:
        value = number(raw, row, c)
        if value <= 0:
            raise cell_error(raw, row, c, f"{c} must be greater than 0, got {value:g} (the "
                             "covariance of the log RRs needs every band's counts; remove the "
                             "count columns to treat the estimates as independent)")
        out[c] = value
    return out

def _reference_index(raw: RawTable, parsed: list[dict[str, float]]) -> int:
    refs = [i for i, p in enumerate(parsed) if p["rr"] == 1 and math.isnan(p["ci_lower"])]
    if not refs:
        raise InputError("no reference band: one row must have rr 1 with ci_lower and ci_upper "
                         "left empty", source=raw.source, location="column 'rr'")
    if len(refs) > 1:
        lines = " and ".join(str(raw.rows[i].line) for i in refs[:2])
        raise InputError("two reference bands (rr 1 with an empty CI); keep exactly one",
                         source=raw.source, location=f"rows {lines}, column 'rr'")
    return refs[0]


def _check_counts(raw: RawTable, counts: dict[str, FloatArray], design: str | None) -> None:
    if not counts:
        return
    location = f"column '{next(iter(counts))}'"
    if "cases" not in counts:
        raise InputError("count columns need a 'cases' column beside them",
                         source=raw.source, location="column 'cases'")
    totals = [c for c in counts if c != "cases"]
    if design is not None:
        need = DESIGN_TOTALS[design]
        if need not in counts:
            hint = near_column(need, [c for c in raw.columns if c not in COUNT_COLUMNS])
            raise InputError(f"missing column '{need}': with design = \"{design}\" the table "
                             f"gives cases and {need} per band (or remove the count columns to "
                             f"treat the estimates as independent){hint}", source=raw.source,
                             location=f"column '{need}'")
    elif len(totals) != 1:
        raise InputError("with cases give exactly one of controls, person_time or persons "
                         f"(found {', '.join(totals) or 'none'}), or set design in [curve]",
                         source=raw.source, location=location)


def design_from_counts(table: StudyTable) -> str | None:
    """The study design implied by the count columns, if any."""
    for design, total in DESIGN_TOTALS.items():
        if "cases" in table.counts and total in table.counts:
            return design
    return None


# -- exposure measurements --------------------------------------------------
def read_measurements(path: str | Path, source: str | None = None, *,
                      detected_column: str = "detected",
                      weight_column: str = "weight", min_positive: int = 3) -> Measurements:
    """Read and check exposure measurements.

    Column ``value`` (required): a positive number, or ``<L`` for a result
    below the detection limit ``L``. Optional ``detected`` column (true /
    false; false means ``value`` is the detection limit) and ``weight``
    column (0 or more, not all 0); optional ``worker`` column (an id per
    sample, for personal samples of several workers). At least
    ``min_positive`` values must be detected and above 0: 3 to fit a
    two-parameter family, 1 for the empirical distribution, which fits
    nothing.
    """
    raw = read_raw(path, source)
    require_columns(raw, ("value",), "a measurement table")
    check_units(raw, ("value", LOD_COLUMN))
    detected_column, weight_column = detected_column.lower(), weight_column.lower()
    has_w = weight_column in raw.columns
    det_column = detected_column if detected_column in raw.columns else None
    vals, det, w_arr, worker = _measurement_columns(raw, det_column,
                                                    weight_column if has_w else None)
    lines = raw.lines
    notes = []
    if w_arr is not None:
        if not np.any(w_arr > 0):
            raise InputError("all weights are 0", source=raw.source,
                             location=f"column '{weight_column}'")
        keep = w_arr > 0
        if not keep.all():
            notes.append(f"{raw.source}: {int((~keep).sum())} rows with weight 0 were left out")
            vals, det, w_arr, lines = vals[keep], det[keep], w_arr[keep], lines[keep]
            worker = None if worker is None else worker[keep]
    positive = det & (vals > 0)
    if positive.sum() < min_positive:
        why = "to fit a distribution" if min_positive > 1 else "for the empirical distribution"
        raise InputError(f"only {int(positive.sum())} of {len(det)} values are detected and "
                         f"above 0; at least {min_positive} detected values are needed {why}",
                         source=raw.source, location="column 'value'")
    if not det.all():
        notes.append(f"{raw.source}: {int((~det).sum())} of {len(det)} values are below a "
                     "detection limit and enter the fit as left-censored")
    if np.any(vals == 0):
        notes.append(f"{raw.source}: {int(np.sum(vals == 0))} values of 0 are taken as people "
                     "with no exposure; their weighted share is the unexposed share")
    if worker is not None and len(worker):  # as wide as the longest id kept
        worker = worker.astype(f"<U{max(1, int(np.char.str_len(worker).max()))}")
    return Measurements(raw.source, vals, det, w_arr, _line_tuple(lines), tuple(notes), worker)


def _line_tuple(lines: NDArray[np.int64]) -> Sequence[int]:
    if len(lines) and lines[-1] - lines[0] == len(lines) - 1:  # one line after another
        return range(int(lines[0]), int(lines[-1]) + 1)
    return tuple(lines.tolist())


def _measurement_columns(raw: RawTable, det_column: str | None, weight_column: str | None
                         ) -> tuple[FloatArray, NDArray[np.bool_], FloatArray | None,
                                    NDArray[np.str_] | None]:
    """Values, detected flags, weights and worker ids of every row, checked.

    The columns are checked at once; rows that are not plain (a cell that
    is no number, a non-detect written as text, any check failing) are then
    read and checked one by one in order by :func:`_measurement_row`, which
    raises the message for the first problem or gives the row's values."""
    values, below, ok = _value_column(raw)
    if det_column is not None:
        flag, flag_ok = _flag_column(raw, det_column)
        ok &= flag_ok & ~(below & flag)
        below = below | ~flag
    ok &= ~(below & (values == 0)) & (np.abs(values) < SQRT_MAX)
    weights = None
    if weight_column is not None:
        weights, w_ok = raw.numbers(weight_column)
        weights = weights.copy()
        ok &= w_ok & (weights >= 0) & (np.abs(weights) < SQRT_MAX)
    workers = None
    if "worker" in raw.columns:
        workers = raw.strings("worker").copy()
        ok &= workers != ""
    bad = np.flatnonzero(~ok)
    if len(bad):
        values, below = values.copy(), below.copy()
    for i in bad.tolist():
        worker, v, is_below, w = _measurement_row(raw, raw.row(i), det_column, weight_column)
        values[i], below[i] = v, is_below
        if weights is not None and w is not None:
            weights[i] = w
        if workers is not None and worker is not None:
            workers[i] = worker
    return values, ~below, weights, workers


def _value_column(raw: RawTable) -> tuple[FloatArray, NDArray[np.bool_], NDArray[np.bool_]]:
    """The ``value`` column: numbers, whether written ``<L``, and where both
    are plain (a number, 0 or more; above 0 after ``<``)."""
    cells = raw.column("value")
    if cells.dtype == np.float64:
        given = raw.below("value")
        below = np.zeros(len(cells), dtype=bool) if given is None else given
        return cells, below, np.isfinite(cells) & (cells >= 0) & ~(below & (cells == 0))
    if cells.dtype != object:
        values, ok = raw.numbers("value")
        return values, np.zeros(len(values), dtype=bool), ok
    texts = cells.tolist()
    below = np.array([t[:1] == "<" for t in texts], dtype=bool)
    rest = cells
    if below.any():
        rest = cells.copy()
        rest[below] = [t[1:].strip() for t in cells[below].tolist()]
    values, ok = parse_numbers(rest, raw.decimal)
    return values, below, ok & (values >= 0) & ~(below & (values == 0))


def _flag_column(raw: RawTable, column: str) -> tuple[NDArray[np.bool_], NDArray[np.bool_]]:
    """The detected column's flags and where they are true or false."""
    cells = raw.column(column)
    if cells.dtype == bool:
        return cells, np.ones(len(cells), dtype=bool)
    known = {t: t.lower() in TRUE_TEXT for t in set(raw.texts(column).tolist())
             if t.lower() in TRUE_TEXT or t.lower() in FALSE_TEXT}
    texts = raw.texts(column).tolist()
    return (np.array([known.get(t, False) for t in texts], dtype=bool),
            np.array([t in known for t in texts], dtype=bool))


def _measurement_row(raw: RawTable, row: Row, det_column: str | None,
                     weight_column: str | None) -> tuple[str | None, float, bool, float | None]:
    """One row's worker, value, whether below a limit and weight, checked
    (the row-by-row reading, whose messages the column checks keep)."""
    worker = _worker(raw, row) if "worker" in raw.columns else None
    v, below = _measurement(raw, row)
    if det_column is not None:
        flag = _flag(raw, row, det_column)
        if below and flag:
            raise cell_error(raw, row, det_column, "the value is written as below a "
                             "detection limit ('<') but marked detected")
        below = below or not flag
        if below and v == 0:
            raise cell_error(raw, row, "value", "a detection limit must be above 0, but this "
                             f"non-detect ({det_column} = false) has the value 0")
    below_sqrt_max(raw, row, "value", v, "give a value below that (check the unit)")
    w = None
    if weight_column is not None:
        w = number(raw, row, weight_column)
        if w < 0:
            raise cell_error(raw, row, weight_column, f"weight must be 0 or more, got {w:g}")
        below_sqrt_max(raw, row, weight_column, w, "only the weights' ratios matter, so "
                       "divide them all by one factor")
    return worker, v, below, w


def _worker(raw: RawTable, row: Row) -> str:
    text = row.cells["worker"].strip()
    if not text:
        raise cell_error(raw, row, "worker", "empty worker id; give every sample the id of "
                         "the worker who wore the sampler")
    return text


def _measurement(raw: RawTable, row: Row) -> tuple[float, bool]:
    text = row.cells["value"]
    if text.lower() in NON_DETECT_TEXT:
        return _non_detect(raw, row, text), True
    below = text.startswith("<")
    if below:
        row = Row(row.line, {**row.cells, "value": text[1:].strip()})
    v = number(raw, row, "value")
    if v < 0:
        raise cell_error(raw, row, "value",
                         f"negative exposure {v:g}; measurements must be 0 or more")
    if v == 0 and below:
        raise cell_error(raw, row, "value", "a detection limit must be above 0, got '<0'")
    return v, below


def _non_detect(raw: RawTable, row: Row, text: str) -> float:
    """The detection limit of a non-detect written as text: the row's
    ``lod`` cell."""
    if LOD_COLUMN not in raw.columns:
        raise cell_error(raw, row, "value", f"'{shown(text)}' marks a result below the "
                         "detection limit without saying the limit; write <0.05 (the "
                         f"detection limit) or add a '{LOD_COLUMN}' column with each row's "
                         "limit")
    if not row.cells[LOD_COLUMN]:
        raise cell_error(raw, row, LOD_COLUMN, f"the value is '{shown(text)}' (below the "
                         "detection limit) but this row's detection limit is empty; give it")
    lod = number(raw, row, LOD_COLUMN)
    if not lod > 0:
        raise cell_error(raw, row, LOD_COLUMN, f"a detection limit must be above 0, got {lod:g}")
    return lod


def _flag(raw: RawTable, row: Row, column: str) -> bool:
    text = row.cells[column].lower()
    if text in TRUE_TEXT:
        return True
    if text in FALSE_TEXT:
        return False
    raise cell_error(raw, row, column, f"'{shown(row.cells[column])}' is not true or false")
