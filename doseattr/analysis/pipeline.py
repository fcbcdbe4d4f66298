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

import numpy as np

from doseattr.analysis.alarms import result_alarms
from doseattr.analysis.assemble import curve_section, exposure_section
from doseattr.analysis.build import BuiltCurve
from doseattr.analysis.burden_run import burden_notes, run_burden
from doseattr.analysis.burden_sums import RowDraws
from doseattr.analysis.check import Prepared, PreparedAll, divergence, prepare_all
from doseattr.analysis.comparisons import curve_variants, exposure_variants, substitution_results
from doseattr.analysis.config import Analysis
from doseattr.analysis.grid_maps import grid_maps
from doseattr.analysis.intervals import (
    population_estimates,
    population_intervals,
    source_width,
    uncertainty_notes,
    width_by_source,
)
from doseattr.analysis.limit_run import limit_section, limit_warnings
from doseattr.analysis.specs import MAX_DRAWS
from doseattr.analysis.tables import StudyTable
from doseattr.core.attribution.categorical import CategoricalComparison
from doseattr.core.attribution.contribution import Contribution
from doseattr.core.uncertainty.propagate import Stratum
from doseattr.errors import DoseattrError
from doseattr.results.cautions import CAUTIONS, LIMIT_CAUTIONS
from doseattr.results.estimate import Estimate
from doseattr.results.numbers import share_text
from doseattr.results.records import (
    CASE_WEIGHTED_PAF,
    POPULATION_PAF,
    AttributionSection,
    BurdenResult,
    GridSection,
    RunInputs,
    ScenarioResult,
    UncertaintySection,
)
from doseattr.results.run import Results

#: A population share above the data range larger than this gets a warning
#: (smaller shares are stated in the notes).
EXTRAPOLATION_WARN = 0.01

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
    prepared = prepare_all(analysis)  # every check, before any Monte Carlo draw
    if analysis.outcomes:
        results = _with_outcomes(analysis, prepared, progress)
    elif prepared.top is None:
        raise DoseattrError("internal error: an analysis with neither [curve] nor "
                            "[[outcome]] passed the checks; please report this")
    else:
        results = _run_prepared(prepared.top, progress)
    results = dataclasses.replace(results, inputs=run_inputs(analysis))
    _warn(results)
    return results


def run_inputs(analysis: Analysis) -> RunInputs:
    """Provenance and the analysis as read, taken when the run finished
    (the command line compares them with what it read before the run)."""
    from doseattr.analysis.provenance import analysis_bytes, protected_paths, provenance

    kind, data = analysis_bytes(analysis)
    return RunInputs(provenance(analysis, source=(kind, data)), kind, data,
                     tuple(protected_paths(analysis)))


def _warn(results: Results) -> None:
    """Issue every warning the results list (the top level's, then each
    outcome's, prefixed by its name) as a :class:`DoseattrWarning`, so
    that Python users see them where they run the analysis."""
    import warnings

    from doseattr.errors import DoseattrWarning

    texts = [*results.warnings]
    for name, r in results.outcomes or ():
        texts += [f"outcome '{name}': {w}" for w in r.warnings]
    for text in _unique(texts):
        warnings.warn(text, DoseattrWarning, stacklevel=3)


def _run_prepared(p: Prepared, progress: bool) -> Results:
    """Compute every result of one checked analysis (no ``[[outcome]]``)."""
    return _run_block(p, progress)[0]


def _run_block(p: Prepared, progress: bool) -> tuple[Results, RowDraws | None]:
    """:func:`_run_prepared`, with the draws of the burden table's rows."""
    analysis = p.analysis
    built_exposure = p.built_exposure
    exposure = built_exposure.exposure
    built = p.built
    curve = built.curve
    scenarios = p.scenarios
    warnings = list(built.warnings) + list(p.warnings)
    notes = list(analysis.notes) + list(built_exposure.notes) + list(built.notes)
    warnings.extend(exposure.fit.warnings if exposure.fit is not None else ())
    notes.extend(exposure.notes)
    with divergence(analysis):
        point = _point_results(p)
    notes.extend(point.notes)
    warnings.extend(_extrapolation(analysis, curve, exposure, notes))
    comparison, sensitivity = curve_variants(analysis, exposure, built, point.paf)
    families = exposure_variants(analysis, curve, exposure, built_exposure, point.paf)
    warnings.extend(result_alarms(
        curve, exposure, analysis.attribution.minimum_risk, analysis.unit, paf=point.paf,
        scenarios=point.scenarios, model_comparison=comparison, dose_sensitivity=sensitivity,
        exposure_comparison=families, contribution=point.contribution))
    with divergence(analysis):
        analysis, mc = _monte_carlo_to_precision(analysis, curve, exposure, scenarios, point,
                                                 p.strata, progress, p.stream)
    notes.extend(mc.notes + _range_note(analysis) + burden_notes(mc.burden))
    scenario_results = tuple(dataclasses.replace(s, averted=_averted(mc.burden, s.name))
                             for s in mc.scenarios)
    attribution = AttributionSection(mc.paf, analysis.attribution.minimum_risk,
                                     analysis.attribution.minimum_risk_range,
                                     scenario_results, point.contribution)
    limit = limit_section(analysis, built_exposure)
    warnings.extend(limit_warnings(limit))
    return Results(
        title=analysis.title, unit=analysis.unit,
        curve_section=curve_section(curve, exposure, built.bands, comparison, sensitivity,
                                    built.pooling),
        exposure_section=exposure_section(
            curve, exposure,
            comparison=families,
            substitution=substitution_results(analysis, curve, exposure, point.paf),
            worker_totals=built_exposure.workers, parametric=tuple(built_exposure.fits),
            samples=built_exposure.samples, worker_model=built_exposure.worker_model),
        attribution=attribution, categorical=point.categorical,
        uncertainty=mc.uncertainty, burden=mc.burden,
        warnings=tuple(_unique(warnings)),
        cautions=CAUTIONS + (LIMIT_CAUTIONS if limit is not None else ()),
        notes=tuple(_unique(notes)), grid=_grid_section(p, mc.burden), limit=limit
    ), mc.rows


def _grid_section(p: Prepared, burden: BurdenResult | None) -> GridSection | None:
    """What a [grid] run read, with its maps (rasters only)."""
    grid = p.built_exposure.grid
    if grid is None:
        return None
    if grid.sample is None:
        return grid.section
    maps = grid_maps(grid.sample, grid.section, grid.total_population, p.built.curve,
                     p.analysis.attribution.minimum_risk, burden)
    return dataclasses.replace(grid.section, maps=maps)


def _averted(burden: BurdenResult | None, name: str) -> Estimate | None:
    """Total averted cases of scenario ``name``, or ``None`` without [burden]."""
    if burden is None:
        return None
    return next((e.averted for e in burden.total.scenarios if e.name == name), None)


@dataclasses.dataclass(frozen=True, eq=False)
class _Point:
    """Results at the point estimates of every input."""

    paf: float
    scenarios: tuple[ScenarioResult, ...]
    categorical: CategoricalComparison
    contribution: Contribution
    notes: tuple[str, ...] = ()


def _point_results(p: Prepared) -> _Point:
    """PAF, each scenario's PIF (computed by the checks), the categorical
    comparison and the burden density, at the point estimates."""
    from doseattr.core.attribution.categorical import categorical_comparison
    from doseattr.core.attribution.contribution import burden_density

    analysis, built, exposure = p.analysis, p.built, p.built_exposure.exposure
    curve, m = built.curve, analysis.attribution.minimum_risk
    scenario_results = tuple(
        ScenarioResult(spec.name, spec.kind, spec.value, Estimate(value),
                       sc.describe(analysis.unit))
        for (spec, sc), value in zip(p.scenarios, p.pifs))
    cuts, reported, cut_notes = _cutpoints(analysis, built, exposure)
    categorical = categorical_comparison(curve, exposure, minimum_risk=m,
                                         cutpoints=cuts, reported_rr=reported)
    return _Point(p.paf, scenario_results, categorical, burden_density(curve, exposure, m),
                  tuple(cut_notes))


@dataclasses.dataclass(frozen=True, eq=False)
class _MonteCarlo:
    """Intervals (when [uncertainty] is given) and the burden."""

    paf: Estimate
    scenarios: tuple[ScenarioResult, ...]
    uncertainty: UncertaintySection | None = None
    burden: BurdenResult | None = None
    notes: list[str] = dataclasses.field(default_factory=list)
    rows: RowDraws | None = None


def _monte_carlo(analysis: Analysis, curve, exposure, scenarios, point: _Point,
                 strata: list | None, progress: bool, stream: int | None = None) -> _MonteCarlo:
    """PAF and PIF intervals, attributable cases, and which input drives
    the width of the overall PAF's interval (``strata`` from the checks)."""
    run = None if strata is None else run_burden(
        analysis, curve, strata, scenarios, progress, shared=exposure, stream=stream)
    burden = None if run is None else run.result
    rows = None if run is None else run.rows
    if analysis.uncertainty is None:
        return _MonteCarlo(Estimate(point.paf), point.scenarios, burden=burden, rows=rows)
    method = "paf"
    if strata is None or run is None or run.draws is None:
        prop, paf, scenario_results = population_intervals(
            analysis, curve, exposure, scenarios, point.paf, point.scenarios, progress)
        strata, overall, draws = [Stratum("population", 1.0, exposure)], point.paf, prop
    else:  # the population is stratum 0 of the burden's draws (common random numbers)
        prop = draws = run.draws
        paf, scenario_results = population_estimates(run.population_draws, point.paf,
                                                     point.scenarios)
        overall = run.result.total.paf.estimate
        method = run.result.method
    widths = width_by_source(analysis, curve, strata, overall, progress, method=method,
                             joint=draws)
    u = analysis.uncertainty
    section = UncertaintySection(int(u.draws), int(u.seed), 0.95, widths,
                                 source_width(analysis, "all", overall, draws), prop,
                                 analysis.attribution.minimum_risk_range is not None,
                                 POPULATION_PAF if burden is None else CASE_WEIGHTED_PAF)
    return _MonteCarlo(paf, scenario_results, section, burden,
                       uncertainty_notes(analysis, curve, exposure), rows)


#: Most draws ``[uncertainty] precision`` may raise the run to.
PRECISION_CAP = MAX_DRAWS


def _monte_carlo_to_precision(analysis: Analysis, curve, exposure, scenarios, point: _Point,
                              strata: list | None, progress: bool,
                              stream: int | None = None) -> tuple[Analysis, _MonteCarlo]:
    """:func:`_monte_carlo`, then, with ``[uncertainty] precision``, again
    with more draws until every interval limit of a fraction has a Monte
    Carlo standard error below it or :data:`PRECISION_CAP` draws are
    reached. The MCSE of a limit falls as 1/sqrt(draws), so each step asks
    for (MCSE / precision)^2 times the draws, 1.2 times over, between 2 and
    16 times more. Returns the analysis as run (its draws) and the results."""
    mc = _monte_carlo(analysis, curve, exposure, scenarios, point, strata, progress, stream)
    u = analysis.uncertainty
    if u is None or u.precision is None:
        return analysis, mc
    target, start, worst = u.precision, u.draws, _worst_limit_mcse(mc)
    while worst > target and u.draws < PRECISION_CAP:
        factor = min(16.0, max(2.0, 1.2 * (worst / target) ** 2))
        u = dataclasses.replace(u, draws=int(min(PRECISION_CAP, math.ceil(u.draws * factor))))
        analysis = dataclasses.replace(analysis, uncertainty=u)
        mc = _monte_carlo(analysis, curve, exposure, scenarios, point, strata, progress, stream)
        worst = _worst_limit_mcse(mc)
    mc.notes.append(_precision_note(target, start, u.draws, worst))
    return analysis, mc


def _precision_note(precision: float, start: int, draws: int, worst: float) -> str:
    what = (f"the largest Monte Carlo SE of a fraction's interval limit is {worst:.2g}")
    if worst <= precision:
        how = ("already met with" if draws == start else
               f"draws raised from {start} to")
        return f"precision {precision:g}: {how} {draws} draws; {what}"
    return (f"precision {precision:g} not reached: stopped at the cap of {draws} draws, where "
            f"{what}; the interval limits are less precise than asked")


def _worst_limit_mcse(mc: _MonteCarlo) -> float:
    """Largest Monte Carlo SE of a limit of the PAF, each PIF, and each
    stratum's and the total's PAF and PIF (fractions only: attributable
    cases are counts, on another scale)."""
    estimates = [mc.paf, *(s.pif for s in mc.scenarios)]
    if mc.burden is not None:
        for row in (*mc.burden.strata, mc.burden.total):
            estimates += [row.paf, *(e.pif for e in row.scenarios)]
    errors = [e for est in estimates for e in (est.lower_mcse, est.upper_mcse) if e is not None]
    return max(errors, default=0.0)


def _range_note(analysis: Analysis) -> list[str]:
    if analysis.attribution.minimum_risk_range is None:
        return []
    lo, hi = analysis.attribution.minimum_risk_range
    m, unit = analysis.attribution.minimum_risk, analysis.unit
    return [f"minimum_risk given as the range {lo:g} to {hi:g} {unit}: the point estimates use "
            f"its middle, {m:g} {unit}"]


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
        if table is not None and table.lower[0] > 0:
            notes.append(f"categorical comparison: the lowest band starts at "
                         f"{table.lower[0]:g} {analysis.unit}; it is taken down to 0 so that "
                         "the bands cover everyone")
    else:
        cuts = _quartiles(exposure)
        what = ("weighted values" if exposure.family.name == "empirical"
                else "fitted distribution")
        notes.append("categorical comparison: no study bands and no cutpoints given, so the "
                     f"quartiles of the exposed population's {what} were used "
                     "(set [attribution] cutpoints to choose them)")
    reported = None
    if (table is not None and study is not None and cuts.shape == study.shape
            and np.allclose(cuts, study)):
        reported = table.rr
        if not _reference_holds_minimum(table, analysis.attribution.minimum_risk):
            notes.append("the study's reported RRs are relative to its reference band, while "
                         "the continuous PAF is relative to the minimum-risk level; their "
                         "difference reflects this too")
    elif study is not None:
        notes.append("categorical comparison: the cutpoints are not the study's bands, so the "
                     "study's reported RRs are not compared")
    return cuts, reported, notes


def _quartiles(exposure) -> np.ndarray:
    """Quartiles of the exposed population: the fitted family's, or for
    weighted values the smallest positive value whose weighted CDF reaches
    each quartile (repeated values give fewer cutpoints)."""
    q = np.array([0.25, 0.5, 0.75])
    if exposure.family.name != "empirical":
        return np.asarray(exposure.family.ppf(q, exposure.params), dtype=float).reshape(-1)
    values, weights, _ = exposure.points  # sorted once, shared with the other point results
    keep = values > 0
    x = values[keep]
    cum = np.cumsum(weights[keep])
    idx = np.minimum(np.searchsorted(cum / cum[-1], q), x.size - 1)
    return np.unique(x[idx])


def _reference_holds_minimum(t: StudyTable, m: float) -> bool:
    """True when the study's reference band holds the minimum-risk level."""
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
    where = (f"{share_text(share)} of the population is exposed above {curve.data_max:g} {unit}, "
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


def _with_outcomes(analysis: Analysis, prepared: PreparedAll, progress: bool) -> Results:
    """Run every ``[[outcome]]`` block with the shared exposure, scenarios and
    settings (all checked beforehand), merge blocks of one outcome and sum
    every outcome's burden within draws. The top-level results are those of
    the file's own [curve], or of the first outcome when the file has none."""
    from doseattr.analysis.config import outcome_location
    from doseattr.analysis.outcome_sums import Block, grand_total, merge_outcome

    blocks = []
    for i, (name, p) in enumerate(prepared.outcomes):
        with outcome_location(i, name):
            blocks.append(Block(name, analysis.outcomes[i].groups, *_run_block(p, progress)))
    blocks = _same_draws(blocks, prepared, progress)
    runs = []
    for name in dict.fromkeys(b.name for b in blocks):
        results, rows = merge_outcome([b for b in blocks if b.name == name])
        runs.append((name, results, rows))
    if prepared.top is not None:
        top = _run_prepared(prepared.top, progress)
    else:
        first = runs[0][1]
        note = (f"the file has no [curve] of its own: the results above the outcomes are those "
                f"of the first outcome, '{runs[0][0]}'")
        top = dataclasses.replace(first, notes=first.notes + (note,))
    return dataclasses.replace(top, outcomes=tuple((n, r) for n, r, _ in runs),
                               grand_total=grand_total(runs))


def _same_draws(blocks: list, prepared: PreparedAll, progress: bool) -> list:
    """With ``[uncertainty] precision`` the blocks may end with different
    numbers of draws; their rows are summed draw by draw, so the blocks
    with fewer are run again with the most (no precision loop)."""
    counts = [b.results.uncertainty.draws for b in blocks
              if b.results.uncertainty is not None and b.rows is not None]
    if len(set(counts)) <= 1:
        return blocks
    most = max(counts)
    out = []
    for b, (_, p) in zip(blocks, prepared.outcomes, strict=True):
        u = b.results.uncertainty
        if u is None or b.rows is None or u.draws == most:
            out.append(b)
            continue
        assert p.analysis.uncertainty is not None
        spec = dataclasses.replace(p.analysis.uncertainty, draws=most, precision=None)
        again = dataclasses.replace(p, analysis=dataclasses.replace(p.analysis, uncertainty=spec))
        results, rows = _run_block(again, progress)
        note = (f"run again with {most} draws (its precision needed {u.draws}) so that the "
                "outcomes' totals are summed draw by draw")
        out.append(dataclasses.replace(b, results=dataclasses.replace(
            results, notes=results.notes + (note,)), rows=rows))
    return out
