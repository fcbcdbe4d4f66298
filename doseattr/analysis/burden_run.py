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
from typing import Any

import numpy as np

from doseattr.analysis.assemble import stratum_exposure as stratum_exposure_record
from doseattr.analysis.build import as_input_error
from doseattr.analysis.config import Analysis
from doseattr.analysis.intervals import (
    SOURCES,
    burden_spec,
    interval,
    minimum_risk_range,
    progress_bar,
)
from doseattr.errors import InputError
from doseattr.results.estimate import Estimate
from doseattr.results.records import BurdenResult, StratumEffect, StratumResult


def burden_strata(analysis: Analysis, exposure) -> list:
    """One core ``Stratum`` per row of the burden table, each with the
    shared exposure or its own (from its exposure columns)."""
    from doseattr.core.uncertainty.propagate import Stratum

    table = burden_spec(analysis).table
    return [Stratum(name, float(n), stratum_exposure(analysis, exposure, override, line))
            for name, n, override, line in zip(table.strata, table.cases, table.exposure,
                                                table.lines)]


#: Name of the stratum carried at index 0 of the burden's draws: the whole
#: population over the shared exposure, with 0 cases so that the totals are
#: the strata's alone.
POPULATION = "population"


def run_burden(analysis: Analysis, curve, strata: list, scenarios, progress: bool, *,
               shared) -> tuple[BurdenResult, Any]:
    """Attributable cases per stratum and in total, with their Monte Carlo
    draws (``None`` without ``[uncertainty]``); ``shared`` is the
    population's exposure, which a stratum without its own uses.

    The draws hold the population over the shared exposure at index 0
    (with 0 cases), then the strata: one set of draws of the curve, the
    minimum-risk level and each exposure serves them all (common random
    numbers), so a stratum with the shared exposure has the population's
    PAF draw by draw, and scenarios and strata differ only by what differs.
    """
    from doseattr.core.uncertainty.propagate import Stratum, point_values, propagate

    transforms = [sc for _, sc in scenarios]
    strata = [Stratum(POPULATION, 0.0, shared), *strata]
    point = point_values(curve, strata, transforms, analysis.attribution.minimum_risk)
    draws = None
    u = analysis.uncertainty
    if u is not None:
        sources = SOURCES + (("cases",) if u.poisson_cases else ())
        total = u.draws * len({id(s.exposure) for s in strata}) * (1 + len(transforms))
        with progress_bar(total, progress) as tick:
            draws = propagate(curve, strata, transforms, draws=u.draws,
                              rng=np.random.default_rng([u.seed, 1]),
                              minimum_risk=minimum_risk_range(analysis), sources=sources,
                              progress=tick)
    names = [sc.name for sc in transforms]
    table = burden_spec(analysis).table
    pop = table.population
    rows = tuple(dataclasses.replace(
        _row(name, float(table.cases[s]), point, draws, names, s + 1,
             None if pop is None else float(pop[s])),
        exposure=stratum_exposure_record(strata[s + 1].exposure, shared, table.exposure[s]))
        for s, name in enumerate(table.strata))
    overall = _row("total", float(table.cases.sum()), point, draws, names, None,
                   None if pop is None else float(pop.sum()))
    return BurdenResult(rows, overall), draws


def _row(name: str, cases: float, point, draws, names: list[str], s: int | None,
         population: float | None) -> StratumResult:
    """Stratum ``s`` (``None`` for the total) as a :class:`StratumResult`."""

    def est(attr: str, scenario: str | None = None) -> Estimate:
        value = float(np.ravel(_pick(point, attr, s, scenario))[0])
        if draws is None:
            return Estimate(value)
        return interval(value, _pick(draws, attr, s, scenario), "burden")

    return StratumResult(name, cases, est("paf"), est("attributable"),
                         tuple(StratumEffect(n, est("pif", n), est("averted", n))
                               for n in names),
                         population)


def _pick(prop, attr: str, s: int | None, scenario: str | None) -> np.ndarray:
    """One output of a core ``Propagation``: stratum ``s`` or the total."""
    if s is None:
        if attr in ("paf", "attributable"):
            return getattr(prop, f"total_{attr}")
        return getattr(prop, f"total_{attr}")(scenario)
    value = getattr(prop, attr)
    return (value[scenario] if scenario is not None else value)[s]


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
