r"""Strata with observed cases, or a population and a rate, for attributable
cases ([burden]).

One row per stratum (and group, when the table has a ``group`` column). A
row gives its cases :math:`N` directly, or a population :math:`P` and a
rate :math:`r` of cases per ``rate_per`` people per year, from which

.. math:: N = P \, r / \text{rate\_per}

(the usual definition of a crude rate, common practice). Everything after
the table works with :math:`N` per row, whichever way it was given.
"""

from __future__ import annotations

import dataclasses
import math
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from doseattr.analysis.csvfile import (
    FloatArray,
    RawTable,
    Row,
    below_sqrt_max,
    cell_error,
    check_units,
    near_column,
    number,
    read_raw,
)
from doseattr.core.exposure.registry import lower_bound
from doseattr.errors import InputError

#: Per-stratum exposure columns that may override the shared exposure.
STRATUM_EXPOSURE = (("gm", "gsd"), ("mean", "sd"), ("shape", "scale"))
#: People a rate is given per, unless ``[burden] rate_per`` says otherwise.
DEFAULT_RATE_PER = 100000.0
#: Highest remaining life expectancy accepted, in years (no life table
#: goes beyond it; common practice).
MAX_LIFE_EXPECTANCY = 120.0
#: What a burden table needs, for messages.
NEEDS = "a burden table needs columns stratum and cases, or stratum, population and rate"


@dataclass(frozen=True, eq=False)
class BurdenTable:
    """Strata with their cases, optional population, and optional
    per-stratum exposure (``exposure[i]`` is ``None`` for the shared
    exposure, else a dict like ``{"gm": 8.0, "gsd": 2.0}``).

    ``cases[i]`` is the row's cases, given or computed as
    ``population[i] * rates[i] / rate_per``; ``rates[i]`` is the rate as
    given (NaN on a row that gave cases), ``rates`` is ``None`` without a
    ``rate`` column. ``groups`` (``None`` without a ``group`` column) and
    ``life_expectancy`` (remaining years at the row's age) are per row,
    like ``lines`` (each row's line in the file).
    """

    source: str
    strata: tuple[str, ...]
    cases: FloatArray
    population: FloatArray | None
    exposure: tuple[dict[str, float] | None, ...]
    lines: tuple[int, ...] = ()
    groups: tuple[str, ...] | None = None
    rates: FloatArray | None = None
    life_expectancy: FloatArray | None = None
    rate_per: float = DEFAULT_RATE_PER

    def label(self, i: int) -> str:
        """Row ``i`` for people: ``"North"``, or ``"North, 65-74"`` with a group."""
        return self.strata[i] if self.groups is None else f"{self.strata[i]}, {self.groups[i]}"

    def subset(self, indices: Sequence[int]) -> BurdenTable:
        """The rows at ``indices``, in that order (same source and rate_per)."""
        idx = np.asarray(indices, dtype=np.intp).reshape(-1)
        picked = [int(i) for i in idx]

        def rows(values: FloatArray | None) -> FloatArray | None:
            return None if values is None else values[idx]

        return dataclasses.replace(
            self, strata=tuple(self.strata[i] for i in picked), cases=self.cases[idx],
            population=rows(self.population),
            exposure=tuple(self.exposure[i] for i in picked),
            lines=tuple(self.lines[i] for i in picked) if self.lines else (),
            groups=None if self.groups is None else tuple(self.groups[i] for i in picked),
            rates=rows(self.rates), life_expectancy=rows(self.life_expectancy))


@dataclass(frozen=True)
class _Values:
    """One row, read and checked."""

    stratum: str
    group: str | None
    cases: float
    rate: float
    population: float | None
    life_expectancy: float | None
    exposure: dict[str, float] | None


def read_burden(path: str | Path, source: str | None = None, *,
                rate_per: float = DEFAULT_RATE_PER) -> BurdenTable:
    """Read strata: columns ``stratum`` and ``cases`` (0 or more), or
    ``stratum``, ``population`` and ``rate`` (cases per ``rate_per`` people
    per year); a table with both ``cases`` and ``rate`` fills exactly one
    of them on each row. Optional: ``group`` (any label; rows are then
    unique by stratum and group), ``life_expectancy`` (years, 0 to 120) and
    exposure columns (``gm`` with ``gsd``, ``mean`` with ``sd``, or
    ``shape`` with ``scale``), filled on a row to override the shared
    exposure for that stratum or left empty together. A ``population``,
    ``group`` or ``life_expectancy`` column must be filled on every row."""
    raw = read_raw(path, source)
    _check_columns(raw)
    check_units(raw, ("gm", "mean", "sd", "scale"))
    pairs = [p for p in STRATUM_EXPOSURE if p[0] in raw.columns or p[1] in raw.columns]
    for a, b in pairs:
        missing = b if a in raw.columns else a
        if missing not in raw.columns:
            raise InputError(f"missing column '{missing}' ({a} and {b} go together)",
                             source=raw.source, location=f"column '{missing}'")
    values = [_read_row(raw, row, pairs, rate_per) for row in raw.rows]
    _check_unique(raw, values)
    if not any(v.cases for v in values):
        raise InputError("every stratum has 0 cases (or a rate of 0); the overall PAF (total "
                         "attributable over total cases) needs at least one case",
                         source=raw.source,
                         location=f"column '{'cases' if 'cases' in raw.columns else 'rate'}'")
    _check_totals(raw, values, rate_per)
    cols = raw.columns
    return BurdenTable(
        raw.source, tuple(v.stratum for v in values), np.array([v.cases for v in values]),
        _column([v.population for v in values]) if "population" in cols else None,
        tuple(v.exposure for v in values), tuple(r.line for r in raw.rows),
        groups=tuple(v.group or "" for v in values) if "group" in cols else None,
        rates=np.array([v.rate for v in values]) if "rate" in cols else None,
        life_expectancy=(_column([v.life_expectancy for v in values])
                         if "life_expectancy" in cols else None),
        rate_per=float(rate_per))


def _column(values: list[float | None]) -> FloatArray:
    return np.array([math.nan if v is None else v for v in values])


def _check_columns(raw: RawTable) -> None:
    """``stratum``, and ``cases`` or ``rate``, must be columns."""
    for name in ("stratum", "cases"):
        if name not in raw.columns and not (name == "cases" and "rate" in raw.columns):
            hint = near_column(name, [c for c in raw.columns if c not in ("stratum", "cases")])
            raise InputError(f"missing column '{name}' ({NEEDS}){hint}", source=raw.source,
                             location=f"column '{name}'")


def _read_row(raw: RawTable, row: Row, pairs: list[tuple[str, str]],
              rate_per: float) -> _Values:
    name = row.cells["stratum"]
    if not name:
        raise cell_error(raw, row, "stratum", "empty stratum name")
    group = _filled(raw, row, "group", "give every row its group (an age band, a sex: any "
                                       "label)") if "group" in raw.columns else None
    population = None
    if "population" in raw.columns:
        _filled(raw, row, "population", "a table with a population column needs it on every "
                                        "row")
        population = number(raw, row, "population")
        if population <= 0:
            why = (" for its rate (cases = population x rate / rate_per)"
                   if row.cells.get("rate", "") else "")
            raise cell_error(raw, row, "population",
                             f"population must be above 0{why}, got {population:g}")
    cases, rate = _cases(raw, row, population, rate_per)
    life = _life_expectancy(raw, row, cases) if "life_expectancy" in raw.columns else None
    return _Values(name, group, cases, rate, population, life,
                   _stratum_exposure(raw, row, pairs))


def _filled(raw: RawTable, row: Row, column: str, advice: str) -> str:
    """The cell's text; an empty cell is an error naming the row."""
    text = row.cells[column]
    if not text:
        raise cell_error(raw, row, column, f"empty {column.replace('_', ' ')}; {advice}")
    return text


def _cases(raw: RawTable, row: Row, population: float | None,
           rate_per: float) -> tuple[float, float]:
    """The row's cases and its rate (NaN when it gave cases)."""
    given = [c for c in ("cases", "rate") if row.cells.get(c, "") != ""]
    if len(given) == 2:
        raise cell_error(raw, row, "rate", f"both cases ({row.cells['cases']}) and a rate "
                         f"({row.cells['rate']}) are given; fill one of them on each row "
                         "and leave the other empty")
    if not given:
        column = "cases" if "cases" in raw.columns else "rate"
        either = ("cases, or its rate (with its population)" if "rate" in raw.columns
                  else "cases (0 or more)")
        raise cell_error(raw, row, column, f"empty cell; give this row's {either}")
    if given == ["cases"]:
        n = number(raw, row, "cases")
        if n < 0:
            raise cell_error(raw, row, "cases", f"cases must be 0 or more, got {n:g}")
        below_sqrt_max(raw, row, "cases", n, "the intervals' standard errors square the "
                       "attributable cases; give cases below that")
        return n, math.nan
    rate = number(raw, row, "rate")
    if rate < 0:
        raise cell_error(raw, row, "rate", f"a rate must be 0 or more (cases per {rate_per:g} "
                         f"people per year), got {rate:g}")
    if population is None:
        raise cell_error(raw, row, "rate", "a rate needs the population it applies to; add "
                         "a population column (cases = population x rate / rate_per)")
    return _from_rate(raw, row, population, rate, rate_per), rate


def _from_rate(raw: RawTable, row: Row, population: float, rate: float,
               rate_per: float) -> float:
    """:math:`N = P r / \\text{rate\\_per}`, refused when it leaves the
    float range (or drops to 0 from a positive rate)."""
    n = population * rate / rate_per
    if not math.isfinite(n):  # P r alone may overflow where the quotient does not
        n = population * (rate / rate_per)
    what = f"population {population:g} x rate {rate:g} / rate_per {rate_per:g}"
    if not math.isfinite(n):
        raise cell_error(raw, row, "rate", f"{what} gives cases beyond the float range; "
                         "check the rate and rate_per")
    below_sqrt_max(raw, row, "rate", n, f"the cases ({what}) enter squares; check the rate "
                   "and rate_per")
    if n == 0 and rate > 0:
        raise cell_error(raw, row, "rate", f"{what} is below the smallest float (about "
                         "5e-324 cases); check the rate and rate_per")
    return n


def _life_expectancy(raw: RawTable, row: Row, cases: float) -> float:
    _filled(raw, row, "life_expectancy", "a table with a life_expectancy column needs it on "
                                         "every row (remaining years of life at the row's age)")
    years = number(raw, row, "life_expectancy")
    if not 0 <= years <= MAX_LIFE_EXPECTANCY:
        raise cell_error(raw, row, "life_expectancy", "life expectancy must be between 0 and "
                         f"{MAX_LIFE_EXPECTANCY:g} years (remaining years at the row's age), "
                         f"got {years:g}")
    below_sqrt_max(raw, row, "life_expectancy", cases * years, "years of life lost (cases x "
                   "life expectancy) enter squares; give fewer cases")
    return years


def _check_unique(raw: RawTable, values: list[_Values]) -> None:
    """One row per stratum (per stratum and group with a group column)."""
    seen: dict[tuple[str, str | None], int] = {}
    for row, v in zip(raw.rows, values):
        key = (v.stratum, v.group)
        if key in seen:
            if v.group is None:
                raise cell_error(raw, row, "stratum", f"stratum '{v.stratum}' appears twice "
                                 f"(also row {seen[key]}); give one row per stratum")
            raise cell_error(raw, row, "group", f"stratum '{v.stratum}' with group "
                             f"'{v.group}' appears twice (rows {seen[key]} and {row.line}); "
                             "give one row per stratum and group")
        seen[key] = row.line


def _stratum_exposure(raw: RawTable, row: Row,
                     pairs: list[tuple[str, str]]) -> dict[str, float] | None:
    filled = [(a, b) for a, b in pairs if row.cells[a] != "" or row.cells[b] != ""]
    if len(filled) > 1:
        raise cell_error(raw, row, filled[1][0], "give one exposure description per stratum "
                    f"(found {filled[0][0]}/{filled[0][1]} and {filled[1][0]}/{filled[1][1]})")
    if not filled:
        return None
    a, b = filled[0]
    for col in (a, b):
        if row.cells[col] == "":
            other = b if col == a else a
            raise cell_error(raw, row, col, f"incomplete exposure: {other} is given but {col} is "
                        "empty (fill both, or leave both empty to use the shared exposure)")
    va, vb = number(raw, row, a), number(raw, row, b)
    for col, v in ((a, va), (b, vb)):
        low = lower_bound(col)
        if v <= low:
            what = "GSD must be greater than" if col == "gsd" else f"{col} must be above"
            raise cell_error(raw, row, col, f"{what} {low:g}, got {v:g}")
    return {a: va, b: vb}


def _check_totals(raw: RawTable, values: list[_Values], rate_per: float) -> None:
    """Totals and rates must be floats: refuse cases or populations that
    add up past the float range (about 1.8e308), and a rate per
    ``rate_per`` that overflows."""
    columns = (("cases", [v.cases for v in values]),
               ("population", [v.population for v in values if v.population is not None]))
    for column, numbers in columns:
        if numbers and not math.isfinite(sum(numbers)):
            raise InputError(f"the {column} add up past the float range (about 1.8e308); "
                             f"give {column} below {sys.float_info.max / len(numbers):.3g} each",
                             source=raw.source, location=f"column '{column}'")
    for row, v in zip(raw.rows, values):
        if (v.population is not None and math.isnan(v.rate)
                and not math.isfinite(v.cases / v.population * rate_per)):
            raise cell_error(raw, row, "population", f"cases {v.cases:g} per population "
                             f"{v.population:g} gives a rate per {rate_per:g} beyond the float "
                             "range; check the population")
