"""Every check a run makes, done before any Monte Carlo draw: build the
exposure, the curve, the scenarios and the burden strata, and compute the
point PAF and PIFs (which is where an infinite expected RR shows).

:func:`prepare` returns what was built so that
:func:`~doseattr.analysis.pipeline.run_analysis` computes from it without
building anything twice; :func:`check_analysis` says in one line per
section what a run would compute. Nothing here draws or writes.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Sequence
from typing import Any, Literal

import numpy as np

from doseattr.analysis.build import (
    BuiltCurve,
    BuiltExposure,
    as_input_error,
    build_curve,
    build_exposure,
    build_scenarios,
)
from doseattr.analysis.burden_run import burden_strata
from doseattr.analysis.burden_table import BurdenTable
from doseattr.analysis.config import Analysis
from doseattr.analysis.intervals import finite, minimum_risk_range
from doseattr.analysis.schema import key_location
from doseattr.analysis.specs import (
    BinnedExposure,
    BurdenSpec,
    DrawsCurve,
    EnteredCurve,
    GridExposure,
    HistoriesExposure,
    MeasuredExposure,
    OutcomeSpec,
    PercentilesExposure,
    PointsCurve,
    PooledCurve,
    ShapeCurve,
    StrataExposure,
    SummaryExposure,
    TableCurve,
)
from doseattr.core.curves.base import Curve
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.errors import ConvergenceError, DivergenceError, FloatRangeError, InputError


@dataclasses.dataclass(frozen=True, eq=False)
class Prepared:
    """One analysis (without ``[[outcome]]``) built and checked: its
    exposure, curve, scenarios, burden strata (``None`` without
    ``[burden]``), point PAF and PIFs, and the minimum-risk warnings."""

    analysis: Analysis
    built_exposure: BuiltExposure
    built: BuiltCurve
    scenarios: tuple
    strata: list | None
    paf: float
    pifs: tuple[float, ...]
    warnings: tuple[str, ...] = ()
    #: Index of the ``[[outcome]]`` block (its own curve and case streams).
    stream: int | None = None


@dataclasses.dataclass(frozen=True, eq=False)
class PreparedAll:
    """Every part of an analysis file: the file's own analysis (``None``
    when the file has ``[[outcome]]`` but no ``[curve]``) and each outcome's."""

    top: Prepared | None
    outcomes: tuple[tuple[str, Prepared], ...] = ()


def check_analysis(analysis: Analysis) -> list[str]:
    """Make every check that :func:`~doseattr.analysis.pipeline.run_analysis`
    makes, and say what it would compute.

    The exposure and curve are fitted at their point estimates (cheap);
    no Monte Carlo draw is made and nothing is written.

    Returns
    -------
    list of str
        One line per section (curve, exposure, attribution, uncertainty,
        burden), prefixed by the outcome's name for ``[[outcome]]``.

    Raises
    ------
    InputError
        The first problem found, as the run would report it.
    """
    done = prepare_all(analysis)
    if done.top is not None and not done.outcomes:
        return describe(done.top)
    per_outcome = ("curve:", "attribution:", "burden:")
    lines = describe(done.top) if done.top is not None else [
        line for line in describe(done.outcomes[0][1]) if not line.startswith(per_outcome)]
    for name, prepared in done.outcomes:
        lines += [f"outcome '{name}': {line}" for line in describe(prepared)
                  if line.startswith(per_outcome)]
    return lines


def prepare_all(analysis: Analysis) -> PreparedAll:
    """:func:`prepare` for the file's own analysis and for every outcome,
    so that a problem in the last outcome stops the run before the first
    is computed."""
    from doseattr.analysis.config import outcome_location

    if not analysis.outcomes:
        return PreparedAll(prepare(analysis))
    shared = build_exposure(analysis)  # one fit, shared by every outcome
    runs = []
    for i, outcome in enumerate(analysis.outcomes):
        sub = dataclasses.replace(analysis, curve=outcome.curve, burden=block_burden(outcome),
                                  outcomes=())
        with outcome_location(i, outcome.name):
            runs.append((outcome.name, dataclasses.replace(
                prepare(sub, built_exposure=shared), stream=i)))
    top = None
    if analysis.own_curve:
        top = prepare(dataclasses.replace(analysis, outcomes=()), built_exposure=shared)
    return PreparedAll(top, tuple(runs))


def block_burden(outcome: OutcomeSpec) -> BurdenSpec | None:
    """The rows of an ``[[outcome]]`` block's burden table that its curve
    applies to: those of its ``groups``, or every row."""
    burden = outcome.burden
    if burden is None or outcome.groups is None:
        return burden
    table = burden.table
    assert table.groups is not None  # checked when the file was read
    rows = [r for r, g in enumerate(table.groups) if g in outcome.groups]
    return dataclasses.replace(burden, table=table.subset(rows))


def prepare(analysis: Analysis, *, built_exposure: BuiltExposure | None = None) -> Prepared:
    """Build and check one analysis (no ``[[outcome]]``): exposure, curve
    (knots, dose rules that need the fitted exposure, shape standard
    errors), scenarios, the minimum-risk level, the burden strata's own
    exposures, and a finite point PAF and PIF (for the population and
    each stratum with its own exposure). ``built_exposure``, when given, is
    the analysis's exposure already fitted (shared by ``[[outcome]]`` blocks)."""
    from doseattr.core.attribution.fractions import paf, pif

    if built_exposure is None:
        built_exposure = build_exposure(analysis)
    exposure = built_exposure.exposure
    built = build_curve(analysis, exposure)
    scenarios = build_scenarios(analysis, built_exposure)
    warnings: list[str] = []
    check_minimum_risk(analysis, built, warnings)
    curve, m = built.curve, analysis.attribution.minimum_risk
    with divergence(analysis):
        paf_value = finite(paf(curve, exposure, minimum_risk=m), "PAF")
        pifs = tuple(finite(pif(curve, exposure, sc, minimum_risk=m), f"PIF of {spec.name}")
                     for spec, sc in scenarios)
    strata = None
    if analysis.burden is not None:
        built_exposure = _grid_quadrature(analysis, built_exposure, curve, scenarios)
        strata = burden_strata(analysis, exposure, built_exposure.grid)
        _check_strata(analysis.burden.table, m, curve, exposure, strata)
    return Prepared(analysis, built_exposure, built, scenarios, strata, paf_value, pifs,
                    tuple(warnings))


def _grid_quadrature(analysis: Analysis, built_exposure: BuiltExposure, curve: Curve,
                     scenarios: Sequence) -> BuiltExposure:
    """The grid's zones as a Gauss rule per group of bins for the Monte
    Carlo (:meth:`~doseattr.analysis.grid_exposure.BuiltGrid.with_quadrature`),
    with its note; unchanged without a grid or where the rule does not apply."""
    grid = built_exposure.grid
    if grid is None:
        return built_exposure
    fewer = grid.with_quadrature(curve, minimum_risk=minimum_risk_range(analysis),
                                 scenarios=[sc for _, sc in scenarios])
    if fewer is grid:
        return built_exposure
    return dataclasses.replace(built_exposure, grid=fewer,
                               notes=(*built_exposure.notes, fewer.notes[-1]))


def _check_strata(table: BurdenTable, m: float, curve: Curve, shared: object,
                  strata: list) -> None:
    """A stratum with its own exposure must give a finite expected RR at
    the minimum-risk level ``m``; the error names its row of the burden
    table. The strata of one exposure family are integrated together
    (:func:`_suspects`); only those in a run that fails are then taken one
    by one, in the table's order, for the first row that fails and its own
    message."""
    from doseattr.core.attribution.fractions import paf

    rows = [(s.exposure, line) for s, line in zip(strata, table.lines)
            if s.exposure is not shared]
    suspects = _suspects(curve, m, [e for e, _ in rows])
    for i, (exposure, line) in enumerate(rows):
        if i not in suspects:
            continue
        try:
            paf(curve, exposure, minimum_risk=m)
        except ConvergenceError as exc:
            raise InputError(f"this stratum's PAF cannot be computed: {exc} (check its "
                             "exposure columns)", source=table.source,
                             location=f"row {line}") from None
        except DivergenceError as exc:
            raise InputError(f"this stratum's exposure gives an infinite expected RR, so there "
                             f"is no PAF: {str(exc).rstrip('.')} (set [curve] beyond = "
                             "\"flat\", or give this stratum a narrower exposure)",
                             source=table.source, location=f"row {line}") from None


#: Strata whose exposures :func:`_suspects` integrates in one call.
CHECK_BATCH = 4096


def _suspects(curve: Curve, m: float, exposures: list[Any]) -> set[int]:
    """The positions of ``exposures`` to check one by one: the empirical
    ones, and every one in a run of up to :data:`CHECK_BATCH` exposures of
    one family whose stacked parameters the engine refuses in one call, or
    whose expected RR is not a positive finite number there."""
    from doseattr.core.attribution.fractions import excess_draws
    from doseattr.core.exposure.base import Exposure

    out: set[int] = set()
    by_family: dict[str, list[int]] = {}
    for i, e in enumerate(exposures):
        if isinstance(e, Exposure):
            by_family.setdefault(e.family.name, []).append(i)
        else:
            out.add(i)
    for same in by_family.values():
        for start in range(0, len(same), CHECK_BATCH):
            run = same[start:start + CHECK_BATCH]
            params = np.array([exposures[i].params for i in run], dtype=float)
            unexposed = np.array([exposures[i].unexposed for i in run], dtype=float)
            try:
                excess = excess_draws(curve, curve.coef, exposures[run[0]].family, params,
                                      unexposed, m)
            except (ConvergenceError, DivergenceError):
                out.update(run)
                continue
            # an expected RR near 0 is refused by the PAF: those rows again
            bad = ~(np.isfinite(excess) & (excess > -0.5))
            out.update(run[j] for j in np.flatnonzero(bad).tolist())
    return out


class divergence:
    """Context manager: a diverging expectation becomes an InputError that
    says which setting to change."""

    def __init__(self, analysis: Analysis) -> None:
        self.analysis = analysis

    def __enter__(self) -> None:
        return None

    def __exit__(self, kind, exc, tb) -> Literal[False]:
        a = self.analysis
        if kind is not None and issubclass(kind, ConvergenceError):
            raise InputError(f"the PAF cannot be computed: {exc} (check the exposure's "
                             "values and unit)", source=a.source, location="[exposure]") from None
        if kind is None or not issubclass(kind, DivergenceError):
            return False
        if issubclass(kind, FloatRangeError):
            raise InputError(f"there is no PAF: {exc}", source=a.source,
                             location="[curve]") from None
        how = ("beyond = \"flat\"" if isinstance(a.curve, (TableCurve, PooledCurve))
               else "max_dose with beyond = \"flat\"")
        raise InputError(
            f"the expected RR is infinite, so there is no PAF: {str(exc).rstrip('.')} "
            f"(in the analysis file: {how} "
            "holds the curve flat above the data)", source=a.source,
            location=key_location("curve", "beyond")) from None


def check_minimum_risk(analysis: Analysis, built: BuiltCurve, warnings: list[str]) -> None:
    """The curve must have a valid RR at the minimum-risk level, and a
    level at or above ``max_dose`` makes every fraction zero."""
    curve, m = built.curve, analysis.attribution.minimum_risk
    low = (analysis.attribution.minimum_risk_range or (m, m))[0]
    check = getattr(curve.model, "check_doses", None)
    loc = key_location("attribution", "minimum_risk")
    if check is not None:
        with as_input_error(analysis.source, loc, "at the minimum-risk level: "):
            check(curve.coef, np.array([low, m]))
    if curve.max_dose is not None and m >= curve.max_dose:
        warnings.append(f"the minimum-risk level {m:g} {analysis.unit} is at or above the dose "
                        f"where the curve is held flat ({curve.max_dose:g} {analysis.unit}), so "
                        "every attributable fraction is 0")
    elif curve.data_max is not None and m > curve.data_max:
        warnings.append(f"the minimum-risk level {m:g} {analysis.unit} is above the highest "
                        f"dose with data ({curve.data_max:g} {analysis.unit})")


# -- what will be computed ------------------------------------------------------------
def describe(p: Prepared) -> list[str]:
    """One line per section of a prepared analysis."""
    a = p.analysis
    lines = [_curve_line(a, p.built), _exposure_line(a, p.built_exposure),
             _attribution_line(a, p), _uncertainty_line(a)]
    if p.strata is not None and a.burden is not None:
        lines.append(_burden_line(a.burden.table, p.strata, p.built_exposure.exposure))
    if a.limit is not None:
        lines.append(_limit_line(a, p.built_exposure))
    return lines


def _limit_line(a: Analysis, built: BuiltExposure) -> str:
    """What ``[limit]`` will test, and on which samples."""
    assert a.limit is not None
    fit = built.sampled.fit
    n = 0 if fit is None else fit.n
    test = ("EN 689 screening test" if 3 <= n <= 5 else "EN 689 statistical test (upper "
            f"tolerance limit of the 95th percentile at {a.limit.confidence:.0%})")
    workers = ("" if built.worker_model is None else
               f"; {built.worker_model.n_workers} workers: within- and between-worker model, "
               "PAF over their long-term means")
    return f"limit: {a.limit.value:g} {a.unit}, {test} on {n} samples{workers}"


COVARIANCE_WORDS = {"counts": "Greenland-Longnecker covariance from the counts",
                    "effective-counts": "covariance from effective counts",
                    "independent": "log RRs treated as independent"}


def _curve_line(a: Analysis, built: BuiltCurve) -> str:
    held = (f"held flat above {built.curve.max_dose:g} {a.unit}"
            if built.curve.max_dose is not None else "extended over all doses")
    return f"curve: {_CURVE_WORDS[type(a.curve)](a.curve, built, a.unit)}, {held}"


def _table_words(spec: TableCurve, built: BuiltCurve, unit: str) -> str:
    t = spec.table
    cov = COVARIANCE_WORDS.get(spec.covariance, spec.covariance)
    if spec.covariance == "effective-counts" and not any(
            "effective counts reconstructed" in n for n in built.notes):
        cov = "effective counts not reconstructed, so log RRs treated as independent"
    return (f"{spec.model} fitted by GLS to {t.n_bands} bands of {t.source} "
            f"({cov}; band doses by '{spec.dose_rule}')")


def _given_words(spec: PointsCurve | DrawsCurve, built: BuiltCurve, unit: str) -> str:
    g = spec.given
    return (f"given as {spec.source} at {g.doses.size} doses in {g.source}, log RR "
            "interpolated linearly")


def _shape_words(spec: ShapeCurve, built: BuiltCurve, unit: str) -> str:
    se = ("with its coefficients' standard errors" if np.any(np.array(spec.cov))
          else "with fixed coefficients")
    return f"published {spec.model} shape {se}"


def _entered_words(spec: EnteredCurve, built: BuiltCurve, unit: str) -> str:
    return f"{spec.model} from a published {spec.estimate} = {spec.value:g} per {spec.per:g} {unit}"


def _pooled_words(spec: PooledCurve, built: BuiltCurve, unit: str) -> str:
    """The studies, how they are pooled and which draws the Monte Carlo makes."""
    how = ("fixed effect (inverse-variance GLS)" if spec.pooling == "fixed" else
           f"random effects (between-study variance by {spec.tau_method.upper()})")
    studies = "; ".join(f"'{n}': {_table_words(s, _own_notes(built, n), unit)}"
                        for n, s in zip(spec.names, spec.studies))
    draws = ("draws of a new population's curve (predict = true)" if spec.predict
             else "draws of the pooled mean curve")
    return (f"{spec.model} fitted to each of {len(spec.studies)} studies and pooled by {how}, "
            f"{draws} [{studies}]")


def _own_notes(built: BuiltCurve, name: str) -> BuiltCurve:
    """``built`` with only the notes of study ``name``."""
    own = f"study '{name}': "
    return dataclasses.replace(built, notes=tuple(t for t in built.notes if t.startswith(own)))


#: How each source of curve is described (before where it is held flat).
_CURVE_WORDS: dict[type, Callable[[Any, BuiltCurve, str], str]] = {
    TableCurve: _table_words, PointsCurve: _given_words, DrawsCurve: _given_words,
    ShapeCurve: _shape_words, EnteredCurve: _entered_words, PooledCurve: _pooled_words}


def _exposure_line(a: Analysis, built: BuiltExposure) -> str:
    ex = built.exposure
    family = ex.family.name
    unexposed = ex.zero_share if isinstance(ex, EmpiricalExposure) else ex.unexposed
    share = f"; unexposed share {unexposed:.4g}" if unexposed else ""
    return f"exposure: {_EXPOSURE_WORDS[type(a.exposure)](a.exposure, built, family)}{share}"


def _measured_words(spec: MeasuredExposure, built: BuiltExposure, family: str) -> str:
    m = spec.measurements
    nd = int(np.sum(~np.asarray(m.detected, bool)))
    what = f"{m.values.size} measurements of {m.source} ({nd} non-detects)"
    if family == "empirical":
        return f"empirical, the {what} themselves, weighted"
    chosen = " (lowest AIC of the families)" if spec.family == "best" else ""
    return f"{family}{chosen} fitted to {what}"


def _histories_words(spec: HistoriesExposure, built: BuiltExposure, family: str) -> str:
    n = 0 if built.workers is None else np.asarray(built.workers.cumulative).size
    return (f"{family} over the cumulative exposure of {n} workers from "
            f"{spec.histories.source} (as of {spec.as_of}, lag {spec.lag_years:g} years)")


def _binned_words(spec: BinnedExposure, built: BuiltExposure, family: str) -> str:
    return f"{family} fitted to the binned counts of {spec.bins.source}"


def _given_exposure_words(spec: SummaryExposure | PercentilesExposure, built: BuiltExposure,
                          family: str) -> str:
    return f"{family} from the given {spec.source}"


def _strata_words(spec: StrataExposure, built: BuiltExposure, family: str) -> str:
    return (f"no [exposure]: the mixture of the {len(spec.table.strata)} rows' own "
            f"distributions in {spec.table.source}")


#: How each source of exposure is described (before its unexposed share).
def _grid_words(spec: GridExposure, built: BuiltExposure, family: str) -> str:
    assert built.grid is not None
    g = built.grid.section
    zones = f"{len(g.zone_ids)} zones" if g.zone_ids else "no zones"
    return (f"grid of {g.cells} cells ({g.skipped_cells} nodata), {zones}, as a census of "
            "population-weighted cells")


_EXPOSURE_WORDS: dict[type, Callable[[Any, BuiltExposure, str], str]] = {
    MeasuredExposure: _measured_words, HistoriesExposure: _histories_words,
    BinnedExposure: _binned_words, SummaryExposure: _given_exposure_words,
    PercentilesExposure: _given_exposure_words, StrataExposure: _strata_words,
    GridExposure: _grid_words}


def _attribution_line(a: Analysis, p: Prepared) -> str:
    at = a.attribution
    level = (f"{at.minimum_risk:g} {a.unit}" if at.minimum_risk_range is None else
             f"{at.minimum_risk:g} {a.unit} (middle of {at.minimum_risk_range[0]:g} to "
             f"{at.minimum_risk_range[1]:g})")
    n = len(p.scenarios)
    scenarios = ("no scenarios" if n == 0 else
                 f"{n} scenario{'' if n == 1 else 's'} (a PIF for each)")
    return (f"attribution: PAF against the minimum-risk level {level}; {scenarios}; "
            f"point PAF {p.paf:.4g}")


def _uncertainty_line(a: Analysis) -> str:
    u = a.uncertainty
    if u is None:
        return "uncertainty: none ([uncertainty] not given): point estimates only"
    seed = f"seed {u.seed}" + ("" if u.seed_given else " (default)")
    cases = "; Poisson variation of the cases" if u.poisson_cases else ""
    return f"uncertainty: {u.draws} Monte Carlo draws, {seed}{cases}"


def _burden_line(table: BurdenTable, strata: list, shared: object) -> str:
    own = sum(1 for s in strata if s.exposure is not shared)
    n = len(strata)
    what = f"{n} row{'' if n == 1 else 's'}" if table.groups is not None else \
        f"{n} strat{'um' if n == 1 else 'a'}"
    groups = "" if table.groups is None else \
        f" (groups {', '.join(dict.fromkeys(table.groups))})"
    return (f"burden: {what} of {table.source}{groups}, "
            f"{float(np.sum(table.cases)):g} observed cases in total ({own} with their own "
            "exposure)")
