"""From a checked :class:`~doseattr.analysis.config.Analysis` to the core's
objects: the relative-risk curve, the exposure distribution and the
scenarios.

Each source of curve and of exposure (one spec type each, in
:mod:`doseattr.analysis.specs`) has one builder, found through
:data:`CURVE_BUILDERS` and :data:`EXPOSURE_BUILDERS`; a builder takes its own
spec and only what it needs besides.

The core refuses values it cannot use with :class:`~doseattr.errors.ModelError`;
here each such refusal becomes an :class:`~doseattr.errors.InputError`
naming the file and key (or table) the values came from.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any, TypeAlias, cast

import numpy as np

from doseattr.analysis.config import Analysis, ScenarioSpec
from doseattr.analysis.csvfile import FloatArray
from doseattr.analysis.schema import key_location
from doseattr.analysis.specs import (
    FITTED_FAMILIES,
    BinnedExposure,
    DrawsCurve,
    EnteredCurve,
    GridExposure,
    HistoriesExposure,
    MeasuredExposure,
    PercentilesExposure,
    PointsCurve,
    PooledCurve,
    ShapeCurve,
    StrataExposure,
    SummaryExposure,
    TableCurve,
)
from doseattr.analysis.tables import DESIGN_TOTALS, Measurements, StudyTable
from doseattr.core.attribution.scenarios import SCENARIO_KINDS, Comply, Scenario
from doseattr.core.curves.base import Curve, CurveModel
from doseattr.core.exposure.base import Exposure, Family
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.errors import DivergenceError, InputError, ModelError
from doseattr.results.records import BandTable, PoolingSection

if TYPE_CHECKING:
    from doseattr.analysis.grid_exposure import BuiltGrid
    from doseattr.core.curves.covariance import LogRRCovariance
    from doseattr.core.curves.doses import BandDoses
    from doseattr.core.exposure.histories import WorkerExposure
    from doseattr.core.hygiene.workers import WorkerModel

#: A population's exposure: a fitted family or the weighted values.
AnyExposure: TypeAlias = Exposure | EmpiricalExposure


@contextmanager
def as_input_error(source: str | None, location: str | None,
                   prefix: str = "") -> Iterator[None]:
    """Turn a core :class:`ModelError` into an :class:`InputError` at
    ``source``/``location`` (a :class:`DivergenceError` is left to the
    caller, which knows which setting to suggest)."""
    try:
        yield
    except DivergenceError:
        raise
    except ModelError as exc:
        raise InputError(f"{prefix}{exc}", source=source, location=location) from None


# -- curve ----------------------------------------------------------------------
@dataclasses.dataclass(frozen=True, eq=False)
class BuiltCurve:
    """The curve, the study's bands as fitted (or ``None``) and what the
    reader should be told about how it was obtained."""

    curve: Curve
    bands: BandTable | None
    warnings: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    #: The studies pooled into the curve (``[[curve.study]]``), or ``None``.
    pooling: PoolingSection | None = None


@dataclasses.dataclass(frozen=True, eq=False)
class CurveInputs:
    """What a curve's builder may need besides its spec: the analysis file
    (named in errors; ``None`` for a dictionary), the analysis unit, the
    population's fitted exposure (for band-mean and band-median doses) and
    whether Monte Carlo draws will be made."""

    source: str | None
    unit: str
    exposure: AnyExposure | None = None
    draws: bool = False


def build_curve(analysis: Analysis, exposure: AnyExposure | None = None) -> BuiltCurve:
    """The relative-risk curve the analysis asks for. ``exposure`` (the
    population's fitted distribution) is needed for band-mean and
    band-median doses."""
    spec = analysis.curve
    inputs = CurveInputs(analysis.source, analysis.unit, exposure,
                         draws=analysis.uncertainty is not None)
    return CURVE_BUILDERS[type(spec)](spec, inputs)


def fit_table_curve(spec: TableCurve, inputs: CurveInputs, *, model: str | None = None,
                    dose_rule: str | None = None) -> BuiltCurve:
    """Fit a model to the study table (``model`` and ``dose_rule`` override
    the spec's, for comparisons and sensitivity tables)."""
    return _fit_table(spec, inputs, model, dose_rule)


def fit_pooled_study(spec: TableCurve, inputs: CurveInputs,
                     knots: FloatArray | None) -> BuiltCurve:
    """One study of a pooled curve, fitted exactly as :func:`fit_table_curve`
    fits a single table; a spline takes the ``knots`` shared by every
    study (checked by the caller against all the studies' doses)."""
    return _fit_table(spec, inputs, None, None, knots)


def _fit_table(spec: TableCurve, inputs: CurveInputs, model: str | None,
               dose_rule: str | None, knots: FloatArray | None = None) -> BuiltCurve:
    from doseattr.core.curves.fit import fit_curve

    t = spec.table
    model_name = model or spec.model
    bd = band_doses(t, dose_rule or spec.dose_rule, inputs.exposure, source=inputs.source)
    doses, ref = bd.doses, t.reference
    nonref = np.arange(t.n_bands) != ref
    if not nonref.any():
        raise InputError("the table has only the reference band; a curve needs at least one "
                         "other band", source=t.source)
    cov, warnings, notes = log_rr_covariance(spec, t)
    notes = list(bd.notes) + notes
    curve_model = _table_model(spec, model_name, doses, inputs.source, knots)
    data_max = float(doses.max())
    max_dose = None if spec.beyond == "extend" else (
        spec.max_dose if spec.max_dose is not None else data_max)
    with as_input_error(inputs.source, key_location("curve", "model"),
                        f"the {model_name} model cannot be fitted to {t.source}: "):
        curve = fit_curve(curve_model, doses[nonref], np.log(t.rr[nonref]), cov,
                          max_dose=max_dose, data_max=data_max)
    bands = BandTable(lower=t.lower, upper=t.upper, dose=doses, rr=t.rr, ci_lower=t.ci_lower,
                      ci_upper=t.ci_upper, reference=np.arange(t.n_bands) == ref,
                      dose_rule=tuple(bd.rule_used), source=t.source)
    warnings.extend(curve.fit.warnings if curve.fit is not None else ())
    return BuiltCurve(curve, bands, tuple(warnings), tuple(notes))


def band_doses(t: StudyTable, rule: str, exposure: AnyExposure | None = None, *,
               source: str | None = None) -> BandDoses:
    """Dose of each band: given/midpoint from the table, or the band mean or
    median of the population's fitted exposure distribution (its exposed
    part). ``source`` is the analysis file, named when the rule cannot be
    used."""
    from doseattr.core.curves.doses import (
        DistributionRule,
        TableRule,
        assign_doses,
        distribution_doses,
    )

    if rule in ("given", "midpoint"):
        with as_input_error(t.source, "columns 'lower', 'upper', 'dose'"):
            return assign_doses(t.lower, t.upper, t.dose if t.has_dose else None,
                                rule=cast(TableRule, rule))
    if not isinstance(exposure, Exposure):
        raise InputError(f"dose = \"{rule}\" needs a fitted exposure distribution (not an "
                         "empirical one): use dose = \"midpoint\" or a fitted family",
                         source=source, location=key_location("curve", "dose"))
    fam, params = exposure.family, exposure.params
    with as_input_error(t.source, "columns 'lower', 'upper'"):
        bd = distribution_doses(t.lower, t.upper, rule=cast(DistributionRule, rule),
                                cdf=lambda x: fam.cdf(x, params),
                                partial_mean=lambda a, b: fam.partial_mean(a, b, params),
                                ppf=lambda q: fam.ppf(q, params))
    note = (f"band doses are the {rule.replace('band-', '')} exposure within each band under "
            f"this population's fitted {fam.name} distribution (not the study population's, "
            "which is not known)")
    return type(bd)(bd.doses, bd.rule_used, bd.notes + (note,))


def log_rr_covariance(spec: TableCurve,
                      t: StudyTable) -> tuple[LogRRCovariance, list[str], list[str]]:
    """Covariance of the non-reference log RRs, with warnings and notes."""
    from doseattr.core.curves.covariance import (
        Design,
        greenland_longnecker,
        independent_covariance,
        var_log_rr_from_ci,
    )
    from doseattr.core.curves.effective_counts import effective_counts, table_conditions

    ref = t.reference
    nonref = np.arange(t.n_bands) != ref
    with as_input_error(t.source, "columns 'rr', 'ci_lower', 'ci_upper'"):
        var = var_log_rr_from_ci(t.rr[nonref], t.ci_lower[nonref], t.ci_upper[nonref])
    full_var = np.zeros(t.n_bands)
    full_var[nonref] = var
    warnings: list[str] = []
    notes: list[str] = []
    design = cast(Design, spec.design)  # set whenever the covariance needs it (curve_section)
    if spec.covariance == "counts":
        totals_col = DESIGN_TOTALS[design]
        with as_input_error(t.source, f"columns 'cases', '{totals_col}'",
                            "the covariance of the log RRs could not be rebuilt from the "
                            "counts: "):
            cov = greenland_longnecker(t.rr, full_var, t.counts["cases"], t.counts[totals_col],
                                       design=design, ref=ref)
        notes.append(f"covariance of the log RRs rebuilt from the {spec.design} counts "
                     "(Greenland & Longnecker 1992, Am J Epidemiol 135:1301)")
        return cov, warnings, notes
    if spec.covariance == "effective-counts":
        with as_input_error(t.source, "columns 'rr', 'ci_lower', 'ci_upper'"):
            given = table_conditions(ref=ref, design=design, cases=t.counts.get("cases"),
                                     totals=t.counts.get(DESIGN_TOTALS[design]),
                                     total_cases=spec.total_cases,
                                     total_noncases=spec.total_noncases)
            cov = effective_counts(t.rr, full_var, ref=ref, design=design,
                                   case_ratio=given.case_ratio,
                                   reference_share=given.reference_share,
                                   share_of=given.share_of)
        if cov.method == "effective-counts":
            notes.append("covariance of the log RRs from effective counts reconstructed from "
                         "the RRs and CIs (Hamling et al. 2008, Stat Med 27:954)")
            notes.extend(given.notes + cov.notes)
            return cov, warnings, notes
        warnings.append(f"{'; '.join(cov.notes)}; this usually understates the uncertainty "
                        "of the curve")
        return cov, warnings, notes
    cov = independent_covariance(var)
    why = ("covariance = \"independent\" was asked for" if t.counts
           else "the table gives no counts (cases with controls, person_time or persons) and "
                "no design (set design to reconstruct effective counts)")
    warnings.append(f"the study's log RRs were treated as independent because {why}; this "
                    "ignores their shared reference band and usually understates the "
                    "uncertainty of the curve (Greenland & Longnecker 1992)")
    return cov, warnings, notes


def _table_model(spec: TableCurve, name: str, doses: FloatArray,
                 src: str | None, shared_knots: FloatArray | None = None) -> CurveModel:
    from doseattr.core.curves.registry import make_model
    from doseattr.core.curves.spline import default_knots

    ref = float(doses[spec.table.reference])
    settings: dict[str, Any] = {}
    if name == "power":
        settings["offset"] = spec.offset
    if name == "spline":
        if shared_knots is not None:
            knots = shared_knots
        elif spec.knots is not None:
            knots = np.asarray(spec.knots, dtype=float)
            if knots[0] < doses.min() or knots[-1] > doses.max():
                raise InputError(f"knots must lie within the assigned doses ({doses.min():g} "
                                 f"to {doses.max():g}); got {knots[0]:g} to {knots[-1]:g}",
                                 source=src, location=key_location("curve", "knots"))
        else:
            with as_input_error(src, key_location("curve", "knot_count")):
                knots = default_knots(doses, spec.knot_count)
        settings["knots"] = knots
    key = "offset" if name == "power" else "model"
    with as_input_error(src, key_location("curve", key)):
        return make_model(name, reference_dose=ref, **settings)


def _table(spec: TableCurve, inputs: CurveInputs) -> BuiltCurve:
    return fit_table_curve(spec, inputs)


def _points(spec: PointsCurve, inputs: CurveInputs) -> BuiltCurve:
    """A curve given as points with CIs (held flat beyond the last dose);
    the RRs are divided by the RR at the reference dose when it is not 1."""
    from doseattr.core.curves.points import points_curve

    g = spec.given
    top = float(g.doses[-1])
    with as_input_error(g.source, "column 'rr'"):
        rr, lo, hi = g.rr, g.ci_lower, g.ci_upper
        at_ref = np.flatnonzero(g.doses == spec.reference_dose)
        if at_ref.size and rr[at_ref[0]] != 1.0:
            scale = rr[at_ref[0]]
            rr, lo, hi = rr / scale, lo / scale, hi / scale
        curve = points_curve(g.doses, rr, lo, hi, reference_dose=spec.reference_dose,
                             beyond="flat", max_dose=top)
    notes = [_given_note(spec, top, inputs.unit)]
    return BuiltCurve(curve, None, (), tuple(notes) + tuple(curve.notes))


def _draws(spec: DrawsCurve, inputs: CurveInputs) -> BuiltCurve:
    """A curve given as draws (held flat beyond the last dose)."""
    from doseattr.core.curves.points import curve_from_draws

    g = spec.given
    top = float(g.doses[-1])
    with as_input_error(g.source, "column 'rr'"):
        curve = curve_from_draws(g.doses, g.rr, reference_dose=spec.reference_dose,
                                 beyond="flat", max_dose=top)
    notes = [_given_note(spec, top, inputs.unit),
             f"the point estimate is the median of the {g.rr.shape[0]} draws at each dose"]
    return BuiltCurve(curve, None, (), tuple(notes) + tuple(curve.notes))


def _given_note(spec: PointsCurve | DrawsCurve, top: float, unit: str) -> str:
    return (f"curve given as {spec.source} ({spec.given.source}): log RR interpolated linearly "
            f"between doses and held flat beyond {top:g} {unit}")


def _entered(spec: EnteredCurve, inputs: CurveInputs) -> BuiltCurve:
    from doseattr.core.curves.published import published_curve

    flat = spec.beyond == "flat"
    value = {spec.estimate: spec.value}
    with as_input_error(inputs.source, key_location("curve", spec.estimate)):
        curve = published_curve(spec.model, rr=value.get("rr"), err=value.get("err"),
                                exponent=value.get("exponent"), per=spec.per, ci=spec.ci,
                                reference_dose=spec.reference_dose,
                                max_dose=spec.max_dose if flat else None, offset=spec.offset,
                                data_max=spec.max_dose)
    notes = list(curve.notes)
    if spec.max_dose is not None and not flat:
        notes.append(f"the curve is extended beyond max_dose = {spec.max_dose:g} "
                     f"{inputs.unit} (beyond = \"extend\"); max_dose marks the end of the "
                     "data range")
    return BuiltCurve(curve, None, (), tuple(notes))


def _shape(spec: ShapeCurve, inputs: CurveInputs) -> BuiltCurve:
    """A published shape with its coefficients and (diagonal, or after a
    unit conversion delta-method) covariance: core
    :func:`~doseattr.core.curves.published.entered_curve`."""
    from doseattr.core.curves.published import entered_curve
    from doseattr.core.curves.registry import make_model

    if inputs.draws:
        _check_shape_draws(spec, inputs.source)
    flat = spec.beyond == "flat"
    with as_input_error(inputs.source, key_location("curve", "model")):
        model = make_model(spec.model, reference_dose=spec.reference_dose,
                           **dict(spec.settings))
        curve = entered_curve(model, spec.coef, cov=np.array(spec.cov),
                              max_dose=spec.max_dose if flat else None, data_max=spec.max_dose,
                              notes=spec.notes)
    notes = [f"published shape {spec.model}: {model.describe()} (doses in {inputs.unit})"]
    return BuiltCurve(curve, None, (), tuple(notes))


#: Lower bounds of the saturating exponential's coefficients, and how many
#: standard errors the estimate must stay above them for normal draws.
SHAPE_BOUNDS = {"alpha": -1.0, "gamma": 0.0, "delta": 0.0}
SHAPE_MARGIN_SE = 5.0


def _check_shape_draws(spec: ShapeCurve, source: str | None) -> None:
    """The Monte Carlo draws of the coefficients are normal; refuse a
    standard error so large that draws would leave the valid range (the
    chance beyond 5 SE is 3e-7 per draw)."""
    if spec.model != "saturating-exponential":
        return
    se = np.sqrt(np.diag(np.array(spec.cov)))
    for (name, low), b, s in zip(SHAPE_BOUNDS.items(), spec.coef, se):
        if b - SHAPE_MARGIN_SE * s <= low:
            raise InputError(f"{name}_se is too large for normal Monte Carlo draws of {name}: "
                             f"{name} - {SHAPE_MARGIN_SE:g} SE = {b - SHAPE_MARGIN_SE * s:.4g} "
                             f"is not above {low:g}, where the curve is invalid (drop the "
                             "[uncertainty] section or give a smaller standard error)",
                             source=source, location=key_location("curve", f"{name}_se"))


def _pooled(spec: PooledCurve, inputs: CurveInputs) -> BuiltCurve:
    """Several studies fitted one by one and pooled
    (:func:`~doseattr.analysis.pooled_curve.build_pooled`)."""
    from doseattr.analysis.pooled_curve import build_pooled

    return build_pooled(spec, inputs)


#: The builder of each source of curve.
CURVE_BUILDERS: dict[type, Callable[[Any, CurveInputs], BuiltCurve]] = {
    TableCurve: _table, EnteredCurve: _entered, PointsCurve: _points, DrawsCurve: _draws,
    ShapeCurve: _shape, PooledCurve: _pooled}


# -- exposure -------------------------------------------------------------------
@dataclasses.dataclass(frozen=True, eq=False)
class BuiltExposure:
    """The exposure distribution, per-worker totals when it came from work
    histories, notes on how it was obtained, the parametric families
    fitted beside an empirical distribution for comparison, and, for a
    ``[grid]``, the reduced grid (each zone's exposure by stratum label)."""

    exposure: AnyExposure
    workers: WorkerExposure | None = None
    notes: tuple[str, ...] = ()
    fits: tuple[Exposure, ...] = ()
    grid: BuiltGrid | None = None
    #: With a ``worker`` column: the fit to the single samples (what a
    #: limit is tested on) and the random-effects model; ``exposure`` is
    #: then the distribution of workers' long-term means.
    samples: Exposure | None = None
    worker_model: WorkerModel | None = None

    @property
    def sampled(self) -> AnyExposure:
        """The distribution of single samples (shifts): the fit itself,
        or with a worker column the fit that ignores who wore the sampler."""
        return self.exposure if self.samples is None else self.samples


#: An exposure family, or ``"best"``/``"empirical"`` (methods over values).
FamilyChoice: TypeAlias = Family | str


def build_exposure(analysis: Analysis) -> BuiltExposure:
    """The exposure distribution the analysis asks for (with its unexposed
    share)."""
    from doseattr.core.exposure.registry import get_family

    spec = analysis.exposure
    src = analysis.source
    with as_input_error(src, key_location("exposure", "family")):
        family = spec.family if spec.family in ("best", "empirical") else get_family(spec.family)
    return EXPOSURE_BUILDERS[type(spec)](spec, family, src)


def _with_unexposed(exposure: Exposure, unexposed: float) -> BuiltExposure:
    """``exposure`` with the ``[exposure] unexposed`` share, when given."""
    if unexposed:
        exposure = dataclasses.replace(exposure, unexposed=unexposed)
    return BuiltExposure(exposure)


def _measured(spec: MeasuredExposure, family: FamilyChoice, src: str | None) -> BuiltExposure:
    m = spec.measurements
    built = _fit_values(spec.family, family, m.values, m.detected, m.weights, m.source,
                        spec.unexposed, weight_meaning=spec.weights or "frequency")
    if m.worker is None:
        return built
    return _long_term(built, m, spec.unexposed)


def _long_term(built: BuiltExposure, m: Measurements, unexposed: float) -> BuiltExposure:
    """With a ``worker`` column: the one-way random-effects model (core
    :func:`~doseattr.core.hygiene.workers.fit_workers`), and the PAF over
    the distribution of workers' long-term mean exposure."""
    from doseattr.core.hygiene.workers import fit_workers, long_term_exposure

    assert m.worker is not None
    with as_input_error(m.source, "column 'worker'",
                        "the within- and between-worker model cannot be fitted: "):
        model = fit_workers(m.values, m.detected, m.worker)
    with as_input_error(m.source, "column 'worker'"):
        exposure = long_term_exposure(model)
    if unexposed:
        exposure = dataclasses.replace(exposure, unexposed=unexposed)
    assert isinstance(built.exposure, Exposure)
    note = (f"the PAF uses the distribution of the {model.n_workers} workers' long-term mean "
            f"exposure (GM {exposure.params[0]:.4g}, GSD {exposure.params[1]:.3g}, between "
            f"workers), not of single samples (GSD {built.exposure.params[1]:.3g}): a cohort's "
            "dose-response refers to long-term mean exposure")
    return dataclasses.replace(built, exposure=exposure, samples=built.exposure,
                               worker_model=model, notes=built.notes + (note,))


def _binned(spec: BinnedExposure, family: FamilyChoice, src: str | None) -> BuiltExposure:
    from doseattr.core.exposure import summary

    b = spec.bins
    with as_input_error(b.source, f"column '{'share' if b.shares else 'count'}'",
                        f"the {spec.family} distribution cannot be fitted: "):
        exposure = summary.fit_bins(family, b.lower, b.upper, b.counts)
    if b.zero > 0:
        if spec.unexposed:
            raise InputError("the binned table has a row of people with no exposure; "
                             "remove the unexposed key (or that row)",
                             source=src, location=key_location("exposure", "unexposed"))
        share = b.zero / (b.zero + float(b.counts.sum()))
        return BuiltExposure(dataclasses.replace(exposure, unexposed=share), notes=(
            f"unexposed share {share:.4g} from the table's no-exposure row (lower = upper = 0)",))
    return _with_unexposed(exposure, spec.unexposed)


def _percentiles(spec: PercentilesExposure, family: FamilyChoice,
                 src: str | None) -> BuiltExposure:
    from doseattr.core.exposure import summary

    with as_input_error(src, key_location("exposure", "percentiles")):
        exposure = summary.from_percentiles(family, dict(spec.values))
    return _with_unexposed(exposure, spec.unexposed)


def _summary(spec: SummaryExposure, family: FamilyChoice, src: str | None) -> BuiltExposure:
    """Two summary statistics: gm and gsd (a lognormal), shape and scale,
    or mean and sd (core :mod:`doseattr.core.exposure.summary`)."""
    from doseattr.core.exposure import summary

    v = spec.values
    if spec.kind == "gm-gsd":
        with as_input_error(src, key_location("exposure", "gsd")):
            exposure = summary.from_gm_gsd(v["gm"], v["gsd"])
    elif spec.kind == "shape-scale":
        with as_input_error(src, key_location("exposure", "shape")):
            exposure = summary.from_parameters(family, {"shape": v["shape"],
                                                        "scale": v["scale"]})
    else:
        with as_input_error(src, key_location("exposure", "sd")):
            exposure = summary.from_mean_sd(family, v["mean"], v["sd"])
    return _with_unexposed(exposure, spec.unexposed)


def _fit_values(name: str, family: FamilyChoice, values: FloatArray, detected: np.ndarray,
                weights: FloatArray | None, source: str, unexposed: float,
                workers: WorkerExposure | None = None, *,
                weight_meaning: str = "frequency") -> BuiltExposure:
    """Fit ``family`` (named ``name`` in the file) to values; exact zeros
    give the unexposed share (core
    :func:`~doseattr.core.exposure.unexposed.estimate_unexposed`)."""
    from doseattr.core.exposure.fit import fit_best, fit_measurements
    from doseattr.core.exposure.unexposed import estimate_unexposed

    if family == "empirical":
        return _empirical(values, weights, source, unexposed, workers, weight_meaning)
    notes = []
    zero = np.asarray(values) == 0
    if zero.any():
        with as_input_error(source, "column 'value'"):
            unexposed, _, _ = estimate_unexposed(values, weights)
        keep = ~zero
        values, detected = values[keep], detected[keep]
        weights = None if weights is None else weights[keep]
        notes.append(f"unexposed share {unexposed:.4g} estimated from the {int(zero.sum())} "
                     f"values of 0 in {source}")
    det = None if detected.all() else detected
    with as_input_error(source, "column 'value'",
                        f"the {name} distribution cannot be fitted: "):
        if family == "best":
            exposure = fit_best(values, detected=det, weights=weights, families=FITTED_FAMILIES,
                                weight_meaning=weight_meaning)
        else:
            exposure = fit_measurements(family, values, detected=det, weights=weights,
                                        weight_meaning=weight_meaning)
    if unexposed:
        exposure = dataclasses.replace(exposure, unexposed=unexposed)
    return BuiltExposure(exposure, workers, tuple(notes))


def _empirical(values: FloatArray, weights: FloatArray | None, source: str, unexposed: float,
               workers: WorkerExposure | None = None,
               weight_meaning: str = "importance") -> BuiltExposure:
    """The weighted values themselves (core
    :func:`~doseattr.core.exposure.empirical.empirical`; zeros stay as
    points at zero exposure), with the parametric families fitted to the
    positive values beside it for comparison."""
    from doseattr.core.exposure.empirical import empirical

    with as_input_error(source, "column 'value'"):
        exposure = empirical(values, weights, unexposed=unexposed, source="measurements",
                             weight_meaning=weight_meaning)
    notes = [f"family = \"empirical\": the PAF is the weighted mean of RR over the "
             f"{values.size} values of {source}, with no fitted distribution"]
    fits, why = _comparison_fits(values, weights)
    return BuiltExposure(exposure, workers, tuple(notes + why), fits)


def _comparison_fits(values: FloatArray,
                     weights: FloatArray | None) -> tuple[tuple[Exposure, ...], list[str]]:
    """Each family of the core registry fitted to the positive values (for
    the comparison table beside the empirical PAF); a failure is a note
    (:func:`doseattr.analysis.comparisons.comparison_fits`)."""
    from doseattr.analysis.comparisons import comparison_fits

    return comparison_fits(values, weights, FITTED_FAMILIES)


def fit_substituted(spec: MeasuredExposure, exposure: Exposure, fraction: float) -> AnyExposure:
    """The main family refitted with every non-detect replaced by
    ``fraction`` x its detection limit (comparison only; core
    :func:`~doseattr.core.exposure.nondetects.substitute_nondetects`)."""
    from doseattr.core.exposure.nondetects import substitute_nondetects

    m = spec.measurements
    values = substitute_nondetects(m.values, m.detected, fraction)
    built = _fit_values(spec.family, exposure.family, values, np.ones(values.size, bool),
                        m.weights, m.source, spec.unexposed,
                        weight_meaning=spec.weights or "frequency")
    return built.exposure


def _histories(spec: HistoriesExposure, family: FamilyChoice, src: str | None) -> BuiltExposure:
    """Cumulative exposure per worker from job histories, then a fit to it."""
    from doseattr.core.exposure.histories import cumulative_exposure

    h = spec.histories
    with as_input_error(h.source, "columns 'start', 'end', 'intensity'"):
        workers = cumulative_exposure(h.worker, h.start, h.end, h.intensity,
                                      as_of=np.datetime64(spec.as_of, "D"),
                                      lag_years=spec.lag_years)
    values = np.asarray(workers.cumulative, dtype=float)
    need, why = (1, "for the empirical distribution") if family == "empirical" else (
        3, "to fit a distribution")
    if np.sum(values > 0) < need:
        raise InputError(f"only {int(np.sum(values > 0))} workers have any exposure before "
                         f"{spec.as_of} minus the {spec.lag_years:g}-year lag; at least {need} "
                         f"{'is' if need == 1 else 'are'} needed {why}", source=h.source,
                         location="columns 'start', 'end', 'intensity'")
    built = _fit_values(spec.family, family, values, np.ones(values.size, bool), None, h.source,
                        0.0, workers)
    note = (f"exposure is cumulative (intensity x years) for {values.size} workers, counted "
            f"up to {spec.as_of} minus a {spec.lag_years:g}-year lag (years = days / 365.25)")
    return dataclasses.replace(built, notes=(note,) + built.notes)


#: The builder of each source of exposure: ``(spec, family, analysis file)``.
def _strata(spec: StrataExposure, family: FamilyChoice, src: str | None) -> BuiltExposure:
    """The mixture of the burden rows' own lognormal distributions, weighted
    by population (by cases without one), as a census of weighted points
    (:func:`~doseattr.core.exposure.empirical.lognormal_mixture`)."""
    from doseattr.core.exposure.empirical import lognormal_mixture

    t = spec.table
    for e, line in zip(t.exposure, t.lines, strict=True):
        if e is None or set(e) != {"gm", "gsd"}:
            what = "no exposure" if e is None else f"{' and '.join(e)}"
            raise InputError(f"without [exposure], every row needs its own gm and gsd (a "
                             f"lognormal); this row has {what}. Fill them, or add an "
                             "[exposure] section for the population", source=t.source,
                             location=f"row {line}")
    weights = t.population if t.population is not None else t.cases
    by = "population" if t.population is not None else "cases"
    gm = np.array([e["gm"] for e in t.exposure if e is not None])
    gsd = np.array([e["gsd"] for e in t.exposure if e is not None])
    with as_input_error(t.source, f"column '{by}'"):
        mixture = lognormal_mixture(gm, gsd, np.asarray(weights, float),
                                    source=f"the mixture of the rows of {t.source}")
    note = (f"no [exposure]: the population's exposure is the mixture of the {gm.size} rows' "
            f"own lognormal distributions in {t.source}, weighted by {by} (each at 64 "
            "Gauss-Hermite nodes); it is the whole population, so it carries no sampling "
            "uncertainty, and each row's results use its own distribution exactly")
    return BuiltExposure(mixture, notes=(note,))


def _grid(spec: GridExposure, family: FamilyChoice, src: str | None) -> BuiltExposure:
    """The grid's cells, reduced by zone in one pass
    (:func:`~doseattr.analysis.grid_exposure.build_grid`)."""
    from doseattr.analysis.grid_exposure import build_grid

    built = build_grid(spec, src)
    return BuiltExposure(built.population, notes=built.notes, grid=built)


EXPOSURE_BUILDERS: dict[type, Callable[[Any, FamilyChoice, str | None], BuiltExposure]] = {
    MeasuredExposure: _measured, SummaryExposure: _summary,
    PercentilesExposure: _percentiles, BinnedExposure: _binned,
    HistoriesExposure: _histories, StrataExposure: _strata, GridExposure: _grid}


# -- scenarios ------------------------------------------------------------------
def build_scenarios(analysis: Analysis, built: BuiltExposure | None = None
                    ) -> tuple[tuple[ScenarioSpec, Scenario], ...]:
    """Each ``[[scenario]]`` with its core transform; ``comply`` scales the
    exposure by min(1, limit / P95), P95 the single samples' 95th
    percentile at the fit (``built``)."""
    out: list[tuple[ScenarioSpec, Scenario]] = []
    for spec in analysis.scenarios:
        with as_input_error(analysis.source, key_location("scenario", spec.kind, spec.index)):
            if spec.kind == "comply":
                assert built is not None, "comply needs the built exposure"
                sampled = built.sampled
                assert isinstance(sampled, Exposure), "[limit] needs a fitted family"
                p95 = float(sampled.ppf(0.95))
                sc: Scenario = Comply.from_percentile(spec.value, p95, name=spec.name)
                out.append((dataclasses.replace(spec, value=sc.value), sc))
            else:
                out.append((spec, SCENARIO_KINDS[spec.kind](spec.value, name=spec.name)))
    return tuple(out)


def study_cutpoints(table: StudyTable) -> np.ndarray:
    """The study's band limits as cutpoints (each band's lower limit but the
    first's)."""
    return table.cutpoints
