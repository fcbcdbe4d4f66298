"""``results.json``: generated here, and only here, from the run's records.

Schema version "2.3" (published as ``results.schema.json`` in this
package). Every estimate is one object ``{estimate, lower, upper, mcse,
lower_mcse, upper_mcse}``;
every number is a plain float or ``None``; a NaN or infinity reaching this
module is a bug and is refused (:func:`~doseattr.results.numbers.num`).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np

from doseattr.core.attribution.categorical import CategoricalComparison
from doseattr.core.attribution.contribution import Contribution, summarise
from doseattr.core.curves.base import Curve
from doseattr.results.estimate import Estimate
from doseattr.results.numbers import json_safe, matrix, num, nums, params
from doseattr.results.records import (
    CASE_WEIGHTED_PAF,
    POPULATION_PAF,
    AttributionSection,
    BandTable,
    BurdenResult,
    CurveSection,
    CurveVariant,
    ExposureSection,
    ExposureVariant,
    FamilyFit,
    GoodnessOfFit,
    GridSection,
    LimitSection,
    PooledStudy,
    PoolingSection,
    SourceWidth,
    StratumExposure,
    StratumResult,
    SubstitutionResult,
    UncertaintySection,
    Workers,
)

if TYPE_CHECKING:
    from doseattr.results.run import Results

SCHEMA_VERSION = "2.3"

#: The keys an outcome repeats from the top level.
OUTCOME_KEYS = ("paf", "minimum_risk", "scenarios", "curve", "categorical", "burden",
                "uncertainty", "model_comparison", "dose_sensitivity", "bands", "warnings",
                "notes")


def results_dict(r: Results) -> dict[str, Any]:
    """The ``results.json`` dictionary of a run (JSON-safe)."""
    from doseattr import __version__

    a = r.attribution
    d = {
        "schema_version": SCHEMA_VERSION,
        "doseattr_version": __version__,
        "title": r.title,
        "unit": r.unit,
        **attribution_dict(a, r.burden),
        "curve": curve_dict(r.curve_section),
        "exposure": exposure_dict(r.exposure_section),
        "categorical": categorical_dict(r.categorical),
        "contribution": contribution_dict(a.contribution),
        "bands": bands_list(r.curve_section.bands),
        "uncertainty": uncertainty_dict(r.uncertainty),
        "burden": burden_dict(r.burden, r.grand_total),
        "outcomes": [outcome_dict(name, o) for name, o in r.outcomes],
        "grid": grid_dict(r.grid),
        "limit": limit_dict(r.limit),
        "workers": workers_list(r.exposure_section.workers),
        "exposure_comparison": [exposure_variant_dict(v) for v in r.exposure_section.comparison],
        "model_comparison": [curve_variant_dict(v) for v in r.curve_section.model_comparison],
        "dose_sensitivity": [curve_variant_dict(v) for v in r.curve_section.dose_sensitivity],
        "warnings": list(r.warnings),
        "cautions": list(r.cautions),
        "notes": list(r.notes),
        "provenance": r.provenance,
    }
    return json_safe(d)  # type: ignore[no-any-return]


def contribution_dict(c: Contribution) -> dict[str, Any]:
    """The burden along the exposure axis at most
    :data:`~doseattr.core.attribution.contribution.SUMMARY_POINTS` points
    (:func:`~doseattr.core.attribution.contribution.summarise`): ``points``
    is how many the full curve has, ``summarised`` whether it was thinned
    (then ``density`` is the share carried between consecutive points)."""
    s = summarise(c)
    return {"x": nums(s.x), "density": nums(s.density), "cumulative": nums(s.cumulative),
            "median": num(s.median), "points": int(c.x.size), "summarised": s is not c}


def estimate_dict(e: Estimate) -> dict[str, float | None]:
    return {"estimate": num(e.estimate), "lower": num(e.lower), "upper": num(e.upper),
            "mcse": num(e.mcse), "lower_mcse": num(e.lower_mcse),
            "upper_mcse": num(e.upper_mcse)}


def attribution_dict(a: AttributionSection, burden: BurdenResult | None) -> dict[str, Any]:
    """``paf``, ``minimum_risk``, ``minimum_risk_range`` and ``scenarios``
    (``averted``: the burden's total averted cases)."""
    rng = a.minimum_risk_range
    return {"paf": estimate_dict(a.paf), "paf_label": POPULATION_PAF,
            "minimum_risk": num(a.minimum_risk),
            "minimum_risk_range": None if rng is None else [num(v) for v in rng],
            "scenarios": [{"name": s.name, "kind": s.kind, "value": num(s.value),
                           "description": s.description, "pif": estimate_dict(s.pif),
                           "averted": None if s.averted is None else estimate_dict(s.averted)}
                          for s in a.scenarios]}


def outcome_dict(name: str, r: Results) -> dict[str, Any]:
    """One outcome's results: the same keys as the top level."""
    d = results_dict(r)
    return {"name": name, **{k: d[k] for k in OUTCOME_KEYS},
            "group_curves": [{"groups": list(groups), "curve": curve_dict(g.curve_section),
                              "paf": estimate_dict(g.attribution.paf)}
                             for groups, g in r.group_runs]}


def bands_list(b: BandTable | None) -> list[dict[str, Any]] | None:
    """One dictionary per study band, or ``None`` for a curve not fitted."""
    if b is None:
        return None
    return [{"lower": num(b.lower[i]), "upper": num(b.upper[i], open_ok=True),
             "dose": num(b.dose[i]), "rr": num(b.rr[i]),
             "ci_lower": num(b.ci_lower[i], open_ok=True),
             "ci_upper": num(b.ci_upper[i], open_ok=True),
             "reference": bool(b.reference[i]), "dose_rule": b.dose_rule[i]}
            for i in range(len(b.rr))]


def standard_errors(curve: Curve) -> list[float | None]:
    return nums(np.sqrt(np.maximum(np.diag(curve.cov), 0.0)))


def curve_variant_dict(v: CurveVariant) -> dict[str, Any]:
    c = v.curve
    fit = None if c is None else c.fit
    return {"label": v.label, "model": None if c is None else c.model.name,
            "coefficients": None if c is None else nums(c.coef),
            "standard_errors": None if c is None else standard_errors(c),
            "doses": None if v.doses is None else nums(v.doses),
            "q": None if fit is None else num(fit.q),
            "df": None if fit is None else int(fit.df),
            "p_value": None if fit is None else num(fit.p_value),
            "nonlinearity_p": num(v.nonlinearity_p),
            "paf": num(v.paf), "problem": v.problem, "used": v.used}


def curve_dict(s: CurveSection) -> dict[str, Any]:
    c = s.curve
    fit = c.fit
    fitted = []
    if fit is not None:
        fitted = [{"dose": num(x), "rr_reported": num(math.exp(y)),
                   "rr_fitted": num(math.exp(f))}
                  for x, y, f in zip(fit.doses, fit.log_rr, fit.fitted_log_rr, strict=True)]
    return {
        "model": c.model.name,
        "parameter_names": list(c.model.param_names),
        "coefficients": nums(c.coef),
        "covariance": matrix(c.cov),
        "standard_errors": standard_errors(c),
        "reference_dose": num(c.model.reference_dose),
        "max_dose": num(c.max_dose),
        "beyond": "extend" if c.max_dose is None else "flat",
        "source": c.source,
        "data_max": num(c.data_max),
        "covariance_method": None if fit is None else fit.covariance_method,
        "q": None if fit is None else num(fit.q),
        "df": None if fit is None else int(fit.df),
        "p_value": None if fit is None else num(fit.p_value),
        "nonlinearity_p": num(s.nonlinearity_p),
        "fitted": fitted,
        "log_rr_covariance": None if fit is None else matrix(fit.log_rr_covariance),
        "formula": c.model.describe(),
        "notes": list(c.notes),
        "pooling": pooling_dict(s.pooling),
        # The Monte Carlo's covariance: the pooled mean's, or with [curve]
        # predict = true the predictive one (mean's + tau^2); "covariance"
        # above always holds the pooled mean's.
        "draws_covariance": matrix(c.cov),
    } | ({} if s.pooling is None else {"covariance": matrix(s.pooling.mean.cov),
                                       "standard_errors": standard_errors(s.pooling.mean)})


def pooling_dict(p: PoolingSection | None) -> dict[str, Any] | None:
    """``curve.pooling``: the heterogeneity statistics and each study's
    stage-one coefficients, or ``None`` for one study or source."""
    if p is None:
        return None
    r = p.pooled
    w = p.nonlinearity
    return {
        "method": r.method, "tau_method": r.tau_method,
        "tau2": num(r.tau2) if np.ndim(r.tau2) == 0 else matrix(r.tau2),
        "q": num(r.q), "df": int(r.df), "p": num(r.p_value), "i2": num(r.i2),
        "converged": bool(r.converged),
        "coefficients": nums(r.coefficients), "covariance": matrix(r.covariance),
        "predictive_covariance": matrix(r.predictive_covariance()),
        "predict": bool(p.predict),
        "nonlinearity": None if w is None else {"w": num(w[0]), "df": int(w[1]), "p": num(w[2])},
        "studies": [pooled_study_dict(st) for st in p.studies],
        "notes": list(r.notes),
    }


def pooled_study_dict(st: PooledStudy) -> dict[str, Any]:
    """One study of ``curve.pooling.studies``: its own fit and weight."""
    c, fit = st.curve, st.curve.fit
    return {"name": st.name, "coefficients": nums(c.coef), "covariance": matrix(c.cov),
            "standard_errors": standard_errors(c), "weight": num(st.weight),
            "design": st.design, "covariance_method": st.covariance_method, "unit": st.unit,
            "reference_dose": num(c.model.reference_dose), "data_max": num(c.data_max),
            "q": None if fit is None else num(fit.q),
            "df": None if fit is None else int(fit.df),
            "p_value": None if fit is None else num(fit.p_value),
            "bands": bands_list(st.bands)}


def gof_dict(g: GoodnessOfFit | None) -> dict[str, Any] | None:
    if g is None:
        return None
    return {"test": g.test, "statistic": num(g.statistic), "p_value": num(g.p_value),
            "n": int(g.n), "note": g.note}


def family_fit_dict(f: FamilyFit) -> dict[str, Any]:
    return {"family": f.family, "parameters": params(f.parameters), "loglik": num(f.loglik),
            "aic": num(f.aic), "goodness_of_fit": gof_dict(f.goodness_of_fit)}


def exposure_variant_dict(v: ExposureVariant) -> dict[str, Any]:
    return {"family": v.label, "parameters": params(v.parameters), "aic": num(v.aic),
            "paf": num(v.paf), "problem": v.problem}


def substitution_dict(v: SubstitutionResult) -> dict[str, Any]:
    return {"fraction": num(v.fraction), "parameters": params(v.parameters),
            "paf": num(v.paf), "difference": num(v.difference), "problem": v.problem}


def exposure_dict(s: ExposureSection) -> dict[str, Any]:
    ex = s.exposure
    fit = ex.fit
    has_data = fit is not None and fit.n > 0
    return {
        "family": ex.family.name,
        "parameters": params(ex.parameters),
        "unexposed": num(s.zero_share),
        "share_beyond_max_dose": num(s.share_beyond_max_dose),
        "share_beyond_data": num(s.share_beyond_data),
        "mean": num(s.mean),
        "source": ex.source,
        "n": int(fit.n) if fit is not None and has_data else None,
        "detected": int(fit.detected) if fit is not None and has_data else None,
        "censored": int(fit.censored) if fit is not None and has_data else None,
        "weights": s.weights,
        "effective_n": num(s.effective_n),
        "loglik": None if fit is None else num(fit.loglik),
        "aic": None if fit is None else num(fit.aic),
        "goodness_of_fit": gof_dict(s.goodness_of_fit),
        "fits": [family_fit_dict(f) for f in s.fits],
        "substitution": [substitution_dict(v) for v in s.substitution],
        "notes": list(ex.notes),
    }


def categorical_dict(cat: CategoricalComparison) -> dict[str, Any]:
    return {
        "cutpoints": nums(cat.cutpoints),
        "shares": nums(cat.shares),
        "midpoints": nums(cat.midpoints),
        "band_means": nums(cat.band_means),
        "methods": [{"method": m.method, "rr": nums(m.rr), "paf": num(m.paf),
                     "difference": num(m.difference)} for m in cat.methods],
        "continuous_paf": num(cat.continuous_paf),
        "convergence": [{"bands": int(k), "paf": num(p)} for k, p in cat.convergence],
    }


def source_width_dict(w: SourceWidth) -> dict[str, Any]:
    cases = None
    if w.attributable is not None:
        lo, hi = w.attributable
        cases = {"lower": num(lo), "upper": num(hi), "width": num(hi - lo)}
    return {"source": w.source, "lower": num(w.lower), "upper": num(w.upper),
            "width": num(w.width), "attributable": cases}


def uncertainty_dict(u: UncertaintySection | None) -> dict[str, Any] | None:
    if u is None:
        return None
    return {"draws": int(u.draws), "seed": int(u.seed), "level": num(u.level),
            "sources": list(u.sources), "minimum_risk_varied": bool(u.minimum_risk_varied),
            "width_by_source_explains": u.explains,
            "width_by_source": [source_width_dict(w) for w in u.width_by_source],
            "width_all": None if u.width_all is None else source_width_dict(u.width_all)}


def stratum_exposure_dict(e: StratumExposure | None) -> dict[str, Any] | None:
    if e is None:
        return None
    return {"own": bool(e.own), "family": e.family, "parameters": params(e.parameters),
            "mean": num(e.mean), "given": None if e.given is None else params(e.given)}


def _maybe(e: Estimate | None) -> dict[str, float | None] | None:
    return None if e is None else estimate_dict(e)


def stratum_dict(s: StratumResult) -> dict[str, Any]:
    return {"stratum": s.stratum, "group": s.group, "cases": num(s.cases),
            "population": num(s.population), "rate": num(s.rate),
            "life_expectancy": num(s.life_expectancy),
            "paf": estimate_dict(s.paf),
            # schema 1.0 had the interval here beside a plain-number paf; kept
            # (the same object as paf) for readers of the keys earlier issues named
            "paf_interval": estimate_dict(s.paf),
            "attributable": estimate_dict(s.attributable),
            "attributable_rate": _maybe(s.attributable_rate),
            "yll": _maybe(s.yll),
            "exposure": stratum_exposure_dict(s.exposure),
            "scenarios": [{"name": e.name, "pif": estimate_dict(e.pif),
                           "averted": estimate_dict(e.averted),
                           "averted_rate": _maybe(e.averted_rate),
                           "averted_yll": _maybe(e.averted_yll)} for e in s.scenarios]}


def _sum_dict(s: StratumResult) -> dict[str, Any]:
    """A sum of rows: the row keys without the row's own exposure and life
    expectancy."""
    d = stratum_dict(s)
    for key in ("exposure", "life_expectancy", "rate"):
        d.pop(key)
    return d


def burden_dict(b: BurdenResult | None,
                grand_total: StratumResult | None = None) -> dict[str, Any] | None:
    if b is None and grand_total is None:
        return None
    d: dict[str, Any] = {"method": "paf", "rate_per": None, "strata": [], "total": None,
                         "groups": [], "stratum_totals": [],
                         "total_label": CASE_WEIGHTED_PAF}
    if b is not None:
        total = _sum_dict(b.total)
        total.pop("stratum")
        d.update(method=b.method, rate_per=num(b.rate_per),
                 strata=[stratum_dict(s) for s in b.strata], total=total,
                 groups=[_sum_dict(g) for g in b.groups],
                 stratum_totals=[_sum_dict(g) for g in b.stratum_totals])
    if grand_total is not None:
        d["grand_total"] = _sum_dict(grand_total)
    return d


def grid_dict(g: GridSection | None) -> dict[str, Any] | None:
    """What a [grid] analysis read (the maps go to the report only)."""
    if g is None:
        return None
    return {"files": dict(g.files), "cells": int(g.cells), "skipped_cells": int(g.skipped_cells),
            "skipped_population": num(g.skipped_population), "error_gsd": num(g.error_gsd),
            "scheduler": g.scheduler,
            "zones": [{"zone": int(z), "name": n, "stratum": st, "population": num(p),
                       "mean": num(m)}
                      for z, n, st, p, m in zip(g.zone_ids, g.zone_names, g.zone_strata,
                                                g.zone_population, g.zone_mean, strict=True)]}


def _bounded(b: Any, upper_key: str = "ucl") -> dict[str, Any]:
    return {"estimate": num(b.estimate), "lower": num(b.lower), "upper": num(b.upper),
            upper_key: num(b.ucl), "level": num(b.level), "confidence": num(b.confidence),
            "method": b.method, "note": b.note}


def limit_dict(lim: LimitSection | None) -> dict[str, Any] | None:
    """``[limit]``: the figures, the decision and, with a worker column, the
    within- and between-worker model (null without ``[limit]``)."""
    if lim is None:
        return None
    s, d = lim.stats, lim.stats.decision
    return {"value": num(s.limit), "unit": lim.unit, "confidence": num(s.confidence),
            "level": num(s.level), "exceedance": num(s.exceedance_tolerated), "family": s.family,
            "n": int(s.n), "n_censored": int(s.n_censored), "exact": bool(s.exact),
            "exceedance_fraction": _bounded(s.exceedance), "p95": _bounded(s.p95, "utl"),
            "mean": _bounded(s.mean), "overexposure": bool(s.overexposure),
            "decision": {"verdict": d.verdict, "test": d.test, "rule": d.rule,
                         "numbers": {k: num(v) for k, v in d.numbers.items()},
                         "from_memory": bool(d.from_memory)},
            "methods": list(s.methods), "notes": list(s.notes) + list(lim.notes),
            "workers": worker_model_dict(lim)}


def worker_model_dict(lim: LimitSection) -> dict[str, Any] | None:
    """The one-way random-effects model and each worker's estimate."""
    w = lim.workers
    if w is None:
        return None
    e = lim.worker_exceedance
    above = {x.worker for x in lim.workers_above}
    return {"n_workers": int(w.n_workers), "n_samples": int(w.n_samples),
            "n_censored": int(w.n_censored), "mu": num(w.mu),
            "sigma_within": num(w.sigma_within), "sigma_between": num(w.sigma_between),
            "gsd_within": num(w.gsd_within), "gsd_between": num(w.gsd_between),
            "icc": num(w.icc), "method": w.method,
            "exceedance_of_worker_means": None if e is None else {
                "estimate": num(e.estimate), "lower": num(e.lower), "upper": num(e.upper),
                "level": num(e.level), "method": e.method},
            "workers": [{"worker": x.worker, "n": int(x.n), "n_censored": int(x.n_censored),
                         "mean_log": num(x.mean_log), "long_term_mean": num(x.long_term_mean),
                         "above_limit": x.worker in above} for x in w.workers]}


def workers_list(w: Workers | None) -> list[dict[str, Any]] | None:
    if w is None:
        return None
    return [{"worker": name, "cumulative": num(c), "duration_years": num(d),
             "mean_intensity": num(m)}
            for name, c, d, m in zip(w.worker, w.cumulative, w.duration_years,
                                     w.mean_intensity, strict=True)]
