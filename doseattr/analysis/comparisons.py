"""The main result beside its alternatives: the PAF under other curve
models and dose-assignment rules, under each exposure description (fitted
families and the empirical distribution of the values), and with
non-detects substituted by a fraction of their detection limit.

A variant that cannot be computed is kept with the reason, so the main
result still stands. None of these is ever used for the main result.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from doseattr.analysis.build import BuiltCurve, CurveInputs, fit_substituted, fit_table_curve
from doseattr.analysis.config import Analysis
from doseattr.analysis.intervals import finite
from doseattr.analysis.specs import HistoriesExposure, MeasuredExposure, TableCurve
from doseattr.errors import DoseattrError, InputError
from doseattr.results.records import CurveVariant, ExposureVariant, SubstitutionResult

if TYPE_CHECKING:  # pragma: no cover
    from doseattr.core.exposure.base import Exposure

FloatArray = NDArray[np.float64]

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
#: Comparison fits collapse repeated values when there are at least this
#: many values and at most half as many distinct ones (below it the fit
#: on every value is cheap and is kept as it is).
COLLAPSE_FROM = 20_000


def comparison_fits(values: FloatArray, weights: FloatArray | None,
                    families: tuple[str, ...]) -> tuple[tuple[Exposure, ...], list[str]]:
    r"""Each of ``families`` fitted to the positive values (frequency
    weights, as beside the empirical PAF); a failure is a note.

    With many repeated values (:data:`COLLAPSE_FROM`) each family is
    fitted to the distinct values with their summed weights, then its fit
    record is put back on the scale of all values: the weighted
    log-likelihood is :math:`\sum_i w_i \log f(x_i) = \sum_j W_j \log f(u_j)`
    over the distinct values :math:`u_j` with :math:`W_j = \sum_{x_i = u_j} w_i`,
    so with the core's normalisation (weights summing to the number of
    points, :func:`~doseattr.core.exposure.fit.prepare`) the collapsed
    log-likelihood is the full one times ``k/n`` (``k`` distinct of ``n``
    values): the same maximiser, the full log-likelihood ``n/k`` times the
    collapsed one and the inverse observed information ``k/n`` times the
    collapsed one (closed form). The record then holds all the values,
    their weights, Kish's effective size and the goodness of fit on all
    values, as a fit to every value would. The parameters agree with that
    fit to the optimiser's tolerance (a relative 1e-7 on a million values:
    as close as two fits of the same values in another order agree).
    """
    from doseattr.core.exposure.fit import fit_measurements

    keep = np.asarray(values) > 0
    x = np.asarray(values, dtype=float)[keep]
    w = None if weights is None else np.asarray(weights, dtype=float)[keep]
    fit_one: Callable[[str], Exposure] = lambda name: fit_measurements(  # noqa: E731
        name, x, weights=w)
    if x.size >= COLLAPSE_FROM:
        distinct, where = np.unique(x, return_inverse=True)
        if 2 * distinct.size <= x.size:
            summed = np.bincount(where, weights=w, minlength=distinct.size).astype(float)
            # the stable order of the ranks of the values is theirs: one
            # sort for every family's goodness of fit
            order = np.argsort(where.ravel(), kind="stable")
            fit_one = lambda name: _on_all_values(  # noqa: E731
                fit_measurements(name, distinct, weights=summed), x, w, order)
    fits, why = [], []
    for name in families:
        try:
            fits.append(fit_one(name))
        except DoseattrError as exc:
            why.append(f"{name} not fitted for comparison: {exc}")
    return tuple(fits), why


def _on_all_values(collapsed: Exposure, x: FloatArray, w: FloatArray | None,
                   order: NDArray[np.intp] | None = None) -> Exposure:
    """A fit to the distinct values put back on the scale of all ``x``
    (weights ``w``, ``None``: unweighted); see :func:`comparison_fits`.
    ``order``: a stable ascending order of ``x``, if known."""
    from doseattr.core.exposure.gof import goodness_of_fit
    from doseattr.core.exposure.sandwich import kish_effective_n

    fit = collapsed.fit
    assert fit is not None and fit.loglik is not None
    ratio = x.size / fit.n  # n / k
    full_w = np.ones(x.size) if w is None else w * (x.size / w.sum())
    loglik = fit.loglik * ratio
    weighted = not np.allclose(full_w, 1.0)
    record = dataclasses.replace(
        fit, method="maximum likelihood" + (" (weighted)" if weighted else ""),
        loglik=loglik, aic=2 * collapsed.params.size - 2 * loglik, n=x.size, detected=x.size,
        censored=0, values=x, detected_mask=np.ones(x.size, bool), weights=full_w,
        cov_internal=None if fit.cov_internal is None else fit.cov_internal / ratio,
        weights_meaning=None if w is None else "frequency",
        effective_n=None if w is None else kish_effective_n(full_w), gof={})
    record = dataclasses.replace(record, gof=goodness_of_fit(
        dataclasses.replace(collapsed, fit=record), order=order))
    return dataclasses.replace(collapsed, fit=record)


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
