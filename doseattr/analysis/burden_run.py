r"""Attributable and averted cases by stratum and in total ([burden]).

Per stratum :math:`s` with observed cases :math:`N_s`: attributable cases
:math:`A_s = PAF_s N_s` and averted cases :math:`PIF_{s,g} N_s` for each
scenario :math:`g`. Totals are sums over strata within each Monte Carlo
draw (so a total's interval is consistent with its strata) and the overall
PAF is :math:`\sum_s A_s / \sum_s N_s` (core
:mod:`doseattr.core.uncertainty.propagate`).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from typing import Any

import numpy as np

from doseattr.analysis.assemble import stratum_exposure as stratum_exposure_record
from doseattr.analysis.build import as_input_error
from doseattr.analysis.burden_sums import Quantity, RowDraws, row_result, sum_result
from doseattr.analysis.config import Analysis
from doseattr.analysis.intervals import (
    SOURCES,
    burden_spec,
    minimum_risk_range,
)
from doseattr.analysis.progress import progress_bar
from doseattr.errors import InputError
from doseattr.results.records import METHOD_TEXT, BurdenResult, StratumResult


def burden_strata(analysis: Analysis, exposure, grid=None) -> list:
    """One core ``Stratum`` per row of the burden table, each with the
    shared exposure or its own (from its exposure columns, or its zone's
    cells when ``grid``, a :class:`~doseattr.analysis.grid_exposure.BuiltGrid`,
    has zones)."""
    from doseattr.core.uncertainty.propagate import Stratum

    table = burden_spec(analysis).table
    if grid is not None and grid.by_stratum:
        return _zone_strata(table, grid)
    return [Stratum(table.label(i), float(n), stratum_exposure(analysis, exposure, override, line))
            for i, (n, override, line) in enumerate(zip(table.cases, table.exposure,
                                                        table.lines))]


def _zone_strata(table, grid) -> list:
    """Each row with its zone's exposure; every zone of the grid needs a
    row (a zone is a stratum; its groups are rows of that stratum)."""
    from doseattr.core.uncertainty.propagate import Stratum

    section = grid.section
    missing = [f"{n} (zone {z})" for z, n, s in zip(section.zone_ids, section.zone_names,
                                                    section.zone_strata, strict=True)
               if id(grid.by_stratum[s]) not in {id(grid.by_stratum[t]) for t in table.strata}]
    if missing:
        more = f" and {len(missing) - 5} more" if len(missing) > 5 else ""
        raise InputError(f"{len(missing)} zone(s) of the grid have no row in this table: "
                         f"{', '.join(missing[:5])}{more}; add a row for each zone",
                         source=table.source)
    return [Stratum(table.label(i), float(n), grid.by_stratum[s])
            for i, (n, s) in enumerate(zip(table.cases, table.strata, strict=True))]


#: Name of the stratum carried at index 0 of the burden's draws: the whole
#: population over the shared exposure, with 0 cases so that the totals are
#: the strata's alone.
POPULATION = "(population)"


@dataclasses.dataclass(frozen=True, eq=False)
class BurdenRun:
    """One burden table's results: the records, the draws of every row
    (:class:`~doseattr.analysis.burden_sums.RowDraws`), the core
    propagation of the population (index 0) and the rows under the
    burden's method, and that of the population's PAF (the same object
    for the ``"paf"`` method); the propagations are ``None`` without
    ``[uncertainty]``."""

    result: BurdenResult
    rows: RowDraws
    draws: Any
    population_draws: Any


def streams(analysis: Analysis, stream: int | None) -> dict[str, Any]:
    """The generators of one burden run (keywords of core ``propagate``).
    Every run draws the minimum-risk level and the exposures from
    ``[seed, 1]``, so that runs of different curves share them; a run of an
    ``[[outcome]]`` block (``stream`` = its index) draws its curve and
    Poisson cases from streams of its own."""
    u = analysis.uncertainty
    assert u is not None
    out: dict[str, Any] = {"rng": np.random.default_rng([u.seed, 1])}
    if stream is not None:
        out["curve_rng"] = np.random.default_rng([u.seed, 1, 1, stream])
        out["case_rng"] = np.random.default_rng([u.seed, 1, 2, stream])
    return out


def run_burden(analysis: Analysis, curve, strata: list, scenarios, progress: bool, *,
               shared, stream: int | None = None) -> BurdenRun:
    """Attributable cases per row of the burden table and in total, with
    their Monte Carlo draws; ``shared`` is the population's exposure, which
    a row without its own uses.

    The draws hold the population over the shared exposure at index 0
    (with 0 cases), then the rows: one set of draws of the curve, the
    minimum-risk level and each exposure serves them all (common random
    numbers), so a row with the shared exposure has the population's
    fraction draw by draw, and scenarios and rows differ only by what
    differs. With ``method = "impact-function"`` the population's PAF
    (``1 - 1/E[RR]``) is integrated over the same draws (core ``vary_only``
    with every source), not drawn again.
    """
    from doseattr.core.uncertainty.propagate import Stratum, point_values, propagate, vary_only

    spec = burden_spec(analysis)
    method = spec.method
    transforms = [sc for _, sc in scenarios]
    strata = [Stratum(POPULATION, 0.0, shared), *strata]
    m = analysis.attribution.minimum_risk
    point = point_values(curve, strata, transforms, m, method)
    draws = population = None
    u = analysis.uncertainty
    if u is not None:
        sources = SOURCES + (("cases",) if u.poisson_cases else ())
        total = u.draws * len({id(s.exposure) for s in strata}) * (1 + len(transforms))
        with progress_bar(total, progress, draws=u.draws) as tick:
            draws = propagate(curve, strata, transforms, draws=u.draws,
                              minimum_risk=minimum_risk_range(analysis), sources=sources,
                              progress=tick, method=method, **streams(analysis, stream))
        population = draws
        if method != "paf":
            population = vary_only(curve, strata[:1], transforms, draws, SOURCES)
    rows = row_draws(spec, point, draws)
    rate_per = spec.rate_per
    records = tuple(dataclasses.replace(
        row_result(rows, s, rate_per), rate=_rate(spec.table, s),
        exposure=stratum_exposure_record(strata[s + 1].exposure, shared, spec.table.exposure[s]))
        for s in range(len(rows)))
    return BurdenRun(burden_result(rows, records, method, rate_per), rows, draws, population)


#: The note that goes with years of life lost.
YLL_NOTE = ("years of life lost are deaths-based: attributable deaths x the remaining life "
            "expectancy given per row (from the user's life table; not discounted nor "
            "age-weighted); outcomes that are not deaths should not carry life expectancy")


def burden_notes(burden: BurdenResult | None) -> list[str]:
    """What the burden's method assumes, and the YLL note when it has YLL."""
    if burden is None:
        return []
    notes = [f"burden method '{burden.method}': {METHOD_TEXT[burden.method]}"]
    if burden.has_yll:
        notes.append(YLL_NOTE)
    return notes


def _rate(table, s: int) -> float | None:
    rates = table.rates
    if rates is None or np.isnan(rates[s]):
        return None
    return float(rates[s])


def row_draws(spec, point, draws) -> RowDraws:
    """The rows of the burden table (indices 1.. of the propagations)."""
    table = spec.table
    n = len(table.strata)

    def q(attr: str, scenario: str | None = None) -> Quantity:
        def pick(prop):
            value = getattr(prop, attr)
            return np.asarray((value[scenario] if scenario is not None else value)[1:])
        return Quantity(pick(point)[:, 0], None if draws is None else pick(draws))

    groups = table.groups
    le = table.life_expectancy
    names = list(point.pif)
    return RowDraws(
        tuple(table.strata), tuple(groups) if groups is not None else (None,) * n,
        np.full(n, np.nan) if table.population is None else np.asarray(table.population, float),
        np.full(n, np.nan) if le is None else np.asarray(le, float),
        q("cases"), q("paf"), q("attributable"), {k: q("pif", k) for k in names},
        {k: q("averted", k) for k in names}, tuple(table.lines))


def burden_result(rows: RowDraws, records: Sequence[StratumResult], method: str,
                  rate_per: float) -> BurdenResult:
    """The burden of ``rows`` (each already a record): the total, each group
    across strata and each stratum across groups (with groups only)."""
    groups: tuple[StratumResult, ...] = ()
    strata_sums: tuple[StratumResult, ...] = ()
    if any(g is not None for g in rows.groups):
        groups = tuple(sum_result(rows.take(_where(rows.groups, g)), "all strata", g, rate_per)
                       for g in _unique(rows.groups))
        strata_sums = tuple(sum_result(rows.take(_where(rows.strata, s)), s, None, rate_per)
                            for s in _unique(rows.strata))
    return BurdenResult(tuple(records), sum_result(rows, "total", None, rate_per), method,
                        rate_per, groups, strata_sums)


def _unique(items: Sequence) -> list:
    return list(dict.fromkeys(items))


def _where(items: Sequence, value) -> list[int]:
    return [i for i, v in enumerate(items) if v == value]


def stratum_exposure(analysis: Analysis, shared, override: dict | None, line: int):
    """The shared exposure, or the stratum's own from its exposure columns
    (same family; the [exposure] unexposed share applies)."""
    if override is None:
        return shared
    from doseattr.core.exposure import summary

    source = burden_spec(analysis).table.source
    family = shared.family.name
    keys = tuple(override)
    location = f"row {line}, column '{keys[1]}'"
    problem = _override_problem(keys, family)
    if problem:
        raise InputError(problem, source=source, location=location)
    with as_input_error(source, location):
        if keys == ("gm", "gsd"):
            ex = summary.from_gm_gsd(override["gm"], override["gsd"])
        elif keys == ("mean", "sd"):
            ex = summary.from_mean_sd(family, override["mean"], override["sd"])
        else:
            ex = summary.from_parameters(family, override)
    unexposed = analysis.exposure.unexposed
    return dataclasses.replace(ex, unexposed=unexposed) if unexposed else ex


def _override_problem(keys: tuple[str, ...], family: str) -> str | None:
    """Why a stratum's exposure columns cannot describe the shared family
    (gm and gsd always can: they give the stratum a lognormal)."""
    from doseattr.core.exposure.registry import FAMILIES

    if keys == ("gm", "gsd"):
        return None
    if family == "empirical":
        return (f"{keys[0]} and {keys[1]} need a fitted family, but the shared exposure is "
                "empirical (weighted values); give gm and gsd (a lognormal) instead")
    if keys == ("mean", "sd"):
        return None
    takes = [name for name, fam in FAMILIES.items() if set(fam.param_names) == set(keys)]
    if family not in takes:
        return (f"{' and '.join(keys)} describe a {' or '.join(takes) or 'no registered'} "
                f"distribution, but the shared exposure is {family}")
    return None
