"""Small frozen records of one finished run, one per section of the results.

The analysis layer fills them; :mod:`doseattr.results.serialize` turns them
into ``results.json``; every table, report section and figure reads one of
them. They hold numbers, strings and the core's own frozen objects (a
:class:`~doseattr.core.curves.base.Curve`, an
:class:`~doseattr.core.exposure.base.Exposure`), never the analysis input.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from doseattr.core.attribution.contribution import Contribution
from doseattr.core.curves.base import Curve
from doseattr.core.curves.pooling import Pooled
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.results.estimate import Estimate

if TYPE_CHECKING:
    from doseattr.core.hygiene.limits import LimitStatistics
    from doseattr.core.hygiene.workers import WorkerEstimate, WorkerModel

FloatArray = NDArray[np.float64]
#: A fitted or entered distribution, or the weighted values themselves.
AnyExposure = Exposure | EmpiricalExposure


@dataclass(frozen=True)
class ScenarioResult:
    """One exposure-reduction scenario: its potential impact fraction and,
    with ``[burden]``, the total averted cases."""

    name: str
    kind: str
    value: float
    pif: Estimate
    description: str = ""
    averted: Estimate | None = None


@dataclass(frozen=True, eq=False)
class BandTable:
    """The study's bands as the fit used them (table order, lowest first).

    Arrays of length ``B``; ``upper`` is ``inf`` for an open-ended top band,
    ``ci_lower``/``ci_upper`` are NaN for the reference band (whose CI is
    empty by definition). ``dose_rule`` says how each dose was assigned.
    """

    lower: FloatArray
    upper: FloatArray
    dose: FloatArray
    rr: FloatArray
    ci_lower: FloatArray
    ci_upper: FloatArray
    reference: NDArray[np.bool_]
    dose_rule: tuple[str, ...]
    source: str | None = None


@dataclass(frozen=True, eq=False)
class CurveVariant:
    """The same analysis under another curve model or dose-assignment rule.

    ``label`` is the model name (model comparison) or the dose rule (dose
    sensitivity); ``curve`` and ``paf`` are ``None`` with ``problem`` set
    when that variant could not be computed. ``used`` marks the variant the
    analysis itself used.
    """

    label: str
    curve: Curve | None
    paf: float | None
    doses: FloatArray | None = None
    problem: str | None = None
    used: bool = False
    nonlinearity_p: float | None = None


@dataclass(frozen=True)
class ExposureVariant:
    """The PAF under another description of the same exposure data: each
    fitted family, and the empirical distribution of the values."""

    label: str
    parameters: Mapping[str, float]
    aic: float | None
    paf: float | None
    problem: str | None = None


@dataclass(frozen=True)
class SubstitutionResult:
    """The main family refitted with each non-detect replaced by
    ``fraction`` x its detection limit, for comparison only: its
    parameters, the PAF it gives and ``difference`` = that PAF minus the
    main (censored-likelihood) PAF. ``problem`` says why a fit failed."""

    fraction: float
    parameters: Mapping[str, float]
    paf: float | None
    difference: float | None
    problem: str | None = None


@dataclass(frozen=True)
class GoodnessOfFit:
    """A goodness-of-fit test of an exposure fit to measurements."""

    test: str | None
    statistic: float | None
    p_value: float | None
    n: int
    note: str | None = None


@dataclass(frozen=True)
class FamilyFit:
    """One parametric family fitted to the exposure data."""

    family: str
    parameters: Mapping[str, float]
    loglik: float | None
    aic: float | None
    goodness_of_fit: GoodnessOfFit | None


@dataclass(frozen=True)
class Workers:
    """Per-worker cumulative exposure from work histories (sorted ids)."""

    worker: tuple[str, ...]
    cumulative: tuple[float, ...]
    duration_years: tuple[float, ...]
    mean_intensity: tuple[float, ...]


@dataclass(frozen=True, eq=False)
class PooledStudy:
    """One ``[[curve.study]]`` of a pooled curve: its stage-one fit
    (``curve``, coefficients with their own covariance), the bands it was
    fitted to, its design, the covariance method of its log RRs, the unit
    it was given in (``None``: the curve's) and its share of the pooled
    estimate (``weight``)."""

    name: str
    curve: Curve
    bands: BandTable
    weight: float
    design: str | None
    covariance_method: str
    unit: str | None = None


@dataclass(frozen=True, eq=False)
class PoolingSection:
    """Two-stage pooling of several studies' coefficients: the core's
    :class:`~doseattr.core.curves.pooling.Pooled` (``pooled``), each
    study, the pooled curve with the covariance of the mean (``mean``)
    and, with ``predict``, with the predictive covariance (``prediction``,
    the curve the Monte Carlo draws from), and the Wald test of
    non-linearity of a pooled spline ``(W, df, p)``."""

    pooled: Pooled
    studies: tuple[PooledStudy, ...]
    mean: Curve
    predict: bool = False
    prediction: Curve | None = None
    nonlinearity: tuple[float, int, float] | None = None


@dataclass(frozen=True, eq=False)
class CurveSection:
    """The relative-risk curve and everything said about it (``pooling``:
    the studies pooled into it, or ``None`` for one study or source)."""

    curve: Curve
    bands: BandTable | None
    model_comparison: tuple[CurveVariant, ...]
    dose_sensitivity: tuple[CurveVariant, ...]
    nonlinearity_p: float | None
    share_beyond_max_dose: float | None
    share_beyond_data: float | None
    pooling: PoolingSection | None = None


@dataclass(frozen=True, eq=False)
class ExposureSection:
    """The exposure distribution and the fits and comparisons behind it.

    ``mean`` counts the unexposed at zero; ``zero_share`` is the unexposed
    share plus, for weighted values, the weighted share of zeros.
    ``weights`` is what the measurements' weights mean (``"frequency"`` or
    ``"importance"``; ``None`` without weights) and ``effective_n`` their
    Kish effective sample size (``None`` without weights).
    """

    exposure: AnyExposure
    mean: float
    zero_share: float
    share_beyond_max_dose: float | None
    share_beyond_data: float | None
    goodness_of_fit: GoodnessOfFit | None
    fits: tuple[FamilyFit, ...]
    comparison: tuple[ExposureVariant, ...]
    substitution: tuple[SubstitutionResult, ...]
    workers: Workers | None
    parametric_fits: tuple[Exposure, ...] = ()
    weights: str | None = None
    effective_n: float | None = None
    #: With a worker column: the fit to the single samples and the one-way
    #: random-effects model (``exposure`` is then workers' long-term means).
    samples: Exposure | None = None
    worker_model: WorkerModel | None = None

    @property
    def is_empirical(self) -> bool:
        """True when the exposure is the weighted values themselves."""
        return isinstance(self.exposure, EmpiricalExposure)


@dataclass(frozen=True)
class SourceWidth:
    """The 95% interval of the overall PAF when only ``source`` varies
    (``"all"`` for every source together); with ``[burden]`` also the
    interval of the total attributable cases, ``attributable = (lower,
    upper)``."""

    source: str
    lower: float
    upper: float
    attributable: tuple[float, float] | None = None

    @property
    def width(self) -> float:
        return self.upper - self.lower


@dataclass(frozen=True, eq=False)
class UncertaintySection:
    """What ``[uncertainty]`` ran: draws, seed, level, which inputs varied,
    and the overall PAF's interval by source.

    ``propagation`` holds the core's Monte Carlo draws (one stratum named
    ``"population"``); ``minimum_risk_varied`` is true when the
    minimum-risk level was drawn from a range.
    """

    draws: int
    seed: int
    level: float
    width_by_source: tuple[SourceWidth, ...]
    width_all: SourceWidth | None
    propagation: Any = None
    minimum_risk_varied: bool = False
    #: Which PAF ``width_by_source`` explains (:data:`POPULATION_PAF` or
    #: :data:`CASE_WEIGHTED_PAF`).
    explains: str = ""

    @property
    def sources(self) -> tuple[str, ...]:
        return tuple(w.source for w in self.width_by_source)


@dataclass(frozen=True)
class StratumExposure:
    """The exposure a stratum's fractions were computed over.

    ``own`` is true when the burden table gave the stratum its own exposure
    (``given``: the columns as written, e.g. ``{"gm": 8.0, "gsd": 2.0}``),
    false when it is the shared one; ``mean`` counts the unexposed at zero.
    """

    own: bool
    family: str
    parameters: Mapping[str, float]
    mean: float
    given: Mapping[str, float] | None = None


@dataclass(frozen=True)
class StratumEffect:
    """One scenario in one stratum: its PIF and the cases averted."""

    name: str
    pif: Estimate
    averted: Estimate
    #: Averted cases per ``rate_per`` people (``None`` without population).
    averted_rate: Estimate | None = None
    #: Averted years of life lost (``None`` without life expectancy).
    averted_yll: Estimate | None = None


@dataclass(frozen=True)
class StratumResult:
    """Attributable cases in one row of the burden table (a stratum, or a
    stratum and group) or in a sum of rows (a group across strata, a
    stratum across groups, an outcome, all outcomes).

    ``paf`` is the fraction that turned the cases into attributable cases
    under the burden's method (attributable over cases, draw by draw, for
    a sum); ``rate`` the baseline rate as given (per ``rate_per``, ``None``
    when the row gave cases); ``attributable_rate`` attributable cases per
    ``rate_per`` people (``None`` without population); ``yll`` attributable
    deaths times remaining life expectancy (``None`` without it);
    ``exposure`` is ``None`` for a sum of rows.
    """

    stratum: str
    cases: float
    paf: Estimate
    attributable: Estimate
    scenarios: tuple[StratumEffect, ...] = ()
    population: float | None = None
    exposure: StratumExposure | None = None
    group: str | None = None
    rate: float | None = None
    attributable_rate: Estimate | None = None
    yll: Estimate | None = None
    life_expectancy: float | None = None


@dataclass(frozen=True)
class BurdenResult:
    """Attributable cases by stratum and in total (totals are sums over the
    strata draw by draw; the total PAF is total attributable over total
    cases)."""

    strata: tuple[StratumResult, ...]
    total: StratumResult
    #: ``"paf"`` (cases x PAF) or ``"impact-function"`` (cases x E[1 - 1/RR]).
    method: str = "paf"
    rate_per: float = 100_000.0
    #: Each group summed across strata (empty without a ``group`` column).
    groups: tuple[StratumResult, ...] = ()
    #: Each stratum summed across its groups (empty without groups).
    stratum_totals: tuple[StratumResult, ...] = ()

    # cached: the report asks once per row, and a scan per ask is quadratic in the strata
    @cached_property
    def any_own_exposure(self) -> bool:
        return any(s.exposure is not None and s.exposure.own for s in self.strata)

    @cached_property
    def has_groups(self) -> bool:
        return any(s.group is not None for s in self.strata)

    @property
    def has_yll(self) -> bool:
        return self.total.yll is not None

    @property
    def has_rates(self) -> bool:
        return self.total.attributable_rate is not None


@dataclass(frozen=True, eq=False)
class GridMaps:
    """Decimated rasters for display: the concentration and the
    attributable cases per 1,000 people of each displayed cell (``NaN``
    where there is no data), each ``(rows, cols)``; ``step`` is the
    decimation (every ``step``-th cell in each direction) and ``extent``
    ``(left, right, bottom, top)`` in the grid's coordinates, ``crs`` its
    reference system as text (``None`` for a cell table)."""

    concentration: FloatArray
    attributable_per_1000: FloatArray
    step: int
    extent: tuple[float, float, float, float] | None = None
    crs: str | None = None


@dataclass(frozen=True, eq=False)
class GridSection:
    """What a ``[grid]`` analysis read: the files, each zone (id, name,
    population, population-weighted mean concentration; the zones are the
    burden's strata in the same order), cells used and skipped (nodata),
    the stated exposure-model error and the maps. ``zone_strata`` is the
    burden table's stratum of each zone (its name, or its id as text)."""

    files: Mapping[str, str]
    zone_ids: tuple[int, ...]
    zone_names: tuple[str, ...]
    zone_population: tuple[float, ...]
    zone_mean: tuple[float, ...]
    cells: int
    skipped_cells: int
    skipped_population: float
    error_gsd: float | None = None
    maps: GridMaps | None = None
    scheduler: str | None = None
    zone_strata: tuple[str, ...] = ()


@dataclass(frozen=True, eq=False)
class WorkerExceedance:
    """The probability that a randomly chosen worker's long-term mean
    exposure is above the limit, with its interval at ``level``."""

    estimate: float
    lower: float | None
    upper: float | None
    level: float
    method: str


@dataclass(frozen=True, eq=False)
class LimitSection:
    """``[limit]``: compliance of the single samples with a limit value
    (core :class:`~doseattr.core.hygiene.limits.LimitStatistics`) and,
    with a worker column, the within- and between-worker model, the
    probability that a worker's long-term mean exceeds the limit and the
    workers whose own estimated mean is above it."""

    stats: LimitStatistics
    unit: str
    workers: WorkerModel | None = None
    worker_exceedance: WorkerExceedance | None = None
    workers_above: tuple[WorkerEstimate, ...] = ()
    notes: tuple[str, ...] = ()


#: The two ways from fractions to attributable cases (``[burden] method``).
BURDEN_METHODS = ("paf", "impact-function")

#: What each method computes and assumes, for the report's methods section.
METHOD_TEXT = {
    "paf": ("attributable = observed cases x PAF, with PAF = 1 - 1/E[RR_m(X)]: the observed "
            "rate is taken as the rate of the whole exposed population (comparative risk "
            "assessment; Murray et al. 2003, Popul Health Metr 1:1)"),
    "impact-function": ("attributable = observed cases x E[1 - 1/RR_m(X)]: the health impact "
                        "function applied to each person's own exposure, which takes the "
                        "observed rate as the rate at each person's exposure (as in "
                        "air-quality impact assessments, e.g. Ostro 2004, WHO Environmental "
                        "Burden of Disease Series 5, and Anenberg et al. 2010, Environ Health "
                        "Perspect 118:1189; both from memory)"),
}


#: What each headline fraction is: the PAF of the whole population over the
#: shared exposure distribution, and the burden's total (attributable over
#: observed cases, so weighted by each stratum's cases and computed over each
#: stratum's own exposure where it has one).
POPULATION_PAF = "population PAF over the shared exposure distribution"
CASE_WEIGHTED_PAF = ("case-weighted PAF over the strata (total attributable cases over total "
                     "observed cases)")


#: One burden table of a run: the outcome's name (``None`` for the
#: analysis's own) and its attributable cases.
BurdenBlock = tuple["str | None", BurdenResult]


def burden_blocks(top: BurdenResult | None,
                  outcomes: Sequence[tuple[str, BurdenResult | None]] = ()) -> list[BurdenBlock]:
    """``(outcome name or None, burden)`` for every burden table of a run.

    With ``[[outcome]]`` blocks, one per outcome that has strata; the
    analysis's own burden is put in front only when it is not the first
    outcome's (a file with its own ``[curve]`` and ``[burden]`` beside the
    outcomes; without its own ``[curve]`` the top level is the first
    outcome's run).
    """
    blocks: list[BurdenBlock] = [(name, b) for name, b in outcomes
                                 if b is not None and len(b.strata) > 0]
    if top is not None and len(top.strata) > 0 and not (
            blocks and (top is blocks[0][1] or top == blocks[0][1])):
        blocks.insert(0, (None, top))
    return blocks


@dataclass(frozen=True, eq=False)
class AttributionSection:
    """The PAF, the minimum-risk level it is relative to, each scenario's
    PIF and where the burden lies along the exposure axis."""

    paf: Estimate
    minimum_risk: float
    minimum_risk_range: tuple[float, float] | None
    scenarios: tuple[ScenarioResult, ...]
    contribution: Contribution


@dataclass(frozen=True)
class RunInputs:
    """What the run read, recorded when it finished: ``provenance`` (the
    results.json record), the analysis as read (``copy_kind`` ``"file"`` or
    ``"python-dict"`` and its bytes) and the input paths an output folder
    must never hold."""

    provenance: Mapping[str, Any]
    copy_kind: str
    copy_bytes: bytes
    protected: tuple[str, ...]
