r"""Monte Carlo intervals for the analysis ([uncertainty]) and which input
drives their width.

The draws come from the core (:func:`~doseattr.core.uncertainty.propagate.propagate`):
curve coefficients from their fitted normal (or the curve's own draws),
exposure parameters from the asymptotic normal of the fit (or a weighted
bootstrap of the values on the empirical path), the minimum-risk level
uniform over its range, and optionally Poisson variation of the observed
cases. Intervals are the 2.5th and 97.5th percentiles of the draws.

The width table varies one source at a time (the others at their point
values) and reports the 95% interval of the overall PAF for each: a
one-at-a-time sensitivity analysis (common practice; the widths do not add
up to the joint width). Each one-source run reuses the joint run's draws of
that source (common random numbers; core
:func:`~doseattr.core.uncertainty.propagate.vary_only`) rather than drawing
afresh, so it integrates only what that source changes, nothing for the
cases (point fractions times the case draws), and a source that is the
only one varying in the joint run has the joint run's interval itself.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence

import numpy as np

from doseattr.analysis.config import Analysis
from doseattr.analysis.progress import progress_bar
from doseattr.analysis.specs import BurdenSpec, UncertaintySpec
from doseattr.core.uncertainty.sampling import small_sample_df
from doseattr.errors import DoseattrError
from doseattr.results.estimate import Estimate
from doseattr.results.records import ScenarioResult, SourceWidth

#: Inputs whose uncertainty is propagated in the main run (the core's names).
SOURCES = ("curve", "exposure", "minimum_risk")


def population_intervals(analysis: Analysis, curve, exposure, scenarios, paf_value: float,
                         scenario_results: tuple[ScenarioResult, ...], progress: bool):
    """Monte Carlo intervals for the PAF and every PIF (one stratum named
    ``"population"``); returns the propagation, the PAF and the scenarios
    with their intervals."""
    from doseattr.core.uncertainty.propagate import Stratum, propagate

    u = settings(analysis)
    total = u.draws * (1 + len(scenarios))
    with progress_bar(total, progress, draws=u.draws) as tick:
        prop = propagate(curve, [Stratum("population", 1.0, exposure)],
                         [sc for _, sc in scenarios], draws=u.draws,
                         rng=np.random.default_rng(u.seed),
                         minimum_risk=minimum_risk_range(analysis),
                         sources=SOURCES, progress=tick)
    paf, results = population_estimates(prop, paf_value, scenario_results)
    return prop, paf, results


def population_estimates(prop, paf_value: float,
                         scenario_results: tuple[ScenarioResult, ...]
                         ) -> tuple[Estimate, tuple[ScenarioResult, ...]]:
    """The population's PAF and each scenario's PIF with their intervals,
    from the draws of the stratum at index 0 of ``prop``."""
    paf = interval(paf_value, prop.paf[0], "PAF")
    results = tuple(dataclasses.replace(r, pif=interval(r.pif.estimate, prop.pif[r.name][0],
                                                        f"PIF of {r.name}"))
                    for r in scenario_results)
    return paf, results


def settings(analysis: Analysis) -> UncertaintySpec:
    """The ``[uncertainty]`` spec of an analysis that has one."""
    if analysis.uncertainty is None:
        raise DoseattrError("internal error: Monte Carlo intervals asked for without "
                            "[uncertainty]; please report this")
    return analysis.uncertainty


def burden_spec(analysis: Analysis) -> BurdenSpec:
    """The ``[burden]`` spec of an analysis that has one."""
    if analysis.burden is None:
        raise DoseattrError("internal error: attributable cases asked for without [burden]; "
                            "please report this")
    return analysis.burden


def minimum_risk_range(analysis: Analysis) -> tuple[float, float]:
    """``(low, high)`` of the minimum-risk level (equal when it is fixed)."""
    m = analysis.attribution.minimum_risk
    return analysis.attribution.minimum_risk_range or (m, m)


def interval(estimate: float, draws: np.ndarray, what: str) -> Estimate:
    """The point estimate with the percentile interval of its draws (core
    :func:`~doseattr.core.uncertainty.summary.summarise`)."""
    from doseattr.core.uncertainty.summary import summarise

    i = summarise(estimate, checked(draws, what))
    return Estimate(i.estimate, i.lower, i.upper, i.mcse, i.lower_mcse, i.upper_mcse)


def limits(estimate: Estimate) -> tuple[float, float]:
    """``(lower, upper)`` of an estimate that has an interval."""
    if estimate.lower is None or estimate.upper is None:
        raise DoseattrError("internal error: an interval without limits; please report this")
    return estimate.lower, estimate.upper


def finite(value: float, what: str) -> float:
    """``value`` as a float when finite; an internal error otherwise."""
    if not math.isfinite(value):
        raise DoseattrError(f"internal error: the {what} came out as {value}; please report "
                            "this with the analysis file")
    return float(value)


def checked(draws: np.ndarray, what: str) -> np.ndarray:
    """``draws`` when all are finite; an internal error otherwise."""
    if not np.all(np.isfinite(draws)):
        raise DoseattrError(f"internal error: some Monte Carlo draws of the {what} are not "
                            "finite; please report this with the analysis file")
    return draws


# -- which input drives the width ---------------------------------------------------
def varying_sources(analysis: Analysis, curve, strata: Sequence) -> tuple[str, ...]:
    """The sources that actually vary: the curve when it has a covariance
    or draws; the exposure when a fit has a covariance or the values are
    bootstrapped; the minimum-risk level when given as a range; the cases
    when Poisson variation is asked for with a burden table."""
    from doseattr.core.exposure.empirical import EmpiricalExposure

    def exposure_varies(e) -> bool:
        if isinstance(e, EmpiricalExposure):
            return not e.census and e.values.size > 1
        return e.fit is not None and e.fit.cov_internal is not None

    low, high = minimum_risk_range(analysis)
    flags = {"curve": curve.draws is not None or bool(np.any(curve.cov)),
             "exposure": any(exposure_varies(s.exposure) for s in strata),
             "minimum_risk": high > low,
             "cases": settings(analysis).poisson_cases and analysis.burden is not None}
    return tuple(k for k, on in flags.items() if on)


def width_by_source(analysis: Analysis, curve, strata: Sequence, point: float,
                    progress: bool, method: str = "paf", *, joint) -> tuple[SourceWidth, ...]:
    """The 95% interval of the overall PAF (total attributable over total
    cases with ``[burden]``, else the PAF) with one source varying at a
    time; one entry per source that varies.

    ``joint`` is the run with every source varying (core ``Propagation``,
    its overall PAF from the same ``strata``); each source's draws are
    the joint run's own (common random numbers), so the widths change with
    the seed together with the joint interval, not independently of it."""
    from doseattr.core.uncertainty.propagate import vary_only

    u = settings(analysis)
    sources = varying_sources(analysis, curve, strata)
    alone = [s for s in sources if set(joint.inputs.varying) <= {s}]
    integrated = [s for s in sources if s not in alone and s != "cases"]
    units = u.draws * len(integrated) * len({id(s.exposure) for s in strata})
    out = []
    with progress_bar(units, progress and units > 0, draws=u.draws * len(integrated),
                      stage=f"draws, one source at a time ({len(integrated)} x {u.draws})"
                      ) as tick:
        for source in sources:
            prop = joint if source in alone else vary_only(
                curve, strata, [], joint, (source,), method=method, progress=tick)
            out.append(source_width(analysis, source, point, prop))
    return tuple(out)


def source_width(analysis: Analysis, source: str, point: float, prop) -> SourceWidth:
    """The overall PAF's interval from the draws ``prop``: the burden's
    total PAF (with the total attributable cases' interval), or the PAF of
    the single population stratum."""
    if analysis.burden is None:
        i = interval(point, prop.paf[0], f"PAF with only {source} varying")
        return SourceWidth(source, *limits(i))
    i = interval(point, prop.total_paf, f"PAF with only {source} varying")
    cases = interval(0.0, prop.total_attributable, "total attributable cases")
    return SourceWidth(source, *limits(i), limits(cases))


def uncertainty_notes(analysis: Analysis, curve, exposure) -> list[str]:
    """One note: how many draws, which seed, and what was varied."""
    from doseattr.core.exposure.empirical import EmpiricalExposure

    u = settings(analysis)
    seed = f"seed {u.seed}" + ("" if u.seed_given else " (the default; set [uncertainty] seed "
                                                      "to choose another)")
    varied = []
    if curve.draws is not None:
        varied.append("the curve's own draws")
    elif np.any(curve.cov):
        varied.append("curve coefficients from their fitted normal distribution")
    if isinstance(exposure, EmpiricalExposure) and exposure.census:
        if exposure.error_gsd is not None:
            varied.append(f"the exposure-model error (one lognormal factor of GSD "
                          f"{exposure.error_gsd:g} per draw for every cell); the exposure is a "
                          "census, so it is not resampled")
        else:
            varied.append("not the exposure: it is a census of the whole population, so it "
                          "is not resampled")
    elif isinstance(exposure, EmpiricalExposure):
        varied.append("the exposure values by a weighted bootstrap of the rows")
    elif exposure.fit is not None and exposure.fit.cov_internal is not None:
        df = small_sample_df(exposure)
        if df is None:
            varied.append("exposure parameters from the asymptotic normal of the fit (log "
                          "scale)")
        else:
            varied.append(f"exposure parameters from a multivariate t with {df:.3g} degrees of "
                          "freedom (Kish effective sample size less the parameters) around the "
                          "fit, its sandwich covariance scaled by n_eff/(n_eff - p) (log scale)")
    if analysis.attribution.minimum_risk_range is not None:
        varied.append("the minimum-risk level, uniform over its range")
    if u.poisson_cases:
        varied.append("the observed cases (Poisson)")
    what = "; ".join(varied) if varied else "nothing (every input was entered without error)"
    return [f"uncertainty: {u.draws} Monte Carlo draws, {seed}; 2.5th and 97.5th percentiles. "
            f"Varied: {what}"]
