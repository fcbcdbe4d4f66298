"""Strata with observed cases for attributable cases ([burden])."""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from doseattr.analysis.csvfile import (
    FloatArray,
    RawTable,
    Row,
    below_sqrt_max,
    cell_error,
    number,
    read_raw,
    require_columns,
)
from doseattr.core.exposure.registry import lower_bound
from doseattr.errors import InputError

#: Per-stratum exposure columns that may override the shared exposure.
STRATUM_EXPOSURE = (("gm", "gsd"), ("mean", "sd"), ("shape", "scale"))


@dataclass(frozen=True, eq=False)
class BurdenTable:
    """Strata with observed cases, optional population, and optional
    per-stratum exposure (``exposure[i]`` is ``None`` for the shared
    exposure, else a dict like ``{"gm": 8.0, "gsd": 2.0}``)."""

    source: str
    strata: tuple[str, ...]
    cases: FloatArray
    population: FloatArray | None
    exposure: tuple[dict[str, float] | None, ...]
    lines: tuple[int, ...] = ()


def read_burden(path: str | Path, source: str | None = None) -> BurdenTable:
    """Read strata: columns ``stratum`` and ``cases`` (0 or more, one row per
    stratum), optional ``population`` and optional exposure columns (``gm``
    with ``gsd``, ``mean`` with ``sd``, or ``shape`` with ``scale``), filled
    on a row to override the shared exposure for that stratum or left empty
    together."""
    raw = read_raw(path, source)
    require_columns(raw, ("stratum", "cases"), "a burden table")
    pairs = [p for p in STRATUM_EXPOSURE if p[0] in raw.columns or p[1] in raw.columns]
    for a, b in pairs:
        missing = b if a in raw.columns else a
        if missing not in raw.columns:
            raise InputError(f"missing column '{missing}' ({a} and {b} go together)",
                             source=raw.source, location=f"column '{missing}'")
    names, cases, population, exposure = [], [], [], []
    seen: dict[str, int] = {}
    for row in raw.rows:
        name = row.cells["stratum"]
        if not name:
            raise cell_error(raw, row, "stratum", "empty stratum name")
        if name in seen:
            raise cell_error(raw, row, "stratum", f"stratum '{name}' appears twice (also row "
                        f"{seen[name]}); give one row per stratum")
        seen[name] = row.line
        n = number(raw, row, "cases")
        if n < 0:
            raise cell_error(raw, row, "cases", f"cases must be 0 or more, got {n:g}")
        below_sqrt_max(raw, row, "cases", n, "the intervals' standard errors square the "
                       "attributable cases; give cases below that")
        names.append(name)
        cases.append(n)
        if "population" in raw.columns:
            pop = number(raw, row, "population")
            if pop <= 0:
                raise cell_error(raw, row, "population", f"population must be above 0, got {pop:g}")
            population.append(pop)
        exposure.append(_stratum_exposure(raw, row, pairs))
    if not any(cases):
        raise InputError("every stratum has 0 cases; the overall PAF (total attributable over "
                         "total cases) needs at least one case", source=raw.source,
                         location="column 'cases'")
    _check_totals(raw, cases, population)
    return BurdenTable(raw.source, tuple(names), np.array(cases),
                       np.array(population) if population else None, tuple(exposure),
                       tuple(r.line for r in raw.rows))


def _stratum_exposure(raw: RawTable, row: Row, pairs) -> dict[str, float] | None:
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


def _check_totals(raw: RawTable, cases: list[float], population: list[float]) -> None:
    """Totals and rates must be floats: refuse cases or populations that
    add up past the float range (about 1.8e308), and a rate per 100,000
    that overflows."""
    for column, values in (("cases", cases), ("population", population)):
        if values and not math.isfinite(sum(values)):
            raise InputError(f"the {column} add up past the float range (about 1.8e308); "
                             f"give {column} below {sys.float_info.max / len(values):.3g} each",
                             source=raw.source, location=f"column '{column}'")
    for row, n, pop in zip(raw.rows, cases, population):
        if not math.isfinite(n / pop * 1e5):
            raise cell_error(raw, row, "population", f"cases {n:g} per population {pop:g} "
                             "gives a rate beyond the float range; check the population")
