"""The main result beside its alternatives: the PAF under other curve
models and dose-assignment rules, under each exposure description (fitted
families and the empirical distribution of the values), and with
non-detects substituted by a fraction of their detection limit.

A variant that cannot be computed is kept with the reason, so the main
result still stands. None of these is ever used for the main result.
"""

from __future__ import annotations

import numpy as np

from doseattr.analysis.build import BuiltCurve, CurveInputs, fit_substituted, fit_table_curve
from doseattr.analysis.config import Analysis
from doseattr.analysis.intervals import finite
from doseattr.analysis.specs import HistoriesExposure, MeasuredExposure, TableCurve
from doseattr.errors import DoseattrError, InputError
from doseattr.results.records import CurveVariant, ExposureVariant, SubstitutionResult

DOSE_RULES = ("midpoint", "band-mean", "band-median")


def _reason(exc: DoseattrError) -> str:
    return exc.line() if isinstance(exc, InputError) else str(exc)


# -- curve ------------------------------------------------------------------------
def curve_variants(analysis: Analysis, exposure, built: BuiltCurve, paf_value: float):
    """PAF under each model of ``compare_models`` and under each dose rule
    (curves fitted to a study table only)."""
    spec = analysis.curve
    if not isinstance(spec, TableCurve) or built.bands is None:
        return (), ()
    main_doses = built.bands.dose
    models = [spec.model] + [m for m in spec.compare_models if m != spec.model]
    comparison: tuple[CurveVariant, ...] = ()
    if spec.compare_models:
        comparison = tuple(
            CurveVariant(spec.model, built.curve, paf_value, main_doses) if name == spec.model
            else _variant(analysis, spec, exposure, name, model=name) for name in models)
    has_dose = spec.table.has_dose
    rules = (("given",) if has_dose else ()) + DOSE_RULES
    # without a dose column, "given" assigns every band its midpoint
    applied = "midpoint" if spec.dose_rule == "given" and not has_dose else spec.dose_rule
    sensitivity = tuple(
        CurveVariant(rule, built.curve, paf_value, main_doses) if rule == applied
        else _variant(analysis, spec, exposure, rule, dose_rule=rule) for rule in rules)
    return comparison, sensitivity


def _variant(analysis: Analysis, spec: TableCurve, exposure, label: str,
             **override: str) -> CurveVariant:
    from doseattr.core.attribution.fractions import paf

    try:
        other = fit_table_curve(spec, CurveInputs(analysis.source, analysis.unit, exposure),
                                **override)
        value = finite(paf(other.curve, exposure, minimum_risk=analysis.attribution.minimum_risk), "PAF")
    except DoseattrError as exc:
        return CurveVariant(label, None, None, None, _reason(exc))
    return CurveVariant(label, other.curve, value,
                        None if other.bands is None else other.bands.dose)


# -- exposure -----------------------------------------------------------------------
def exposure_variants(analysis: Analysis, curve, exposure, built_exposure,
                      paf_value: float) -> tuple[ExposureVariant, ...]:
    """PAF under the main description, each other family fitted, and the
    empirical distribution of the data (weighted mean of RR over the
    values: core :func:`~doseattr.core.exposure.empirical.empirical`)."""
    from doseattr.core.attribution.fractions import paf
    from doseattr.core.exposure.base import Exposure

    spec = analysis.exposure
    if not isinstance(spec, (MeasuredExposure, HistoriesExposure)):
        return ()
    m = analysis.attribution.minimum_risk
    fit = exposure.fit
    out = [ExposureVariant(exposure.family.name, exposure.parameters,
                           None if fit is None else fit.aic, paf_value)]
    samples = built_exposure.samples
    if samples is not None:  # a worker column: the PAF over workers' long-term means
        out = [ExposureVariant(f"{exposure.family.name}, workers' long-term means",
                               exposure.parameters, None, paf_value),
               _exposure_variant(f"{samples.family.name}, single samples", samples.parameters,
                                 getattr(samples.fit, "aic", None),
                                 lambda: paf(curve, samples, minimum_risk=m))]
    empirical_main = exposure.family.name == "empirical"
    unexposed = exposure.zero_share if empirical_main else exposure.unexposed
    others = list(exposure.alternatives) + [(e.family, e.params, e.fit)
                                            for e in built_exposure.fits]
    for fam, params, alt in others:
        other = Exposure(fam, np.asarray(params, dtype=float), unexposed)
        out.append(_exposure_variant(fam.name, other.parameters, getattr(alt, "aic", None),
                                     lambda other=other: paf(curve, other, minimum_risk=m)))
    if not empirical_main:
        out.append(_empirical_variant(analysis, spec, curve, built_exposure))
    return tuple(out)


def _empirical_variant(analysis: Analysis, spec: MeasuredExposure | HistoriesExposure, curve,
                       built_exposure) -> ExposureVariant:
    from doseattr.core.attribution.fractions import paf
    from doseattr.core.exposure.empirical import empirical

    if isinstance(spec, HistoriesExposure):
        values, weights, detected = built_exposure.workers.cumulative, None, None
        unexposed = 0.0
    else:
        data = spec.measurements
        values, weights, detected = data.values, data.weights, data.detected
        unexposed = spec.unexposed
    if detected is not None and not detected.all():
        return ExposureVariant("empirical", {}, None, None,
                               "not computed: the data have values below a detection limit, "
                               "and the empirical path substitutes nothing")
    m = analysis.attribution.minimum_risk
    return _exposure_variant("empirical", {}, None, lambda: paf(
        curve, empirical(values, weights, unexposed=unexposed), minimum_risk=m))


def _exposure_variant(label: str, params: dict, aic, compute) -> ExposureVariant:
    try:
        return ExposureVariant(label, params, aic, finite(compute(), "PAF"))
    except DoseattrError as exc:
        return ExposureVariant(label, params, aic, None, str(exc))


# -- substitution -----------------------------------------------------------------
def substitution_results(analysis: Analysis, curve, exposure,
                         paf_value: float) -> tuple[SubstitutionResult, ...]:
    r"""For each fraction :math:`k` of ``[exposure] substitution``: refit the
    main family to the values with every non-detect set to :math:`k\,DL`,
    and report its parameters, its PAF and that PAF minus the main one.

    Substitution biases fitted means and spreads by an amount that depends
    on the arbitrary fraction (Helsel 2006, Chemosphere 65:2434, from
    memory); it is shown only to compare with the censored-likelihood fit.
    """
    from doseattr.core.attribution.fractions import paf

    spec = analysis.exposure
    if not isinstance(spec, MeasuredExposure):
        return ()
    out = []
    for k in spec.substitution:
        try:
            other = fit_substituted(spec, exposure, k)
            value = finite(paf(curve, other, minimum_risk=analysis.attribution.minimum_risk), "PAF")
        except DoseattrError as exc:
            out.append(SubstitutionResult(k, {}, None, None, _reason(exc)))
            continue
        out.append(SubstitutionResult(k, other.parameters, value, value - paf_value))
    return tuple(out)
