"""``[grid]``: the cells reduced by zone in one pass, each zone a census
exposure for the burden rows of its stratum.

A zone is a stratum of the burden table: a row's ``stratum`` is the zone's
name (from ``[grid] zone_names``) or its id. The reduction
(:func:`~doseattr.analysis.grid_reduce.reduce_grid`) keeps, per zone, the
population-weighted histogram of concentrations on a fine log grid; each
zone's exposure is then the census of its bin means
(:meth:`~doseattr.core.exposure.grid.GridSummary.zone_exposure`), and the
population's is every zone pooled. A census carries no sampling
uncertainty, so it is never bootstrapped; a stated exposure-model error
(``error_gsd``) is the only uncertainty of the exposure.
"""

from __future__ import annotations

import dataclasses
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from doseattr.analysis.burden_table import BurdenTable
from doseattr.analysis.csvfile import shown
from doseattr.analysis.grid_inputs import read_zone_names, table_has_zones
from doseattr.analysis.grid_reduce import GridNotes, GridSample, reduce_grid
from doseattr.analysis.specs import GridExposure
from doseattr.errors import InputError, ModelError
from doseattr.results.records import GridSection

WHOLE_NUMBER = re.compile(r"^[+-]?\d+$")


@dataclass(frozen=True, eq=False)
class BuiltGrid:
    """A reduced grid: the population's exposure, each zone's (by the
    stratum label that names it; empty when the cells carry no zones), the
    record of what was read (maps are added once the curve is known), the
    sample of cells for the maps, notes, and the grid's whole population;
    ``summary`` (the core ``GridSummary``) and ``error`` (the keywords of
    the exposure-model error) rebuild the zones with fewer points
    (:meth:`with_quadrature`)."""

    population: Any
    total_population: float
    by_stratum: Mapping[str, Any]
    section: GridSection
    sample: GridSample | None
    notes: tuple[str, ...]
    summary: Any = None
    error: Mapping[str, Any] = field(default_factory=dict)

    def with_quadrature(self, curve: Any, *, minimum_risk: tuple[float, float] = (0.0, 0.0),
                        scenarios: Sequence[Any] = (), width: float | None = None) -> BuiltGrid:
        """The grid with each zone's census given as a two-point Gauss rule
        per group of bins of log ``width`` (default the core's
        ``QUADRATURE_WIDTH``, 0.05: about a tenth of the points), for the
        Monte Carlo to integrate fewer points; the population's exposure
        (percentiles, cut points, figures) keeps every bin.

        The groups are split at the reduction's cuts, at the curve's kinks
        (``curve.kinks()``) and the minimum-risk level, and where each of
        the core ``scenarios`` moves them (``preimage``) or has its own
        (``own_kinks``), so that each
        group is smooth for the curve and each zone's fractions differ from
        those of every bin by the fourth-order term of the core's module
        docstring (doseattr.core.exposure.grid: relative 4.5e-9 of
        x^4 |h^(4)| / h at width 0.05). Unchanged (``self``) where that
        would not hold: an exposure-model error (each draw's factor moves
        the cuts), a minimum-risk level drawn over a range (``minimum_risk``
        low < high: each draw's level is a kink), a curve whose kinks differ
        from draw to draw, or no zones. Strata of one zone keep sharing one
        exposure.
        """
        if (self.summary is None or not self.by_stratum
                or self.error.get("error_gsd") is not None
                or minimum_risk[0] != minimum_risk[1]):
            return self
        kinks = np.asarray(curve.kinks(), dtype=float)
        if kinks.ndim != 1:
            return self
        from doseattr.core.exposure.grid import QUADRATURE_WIDTH

        step = QUADRATURE_WIDTH if width is None else float(width)
        levels = np.append(kinks, float(minimum_risk[0]))
        splits = np.concatenate([levels, *(np.ravel(sc.preimage(levels)) for sc in scenarios),
                                 *(np.ravel(sc.own_kinks()) for sc in scenarios)])
        merged = {id(self.by_stratum[s]): self.summary.zone_exposure(k, quadrature=step,
                                                                     splits=splits)
                  for k, s in enumerate(self.section.zone_strata)}
        by_stratum = {s: merged[id(e)] for s, e in self.by_stratum.items()}
        bins = sum(e.values.size for e in {id(e): e for e in self.by_stratum.values()}.values())
        points = sum(e.values.size for e in merged.values())
        note = (f"grid: each zone's census is integrated as a two-point Gauss rule per "
                f"{step:g} of ln x ({points} points for {bins} bins), its groups split at "
                "the curve's kinks, the minimum-risk level, the cuts and where the scenarios "
                "move them; it keeps each group's population and first three moments and "
                "differs from every bin's by a fourth-order term, about "
                f"{math.expm1(step) ** 4 / 1536:.1e} of x^4|h''''|/h")
        return dataclasses.replace(self, by_stratum=by_stratum, notes=(*self.notes, note))


def build_grid(spec: GridExposure, source: str | None) -> BuiltGrid:
    """Reduce the grid of ``spec`` and give each zone's exposure.

    Raises
    ------
    InputError
        Zones without a burden table, burden rows with exposure columns, a
        stratum that names no zone, zones with population but no burden row
        (from the reduction), and rows whose zone has no population.
    """
    g = spec.grid
    zoned = g.zones is not None or (g.cells is not None and table_has_zones(g.cells))
    names = read_zone_names(g.zone_names) if g.zone_names else {}
    if zoned and not spec.tables:
        raise InputError("the grid has zones: results by zone need a [burden] table with a row "
                         "per zone (stratum = zone name or id); add one, or drop the zones",
                         source=source, location="[grid]")
    for table in spec.tables:
        _refuse_exposure_columns(table)
    ids = _zone_ids(spec.tables, names, g.zone_names) if zoned else {}
    zone_ids = tuple(dict.fromkeys(ids.values()))
    sums, notes = reduce_grid(g, zone_ids, scheduler=spec.scheduler,
                              reducer=_reducer(spec.cuts))
    summary = sums.summary()
    error_seed = _error_seed(spec) if g.error_gsd is not None else None
    keywords = {"error_gsd": g.error_gsd, "error_seed": error_seed}
    try:
        population = summary.population_exposure(**keywords)
    except ModelError as exc:
        raise InputError(str(exc), source=g.cells or g.population) from None
    by_stratum: dict[str, Any] = {}
    for k, z in enumerate(zone_ids):
        if not summary.zone_population(k) > 0:
            raise _empty_zone(spec.tables, ids, z, int(summary.cells[k]))
        exposure = summary.zone_exposure(k, **keywords)
        by_stratum.update({s: exposure for s, zz in ids.items() if zz == z})
    strata = {z: s for s, z in ids.items()}
    section = GridSection(
        files=_files(spec), zone_ids=zone_ids,
        zone_names=tuple(names.get(z, str(z)) for z in zone_ids),
        zone_population=tuple(summary.zone_population(k) for k in range(len(zone_ids))),
        zone_mean=tuple(summary.zone_mean(k) for k in range(len(zone_ids))),
        cells=notes.cells, skipped_cells=notes.skipped,
        skipped_population=notes.skipped_population, error_gsd=g.error_gsd,
        scheduler=spec.scheduler, zone_strata=tuple(strata[z] for z in zone_ids))
    total = float(summary.zero.sum() + summary.weight.sum())
    extra = _population_notes(spec.tables, ids, section)
    return BuiltGrid(population, total, by_stratum, section, notes.sample,
                     _notes(spec, notes, len(zone_ids)) + extra, summary, keywords)


#: Relative difference between a zone's population in the burden table and
#: in the grid above which a note says so.
POPULATION_DIFFERENCE = 0.10


def _population_notes(tables: tuple[BurdenTable, ...], ids: Mapping[str, int],
                      section: GridSection) -> tuple[str, ...]:
    """A note for each zone whose population in a burden table (its rows
    summed) differs from the grid's by more than :data:`POPULATION_DIFFERENCE`."""
    out = []
    grid_pop = dict(zip(section.zone_ids, section.zone_population, strict=True))
    for table in tables if ids else ():
        if table.population is None:
            continue
        given: dict[int, float] = {}
        for label, p in zip(table.strata, table.population, strict=True):
            given[ids[label]] = given.get(ids[label], 0.0) + float(p)
        for z, p in given.items():
            g = grid_pop[z]
            if g > 0 and abs(p - g) > POPULATION_DIFFERENCE * g:
                out.append(f"grid: zone {z} has a population of {p:.6g} in {table.source} but "
                           f"{g:.6g} in the grid ({(p - g) / g:+.0%}); rates use the table's "
                           "population, the exposure and the maps the grid's")
    return tuple(out)


def _reducer(cuts: tuple[float, ...]):
    """The core's block reducer, splitting bins at ``cuts``."""
    import functools

    from doseattr.core.exposure.grid import reduce_block

    return functools.partial(reduce_block, cuts=cuts) if cuts else None


def _zone_ids(tables: tuple[BurdenTable, ...], names: Mapping[int, str],
              names_file: str | None) -> dict[str, int]:
    """The zone id of each stratum label of the burden tables: a name of
    ``zone_names``, or a whole number; two labels of one zone are refused."""
    by_name = {n: z for z, n in names.items()}
    out: dict[str, int] = {}
    for table in tables:
        for label, line in zip(table.strata, table.lines, strict=True):
            if label in out:
                continue
            zone = _zone_of(label, by_name, names_file, table, line)
            other = next((s for s, z in out.items() if z == zone), None)
            if other is not None:
                raise InputError(f"stratum '{shown(label)}' and stratum '{shown(other)}' are "
                                 f"both zone {zone}; use one label per zone",
                                 source=table.source, location=f"row {line}, column 'stratum'")
            out[label] = zone
    return out


def _zone_of(label: str, by_name: Mapping[str, int], names_file: str | None,
             table: BurdenTable, line: int) -> int:
    if label in by_name:
        return by_name[label]
    if WHOLE_NUMBER.match(label.strip()):
        return int(label)
    where = (f"neither a zone name in {names_file} nor a zone id" if names_file else
             "not a zone id (a whole number); to use names, give [grid] zone_names")
    raise InputError(f"stratum '{shown(label)}' is {where}", source=table.source,
                     location=f"row {line}, column 'stratum'")


def _refuse_exposure_columns(table: BurdenTable) -> None:
    for e, line in zip(table.exposure, table.lines, strict=True):
        if e is not None:
            raise InputError(f"with [grid], each zone's exposure is its cells; remove the "
                             f"exposure columns ({', '.join(e)})", source=table.source,
                             location=f"row {line}")


def _empty_zone(tables: tuple[BurdenTable, ...], ids: Mapping[str, int], zone: int,
                cells: int) -> InputError:
    """The one-line error for a burden row whose zone holds no population."""
    labels = {s for s, z in ids.items() if z == zone}
    for table in tables:
        for label, line in zip(table.strata, table.lines, strict=True):
            if label in labels:
                held = ("has no cells in the grid" if cells == 0 else
                        f"has {cells} cells in the grid but no population in them")
                return InputError(f"zone {zone} of this row {held}; remove the row or check "
                                  "the zones", source=table.source, location=f"row {line}")
    raise AssertionError("a zone id without a stratum")


def _error_seed(spec: GridExposure) -> int:
    """The stream of the exposure-model error: from the analysis seed, apart
    from every other stream (``[seed, 7]``), the same for every zone."""
    return int(np.random.SeedSequence([spec.seed, 7]).generate_state(1)[0])


def _files(spec: GridExposure) -> dict[str, str]:
    g = spec.grid
    keys = ("concentration", "population", "zones", "zone_names", "cells")
    return {k: str(getattr(g, k)) for k in keys if getattr(g, k) is not None}


def _notes(spec: GridExposure, notes: GridNotes, zones: int) -> tuple[str, ...]:
    g = spec.grid
    out = list(notes.lines())
    where = f"{zones} zones" if zones else "the whole grid (no zones)"
    out.append(f"grid: the exposure is a census of the cells' population, reduced for {where} "
               "to population-weighted histograms on a log grid (bins 0.2% wide in ln x); it "
               "is not resampled (no bootstrap). Each expectation E[h(X)] over the bins' means "
               "differs from the exact per-cell one by at most 1/8 sum_b w_b sup|h''| "
               "(x_b (e^0.002 - 1))^2, about 5e-7 of x^2|h''|/h (exact for a linear h); a kink "
               "of h inside a bin (the minimum-risk level, max_dose, a cap) adds a term of "
               "first order, at most that bin's share of the population times 0.2%")
    if g.error_gsd is not None:
        mean = float(np.exp(np.log(g.error_gsd) ** 2 / 2))
        out.append(f"grid: exposure-model error with GSD {g.error_gsd:g}: each Monte Carlo draw "
                   "multiplies every cell's concentration by one lognormal factor (median 1, "
                   f"mean {mean:.4g}); this assumes the model's error is shared by the whole "
                   "grid (fully correlated), which gives the widest interval for the totals; "
                   "errors independent from cell to cell would mostly average out")
    if g.is_table:
        out.append("grid: a cell table has no geometry, so the report has no maps")
    return tuple(out)
