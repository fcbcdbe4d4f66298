"""CSV tables of the results.

Every table is built from one typed section of the run's
:class:`~doseattr.results.run.Results` (the records results.json is
generated from, so the CSV files and results.json hold the same numbers).
Optional tables (burden, burden by group and in total, the zones of a grid,
comparisons, width by source, workers) are written only when the results
hold them. Numbers are written at full precision
(``repr`` of the float, which round-trips exactly); empty cells mean "not
applicable". Units are given in the column headers, e.g. ``lower (ug/m3)``.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from doseattr.core.attribution.categorical import CategoricalComparison
from doseattr.core.curves.base import Curve
from doseattr.outputs.limit_tables import limit_table, limit_workers_table
from doseattr.outputs.pooling_tables import studies_table
from doseattr.outputs.zones import zone_rows
from doseattr.results.estimate import Estimate
from doseattr.results.records import (
    AttributionSection,
    BurdenBlock,
    BurdenResult,
    CurveSection,
    CurveVariant,
    ExposureSection,
    GridSection,
    StratumExposure,
    StratumResult,
    UncertaintySection,
    Workers,
)
from doseattr.results.run import Results

Table = tuple[list[str], list[list[Any]]]
#: One burden table of the run: the outcome's name (``None`` for the
#: analysis's own ``[burden]``) and its strata.

ESTIMATE_COLUMNS = ["estimate", "lower", "upper", "mcse"]
BURDEN_COLUMNS = ["stratum", "cases", "population", *[f"paf_{c}" for c in ESTIMATE_COLUMNS],
                  *[f"attributable_{c}" for c in ESTIMATE_COLUMNS]]
#: Appended to burden.csv (after the exposure columns) when a burden table
#: has groups, rates or years of life lost.
HEALTH_IMPACT_COLUMNS = ["group", "rate", *[f"attributable_rate_{c}" for c in ESTIMATE_COLUMNS],
                         *[f"yll_{c}" for c in ESTIMATE_COLUMNS], "life_expectancy"]
#: An estimate and its 95% limits, the layout of burden_groups.csv and
#: burden_totals.csv.
LIMITS = ["", "_lower", "_upper"]
#: The columns of burden_groups.csv (:func:`burden_groups_table`).
GROUPS_COLUMNS = ["outcome", "level", "stratum", "group", "population", "rate", "cases",
                  *[f"attributable{c}" for c in LIMITS],
                  *[f"attributable_rate{c}" for c in LIMITS],
                  *[f"yll{c}" for c in LIMITS], "life_expectancy"]
#: The columns of burden_totals.csv (:func:`burden_totals_table`).
TOTALS_COLUMNS = ["outcome", "level", "scenario", "cases", "population",
                  *[f"attributable{c}" for c in LIMITS],
                  *[f"attributable_rate{c}" for c in LIMITS], *[f"yll{c}" for c in LIMITS],
                  *[f"averted{c}" for c in LIMITS], *[f"averted_rate{c}" for c in LIMITS],
                  *[f"averted_yll{c}" for c in LIMITS]]


def cell(value: Any) -> str:
    """One CSV cell: full-precision floats, empty for ``None``.

    Non-finite floats never reach results (RULES item 6); an infinite
    upper band limit is written as an empty cell (open-ended).
    """
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):  # includes numpy.float64
        return repr(float(value)) if math.isfinite(value) else ""
    if isinstance(value, int):
        return str(value)
    if isinstance(value, np.generic):
        return cell(value.item())
    return str(value)


def write_csv(path: Path, table: Table) -> Path:
    """Write ``(header, rows)`` to ``path`` (UTF-8, ``\\n`` line ends)."""
    header, rows = table
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        for row in rows:
            writer.writerow([cell(v) for v in row])
    return path


def with_unit(name: str, unit: str | None) -> str:
    return f"{name} ({unit})" if unit else name


def estimate_cells(est: Estimate | None) -> list[float | None]:
    """``[estimate, lower, upper, mcse]`` of an estimate (empty without one)."""
    if est is None:
        return [None] * 4
    return [_float(est.estimate), _float(est.lower), _float(est.upper), _float(est.mcse)]


def summary_table(attribution: AttributionSection) -> Table:
    """PAF and every scenario's PIF with their intervals."""
    rows = [["PAF", "", *estimate_cells(attribution.paf)]]
    for s in attribution.scenarios:
        rows.append(["PIF", s.name, *estimate_cells(s.pif)])
    return ["quantity", "scenario", *ESTIMATE_COLUMNS], rows


def scenarios_table(attribution: AttributionSection, unit: str | None) -> Table:
    """One row per scenario: its kind, value (with unit where it has one), PIF."""
    rows: list[list[Any]] = []
    for s in attribution.scenarios:
        value_unit = "" if s.kind in ("scale", "comply") else (unit or "")
        rows.append([s.name, s.kind, _float(s.value), value_unit, *estimate_cells(s.pif)])
    header = ["name", "kind", "value", "value_unit", "pif", "pif_lower", "pif_upper", "pif_mcse"]
    return header, rows


def categorical_table(cat: CategoricalComparison, unit: str | None) -> Table:
    """One row per band of the categorical comparison: limits, population
    share, midpoint, conditional mean, and the RR each method assigns."""
    cuts = _floats(cat.cutpoints)
    lowers, uppers = [0.0, *cuts], [*cuts, None]
    midpoints, means = _floats(cat.midpoints), _floats(cat.band_means)
    rrs = [_floats(m.rr) for m in cat.methods]
    header = ["band", with_unit("lower", unit), with_unit("upper", unit), "share",
              with_unit("midpoint", unit), with_unit("band_mean", unit),
              *[f"rr_{m.method}" for m in cat.methods]]
    rows = []
    for i, share in enumerate(_floats(cat.shares)):
        rows.append([i + 1, lowers[i], uppers[i], share, _item(midpoints, i), _item(means, i),
                     *[_item(rr, i) for rr in rrs]])
    return header, rows


def categorical_paf_table(cat: CategoricalComparison) -> Table:
    """PAF by each categorical method, its difference from the continuous
    PAF, and the continuous PAF itself."""
    rows: list[list[Any]] = [[m.method, _float(m.paf), _float(m.difference)]
                             for m in cat.methods]
    rows.append(["continuous", _float(cat.continuous_paf), 0.0])
    return ["method", "paf", "difference_from_continuous"], rows


def contribution_table(attribution: AttributionSection, unit: str | None,
                       empirical: bool) -> Table:
    """The burden curve at every point it was computed at (``[report]
    contribution_table``): exposure; the burden there, a density per unit
    of exposure on a family's grid (``burden_density``, integrating to the
    PAF) or each value's mass on the empirical path (``burden_mass``,
    adding up to the PAF); and the cumulative share of the attributable
    excess at or below it."""
    c = attribution.contribution
    rows: list[list[Any]] = [[_float(x), _float(d), _float(q)]
                             for x, d, q in zip(c.x.tolist(), c.density.tolist(),
                                                c.cumulative.tolist())]
    return [with_unit("exposure", unit), "burden_mass" if empirical else "burden_density",
            "cumulative_share"], rows


def convergence_table(cat: CategoricalComparison) -> Table:
    """Categorical PAF with ``k`` equal-probability bands, beside the
    continuous PAF it converges to."""
    continuous = _float(cat.continuous_paf)
    rows: list[list[Any]] = [[int(k), _float(p), continuous] for k, p in cat.convergence]
    return ["bands", "categorical_paf", "continuous_paf"], rows


def curve_fit_table(section: CurveSection, unit: str | None) -> Table:
    """The study's bands with assigned dose (and how it was assigned),
    reported RR and CI, and the fitted RR at the assigned dose (1 for the
    reference band); without bands, the fit's doses with reported and
    fitted RR."""
    fit = section.curve.fit
    fitted: list[tuple[float, float, float]] = [] if fit is None else [
        (float(x), math.exp(y), math.exp(f))
        for x, y, f in zip(fit.doses, fit.log_rr, fit.fitted_log_rr, strict=True)]
    b = section.bands
    if b is None or len(b.rr) == 0:
        header = [with_unit("dose", unit), "rr_reported", "rr_fitted"]
        return header, [list(f) for f in fitted]
    header = ["band", with_unit("lower", unit), with_unit("upper", unit), with_unit("dose", unit),
              "dose_rule", "rr", "ci_lower", "ci_upper", "reference", "rr_fitted"]
    fitted_rr = iter(f[2] for f in fitted)
    rows = []
    for i in range(len(b.rr)):
        ref = bool(b.reference[i])
        rr_fitted = 1.0 if ref else next(fitted_rr, None)
        rows.append([i + 1, _float(b.lower[i]), _float(b.upper[i]), _float(b.dose[i]),
                     b.dose_rule[i], _float(b.rr[i]), _float(b.ci_lower[i]),
                     _float(b.ci_upper[i]), ref, rr_fitted])
    return header, rows


def coefficients_table(section: CurveSection) -> Table:
    """Coefficients, standard errors and the covariance matrix by rows."""
    c = section.curve
    coef = _floats(c.coef)
    names = list(c.model.param_names) or [f"b{i}" for i in range(len(coef))]
    cov = [_floats(row) for row in np.atleast_2d(np.asarray(c.cov, dtype=float))]
    header = ["parameter", "estimate", "standard_error", *[f"cov_{n}" for n in names]]
    rows = [[n, b, se, *row] for n, b, se, row in zip(names, coef, _standard_errors(c), cov)]
    return header, rows


def exposure_fits_table(section: ExposureSection) -> Table:
    """Every family fitted (or the one entered), parameters, log-likelihood, AIC."""
    ex = section.exposure
    family = ex.family.name
    if section.fits:
        fits = [(f.family, f.parameters, f.loglik, f.aic) for f in section.fits]
    else:
        fit = ex.fit
        fits = [(family, ex.parameters, None if fit is None else fit.loglik,
                 None if fit is None else fit.aic)]
    names = _union(parameters for _, parameters, _, _ in fits)
    header = ["family", "selected", *names, "loglik", "aic"]
    rows = [[name, name == family, *_parameter_cells(parameters, names), _float(loglik),
             _float(aic)] for name, parameters, loglik, aic in fits]
    return header, rows


def burden_table(burden: BurdenResult, unit: str | None) -> Table:
    """Attributable cases by stratum and in total, one burden
    (:func:`burden_blocks_table`)."""
    table = burden_blocks_table([(None, burden)], unit)
    assert table is not None
    return table


def burden_blocks_table(blocks: Sequence[BurdenBlock], unit: str | None) -> Table | None:
    """Attributable cases by stratum and in total, one block per outcome.

    Columns: ``outcome`` (only with outcomes), ``stratum``, ``cases``,
    ``population``, ``paf_estimate`` ... ``paf_mcse``,
    ``attributable_estimate`` ... ``attributable_mcse``, then the exposure
    each stratum's fractions were computed over: ``exposure`` (``own``
    when the burden table gave the stratum its own, else ``shared``),
    ``exposure_family``, one ``exposure_<parameter>`` per parameter name
    (the union over all strata, in first-seen order) and ``exposure_mean``
    (the unexposed counted at zero). The total row leaves those empty.
    When any block has groups, rates or years of life lost,
    :data:`HEALTH_IMPACT_COLUMNS` follow: ``group``, ``rate`` (the baseline
    rate as given, per ``rate_per``), ``attributable_rate_estimate`` ...
    ``_mcse`` (per ``rate_per`` people), ``yll_estimate`` ... ``_mcse`` and
    ``life_expectancy``. Per-scenario results go to
    :func:`burden_scenarios_table`.
    """
    if not blocks:
        return None
    strata = [s for _, b in blocks for s in b.strata]
    names = _union(s.exposure.parameters for s in strata if s.exposure is not None)
    exposure_header = ["exposure", "exposure_family", *[f"exposure_{n}" for n in names],
                       with_unit("exposure_mean", unit)]
    named = any(name for name, _ in blocks)
    # The outcome column is first; it stood after the burden columns (and
    # stays there) when the analysis's own burden comes before the outcomes.
    at = 0 if blocks[0][0] else len(BURDEN_COLUMNS)
    extended = health_impact(blocks)
    header = [*BURDEN_COLUMNS, *exposure_header,
              *(HEALTH_IMPACT_COLUMNS if extended else [])]
    if named:
        header.insert(at, "outcome")
    rows = []
    for name, burden in blocks:
        for s in (*burden.strata, burden.total):
            stratum = "total" if s is burden.total else s.stratum
            row = [*_burden_cells(s, stratum), *_exposure_cells(s.exposure, names)]
            if extended:
                row += [s.group, _float(s.rate), *estimate_cells(s.attributable_rate),
                        *estimate_cells(s.yll), _float(s.life_expectancy)]
            if named:
                row.insert(at, name or None)
            rows.append(row)
    return header, rows


def burden_scenarios_table(burden: BurdenResult) -> Table | None:
    """Each stratum's (and the total's) PIF and cases averted per scenario
    (:func:`burden_scenarios_blocks_table`)."""
    return burden_scenarios_blocks_table([(None, burden)])


def burden_scenarios_blocks_table(blocks: Sequence[BurdenBlock]) -> Table | None:
    """One row per outcome, stratum (and total) and scenario: the PIF and the
    cases averted, each with its interval; no ``outcome`` column without
    outcomes. When any block has groups, rates or years of life lost
    (:func:`health_impact`), the row's ``group``, the averted rate (per
    ``rate_per`` people) and the averted years of life lost follow, each
    with its interval (empty where a row has none)."""
    header = ["outcome", "stratum", "scenario", *[f"pif_{c}" for c in ESTIMATE_COLUMNS],
              *[f"averted_{c}" for c in ESTIMATE_COLUMNS]]
    extended = health_impact(blocks)
    if extended:
        header += ["group", *[f"averted_rate_{c}" for c in ESTIMATE_COLUMNS],
                   *[f"averted_yll_{c}" for c in ESTIMATE_COLUMNS]]
    rows: list[list[Any]] = []
    for name, burden in blocks:
        for s in (*burden.strata, burden.total):
            stratum = "total" if s is burden.total else s.stratum
            for e in s.scenarios:
                row = [name or None, stratum, e.name, *estimate_cells(e.pif),
                       *estimate_cells(e.averted)]
                if extended:
                    row += [s.group, *estimate_cells(e.averted_rate),
                            *estimate_cells(e.averted_yll)]
                rows.append(row)
    if not any(r[0] for r in rows):
        header, rows = header[1:], [r[1:] for r in rows]
    return (header, rows) if rows else None


def health_impact(blocks: Sequence[BurdenBlock]) -> bool:
    """True when any burden table has groups, rates or years of life lost
    (then burden.csv gains :data:`HEALTH_IMPACT_COLUMNS` and
    burden_groups.csv is written)."""
    return any(b.has_groups or b.has_rates or b.has_yll for _, b in blocks)


def burden_groups_table(blocks: Sequence[BurdenBlock]) -> Table | None:
    """Every row of every burden table and its sums (``None`` unless
    :func:`health_impact`).

    Columns :data:`GROUPS_COLUMNS`: ``outcome`` (empty for the analysis's
    own burden), ``level``, ``stratum``, ``group``, ``population``,
    ``rate`` (baseline, per ``rate_per``, as given), ``cases``,
    ``attributable`` with ``_lower``/``_upper``, ``attributable_rate``
    (per ``rate_per`` people) and ``yll`` with theirs, ``life_expectancy``.
    ``level`` is ``"row"`` for a row of the burden table, ``"group"`` for a
    group summed across strata, ``"stratum"`` for a stratum summed across
    its groups and ``"outcome"`` for the outcome's total (stratum
    ``total``); within an outcome the rows come first, then the groups,
    the strata and the total. Sums are the analysis's, draw by draw.
    """
    if not health_impact(blocks):
        return None
    rows: list[list[Any]] = []
    for name, burden in blocks:
        levels = [("row", s) for s in burden.strata] + [("group", g) for g in burden.groups]
        levels += [("stratum", s) for s in burden.stratum_totals]
        for level, s in (*levels, ("outcome", burden.total)):
            stratum = "total" if level == "outcome" else s.stratum
            rows.append([name, level, stratum, s.group, _float(s.population), _float(s.rate),
                         _float(s.cases), *limit_cells(s.attributable),
                         *limit_cells(s.attributable_rate), *limit_cells(s.yll),
                         _float(s.life_expectancy)])
    return list(GROUPS_COLUMNS), rows


def burden_totals_table(blocks: Sequence[BurdenBlock],
                        grand_total: StratumResult | None) -> Table | None:
    """Each outcome's total and the total across outcomes, in long form
    (``None`` without either groups, rates, years of life lost or a grand
    total).

    Columns :data:`TOTALS_COLUMNS`. ``level`` is ``"outcome"`` (``outcome``
    names it; empty for the analysis's own burden) or ``"all outcomes"``
    (``grand_total``, the sum over the outcomes draw by draw; ``outcome``
    empty). A row with an empty ``scenario`` holds the total: ``cases``,
    ``population``, ``attributable``, ``attributable_rate`` and ``yll``
    with their 95% limits. Each scenario then has a row of its own
    (``scenario`` = its name) holding only ``averted``, ``averted_rate``
    and ``averted_yll`` with their limits; its other cells are empty, so
    summing a column never counts a number twice.
    """
    if grand_total is None and not health_impact(blocks):
        return None
    totals: list[tuple[str | None, str, StratumResult]] = [
        (name, "outcome", b.total) for name, b in blocks]
    if grand_total is not None:
        totals.append((None, "all outcomes", grand_total))
    rows: list[list[Any]] = []
    blank = [None] * 9
    for name, level, t in totals:
        rows.append([name, level, None, _float(t.cases), _float(t.population),
                     *limit_cells(t.attributable), *limit_cells(t.attributable_rate),
                     *limit_cells(t.yll), *blank])
        for e in t.scenarios:
            rows.append([name, level, e.name, None, None, *blank, *limit_cells(e.averted),
                         *limit_cells(e.averted_rate), *limit_cells(e.averted_yll)])
    return list(TOTALS_COLUMNS), rows


def zones_table(grid: GridSection | None, burden: BurdenResult | None,
                scenarios: Sequence[str] = (), unit: str | None = None) -> Table | None:
    """One row per zone of a ``[grid]`` analysis, in the grid's zone order
    (``None`` without a grid).

    Columns: ``zone`` (id), ``name``, ``population`` (the grid's),
    ``mean_concentration (<unit>)`` (population-weighted), then from the
    burden: ``cases``, ``attributable`` with ``_lower``/``_upper``; with
    populations in the burden table ``attributable_rate (per <rate_per>)``
    with ``attributable_rate_lower``/``_upper`` (same unit); ``paf`` with
    its limits (the fraction used: attributable over cases); and for each
    scenario in ``scenarios`` ``pif_<name>``, ``pif_lower_<name>``,
    ``pif_upper_<name>`` (averted over cases) and ``averted_<name>``,
    ``averted_lower_<name>``, ``averted_upper_<name>``. A zone is matched to
    its stratum by ``grid.zone_strata``; with groups its row is the stratum
    summed across its groups. Burden cells are empty for a zone without a
    burden result; without a burden there are no burden columns.
    """
    if grid is None:
        return None
    header = ["zone", "name", "population", with_unit("mean_concentration", unit)]
    rates = burden is not None and burden.has_rates
    if burden is not None:
        header += ["cases", *[f"attributable{c}" for c in LIMITS]]
        if rates:
            per = f"per {burden.rate_per:g}"
            header += [with_unit(f"attributable_rate{c}", per) for c in LIMITS]
        header += [f"paf{c}" for c in LIMITS]
        for name in scenarios:
            header += [f"pif{c}_{name}" for c in LIMITS]
            header += [f"averted{c}_{name}" for c in LIMITS]
    rows: list[list[Any]] = []
    for z in zone_rows(grid, burden):
        row: list[Any] = [z.zone, z.name, z.population, z.mean]
        if burden is not None:
            r = z.result
            row += [None if r is None else _float(r.cases),
                    *limit_cells(None if r is None else r.attributable)]
            if rates:
                row += limit_cells(None if r is None else r.attributable_rate)
            row += limit_cells(None if r is None else r.paf)
            for name in scenarios:
                e = z.effect(name)
                row += [*limit_cells(None if e is None else e.pif),
                        *limit_cells(None if e is None else e.averted)]
        rows.append(row)
    return header, rows


def limit_cells(est: Estimate | None) -> list[float | None]:
    """``[estimate, lower, upper]`` of an estimate (empty without one)."""
    return estimate_cells(est)[:3]


def model_comparison_table(section: CurveSection) -> Table | None:
    """PAF and fit of each model in ``compare_models``."""
    return _variant_table(section.model_comparison, "model")


def dose_sensitivity_table(section: CurveSection, unit: str | None) -> Table | None:
    """PAF and fit under each dose-assignment rule, with the assigned doses
    ``dose_1`` ... in the unit of the analysis."""
    return _variant_table(section.dose_sensitivity, "dose_rule", unit=unit, doses=True)


def _variant_table(variants: Sequence[CurveVariant], label: str, unit: str | None = None,
                   doses: bool = False) -> Table | None:
    if not variants:
        return None
    coefs = [[] if v.curve is None else _floats(v.curve.coef) for v in variants]
    ses = [[] if v.curve is None else _standard_errors(v.curve) for v in variants]
    dose_lists = [[] if v.doses is None else _floats(v.doses) for v in variants]
    n_coef = max(len(c) for c in coefs)
    n_dose = max(len(d) for d in dose_lists) if doses else 0
    # the models compared are named by their label already (no second "model" column)
    model_column = ["model"] if label != "model" else []
    header = [label, *model_column, *[f"coefficient_{i + 1}" for i in range(n_coef)],
              *[f"standard_error_{i + 1}" for i in range(n_coef)],
              *[with_unit(f"dose_{i + 1}", unit) for i in range(n_dose)],
              "q", "df", "p_value", "nonlinearity_p", "paf", "problem"]
    rows = []
    for v, coef, se, dose in zip(variants, coefs, ses, dose_lists):
        c = v.curve
        fit = None if c is None else c.fit
        model = [None if c is None else c.model.name] if model_column else []
        rows.append([v.label, *model, *_padded(coef, n_coef),
                     *_padded(se, n_coef), *_padded(dose, n_dose),
                     None if fit is None else _float(fit.q),
                     None if fit is None else int(fit.df),
                     None if fit is None else _float(fit.p_value),
                     _float(v.nonlinearity_p), _float(v.paf),
                     v.problem])
    return header, rows


def exposure_comparison_table(section: ExposureSection) -> Table | None:
    """PAF under each fitted family and the empirical distribution."""
    variants = section.comparison
    if not variants:
        return None
    names = _union(v.parameters for v in variants)
    header = ["family", *names, "aic", "paf", "problem"]
    return header, [[v.label, *_parameter_cells(v.parameters, names), _float(v.aic),
                     _float(v.paf), v.problem] for v in variants]


def substitution_table(section: ExposureSection) -> Table | None:
    """Non-detects replaced by a fraction of their limit (comparison only):
    fraction, fitted parameters, PAF, difference from the analysis's PAF."""
    rows_in = section.substitution
    if not rows_in:
        return None
    names = _union(r.parameters for r in rows_in)
    header = ["fraction", *names, "paf", "difference"]
    return header, [[_float(r.fraction), *_parameter_cells(r.parameters, names), _float(r.paf),
                     _float(r.difference)] for r in rows_in]


def width_by_source_table(u: UncertaintySection | None) -> Table | None:
    """The PAF interval with one source of uncertainty at a time."""
    if u is None or not u.width_by_source:
        return None
    return (["source", "lower", "upper", "width"],
            [[w.source, _float(w.lower), _float(w.upper), _float(w.width)]
             for w in u.width_by_source])


def workers_table(w: Workers | None) -> Table | None:
    """One row per worker: worker, cumulative, duration_years, mean_intensity
    (``None`` without work histories)."""
    if w is None:
        return None
    rows: list[list[Any]] = [
        [name, _float(c), _float(t), _float(m)]
        for name, c, t, m in zip(w.worker, w.cumulative, w.duration_years, w.mean_intensity,
                                 strict=True)]
    return ["worker", "cumulative", "duration_years", "mean_intensity"], rows


def all_tables(results: Results) -> dict[str, Table]:
    """Every CSV file name with its table; optional ones only when present."""
    unit = results.unit
    curve, exposure = results.curve_section, results.exposure_section
    tables = {
        "summary.csv": summary_table(results.attribution),
        "scenarios.csv": scenarios_table(results.attribution, unit),
        "curve_fit.csv": curve_fit_table(curve, unit),
        "curve_coefficients.csv": coefficients_table(curve),
        "exposure_fits.csv": exposure_fits_table(exposure),
        "categorical.csv": categorical_table(results.categorical, unit),
        "categorical_paf.csv": categorical_paf_table(results.categorical),
        "convergence.csv": convergence_table(results.categorical),
    }
    blocks = results.burden_blocks
    optional = {
        "burden.csv": burden_blocks_table(blocks, unit),
        "burden_scenarios.csv": burden_scenarios_blocks_table(blocks),
        "burden_groups.csv": burden_groups_table(blocks),
        "burden_totals.csv": burden_totals_table(blocks, results.grand_total),
        "model_comparison.csv": model_comparison_table(curve),
        "dose_sensitivity.csv": dose_sensitivity_table(curve, unit),
        "exposure_comparison.csv": exposure_comparison_table(exposure),
        "substitution.csv": substitution_table(exposure),
        "width_by_source.csv": width_by_source_table(results.uncertainty),
        "workers.csv": workers_table(exposure.workers),
        "zones.csv": zones_table(results.grid, results.burden,
                                 [s.name for s in results.attribution.scenarios], unit),
        "limit.csv": limit_table(results.limit, unit),
        "limit_workers.csv": limit_workers_table(results.limit, unit),
        "studies.csv": studies_table(curve, unit),
    }
    tables.update({name: t for name, t in optional.items() if t is not None})
    return tables


def _burden_cells(s: StratumResult, stratum: str) -> list[Any]:
    return [stratum, _float(s.cases), _float(s.population), *estimate_cells(s.paf),
            *estimate_cells(s.attributable)]


def _exposure_cells(e: StratumExposure | None, names: Sequence[str]) -> list[Any]:
    if e is None:
        return [None] * (len(names) + 3)
    return ["own" if e.own else "shared", e.family, *_parameter_cells(e.parameters, names),
            _float(e.mean)]


def _standard_errors(curve: Curve) -> list[float]:
    """sqrt of the covariance's diagonal (negative rounding clipped to 0)."""
    return _floats(np.sqrt(np.maximum(np.diag(np.atleast_2d(curve.cov)), 0.0)))


def _union(mappings: Iterable[Mapping[str, float]]) -> list[str]:
    """The keys of every mapping, in first-seen order."""
    names: list[str] = []
    for m in mappings:
        names += [k for k in m if k not in names]
    return names


def _parameter_cells(parameters: Mapping[str, float], names: Sequence[str]) -> list[float | None]:
    return [_float(parameters.get(n)) for n in names]


def _float(value: Any) -> float | None:
    """A plain float, or ``None`` for a missing value."""
    return None if value is None else float(value)


def _floats(values: Any) -> list[float]:
    return [float(v) for v in np.asarray(values, dtype=float).reshape(-1)]


def _padded(values: Sequence[Any], n: int) -> list[Any]:
    values = list(values)[:n]
    return values + [None] * (n - len(values))


def _item(seq: Sequence[Any], i: int) -> Any:
    return None if i >= len(seq) else seq[i]
