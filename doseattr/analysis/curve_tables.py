"""Curves given as a CSV: points (dose, RR, CI) or draws of RR on a dose grid."""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from doseattr.analysis.csvfile import (
    FloatArray,
    RawTable,
    Row,
    cell_error,
    check_units,
    number,
    read_raw,
    require_columns,
)
from doseattr.errors import InputError


@dataclass(frozen=True, eq=False)
class PointsTable:
    """A curve given as points: doses (increasing), RR, CI (NaN where
    empty). ``reference_dose`` is the first dose with RR 1, else the first
    dose."""

    source: str
    doses: FloatArray
    rr: FloatArray
    ci_lower: FloatArray
    ci_upper: FloatArray
    reference_dose: float
    notes: tuple[str, ...] = ()


@dataclass(frozen=True, eq=False)
class DrawsTable:
    """A curve given as draws: doses ``(K,)`` and RR draws ``(D, K)``."""

    source: str
    doses: FloatArray
    rr: FloatArray
    reference_dose: float
    notes: tuple[str, ...] = ()


def read_points_table(path: str | Path, source: str | None = None) -> PointsTable:
    """Read a curve given as points: columns ``dose``, ``rr`` and optional
    ``ci_lower``, ``ci_upper``. Doses 0 or more and strictly increasing; RR
    above 0; a CI, where given, contains its RR."""
    raw = read_raw(path, source)
    require_columns(raw, ("dose", "rr"), "a points table")
    check_units(raw, ("dose",))
    has_ci = "ci_lower" in raw.columns and "ci_upper" in raw.columns
    doses: list[float] = []
    rr: list[float] = []
    lo: list[float] = []
    hi: list[float] = []
    for row in raw.rows:
        d = _dose(raw, row, "dose", doses)
        r = number(raw, row, "rr")
        if r <= 0:
            raise cell_error(raw, row, "rr", f"RR must be greater than 0, got {r:g}")
        a = number(raw, row, "ci_lower", required=False) if has_ci else None
        b = number(raw, row, "ci_upper", required=False) if has_ci else None
        if (a is None) != (b is None):
            raise cell_error(raw, row, "ci_lower" if a is None else "ci_upper",
                        "one CI limit is empty; give both or neither")
        if a is not None and b is not None and not (0 < a < b and a <= r <= b):
            raise cell_error(raw, row, "ci_lower", f"the CI {a:g} to {b:g} must be above 0 and "
                        f"contain its RR {r:g}")
        doses.append(d)
        rr.append(r)
        lo.append(math.nan if a is None else a)
        hi.append(math.nan if b is None else b)
    doses_a, rr_a = np.array(doses), np.array(rr)
    _need_two(raw, doses_a)
    ref, notes = _reference_point(raw, doses_a, rr_a)
    return PointsTable(raw.source, doses_a, rr_a, np.array(lo), np.array(hi), ref, notes)


def read_draws_table(path: str | Path, source: str | None = None) -> DrawsTable:
    """Read a curve given as draws: the first column is the dose, each
    further column one draw of the RR at those doses (at least 2 draws)."""
    raw = read_raw(path, source)
    dose_col, draw_cols = raw.columns[0], raw.columns[1:]
    check_units(raw, (dose_col,))
    if len(draw_cols) < 2:
        raise InputError("a draws file needs a dose column and at least 2 draw columns",
                         source=raw.source, location="row 1")
    doses: list[float] = []
    rows: list[list[float]] = []
    for row in raw.rows:
        doses.append(_dose(raw, row, dose_col, doses))
        values = []
        for col in draw_cols:
            v = number(raw, row, col)
            if v <= 0:
                raise cell_error(raw, row, col, f"RR must be greater than 0, got {v:g}")
            values.append(v)
        rows.append(values)
    doses_a = np.array(doses)
    _need_two(raw, doses_a)
    rr = np.array(rows).T
    median = np.median(rr, axis=0)
    ref, notes = _reference_point(raw, doses_a, median)
    return DrawsTable(raw.source, doses_a, rr, ref, notes)


def _dose(raw: RawTable, row: Row, column: str, before: list[float]) -> float:
    d = number(raw, row, column)
    if d < 0:
        raise cell_error(raw, row, column, f"negative exposure {d:g}; doses must be 0 or more")
    if before and d <= before[-1]:
        raise cell_error(raw, row, column, f"doses must increase down the file; {d:g} follows "
                    f"{before[-1]:g}")
    return d


def _need_two(raw: RawTable, doses: FloatArray) -> None:
    if doses.size < 2:
        raise InputError("a curve needs at least 2 doses", source=raw.source)


def _reference_point(raw: RawTable, doses: FloatArray,
                     rr: FloatArray) -> tuple[float, tuple[str, ...]]:
    ones = np.flatnonzero(np.isclose(rr, 1.0, rtol=0, atol=1e-9))
    if ones.size:
        return float(doses[ones[0]]), ()
    return float(doses[0]), (f"{raw.source}: no dose has RR 1; RRs are taken relative to the "
                             f"first dose, {doses[0]:g} (this does not change the fractions, "
                             "which use RR relative to the minimum-risk level)",)
