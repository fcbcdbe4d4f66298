"""The report's section on a ``[grid]`` analysis: what was read, the two
maps and the zones with the largest burden.

Reads the run's :class:`~doseattr.results.records.GridSection` and its
:class:`~doseattr.results.records.BurdenResult` (zones matched to strata by
:func:`~doseattr.outputs.zones.zone_rows`); figures are passed in as PNG
bytes by name (``grid_concentration``, ``grid_attributable``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from doseattr.outputs.burden_report import cases, rate_header
from doseattr.outputs.grid_figures import decimation_text
from doseattr.outputs.markup import (
    NA,
    definition_list,
    estimate_text,
    figure,
    interval,
    num,
    para,
    pct,
    table,
    warning_box,
)
from doseattr.outputs.zones import TOP_ZONES, ZoneRow, largest_burdens, zone_rows
from doseattr.results.records import BurdenResult, GridSection

#: How each input file of ``[grid]`` is named in the report.
FILE_NAMES = {"concentration": "Concentration raster", "population": "Population raster",
              "zones": "Zone raster", "zone_names": "Zone names", "cells": "Cell table"}


def grid_section(grid: GridSection | None, burden: BurdenResult | None, unit: str | None,
                 images: Mapping[str, bytes]) -> str:
    """What the grid analysis read, its maps and the zones with the most
    attributable cases; empty without a grid."""
    if grid is None:
        return ""
    rows = zone_rows(grid, burden)
    grouped = burden is not None and burden.has_groups
    whose = ("its stratum's, summed across the stratum's groups" if grouped
             else "its stratum's")
    parts = [para("Exposure was read from a grid of cells, each with a concentration and a "
                  "population. A zone's exposure distribution is that of its cells' "
                  "concentrations, each cell weighted by its population; cells without data "
                  "are left out and counted below. Each zone is a stratum of the burden "
                  f"table, so a zone's attributable cases are {whose}."),
             definition_list(read_facts(grid)),
             unmatched_warning(rows),
             maps_block(grid, unit, images),
             top_zones_table(rows, burden, unit),
             para("zones.csv lists every zone with its population, mean concentration, "
                  "attributable cases, PAF and each scenario's PIF and averted cases.")]
    return "".join(p for p in parts if p)


def read_facts(grid: GridSection) -> list[tuple[str, str]]:
    """``(what, value)`` lines: the files, the cells read and skipped, the
    exposure-model error, where the sums were computed and the zones."""
    facts = [(FILE_NAMES.get(key, key.replace("_", " ")), str(path))
             for key, path in grid.files.items()]
    cells, skipped = int(grid.cells), int(grid.skipped_cells)
    share = f" ({pct(skipped / cells)} of them)" if cells > 0 and skipped > 0 else ""
    facts += [("Cells read", f"{cells:,}"),
              ("Cells skipped as nodata", f"{skipped:,}{share}, holding a population of "
                                          f"{cases(float(grid.skipped_population))}"),
              ("Exposure-model error", error_text(grid.error_gsd)),
              ("Computed on", grid.scheduler or "this machine (no distributed scheduler)"),
              ("Zones", f"{len(grid.zone_ids):,}, holding a population of "
                        f"{cases(float(sum(grid.zone_population)))}")]
    return facts


def error_text(error_gsd: float | None) -> str:
    """How the stated error of the concentration surface entered the run."""
    if error_gsd is None:
        return "none stated: the concentration surface is taken as exact"
    return (f"a multiplicative lognormal error of GSD {num(float(error_gsd))}, one factor per "
            "Monte Carlo draw shared by every cell and zone, so it enters the intervals only "
            "(not the estimates)")


def unmatched_warning(rows: Sequence[ZoneRow]) -> str:
    """A warning naming the zones with no burden result, if any."""
    missing = [r for r in rows if r.result is None]
    if not missing:
        return ""
    names = ", ".join(f"{r.zone} ({r.name})" for r in missing[:5])
    more = f" and {len(missing) - 5} more" if len(missing) > 5 else ""
    return warning_box([f"{len(missing)} zone(s) have no result in the burden table: "
                        f"{names}{more}; their burden cells in zones.csv are empty."])


def maps_block(grid: GridSection, unit: str | None, images: Mapping[str, bytes]) -> str:
    """The two maps with their captions, or a line saying there are none."""
    maps = grid.maps
    if maps is None:
        return para("No maps are drawn: the run holds no gridded rasters to display (a cell "
                    "table has no grid).")
    note = decimation_text(maps.step)
    where = f" Coordinates in {maps.crs}." if maps.crs else ""
    u = f" in {unit}" if unit else ""
    return (figure(images, "grid_concentration",
                   f"Concentration{u} in each shown cell; grey cells have no data. "
                   f"{note}{where}")
            + figure(images, "grid_attributable",
                     "Attributable cases per 1,000 people in each shown cell; grey cells have "
                     f"no data or no population. {note}{where}"))


def top_zones_table(rows: Sequence[ZoneRow], burden: BurdenResult | None,
                    unit: str | None, n: int = TOP_ZONES) -> str:
    """The ``n`` zones with the most attributable cases, most first: name,
    population, mean concentration, attributable cases with their interval
    and, with populations in the burden table, the attributable rate."""
    top = largest_burdens(rows, n)
    if burden is None or not top:
        return ""
    rates = burden.has_rates
    u = f", {unit}" if unit else ""
    header = ["Zone", "Name", "Population", f"Mean concentration (population-weighted{u})",
              "Attributable cases", "95% interval", *([rate_header(burden.rate_per)]
                                                      if rates else [])]
    body = []
    for r in top:
        s = r.result
        assert s is not None
        att = s.attributable
        body.append([str(r.zone), r.name, cases(r.population), num(r.mean),
                     cases(att.estimate), interval(att.lower, att.upper, cases),
                     *([estimate_text(s.attributable_rate, cases) if s.attributable_rate
                        else NA] if rates else [])])
    matched = sum(1 for r in rows if r.result is not None)
    caption = (f"The {len(top)} zones with the most attributable cases, of {matched}"
               if len(top) < matched else
               f"All {matched} zones, most attributable cases first")
    return table(header, body, caption=caption)
