r"""Rows of a burden table with their Monte Carlo draws, and sums of rows.

Each row :math:`r` (a stratum, or a stratum and group) has observed cases
:math:`N_r`, the fraction :math:`F_r` of its method and attributable cases
:math:`A_r = F_r N_r`, each per draw :math:`d`; with a population
:math:`P_r` and a remaining life expectancy :math:`L_r`,

.. math::
    \text{rate}_r = A_r / P_r \cdot \text{rate\_per}, \qquad
    YLL_r = A_r L_r

(deaths-based years of life lost). A sum over a set of rows :math:`R` (a
group across strata, a stratum across groups, an outcome, every outcome)
is taken within each draw,

.. math::
    A_{Rd} = \sum_{r \in R} A_{rd}, \qquad YLL_{Rd} = \sum_{r\in R} A_{rd} L_r,
    \qquad F_{Rd} = A_{Rd} / \sum_{r \in R} N_{rd},

so the interval of a sum is that of the sum's draws, consistent with its
rows whatever their correlation (shared exposure and minimum-risk draws,
independent curves of different outcomes). Scenario effects are summed the
same way. Rows of different curves line up draw by draw because their runs
share the exposure and minimum-risk draws (common random numbers).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from doseattr.analysis.intervals import interval
from doseattr.results.estimate import Estimate
from doseattr.results.records import StratumEffect, StratumResult


@dataclass(frozen=True, eq=False)
class Quantity:
    """A per-row quantity at the point estimates ``point (S,)`` and its
    draws ``draws (S, D)`` (``None`` without ``[uncertainty]``)."""

    point: np.ndarray
    draws: np.ndarray | None

    def take(self, idx: Sequence[int]) -> Quantity:
        i = np.asarray(idx, dtype=int)
        return Quantity(self.point[i], None if self.draws is None else self.draws[i])

    @staticmethod
    def concat(parts: Sequence[Quantity]) -> Quantity:
        draws = [p.draws for p in parts]
        return Quantity(np.concatenate([p.point for p in parts]),
                        None if any(d is None for d in draws)
                        else np.concatenate([d for d in draws if d is not None]))


@dataclass(frozen=True, eq=False)
class RowDraws:
    """Every row of one burden table (or of several, concatenated): names,
    groups, population and life expectancy (``NaN`` where not given), the
    observed cases, the fraction and the attributable cases, and per
    scenario the averted fraction and averted cases."""

    strata: tuple[str, ...]
    groups: tuple[str | None, ...]
    population: np.ndarray
    life_expectancy: np.ndarray
    cases: Quantity
    fraction: Quantity
    attributable: Quantity
    pif: dict[str, Quantity]
    averted: dict[str, Quantity]
    #: Line of each row in its burden table (to restore the table's order).
    lines: tuple[int, ...] = ()

    def take(self, idx: Sequence[int]) -> RowDraws:
        i = list(idx)
        return RowDraws(tuple(self.strata[k] for k in i), tuple(self.groups[k] for k in i),
                        self.population[i], self.life_expectancy[i], self.cases.take(i),
                        self.fraction.take(i), self.attributable.take(i),
                        {k: v.take(i) for k, v in self.pif.items()},
                        {k: v.take(i) for k, v in self.averted.items()},
                        tuple(self.lines[k] for k in i) if self.lines else ())

    @staticmethod
    def concat(parts: Sequence[RowDraws]) -> RowDraws:
        names = list(parts[0].pif)
        return RowDraws(
            tuple(s for p in parts for s in p.strata), tuple(g for p in parts for g in p.groups),
            np.concatenate([p.population for p in parts]),
            np.concatenate([p.life_expectancy for p in parts]),
            Quantity.concat([p.cases for p in parts]),
            Quantity.concat([p.fraction for p in parts]),
            Quantity.concat([p.attributable for p in parts]),
            {k: Quantity.concat([p.pif[k] for p in parts]) for k in names},
            {k: Quantity.concat([p.averted[k] for p in parts]) for k in names},
            tuple(line for p in parts for line in p.lines))

    def __len__(self) -> int:
        return len(self.strata)


def row_result(rows: RowDraws, r: int, rate_per: float) -> StratumResult:
    """Row ``r`` as a :class:`StratumResult` (without its exposure record)."""
    one = rows.take([r])
    label = rows.strata[r]
    pop = float(rows.population[r])
    le = float(rows.life_expectancy[r])
    scenarios = tuple(StratumEffect(
        name, _est(one.pif[name], f"PIF of {name} in {label}"),
        _est(one.averted[name], f"averted cases in {label}"),
        _per(one.averted[name], pop, rate_per, label), _yll(one.averted[name], one, label))
        for name in rows.pif)
    return StratumResult(label, float(rows.cases.point[r]), _est(one.fraction, label),
                         _est(one.attributable, f"attributable cases in {label}"), scenarios,
                         population=None if np.isnan(pop) else pop, group=rows.groups[r],
                         attributable_rate=_per(one.attributable, pop, rate_per, label),
                         yll=_yll(one.attributable, one, label),
                         life_expectancy=None if np.isnan(le) else le)


def sum_result(rows: RowDraws, label: str, group: str | None, rate_per: float,
               population: float | None = None) -> StratumResult:
    """The sum of ``rows`` (every one of them), draw by draw; the rates are
    per ``population`` when given, else per the rows' summed population."""
    pop = float(rows.population.sum()) if population is None else population
    cases = _sum(rows.cases)
    scenarios = tuple(StratumEffect(
        name, _est(_ratio(_sum(rows.averted[name]), cases, rows.pif[name], rows.cases),
                   f"PIF of {name} in {label}"),
        _est(_sum(rows.averted[name]), f"averted cases in {label}"),
        _per(_sum(rows.averted[name]), pop, rate_per, label),
        _yll(rows.averted[name], rows, label))
        for name in rows.pif)
    attributable = _sum(rows.attributable)
    return StratumResult(
        label, float(cases.point[0]),
        _est(_ratio(attributable, cases, rows.fraction, rows.cases), f"PAF of {label}"),
        _est(attributable, f"attributable cases in {label}"), scenarios,
        population=None if np.isnan(pop) else pop, group=group,
        attributable_rate=_per(attributable, pop, rate_per, label),
        yll=_yll(rows.attributable, rows, label))


def _sum(q: Quantity) -> Quantity:
    return Quantity(q.point.sum(keepdims=True),
                    None if q.draws is None else q.draws.sum(axis=0, keepdims=True))


def _ratio(total: Quantity, cases: Quantity, fraction: Quantity, row_cases: Quantity) -> Quantity:
    """Total over cases per draw; where the cases are 0 (every row with 0
    cases, or Poisson draws of 0), the rows' fractions weighted by their
    mean cases (equally when those are all 0)."""

    def one(t: np.ndarray, c: np.ndarray, f: np.ndarray, w: np.ndarray) -> np.ndarray:
        w = np.ones_like(w) if w.sum() <= 0 else w
        fallback = (f * w[:, None]).sum(axis=0) / w.sum()
        safe = np.where(c > 0, c, 1.0)
        return np.where(c > 0, t / safe, fallback)[None, :]

    point = one(total.point, cases.point, fraction.point[:, None], row_cases.point)[0]
    draws = None
    if total.draws is not None and cases.draws is not None and fraction.draws is not None:
        assert row_cases.draws is not None
        draws = one(total.draws[0], cases.draws[0], fraction.draws,
                    row_cases.draws.mean(axis=1))
    return Quantity(point, draws)


def _est(q: Quantity, what: str) -> Estimate:
    value = float(q.point[0])
    if q.draws is None:
        return Estimate(value)
    return interval(value, q.draws[0], what)


def _per(q: Quantity, population: float, rate_per: float, label: str) -> Estimate | None:
    """``q`` per ``rate_per`` people (``None`` without a population)."""
    if np.isnan(population) or population <= 0:
        return None
    scale = rate_per / population
    return _est(Quantity(q.point * scale, None if q.draws is None else q.draws * scale),
                f"attributable rate in {label}")


def _yll(q: Quantity, rows: RowDraws, label: str) -> Estimate | None:
    """Deaths ``q (S, .)`` times each row's life expectancy, summed over
    rows (``None`` when a row has no life expectancy)."""
    le = rows.life_expectancy
    if le.size == 0 or np.any(np.isnan(le)):
        return None
    point = np.atleast_1d((q.point * le).sum(keepdims=True))
    draws = None if q.draws is None else (q.draws * le[:, None]).sum(axis=0, keepdims=True)
    return _est(Quantity(point, draws), f"years of life lost in {label}")
