"""What a checked analysis file asks for: one frozen spec per section, and
the :class:`Analysis` that holds them (built by
:mod:`doseattr.analysis.config`).

The curve and the exposure each come from one of several sources; each
source has its own frozen type (a tagged union), with a read-only
``source`` property giving the source's name as the messages and
results.json spell it:

- curve (:data:`CurveSpec`): :class:`TableCurve` (``"table"``),
  :class:`EnteredCurve` (``"entered"``), :class:`PointsCurve`
  (``"points"``), :class:`DrawsCurve` (``"draws"``), :class:`ShapeCurve`
  (``"shape"``), :class:`PooledCurve` (``"pooled"``, several study tables);
- exposure (:data:`ExposureSpec`): :class:`MeasuredExposure`
  (``"measurements"``), :class:`SummaryExposure` (``"gm-gsd"``,
  ``"shape-scale"`` or ``"mean-sd"``), :class:`PercentilesExposure`
  (``"percentiles"``), :class:`BinnedExposure` (``"bins"``),
  :class:`HistoriesExposure` (``"histories"``).

Every dose is in the analysis file's unit once a spec is built (converted
from ``unit``, the unit the file gave the section in).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import date
from typing import TYPE_CHECKING, Any, TypeAlias

from doseattr.analysis.burden_table import DEFAULT_RATE_PER
from doseattr.analysis.tables import (
    BinsTable,
    BurdenTable,
    DrawsTable,
    HistoriesTable,
    Measurements,
    PointsTable,
    StudyTable,
)
from doseattr.core.curves.pooling import METHODS
from doseattr.core.curves.pooling import TAU_METHODS as POOLING_TAU_METHODS
from doseattr.core.curves.registry import MODELS
from doseattr.core.exposure.registry import FAMILIES

if TYPE_CHECKING:  # grid_inputs reads the schema, which reads this module
    from doseattr.analysis.grid_inputs import GridSpec

#: Monte Carlo draws: fewer than MIN_DRAWS give unstable percentiles; more
#: than MAX_DRAWS need ``allow_many_draws = true`` (memory and time).
MIN_DRAWS, MAX_DRAWS = 100, 100_000
#: Seed used when ``[uncertainty]`` gives none, so that runs repeat exactly.
DEFAULT_SEED = 1

#: Published shapes entered with their parameters: (coefficients, each with
#: an optional ``<name>_se``; required fixed settings); ``threshold`` is
#: optional for both.
SHAPE_KEYS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    # param_names is a plain class attribute on every registered model
    name: (tuple(cls.param_names), cls.shape_settings)  # type: ignore[arg-type]
    for name, cls in MODELS.items() if cls.shape_settings is not None}
#: Models of the core registry that are entered as published shapes.
SHAPE_MODELS = tuple(name for name in MODELS if name in SHAPE_KEYS)
#: Models of the core registry that can be fitted to a study table (all
#: but the published shapes and the curve given as points).
FITTED_MODELS = tuple(name for name, cls in MODELS.items() if cls.fits_table)
#: Exposure families of the core registry, in its order.
FITTED_FAMILIES = tuple(FAMILIES)
#: Designs for which effective counts can be reconstructed.
EFFECTIVE_COUNT_DESIGNS = ("case-control", "incidence-rate")


# -- curve ------------------------------------------------------------------------
@dataclass(frozen=True, eq=False, kw_only=True)
class _Curve:
    """What every ``[curve]`` has: the model's name, ``beyond``
    (``"flat"`` or ``"extend"``), ``max_dose`` (``None`` unless given; a
    fitted curve then uses its highest assigned dose), the unit the file
    gave the curve in and notes on how it was read."""

    model: str
    beyond: str
    max_dose: float | None = None
    unit: str | None = None
    notes: tuple[str, ...] = ()


class _NoStudyTable:
    """A curve that was not fitted to a study table."""

    @property
    def table(self) -> StudyTable | None:
        """``None``: there is no study table (read by the categorical
        comparison, which uses the study's bands when there are any)."""
        return None


@dataclass(frozen=True, eq=False, kw_only=True)
class TableCurve(_Curve):
    """A model fitted to the study's bands in ``table``: ``design`` (given
    or implied by the counts), band doses by ``dose_rule``, the log RRs'
    ``covariance`` (``"counts"``, ``"effective-counts"`` or
    ``"independent"``), the power model's ``offset``, the spline's
    ``knots`` (or ``knot_count``), and the models to compare with."""

    table: StudyTable
    design: str | None = None
    dose_rule: str = "given"
    covariance: str = "independent"
    offset: float = 0.0
    knots: tuple[float, ...] | None = None
    knot_count: int = 3
    compare_models: tuple[str, ...] = ()
    #: The study's totals for effective counts when the table has no count
    #: columns: total cases, and total controls (case-control) or
    #: person-time (incidence rate).
    total_cases: float | None = None
    total_noncases: float | None = None

    @property
    def source(self) -> str:
        return "table"


@dataclass(frozen=True, eq=False, kw_only=True)
class EnteredCurve(_NoStudyTable, _Curve):
    """A published one-parameter estimate: ``estimate`` names it
    (``"rr"``, ``"err"`` or ``"exponent"``) and ``value`` is its value per
    ``per`` dose units, with its ``ci`` when given."""

    estimate: str
    value: float
    per: float = 1.0
    ci: tuple[float, float] | None = None
    offset: float = 0.0
    reference_dose: float = 0.0

    @property
    def source(self) -> str:
        return "entered"


@dataclass(frozen=True, eq=False, kw_only=True)
class PointsCurve(_NoStudyTable, _Curve):
    """A curve given as doses with RR and CI (``given``), held flat beyond
    its last dose; RRs are divided by the RR at ``reference_dose``."""

    given: PointsTable
    reference_dose: float = 0.0

    @property
    def source(self) -> str:
        return "points"


@dataclass(frozen=True, eq=False, kw_only=True)
class DrawsCurve(_NoStudyTable, _Curve):
    """A curve given as draws of RR on doses (``given``), held flat beyond
    its last dose."""

    given: DrawsTable
    reference_dose: float = 0.0

    @property
    def source(self) -> str:
        return "draws"


@dataclass(frozen=True, eq=False, kw_only=True)
class ShapeCurve(_NoStudyTable, _Curve):
    """A published shape (``model`` one of :data:`SHAPE_MODELS`) with its
    coefficients ``coef``, their covariance ``cov`` (diagonal as entered)
    and fixed ``settings`` (threshold, and the shape's own)."""

    coef: tuple[float, ...]
    cov: tuple[tuple[float, ...], ...]
    settings: Mapping[str, float]
    reference_dose: float = 0.0

    @property
    def source(self) -> str:
        return "shape"


#: ``[curve] pooling`` and ``tau_method``: the core's choices, defaults first.
POOLING_METHODS, TAU_METHODS = METHODS, POOLING_TAU_METHODS


@dataclass(frozen=True, eq=False, kw_only=True)
class PooledCurve(_NoStudyTable, _Curve):
    """Two or more ``[[curve.study]]`` blocks, each a :class:`TableCurve`
    fitted on its own (``studies``, named ``names``), their coefficients
    pooled by ``pooling`` (``"random-effects"`` or ``"fixed"``) with the
    between-study variance by ``tau_method`` (``"reml"`` or ``"dl"``).
    ``predict`` draws the Monte Carlo coefficients from the predictive
    distribution of a new population's curve. The spline's ``knots`` (or
    ``knot_count``) and the power model's ``offset`` are shared."""

    studies: tuple[TableCurve, ...]
    names: tuple[str, ...]
    pooling: str = POOLING_METHODS[0]
    tau_method: str = TAU_METHODS[0]
    predict: bool = False
    offset: float = 0.0
    knots: tuple[float, ...] | None = None
    knot_count: int = 3

    @property
    def source(self) -> str:
        return "pooled"


#: What ``[curve]`` asks for: one type per source.
CurveSpec: TypeAlias = (TableCurve | EnteredCurve | PointsCurve | DrawsCurve | ShapeCurve
                        | PooledCurve)


# -- exposure -----------------------------------------------------------------------
@dataclass(frozen=True, eq=False, kw_only=True)
class _Exposure:
    """What every ``[exposure]`` has: the family (a name of
    :data:`FITTED_FAMILIES`, or ``"best"``/``"empirical"`` for values),
    the unexposed share given, the unit the file gave the values in and
    notes on how they were read."""

    family: str
    unexposed: float = 0.0
    unit: str | None = None
    notes: tuple[str, ...] = ()


@dataclass(frozen=True, eq=False, kw_only=True)
class MeasuredExposure(_Exposure):
    """``family`` fitted to ``measurements``; ``substitution`` lists
    fractions of the detection limit to substitute for a comparison fit;
    ``weights`` says what the weight column means (``"frequency"`` or
    ``"importance"``; ``None`` when the table has no weights)."""

    measurements: Measurements
    substitution: tuple[float, ...] = ()
    weights: str | None = None

    @property
    def source(self) -> str:
        return "measurements"


#: Summary statistics: the source's name and the two keys it takes.
SUMMARY_KEYS: dict[str, tuple[str, str]] = {"gm-gsd": ("gm", "gsd"),
                                            "shape-scale": ("shape", "scale"),
                                            "mean-sd": ("mean", "sd")}


@dataclass(frozen=True, eq=False, kw_only=True)
class SummaryExposure(_Exposure):
    """Two summary statistics: ``kind`` is a key of :data:`SUMMARY_KEYS`
    (which is also the ``source``) and ``values`` maps its two keys to
    their values."""

    kind: str
    values: Mapping[str, float]

    @property
    def source(self) -> str:
        return self.kind


@dataclass(frozen=True, eq=False, kw_only=True)
class PercentilesExposure(_Exposure):
    """``family`` matched to ``values``, percentile (0-100) to value."""

    values: Mapping[float, float]

    @property
    def source(self) -> str:
        return "percentiles"


@dataclass(frozen=True, eq=False, kw_only=True)
class BinnedExposure(_Exposure):
    """``family`` fitted to the binned counts or shares of ``bins``."""

    bins: BinsTable

    @property
    def source(self) -> str:
        return "bins"


@dataclass(frozen=True, eq=False, kw_only=True)
class HistoriesExposure(_Exposure):
    """``family`` fitted to cumulative exposure from work ``histories``,
    counted up to ``as_of`` minus ``lag_years``."""

    histories: HistoriesTable
    as_of: date
    lag_years: float = 0.0

    @property
    def source(self) -> str:
        return "histories"


@dataclass(frozen=True, eq=False, kw_only=True)
class StrataExposure(_Exposure):
    """No ``[exposure]``: the population's distribution is the mixture of
    the burden ``table``'s rows, each with its own exposure, weighted by
    population (or by cases without a population column)."""

    table: BurdenTable

    @property
    def source(self) -> str:
        return "strata"


@dataclass(frozen=True, eq=False, kw_only=True)
class GridExposure(_Exposure):
    """``[grid]`` instead of ``[exposure]``: the population is the grid's
    cells, weighted by population (a census), reduced by zone; ``tables``
    are the burden tables whose strata are the zones (the file's and each
    outcome's), ``scheduler`` the dask.distributed address of ``[compute]``
    (``None``: dask's local threads) and ``seed`` the stream of the
    exposure-model error."""

    grid: GridSpec
    tables: tuple[BurdenTable, ...] = ()
    scheduler: str | None = None
    seed: int = DEFAULT_SEED
    #: Concentrations where the integrands have kinks (the minimum-risk
    #: level, a stated max_dose, and where the scenarios move them).
    cuts: tuple[float, ...] = ()

    @property
    def source(self) -> str:
        return "grid"


#: What ``[exposure]`` asks for: one type per source.
ExposureSpec: TypeAlias = (MeasuredExposure | SummaryExposure | PercentilesExposure
                           | BinnedExposure | HistoriesExposure | StrataExposure
                           | GridExposure)


@dataclass(frozen=True)
class ScenarioSpec:
    """One ``[[scenario]]``: ``kind`` is ``"cap"``, ``"scale"``,
    ``"reduce_by"`` or ``"comply"`` (``value`` is then the limit; the
    scale factor follows from the fit); ``index`` is its position in the
    file (0-based)."""

    name: str
    kind: str
    value: float
    index: int


@dataclass(frozen=True)
class AttributionSpec:
    """``[attribution]``: the minimum-risk level (a value, or the middle of
    a range ``minimum_risk_range``) and optional cutpoints."""

    minimum_risk: float = 0.0
    minimum_risk_range: tuple[float, float] | None = None
    cutpoints: tuple[float, ...] | None = None


@dataclass(frozen=True)
class UncertaintySpec:
    """``[uncertainty]``: Monte Carlo draws and the seed of the generator."""

    draws: int = 1000
    seed: int = DEFAULT_SEED
    seed_given: bool = False
    poisson_cases: bool = False
    #: Largest Monte Carlo standard error allowed for a fraction's interval
    #: limit; the draws are raised until it holds (``None``: not asked).
    precision: float | None = None


#: ``[limit] confidence`` when not given: EN 689:2018's level for the
#: statistical test of compliance (from memory).
DEFAULT_LIMIT_CONFIDENCE = 0.70
#: ``[limit] exceedance`` when not given: the tolerated share of shifts
#: above the limit (the 95th percentile's complement; common practice).
DEFAULT_EXCEEDANCE = 0.05


@dataclass(frozen=True)
class LimitSpec:
    """``[limit]``: an occupational exposure limit ``value`` in the
    analysis unit (converted from ``[limit] unit`` when given), the
    ``confidence`` of the compliance test and the tolerated
    ``exceedance`` fraction; ``notes`` say how the value was read."""

    value: float
    confidence: float = DEFAULT_LIMIT_CONFIDENCE
    exceedance: float = DEFAULT_EXCEEDANCE
    notes: tuple[str, ...] = ()


#: Ways from fractions to cases, ``[burden] method``: ``"paf"``
#: (attributable = cases x PAF) or ``"impact-function"`` (attributable =
#: cases x E[1 - 1/RR(X)]).
BURDEN_METHODS = ("paf", "impact-function")


@dataclass(frozen=True, eq=False)
class BurdenSpec:
    """``[burden]``: strata with observed cases, or population and rates
    per ``rate_per`` people (and optional groups, life expectancy and
    exposure), and the ``method`` from fractions to cases (one of
    :data:`BURDEN_METHODS`)."""

    table: BurdenTable
    method: str = "paf"
    rate_per: float = DEFAULT_RATE_PER


@dataclass(frozen=True, eq=False)
class OutcomeSpec:
    """One ``[[outcome]]``: its own curve and (optional) burden table; the
    exposure, scenarios and settings are shared."""

    name: str
    curve: CurveSpec
    burden: BurdenSpec | None = None
    #: The burden table's groups this curve applies to (``None``: every row).
    groups: tuple[str, ...] | None = None


@dataclass(frozen=True, eq=False)
class Analysis:
    """A checked analysis, ready for :func:`doseattr.analysis.pipeline.run_analysis`.

    ``source`` is the analysis file as given (``None`` for a dictionary);
    ``base_dir`` the folder its paths are relative to; ``settings`` the
    parsed TOML as read (for provenance only: what was hashed and which
    tables it names; every other reader uses the checked specs).
    """

    unit: str
    curve: CurveSpec
    exposure: ExposureSpec
    attribution: AttributionSpec
    scenarios: tuple[ScenarioSpec, ...]
    title: str | None = None
    uncertainty: UncertaintySpec | None = None
    burden: BurdenSpec | None = None
    outcomes: tuple[OutcomeSpec, ...] = ()
    source: str | None = None
    base_dir: str = "."
    settings: Mapping[str, Any] | None = None
    molecular_weight: float | None = None
    #: False when the file has no [curve] of its own and ``curve`` is the
    #: first outcome's (its results then stand for the top level).
    own_curve: bool = True
    limit: LimitSpec | None = None

    @property
    def notes(self) -> tuple[str, ...]:
        """How the inputs were read (defaults taken, gaps between bands)."""
        return self.curve.notes + self.exposure.notes
