"""The zones of a ``[grid]`` analysis beside their burden results.

A zone of the grid (:class:`~doseattr.results.records.GridSection`) is a
stratum of the burden table: ``zone_strata[k]`` is the stratum of zone
``k``. Without groups a zone's result is its stratum's row; with groups
(several rows per stratum) it is the stratum summed across its groups
(``BurdenResult.stratum_totals``, a sum draw by draw). zones.csv and the
report's table of zones both read :func:`zone_rows`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from doseattr.results.records import BurdenResult, GridSection, StratumEffect, StratumResult

#: How many zones the report's table of the largest burdens shows.
TOP_ZONES = 10


@dataclass(frozen=True)
class ZoneRow:
    """One zone: what the grid says of it (id, name, population,
    population-weighted mean concentration) and its burden result
    (``None`` when the burden has no stratum ``stratum``)."""

    zone: int
    name: str
    population: float
    mean: float
    stratum: str | None
    result: StratumResult | None

    def effect(self, scenario: str) -> StratumEffect | None:
        """The zone's result under scenario ``scenario`` (``None`` without one)."""
        if self.result is None:
            return None
        return next((e for e in self.result.scenarios if e.name == scenario), None)


def zone_results(burden: BurdenResult) -> dict[str, StratumResult]:
    """``{stratum: result}``: each stratum's row, or with groups each
    stratum summed across its groups."""
    rows = burden.stratum_totals if burden.has_groups else burden.strata
    return {s.stratum: s for s in rows}


def zone_rows(grid: GridSection, burden: BurdenResult | None) -> list[ZoneRow]:
    """Every zone of ``grid`` in its order, with its burden result matched
    by ``grid.zone_strata[k] == stratum``.

    Raises
    ------
    ValueError
        When ``zone_strata`` is given but not one label per zone (a record
        the analysis built wrongly; an empty ``zone_strata`` matches
        nothing).
    """
    n = len(grid.zone_ids)
    if grid.zone_strata and len(grid.zone_strata) != n:
        raise ValueError(f"the grid record has {len(grid.zone_strata)} zone strata for {n} "
                         "zones")
    strata: Sequence[str | None] = grid.zone_strata or [None] * n
    results = {} if burden is None else zone_results(burden)
    return [ZoneRow(int(z), str(name), float(pop), float(mean), stratum,
                    None if stratum is None else results.get(stratum))
            for z, name, pop, mean, stratum in zip(grid.zone_ids, grid.zone_names,
                                                   grid.zone_population, grid.zone_mean,
                                                   strata, strict=True)]


def largest_burdens(rows: Sequence[ZoneRow], n: int = TOP_ZONES) -> list[ZoneRow]:
    """The ``n`` zones with the most attributable cases (point estimates),
    most first; zones without a burden result are left out and ties keep
    the zones' order."""
    matched = [r for r in rows if r.result is not None]
    return sorted(matched, key=lambda r: -_attributable(r))[:n]


def _attributable(row: ZoneRow) -> float:
    assert row.result is not None
    return float(row.result.attributable.estimate)
