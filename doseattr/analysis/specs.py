"""What a checked analysis file asks for: one frozen spec per section, and
the :class:`Analysis` that holds them (built by
:mod:`doseattr.analysis.config`)."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date
from typing import Any, Mapping

from doseattr.analysis.tables import (BinsTable, BurdenTable, DrawsTable, HistoriesTable,
                                      Measurements, PointsTable, StudyTable)

#: Monte Carlo draws: fewer than MIN_DRAWS give unstable percentiles; more
#: than MAX_DRAWS need ``allow_many_draws = true`` (memory and time).
MIN_DRAWS, MAX_DRAWS = 100, 100_000
#: Seed used when ``[uncertainty]`` gives none, so that runs repeat exactly.
DEFAULT_SEED = 1

#: Models that can be fitted to a study table.
FITTED_MODELS = ("log-linear", "linear", "power", "spline")
#: Designs for which effective counts can be reconstructed.
EFFECTIVE_COUNT_DESIGNS = ("case-control", "incidence-rate")



@dataclass(frozen=True, eq=False)
class CurveSpec:
    """What ``[curve]`` asks for.

    ``source`` is ``"table"`` (fitted to the study's bands in ``table``),
    ``"entered"`` (a published estimate: ``rr``, ``err`` or ``exponent``),
    ``"points"``/``"draws"`` (a curve given as a CSV) or ``"shape"`` (a
    published shape with coefficients ``shape_coef``, their covariance
    ``shape_cov`` and fixed settings ``shape_settings``).
    ``beyond`` is ``"flat"`` or ``"extend"``; ``max_dose`` is ``None``
    unless given (a fitted curve then uses its highest assigned dose).
    Every dose is in the analysis file's unit once the spec is built
    (converted from ``unit``, the unit the file gave the curve in).
    """

    source: str
    model: str
    beyond: str
    table: StudyTable | None = None
    design: str | None = None
    dose_rule: str = "given"
    covariance: str | None = None
    offset: float = 0.0
    rr: float | None = None
    err: float | None = None
    exponent: float | None = None
    per: float = 1.0
    ci: tuple[float, float] | None = None
    reference_dose: float = 0.0
    max_dose: float | None = None
    knots: tuple[float, ...] | None = None
    knot_count: int = 3
    compare_models: tuple[str, ...] = ()
    given: PointsTable | DrawsTable | None = None
    shape_coef: tuple[float, ...] = ()
    shape_cov: tuple[tuple[float, ...], ...] = ()
    shape_settings: Mapping[str, float] | None = None
    unit: str | None = None
    notes: tuple[str, ...] = ()


@dataclass(frozen=True, eq=False)
class ExposureSpec:
    """What ``[exposure]`` asks for.

    ``source`` is ``"measurements"`` (fit ``family`` to ``measurements``),
    ``"gm-gsd"``, ``"shape-scale"``, ``"mean-sd"``, ``"percentiles"``,
    ``"bins"`` or ``"histories"``; ``values`` holds the typed parameters.
    ``substitution`` lists fractions of the detection limit to substitute
    for a comparison fit. Values are in the analysis file's unit once the
    spec is built (converted from ``unit``).
    """

    source: str
    family: str
    unexposed: float = 0.0
    measurements: Measurements | None = None
    values: Mapping[Any, float] | None = None
    bins: BinsTable | None = None
    histories: HistoriesTable | None = None
    as_of: date | None = None
    lag_years: float = 0.0
    substitution: tuple[float, ...] = ()
    unit: str | None = None
    notes: tuple[str, ...] = ()


@dataclass(frozen=True)
class ScenarioSpec:
    """One ``[[scenario]]``: ``kind`` is ``"cap"``, ``"scale"`` or
    ``"reduce_by"``; ``index`` is its position in the file (0-based)."""

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


@dataclass(frozen=True, eq=False)
class BurdenSpec:
    """``[burden]``: strata with observed cases (and optional exposure)."""

    table: BurdenTable


@dataclass(frozen=True, eq=False)
class OutcomeSpec:
    """One ``[[outcome]]``: its own curve and (optional) burden table; the
    exposure, scenarios and settings are shared."""

    name: str
    curve: CurveSpec
    burden: BurdenSpec | None = None


@dataclass(frozen=True, eq=False)
class Analysis:
    """A checked analysis, ready for :func:`doseattr.analysis.pipeline.run_analysis`.

    ``source`` is the analysis file as given (``None`` for a dictionary);
    ``base_dir`` the folder its paths are relative to; ``settings`` the
    parsed TOML as read.
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

    @property
    def notes(self) -> tuple[str, ...]:
        """How the inputs were read (defaults taken, gaps between bands)."""
        return self.curve.notes + self.exposure.notes
