r"""Run an analysis: build the curve, exposure and scenarios, then compute the
PAF, each scenario's PIF, the categorical comparison and the burden's
distribution over exposure, with the warnings and cautions that go with them.

With minimum-risk level :math:`m`, :math:`RR_m(x) = RR(\max(x, m))/RR(m)`,

.. math::
    PAF = 1 - \frac{1}{E[RR_m(X)]}, \qquad
    PIF_g = 1 - \frac{E[RR_m(g(X))]}{E[RR_m(X)]}

(the comparative-risk-assessment form; Murray et al. 2003, Popul Health
Metr 1:1). The integrals are the core's (:mod:`doseattr.core.attribution`).
Nothing is written here: the caller decides what to do with the results.
"""

from __future__ import annotations

import dataclasses
import math
import sys
from contextlib import contextmanager
from typing import Callable, Iterator

import numpy as np

from doseattr.analysis.build import (BuiltCurve, as_input_error, build_curve, build_exposure,
                                     build_scenarios, fit_table_curve)
from doseattr.analysis.config import Analysis
from doseattr.analysis.results import (BurdenResult, CurveVariant, Estimate, ExposureVariant,
                                       Results, ScenarioResult, StratumResult)
from doseattr.analysis.schema import key_location
from doseattr.errors import DivergenceError, DoseattrError, InputError

#: A population share above the data range larger than this gets a warning
#: (smaller shares are stated in the notes).
EXTRAPOLATION_WARN = 0.01

CAUTIONS = (
    "Causality: a PAF is the share of cases that would not occur without the exposure only if "
    "the RR curve is causal and free of confounding. With confounder-adjusted RRs the "
    "population formula used here can be biased; Miettinen's case-based formula "
    "(Miettinen 1974, Am J Epidemiol 99:325), PAF = sum of pc_i (RR_i - 1)/RR_i over the "
    "share of cases pc_i at each level, is the valid form when the cases' exposure "
    "distribution is known.",
    "Transportability: the study's RRs are assumed to hold in this population (same "
    "susceptibility, co-exposures, baseline risk and exposure metric).",
    "Extrapolation: results that depend on exposures above the curve's data range rest on "
    "the assumed shape there (held flat or extended), not on data.",
    "Decisions: exposure limits and any decision based on these numbers belong to the local "
    "regulations and to licensed professionals; this tool computes, it does not advise.",
)


def run_analysis(analysis: Analysis, *, progress: bool = False) -> Results:
    """Compute every result of ``analysis``.

    Parameters
    ----------
    analysis
        From :func:`~doseattr.analysis.config.load_analysis` or
        :func:`~doseattr.analysis.config.analysis_from_dict`.
    progress
        Show a progress bar on standard error while uncertainty draws are
        integrated (only on a terminal, and only once a run takes more than
        a second).

    Raises
    ------
    InputError
        When the inputs give no valid curve or exposure, or an expectation
        that diverges (with the setting to change).
    """
    from doseattr.core.attribution.categorical import categorical_comparison
    from doseattr.core.attribution.contribution import burden_density
    from doseattr.core.attribution.fractions import paf, pif

    if analysis.outcomes:
        return _with_outcomes(analysis, progress)
    built_exposure = build_exposure(analysis)
    exposure = built_exposure.exposure
    built = build_curve(analysis, exposure)
    curve = built.curve
    scenarios = build_scenarios(analysis)
    m = analysis.attribution.minimum_risk
    warnings = list(built.warnings)
    notes = list(analysis.notes) + list(built_exposure.notes) + list(built.notes)
    _check_minimum_risk(analysis, built, warnings)
    if exposure.fit is not None:
        warnings.extend(exposure.fit.warnings)
    notes.extend(exposure.notes)

    with _divergence(analysis):
        paf_value = _finite(paf(curve, exposure, m), "PAF")
        scenario_results = tuple(
            ScenarioResult(spec.name, spec.kind, spec.value,
                           Estimate(_finite(pif(curve, exposure, sc, m), f"PIF of {spec.name}")),
                           sc.describe(analysis.unit))
            for spec, sc in scenarios)
        cuts, reported, cut_notes = _cutpoints(analysis, built, exposure)
        categorical = categorical_comparison(curve, exposure, minimum_risk=m, cutpoints=cuts,
                                             reported_rr=reported)
        contribution = burden_density(curve, exposure, m)
    notes.extend(cut_notes)
    warnings.extend(_extrapolation(analysis, curve, exposure, notes))
    comparison, sensitivity = _variants(analysis, exposure, built, paf_value)
    exposure_variants = _exposure_variants(analysis, curve, exposure, built_exposure, paf_value)
    propagation = None
    if analysis.uncertainty is not None:
        with _divergence(analysis):
            propagation, paf_estimate, scenario_results = _intervals(
                analysis, curve, exposure, scenarios, paf_value, scenario_results, progress)
        notes.extend(_uncertainty_notes(analysis, curve, exposure))
    else:
        paf_estimate = Estimate(paf_value)
    burden = None
    if analysis.burden is not None:
        with _divergence(analysis):
            burden = _burden(analysis, curve, exposure, scenarios, progress)
    if analysis.attribution.minimum_risk_range is not None:
        lo, hi = analysis.attribution.minimum_risk_range
        notes.append(f"minimum_risk given as the range {lo:g} to {hi:g} {analysis.unit}: the "
                     f"point estimates use its middle, {m:g} {analysis.unit}")
    return Results(analysis=analysis, curve=curve, exposure=exposure, minimum_risk=m,
                   paf=paf_estimate, scenarios=scenario_results,
                   categorical=categorical, contribution=contribution,
                   warnings=tuple(_unique(warnings)), cautions=CAUTIONS,
                   band_table=built.bands, notes=tuple(_unique(notes)),
                   propagation=propagation, model_comparison=comparison,
                   dose_sensitivity=sensitivity, workers=built_exposure.workers,
                   exposure_comparison=exposure_variants, burden=burden)


class _divergence:
    """Context manager: a diverging expectation becomes an InputError that
    says which setting to change."""

    def __init__(self, analysis: Analysis) -> None:
        self.analysis = analysis

    def __enter__(self) -> None:
        return None

    def __exit__(self, kind, exc, tb) -> bool:
        if kind is None or not issubclass(kind, DivergenceError):
            return False
        a = self.analysis
        how = ("beyond = \"flat\"" if a.curve.source == "table"
               else "max_dose with beyond = \"flat\"")
        raise InputError(
            f"the expected RR is infinite, so there is no PAF: {str(exc).rstrip('.')} (in the analysis file: {how} "
            "holds the curve flat above the data)", source=a.source,
            location=key_location("curve", "beyond")) from None


def _finite(value: float, what: str) -> float:
    if not math.isfinite(value):
        raise DoseattrError(f"internal error: the {what} came out as {value}; please report "
                            "this with the analysis file")
    return float(value)


def _check_minimum_risk(analysis: Analysis, built: BuiltCurve, warnings: list[str]) -> None:
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


def _cutpoints(analysis: Analysis, built: BuiltCurve, exposure):
    """Cutpoints for the categorical comparison, the study's reported RRs
    when the cutpoints are the study's own bands, and notes."""
    notes = []
    table = analysis.curve.table
    study = None if table is None else table.cutpoints
    given = analysis.attribution.cutpoints
    if given is not None:
        cuts = np.asarray(given, dtype=float)
    elif study is not None:
        cuts = study
        if table.lower[0] > 0:
            notes.append(f"categorical comparison: the lowest band starts at "
                         f"{table.lower[0]:g} {analysis.unit}; it is taken down to 0 so that "
                         "the bands cover everyone")
    else:
        q = np.array([0.25, 0.5, 0.75])
        cuts = np.asarray(exposure.family.ppf(q, exposure.params), dtype=float).reshape(-1)
        notes.append("categorical comparison: no study bands and no cutpoints given, so the "
                     "quartiles of the exposed population's fitted distribution were used "
                     "(set [attribution] cutpoints to choose them)")
    reported = None
    if study is not None and cuts.shape == study.shape and np.allclose(cuts, study):
        reported = table.rr
        if not _reference_holds_minimum(analysis, built):
            notes.append("the study's reported RRs are relative to its reference band, while "
                         "the continuous PAF is relative to the minimum-risk level; their "
                         "difference reflects this too")
    elif study is not None:
        notes.append("categorical comparison: the cutpoints are not the study's bands, so the "
                     "study's reported RRs are not compared")
    return cuts, reported, notes


def _reference_holds_minimum(analysis: Analysis, built: BuiltCurve) -> bool:
    t = analysis.curve.table
    m = analysis.attribution.minimum_risk
    ref = t.reference
    return bool(t.lower[ref] <= m <= t.upper[ref])


def _extrapolation(analysis: Analysis, curve, exposure, notes: list[str]) -> list[str]:
    unit = analysis.unit
    out = []
    if curve.data_max is None:
        if curve.max_dose is None:
            out.append("the curve is extended over all exposures with no stated data range; "
                       "results at high exposure are extrapolation")
        return out
    share = float(np.asarray(exposure.sf(np.array([curve.data_max]))).reshape(-1)[0])
    where = (f"{100 * share:.2g}% of the population is exposed above {curve.data_max:g} {unit}, "
             "the highest dose with data")
    if curve.max_dose is not None:
        how = f"; the RR is held flat above {curve.max_dose:g} {unit}"
        advice = " (beyond = \"extend\" would extrapolate the formula instead)"
    else:
        how = f"; the RR there is extrapolated from the {curve.model.name} formula"
        advice = " (beyond = \"flat\" would hold it flat instead)"
    if share > EXTRAPOLATION_WARN:
        out.append(where + how + advice)
    else:
        notes.append(where + how)
    return out


def _unique(items: list[str]) -> list[str]:
    seen, out = set(), []
    for s in items:
        if s not in seen:
            seen.add(s)
            out.append(s)
    return out


#: Inputs whose uncertainty is propagated (the core's names).
SOURCES = ("curve", "exposure", "minimum_risk")


def _intervals(analysis: Analysis, curve, exposure, scenarios, paf_value: float,
               scenario_results: tuple[ScenarioResult, ...], progress: bool):
    """Monte Carlo intervals for the PAF and every PIF (core
    :func:`~doseattr.core.uncertainty.propagate.propagate`, one stratum)."""
    from doseattr.core.uncertainty.propagate import Stratum, propagate
    from doseattr.core.uncertainty.summary import summarise

    u = analysis.uncertainty
    m = analysis.attribution.minimum_risk
    low, high = analysis.attribution.minimum_risk_range or (m, m)
    rng = np.random.default_rng(u.seed)
    total = u.draws * (1 + len(scenarios))
    with _progress_bar(total, progress) as tick:
        prop = propagate(curve, [Stratum("population", 1.0, exposure)],
                         [sc for _, sc in scenarios], draws=u.draws, rng=rng,
                         minimum_risk=(low, high), sources=SOURCES, progress=tick)
    paf = _estimate(summarise(paf_value, _checked(prop.paf[0], "PAF")))
    results = tuple(
        dataclasses.replace(r, pif=_estimate(summarise(
            r.pif.estimate, _checked(prop.pif[r.name][0], f"PIF of {r.name}"))))
        for r in scenario_results)
    return prop, paf, results


def _estimate(interval) -> Estimate:
    return Estimate(interval.estimate, interval.lower, interval.upper, interval.mcse)


def _checked(draws: np.ndarray, what: str) -> np.ndarray:
    if not np.all(np.isfinite(draws)):
        raise DoseattrError(f"internal error: some Monte Carlo draws of the {what} are not "
                            "finite; please report this with the analysis file")
    return draws


@contextmanager
def _progress_bar(total: int, enabled: bool) -> Iterator[Callable[[int], None] | None]:
    """A tqdm bar on standard error, shown only on a terminal and only
    after a second (tqdm's ``disable=None`` and ``delay``)."""
    if not enabled:
        yield None
        return
    from tqdm import tqdm

    with tqdm(total=total, unit="draw", disable=None, delay=1.0, leave=False,
              file=sys.stderr, desc="uncertainty") as bar:
        yield bar.update


def _uncertainty_notes(analysis: Analysis, curve, exposure) -> list[str]:
    u = analysis.uncertainty
    seed = f"seed {u.seed}" + ("" if u.seed_given else " (the default; set [uncertainty] seed "
                                                      "to choose another)")
    varied = []
    if curve.draws is not None:
        varied.append("the curve's own draws")
    elif np.any(curve.cov):
        varied.append("curve coefficients from their fitted normal distribution")
    if exposure.fit is not None and getattr(exposure.fit, "cov_internal", None) is not None:
        varied.append("exposure parameters from the asymptotic normal of the fit (log scale)")
    if analysis.attribution.minimum_risk_range is not None:
        varied.append("the minimum-risk level, uniform over its range")
    what = "; ".join(varied) if varied else "nothing (every input was entered without error)"
    return [f"uncertainty: {u.draws} Monte Carlo draws, {seed}; 2.5th and 97.5th percentiles. "
            f"Varied: {what}"]


DOSE_RULES = ("midpoint", "band-mean", "band-median")


def _variants(analysis: Analysis, exposure, built: BuiltCurve, paf_value: float):
    """PAF under each model of ``compare_models`` and under each dose rule
    (curves fitted to a study table only). A variant that cannot be
    computed is kept with the reason, so the main result still stands."""
    spec = analysis.curve
    if spec.source != "table":
        return (), ()
    main_doses = built.bands.dose
    models = [spec.model] + [m for m in spec.compare_models if m != spec.model]
    comparison = ()
    if spec.compare_models:
        comparison = tuple(
            CurveVariant(spec.model, built.curve, paf_value, main_doses) if name == spec.model
            else _variant(analysis, exposure, name, model=name) for name in models)
    rules = (("given",) if spec.table.has_dose else ()) + DOSE_RULES
    sensitivity = tuple(
        CurveVariant(rule, built.curve, paf_value, main_doses) if rule == spec.dose_rule
        else _variant(analysis, exposure, rule, dose_rule=rule) for rule in rules)
    return comparison, sensitivity


def _variant(analysis: Analysis, exposure, label: str, **override) -> CurveVariant:
    from doseattr.core.attribution.fractions import paf

    try:
        other = fit_table_curve(analysis, exposure, **override)
        value = _finite(paf(other.curve, exposure, analysis.attribution.minimum_risk), "PAF")
    except DoseattrError as exc:
        text = exc.line() if isinstance(exc, InputError) else str(exc)
        return CurveVariant(label, None, None, None, text)
    return CurveVariant(label, other.curve, value, other.bands.dose)


def _exposure_variants(analysis: Analysis, curve, exposure, built_exposure,
                       paf_value: float) -> tuple[ExposureVariant, ...]:
    """PAF under each fitted family and under the empirical distribution of
    the data (weighted mean of RR over the values: core
    :func:`~doseattr.core.exposure.empirical.empirical`)."""
    from doseattr.core.attribution.fractions import paf
    from doseattr.core.exposure.base import Exposure
    from doseattr.core.exposure.empirical import empirical

    spec = analysis.exposure
    if spec.source not in ("measurements", "histories"):
        return ()
    m = analysis.attribution.minimum_risk
    fit = exposure.fit
    out = [ExposureVariant(exposure.family.name, exposure.parameters,
                           None if fit is None else fit.aic, paf_value)]
    for fam, params, alt in exposure.alternatives:
        other = Exposure(fam, np.asarray(params, dtype=float), exposure.unexposed)
        out.append(_exposure_variant(fam.name, other.parameters, getattr(alt, "aic", None),
                                     lambda: paf(curve, other, m)))
    if spec.source == "histories":
        values, weights, detected = built_exposure.workers.cumulative, None, None
        unexposed = 0.0
    else:
        data = spec.measurements
        values, weights, detected = data.values, data.weights, data.detected
        unexposed = spec.unexposed
    if detected is not None and not detected.all():
        out.append(ExposureVariant("empirical", {}, None, None,
                                   "not computed: the data have values below a detection "
                                   "limit, and the empirical path substitutes nothing"))
    else:
        out.append(_exposure_variant(
            "empirical", {}, None,
            lambda: paf(curve, empirical(values, weights, unexposed=unexposed), m)))
    return tuple(out)


def _exposure_variant(label: str, params: dict, aic, compute) -> ExposureVariant:
    try:
        return ExposureVariant(label, params, aic, _finite(compute(), "PAF"))
    except DoseattrError as exc:
        return ExposureVariant(label, params, aic, None, str(exc))


def _burden(analysis: Analysis, curve, exposure, scenarios, progress: bool) -> BurdenResult:
    """Attributable cases per stratum and in total: PAF x observed cases
    (core :func:`~doseattr.core.uncertainty.propagate.point_values`, and
    :func:`~doseattr.core.uncertainty.propagate.propagate` for intervals)."""
    from doseattr.core.uncertainty.propagate import Stratum, point_values, propagate

    table = analysis.burden.table
    strata = [Stratum(name, float(n), _stratum_exposure(analysis, exposure, override, line))
              for name, n, override, line in zip(table.strata, table.cases, table.exposure,
                                                  table.lines)]
    transforms = [sc for _, sc in scenarios]
    m = analysis.attribution.minimum_risk
    point = point_values(curve, strata, transforms, m)
    draws = None
    u = analysis.uncertainty
    if u is not None:
        low, high = analysis.attribution.minimum_risk_range or (m, m)
        sources = SOURCES + (("cases",) if u.poisson_cases else ())
        total = u.draws * len({id(s.exposure) for s in strata}) * (1 + len(transforms))
        with _progress_bar(total, progress) as tick:
            draws = propagate(curve, strata, transforms, draws=u.draws,
                              rng=np.random.default_rng([u.seed, 1]), minimum_risk=(low, high),
                              sources=sources, progress=tick)
    names = [sc.name for sc in transforms]

    def est(value_point, value_draws) -> Estimate:
        if value_draws is None:
            return Estimate(float(np.ravel(value_point)[0]))
        from doseattr.core.uncertainty.summary import summarise

        i = summarise(float(np.ravel(value_point)[0]), _checked(value_draws, "burden"))
        return Estimate(i.estimate, i.lower, i.upper, i.mcse)

    def pick(prop, attr, s=None, name=None):
        if prop is None:
            return None
        if s is None:  # totals
            if attr == "paf":
                return prop.total_paf
            if attr == "attributable":
                return prop.total_attributable
            return prop.total_pif(name) if attr == "pif" else prop.total_averted(name)
        value = getattr(prop, attr)
        return (value[name] if name is not None else value)[s]

    rows = []
    pop = table.population
    for s, name in enumerate(table.strata):
        rows.append(StratumResult(
            name, float(table.cases[s]), est(pick(point, "paf", s), pick(draws, "paf", s)),
            est(pick(point, "attributable", s), pick(draws, "attributable", s)),
            tuple((n, est(pick(point, "pif", s, n), pick(draws, "pif", s, n)),
                   est(pick(point, "averted", s, n), pick(draws, "averted", s, n)))
                  for n in names),
            None if pop is None else float(pop[s])))
    total = StratumResult(
        "total", float(table.cases.sum()), est(pick(point, "paf"), pick(draws, "paf")),
        est(pick(point, "attributable"), pick(draws, "attributable")),
        tuple((n, est(pick(point, "pif", name=n), pick(draws, "pif", name=n)),
               est(pick(point, "averted", name=n), pick(draws, "averted", name=n)))
              for n in names),
        None if pop is None else float(pop.sum()))
    return BurdenResult(tuple(rows), total)


def _stratum_exposure(analysis: Analysis, shared, override: dict | None, line: int):
    """The shared exposure, or the stratum's own from its exposure columns
    (same family; the [exposure] unexposed share applies)."""
    if override is None:
        return shared
    from doseattr.core.exposure import summary

    source = analysis.burden.table.source
    family = shared.family.name
    keys = tuple(override)
    location = f"row {line}, column '{keys[1]}'"
    with as_input_error(source, location):
        if keys == ("gm", "gsd"):
            ex = summary.from_gm_gsd(override["gm"], override["gsd"])
        elif keys == ("mean", "sd"):
            ex = summary.from_mean_sd(family if family != "empirical" else "lognormal",
                                      override["mean"], override["sd"])
        else:
            if family not in ("gamma", "weibull"):
                raise InputError(f"shape and scale describe a gamma or Weibull distribution, "
                                 f"but the shared exposure is {family}", source=source,
                                 location=location)
            ex = summary.from_parameters(family, override)
    unexposed = analysis.exposure.unexposed
    return dataclasses.replace(ex, unexposed=unexposed) if unexposed else ex


def _with_outcomes(analysis: Analysis, progress: bool) -> Results:
    """Run every ``[[outcome]]`` with the shared exposure, scenarios and
    settings. The top-level results are those of the file's own [curve], or
    of the first outcome when the file has none."""
    from doseattr.analysis.config import outcome_location

    runs = []
    for i, outcome in enumerate(analysis.outcomes):
        sub = dataclasses.replace(analysis, curve=outcome.curve, burden=outcome.burden,
                                  outcomes=())
        with outcome_location(i, outcome.name):
            runs.append((outcome.name, run_analysis(sub, progress=progress)))
    if "curve" in (analysis.settings or {}):
        top = run_analysis(dataclasses.replace(analysis, outcomes=()), progress=progress)
    else:
        first = runs[0][1]
        note = (f"the file has no [curve] of its own: the results above the outcomes are those "
                f"of the first outcome, '{runs[0][0]}'")
        top = dataclasses.replace(first, notes=first.notes + (note,))
    return dataclasses.replace(top, analysis=analysis, outcomes=tuple(runs))
