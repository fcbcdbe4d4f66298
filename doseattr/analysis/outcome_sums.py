r"""Outcomes made of several ``[[outcome]]`` blocks, and the grand total.

Blocks that share a name and have disjoint ``groups`` are one outcome with
group-specific curves: each block's run covers the rows of its groups, and
the outcome's burden puts the rows back in the table's order and sums them
within draws (:mod:`doseattr.analysis.burden_sums`). The grand total adds
every outcome's rows the same way, so its interval reflects the draws the
outcomes share (exposure, minimum-risk level) and those they do not (each
curve's coefficients).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import numpy as np

from doseattr.analysis.burden_run import burden_result
from doseattr.analysis.burden_sums import RowDraws, sum_result
from doseattr.results.records import StratumResult
from doseattr.results.run import Results


@dataclasses.dataclass(frozen=True, eq=False)
class Block:
    """One ``[[outcome]]`` block's run: its name and groups (``None``: every
    row), its results and the draws of its rows (``None`` without burden)."""

    name: str
    groups: tuple[str, ...] | None
    results: Results
    rows: RowDraws | None


def merge_outcome(blocks: Sequence[Block]) -> tuple[Results, RowDraws | None]:
    """One outcome's results from its blocks (a single block as it is)."""
    first = blocks[0]
    if len(blocks) == 1:
        return first.results, first.rows
    parts = [b.rows for b in blocks]
    assert all(p is not None for p in parts)
    rows = RowDraws.concat([p for p in parts if p is not None])
    records = [s for b in blocks if b.results.burden is not None for s in b.results.burden.strata]
    order = sorted(range(len(rows)), key=lambda i: rows.lines[i])
    rows = rows.take(order)
    records = [records[i] for i in order]
    burden = first.results.burden
    assert burden is not None
    merged = burden_result(rows, records, burden.method, burden.rate_per)
    scenarios = tuple(dataclasses.replace(
        s, averted=next((e.averted for e in merged.total.scenarios if e.name == s.name), None))
        for s in first.results.attribution.scenarios)
    groups = ", ".join("[" + ", ".join(b.groups or ()) + "]" for b in blocks)
    note = (f"group-specific curves {groups}: the outcome's curve and population PAF shown "
            f"are those of its first block (groups {', '.join(first.groups or ())}); "
            "group_curves in results.json lists each curve")
    results = dataclasses.replace(
        first.results, burden=merged,
        attribution=dataclasses.replace(first.results.attribution, scenarios=scenarios),
        group_runs=tuple((b.groups or (), b.results) for b in blocks),
        warnings=_unique(w for b in blocks for w in b.results.warnings),
        notes=_unique([*(n for b in blocks for n in b.results.notes), note]))
    return results, rows


def grand_total(outcomes: Sequence[tuple[str, Results, RowDraws | None]]) -> StratumResult | None:
    """Every outcome's burden summed within draws (``None`` without any).

    Populations are not added across outcomes (they are the same people):
    the grand total's rate uses the population of the outcomes' tables when
    they all have the same total, else there is none. Years of life lost
    add over the outcomes that carry life expectancy (deaths)."""
    parts = [(r, rows) for _, r, rows in outcomes if rows is not None and r.burden is not None]
    if not parts:
        return None
    rows = RowDraws.concat([p[1] for p in parts])
    pops = {float(np.sum(p[1].population)) for p in parts}
    rate_pers = {p[0].burden.rate_per for p in parts if p[0].burden is not None}
    rate_per = next(iter(rate_pers))
    shared = len(pops) == 1 and len(rate_pers) == 1 and not np.isnan(next(iter(pops)))
    total = sum_result(rows, "all outcomes", None, rate_per,
                       population=next(iter(pops)) if shared else float("nan"))
    deaths = [p[1] for p in parts if not np.any(np.isnan(p[1].life_expectancy))]
    if deaths:
        with_le = sum_result(RowDraws.concat(deaths), "all outcomes", None, rate_per)
        total = dataclasses.replace(total, yll=with_le.yll, scenarios=tuple(
            dataclasses.replace(e, averted_yll=w.averted_yll)
            for e, w in zip(total.scenarios, with_le.scenarios, strict=True)))
    return total


def _unique(items) -> tuple[str, ...]:
    return tuple(dict.fromkeys(items))
