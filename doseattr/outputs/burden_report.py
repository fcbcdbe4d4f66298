"""The report's uncertainty, attributable-cases and outcomes sections.

Every estimate is shown with its 95% interval where the results hold one.
Everything is read from the run's typed records
(:class:`~doseattr.results.UncertaintySection`,
:class:`~doseattr.results.BurdenResult`, the outcomes' ``Results``);
figures are passed in as PNG bytes by name.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

from doseattr.outputs.burden_figures import MAX_STRATA, per_text
from doseattr.outputs.markup import (
    NA,
    estimate_text,
    figure,
    interval,
    num,
    para,
    pct,
    points_text,
    table,
    with_unit,
    worded,
)
from doseattr.outputs.text import (
    GRAND_TOTAL_CAUTION,
    UNIT_PARAMETERS,
    YLL_NOTE,
    method_sentence,
)
from doseattr.results import (
    AttributionSection,
    BurdenResult,
    Estimate,
    SourceWidth,
    StratumExposure,
    StratumResult,
    UncertaintySection,
)
from doseattr.results.records import BurdenBlock, StratumEffect, burden_blocks

if TYPE_CHECKING:  # pragma: no cover
    from doseattr.results import Results

SOURCE_NAMES = {
    "curve": "the curve's coefficients (their fitted normal distribution, or the curve's own "
             "draws)",
    "exposure": "the exposure distribution's parameters (asymptotic normal of the fit; "
                "bootstrap for the empirical path)",
    "minimum_risk": "the minimum-risk level (uniform over its range)",
    "cases": "Poisson variation of the observed cases",
}

#: Short names of the sources in the width-by-source table.
SOURCE_LABELS = {"curve": "curve coefficients", "exposure": "exposure parameters",
                 "minimum_risk": "minimum-risk level", "cases": "observed cases (Poisson)"}

#: How the exposure columns of a burden table read in the report.
GIVEN_NAMES = {"gm": "GM", "gsd": "GSD", "mean": "mean", "sd": "SD", "shape": "shape",
               "scale": "scale"}


def cases(v: float | None) -> str:
    """A number of cases: whole numbers above 100, else 3 significant figures."""
    if v is None:
        return NA
    return f"{v:,.0f}" if abs(v) >= 100 else num(float(v), 3)


def uncertainty_section(u: UncertaintySection | None, a: AttributionSection,
                        images: Mapping[str, bytes], *, strata: bool = False,
                        outcomes: Sequence[tuple[str, UncertaintySection | None]] = ()) -> str:
    """Intervals of the PAF and the PIFs of ``a``, how they were drawn
    (``u``) and which input drives their width; ``strata`` when the run has
    a burden table (Poisson variation of the cases is then drawn),
    ``outcomes`` each outcome's own uncertainty."""
    paf = a.paf
    if paf.lower is None:
        return ""
    rows = [["PAF", pct(paf.estimate), interval(paf.lower, paf.upper), _limit_errors(paf)]]
    for s in a.scenarios:
        p = s.pif
        rows.append([f"PIF, {s.name}", pct(p.estimate), interval(p.lower, p.upper),
                     _limit_errors(p)])
    parts = []
    if u is not None and u.draws:
        parts.append(para(f"Intervals are the 2.5th and 97.5th percentiles of "
                          f"{int(u.draws)} Monte Carlo draws (seed {int(u.seed)}). The estimate "
                          "is computed at the inputs' point values and does not depend on the "
                          "draws; the Monte Carlo SEs are those of the two limits (how much "
                          "each would move with another seed, from the order statistics of "
                          "the draws)."))
    fixed = _fixed_sources(u, strata)
    names = [] if u is None else [worded(SOURCE_NAMES, x) for x in u.sources if x not in fixed]
    if names:
        parts.append(para("Sources of uncertainty drawn: " + "; ".join(names) + "."))
    if outcomes:
        parts.append(para("The PAF and PIFs below are those of the results above the outcomes "
                          "(see the notes under Key numbers); each outcome's own intervals are "
                          "in the outcomes table."))
    parts.append(table(["Quantity", "Estimate", "95% interval",
                        "Monte Carlo SE of the limits"], rows))
    parts.append(figure(images, "paf_draws",
                        "Monte Carlo draws of the PAF, with the estimate and the 2.5th and "
                        "97.5th percentiles."))
    parts.append(width_block(u, strata=strata, outcomes=outcomes))
    return "".join(parts)


def _fixed_sources(u: UncertaintySection | None, strata: bool) -> set[str]:
    """Sources named by the core but not varied in this run."""
    fixed = set() if u is not None and u.minimum_risk_varied else {"minimum_risk"}
    if not strata:
        fixed.add("cases")
    return fixed


def width_block(u: UncertaintySection | None, *, strata: bool,
                outcomes: Sequence[tuple[str, UncertaintySection | None]] = ()) -> str:
    """Which input drives the width of the interval: one table for the
    analysis, or one per outcome when there are several."""
    own = [(name, o) for name, o in outcomes if o is not None and o.width_by_source]
    tables = ([width_table(o, f"{name}: ") for name, o in own] if own
              else [width_table(u, "")])
    if not any(tables):
        return ""
    what = ("the total PAF over the strata (total attributable over total cases)"
            if strata else "the PAF")
    return "".join(tables) + para(
        f"Each row uses the same Monte Carlo draws as the full interval, with one source of "
        f"uncertainty varying and the others held at their estimates, and gives the 95% "
        f"interval of {what}. The widths of the rows need not add up to the full width.")


def width_table(u: UncertaintySection | None, prefix: str) -> str:
    """The overall PAF's interval with one source of uncertainty varied at a
    time, widest first, beside the interval with all of them
    (``UncertaintySection.width_all``); with strata also the interval of the
    total attributable cases. The overall PAF is the burden's total PAF when
    the analysis has strata, else the PAF."""
    if u is None or not u.width_by_source:
        return ""
    rows_in: list[tuple[str, SourceWidth]] = [
        (worded(SOURCE_LABELS, w.source), w)
        for w in sorted(u.width_by_source, key=lambda w: -w.width)]
    full = u.width_all
    if full is not None:
        rows_in.append(("all sources together", full))
    width = None if full is None else full.width
    cases_too = any(w.attributable is not None for _, w in rows_in)
    rows = []
    for label, w in rows_in:
        row = [label, interval(w.lower, w.upper), _points(w.width),
               NA if not width else f"{100 * w.width / width:.0f}%"]
        if cases_too:
            row += [NA if w.attributable is None else interval(*w.attributable, cases)]
        rows.append(row)
    header = ["Source varied alone", "95% interval of the PAF", "Width",
              "Share of the full width"] + (["Attributable cases, 95% interval"]
                                            if cases_too else [])
    what = f" of the {u.explains}" if u.explains else ""
    return table(header, rows, caption=f"{prefix}which input drives the width of the interval"
                                       f"{what} (each source varied alone, widest first)")


def _limit_errors(e: Estimate) -> str:
    """``"0.14% / 0.30%"``: the Monte Carlo SE of the lower and upper limit."""
    return f"{pct(e.lower_mcse, 2)} / {pct(e.upper_mcse, 2)}"


def _points(v: float) -> str:
    return points_text(v)


def burden_section(burden: BurdenResult | None, unit: str | None,
                   images: Mapping[str, bytes], *,
                   outcomes: Sequence[tuple[str, BurdenResult | None]] = ()) -> str:
    """Per outcome: attributable cases and PAF by stratum (and group) and
    in total (with each stratum's exposure, and rates and years of life
    lost where the burden table allows them), each group across strata and
    each stratum across its groups, and the cases each scenario averts, all
    with intervals; which method turned fractions into cases. ``outcomes``
    holds each outcome's own burden."""
    blocks = burden_blocks(burden, outcomes)
    if not blocks:
        return ""
    parts = [method_text(blocks)]
    for name, b in blocks:
        prefix = f"{name}: " if name else ""
        what = "by stratum and group" if b.has_groups else "by stratum"
        parts.append(strata_table(b, unit, f"{prefix}attributable cases {what}"))
        parts.append(own_exposure_text(b))
        if b.has_groups:
            parts.append(sums_table(b, b.groups, "Group",
                                    f"{prefix}each group summed across strata"))
            parts.append(sums_table(b, b.stratum_totals, "Stratum",
                                    f"{prefix}each stratum summed across its groups"))
        parts.append(scenarios_table(b, f"{prefix}cases averted by each scenario"))
    parts.append(figure(images, "burden",
                        "Attributable cases by stratum (left) and, in total, all cases "
                        "attributable to exposure above the minimum-risk level and the cases "
                        "each scenario averts (right); whiskers are 95% intervals."
                        + _capped_caption(blocks)))
    parts.append(figure(images, "burden_rates", _rates_caption(blocks)))
    parts.append(para("Totals are sums over the strata draw by draw, so their intervals are "
                      "consistent with the strata; the total PAF is the total attributable over "
                      "the total cases."))
    if any(b.has_yll for _, b in blocks):
        parts.append(para(YLL_NOTE))
    return "".join(p for p in parts if p)


def _capped_caption(blocks: Sequence[BurdenBlock]) -> str:
    """The note on the strata bars when some outcome has more than
    :data:`MAX_STRATA` rows."""
    if not any(len(b.strata) > MAX_STRATA for _, b in blocks):
        return ""
    return (f" With more than {MAX_STRATA} strata, the {MAX_STRATA} with the most "
            "attributable cases are drawn, largest first, and the rest are summed into one "
            "bar (its cases are the sum of their estimates; it has no interval). The full "
            "table, every stratum with its interval, is burden.csv.")


def _rates_caption(blocks: Sequence[BurdenBlock]) -> str:
    pers = list(dict.fromkeys(per_text(b.rate_per) for _, b in blocks
                              if b.has_groups and b.has_rates))
    per = " or ".join(pers) or per_text(100_000.0)
    capped = any(len(dict.fromkeys(s.stratum for s in b.strata)) > MAX_STRATA
                 for _, b in blocks if b.has_groups and b.has_rates)
    more = (f" With more than {MAX_STRATA} strata, only the {MAX_STRATA} with the most "
            "attributable cases are drawn (rates do not add, so the rest are not summed); "
            "every stratum is in burden.csv." if capped else "")
    return (f"Attributable cases per {per} people by group (colour and marker) in each "
            "stratum (row), one panel per outcome with groups and rates; whiskers are 95% "
            "intervals." + more)


def method_text(blocks: Sequence[BurdenBlock]) -> str:
    """One sentence saying which method turned fractions into cases and
    what it assumes; one per outcome when the outcomes differ."""
    methods = list(dict.fromkeys(b.method for _, b in blocks))
    if len(methods) == 1:
        return para(method_sentence(methods[0]) + " The methods section shows both methods.")
    return "".join(para(method_sentence(b.method, name or "this analysis"))
                   for name, b in blocks)


def rate_header(rate_per: float) -> str:
    return f"Attributable per {per_text(rate_per)} (95% interval)"


YLL_HEADER = "Years of life lost (95% interval)"


def _impact_header(burden: BurdenResult) -> list[str]:
    """Headers of the rate and YLL columns the burden table has."""
    return (([rate_header(burden.rate_per)] if burden.has_rates else [])
            + ([YLL_HEADER] if burden.has_yll else []))


def _impact_cells(burden: BurdenResult, r: StratumResult) -> list[str]:
    return (([estimate_text(r.attributable_rate, cases)] if burden.has_rates else [])
            + ([estimate_text(r.yll, cases)] if burden.has_yll else []))


def strata_table(burden: BurdenResult, unit: str | None, caption: str) -> str:
    """One row per row of the burden table (stratum, and group when it has
    one) and the total: cases, attributable cases and PAF with their
    intervals, with rates the attributable rate and with life expectancy
    the years of life lost (each with its interval), and the exposure the
    row's fractions used."""
    groups = burden.has_groups
    shown = largest_rows(burden.strata)
    rows = [_stratum_row(s.stratum, s, unit, burden) for s in shown]
    rows.append(_stratum_row("Total", burden.total, unit, burden))
    return table(["Stratum", *(["Group"] if groups else []), "Cases", "Attributable cases",
                  "95% interval", *_impact_header(burden), "PAF", "95% interval",
                  "Exposure"], rows, caption=caption) + left_out_note(
        len(burden.strata), "burden.csv")


def largest_rows(records: Sequence[StratumResult],
                 cap: int = MAX_STRATA) -> Sequence[StratumResult]:
    """``records`` unchanged when there are at most ``cap``; otherwise the
    ``cap`` with the most attributable cases, largest first (ties in table
    order, a missing estimate last), so that a report table's length stays
    bounded whatever the number of strata (the full table is a CSV file)."""
    if len(records) <= cap:
        return records
    est = [r.attributable.estimate for r in records]
    key = [-(e if e is not None and e == e else -float("inf")) for e in est]
    order = sorted(range(len(records)), key=key.__getitem__)  # stable: ties in table order
    return [records[i] for i in order[:cap]]


def left_out_note(n: int, where: str, cap: int = MAX_STRATA) -> str:
    """The line under a table cut to its ``cap`` largest rows (empty when
    all ``n`` rows are shown)."""
    if n <= cap:
        return ""
    return para(f"The table shows the {cap} of the {n:,} rows with the most attributable "
                f"cases, largest first; the total is over all {n:,}. Every row, with its "
                f"interval, is in {where}.")


def _stratum_row(label: str, r: StratumResult, unit: str | None,
                 burden: BurdenResult) -> list[str]:
    att, paf = r.attributable, r.paf
    group = [NA if r.group is None or r is burden.total else r.group] if burden.has_groups \
        else []
    return [label, *group, cases(r.cases), cases(att.estimate),
            interval(att.lower, att.upper, cases), *_impact_cells(burden, r),
            pct(paf.estimate), interval(paf.lower, paf.upper),
            stratum_exposure_text(r.exposure, unit)]


def sums_table(burden: BurdenResult, sums: Sequence[StratumResult], label: str,
               caption: str) -> str:
    """Sums of rows (each group across strata, ``label`` "Group", or each
    stratum across its groups, "Stratum") and the total: cases,
    attributable cases, rate and years of life lost with intervals, and
    the PAF (attributable over cases)."""
    if not sums:
        return ""
    records = [((s.group or NA) if label == "Group" else s.stratum, s)
               for s in largest_rows(sums)]
    rows = [[name, cases(s.cases), cases(s.attributable.estimate),
             interval(s.attributable.lower, s.attributable.upper, cases),
             *_impact_cells(burden, s), estimate_text(s.paf)]
            for name, s in (*records, ("Total", burden.total))]
    return table([label, "Cases", "Attributable cases", "95% interval",
                  *_impact_header(burden), "PAF (95% interval)"], rows,
                 caption=caption) + left_out_note(len(sums), "burden_groups.csv")


def stratum_exposure_text(e: StratumExposure | None, unit: str | None) -> str:
    """``"shared"``, or the stratum's own description as the burden table
    gave it with its mean, e.g. ``"own: GM 18.5 ug/m3, GSD 2.1; mean
    exposure 23.14 ug/m3"``; a dash for the total."""
    if e is None:
        return NA
    if not e.own:
        return "shared"
    given = e.parameters if e.given is None else e.given
    described = ", ".join(f"{worded(GIVEN_NAMES, k)} {_given_value(k, v, unit)}"
                          for k, v in given.items())
    return f"own: {described}; mean exposure {with_unit(float(e.mean), unit)}"


def _given_value(name: str, value: float, unit: str | None) -> str:
    carries_unit = name in UNIT_PARAMETERS
    return with_unit(float(value), unit) if carries_unit else num(float(value))


def own_exposure_text(burden: BurdenResult) -> str:
    """One sentence naming the strata with their own exposure description
    (from the burden table); empty when every stratum uses the shared one."""
    own = list(dict.fromkeys(s.stratum for s in burden.strata
                             if s.exposure is not None and s.exposure.own))
    if not own:
        return ""
    if len(own) == len({s.stratum for s in burden.strata}):  # a stratum's groups once
        return para("Every stratum had its own exposure description in the burden table, so "
                    "their PAFs differ only through exposure (mean exposures count the "
                    "unexposed share at zero).")
    if len(own) > MAX_STRATA:  # a list of names would outgrow the page
        return para(f"{len(own):,} strata had their own exposure descriptions in the burden "
                    "table (burden.csv says which) and the other strata use the shared "
                    "exposure distribution, so their PAFs differ only through exposure (mean "
                    "exposures count the unexposed share at zero).")
    names = own[0] if len(own) == 1 else ", ".join(own[:-1]) + " and " + own[-1]
    whose = "its own exposure description" if len(own) == 1 else \
        "their own exposure descriptions"
    return para(f"{names} had {whose} in the burden table and the other strata use the shared "
                f"exposure distribution, so their PAFs differ only through exposure (mean "
                f"exposures count the unexposed share at zero).")


def scenarios_table(burden: BurdenResult, caption: str) -> str:
    """One row per row of the burden table (and the total), one column
    pair per scenario: the PIF and the cases averted, each with its
    interval; with groups a group column and with life expectancy the
    years of life lost averted."""
    records = [(s.stratum, s) for s in largest_rows(burden.strata)] + [("Total", burden.total)]
    names = [e.name for e in records[0][1].scenarios]
    if not names:
        return ""
    groups, yll = burden.has_groups, burden.has_yll
    rows = []
    for label, r in records:
        row = [label]
        if groups:
            row.append(NA if r.group is None or r is burden.total else r.group)
        for n in names:
            e = _effect(r, n)
            row += [estimate_text(None if e is None else e.pif),
                    estimate_text(None if e is None else e.averted, cases)]
            if yll:
                row.append(estimate_text(None if e is None else e.averted_yll, cases))
        rows.append(row)
    header = ["Stratum"] + (["Group"] if groups else [])
    for n in names:
        header += [f"{n}: PIF", f"{n}: cases averted"] + ([f"{n}: YLL averted"] if yll else [])
    return table(header, rows, caption=caption) + left_out_note(len(burden.strata),
                                                                "burden_scenarios.csv")


def _effect(r: StratumResult, name: str) -> StratumEffect | None:
    return next((x for x in r.scenarios if x.name == name), None)


def totals_block(results: Results) -> str:
    """With a total across outcomes (``results.grand_total``): each
    outcome's total and the grand total, attributable cases, rate and
    years of life lost with intervals and what each scenario averts, then
    the caution on adding outcomes. Empty without a grand total."""
    grand = results.grand_total
    if grand is None:
        return ""
    blocks = results.burden_blocks
    totals = [(name or "this analysis", b.total) for name, b in blocks]
    totals.append(("All outcomes (grand total)", grand))
    pers = list(dict.fromkeys(b.rate_per for _, b in blocks)) or [100_000.0]
    rates = any(t.attributable_rate is not None for _, t in totals)
    yll = any(t.yll is not None for _, t in totals)
    names = list(dict.fromkeys(e.name for _, t in totals for e in t.scenarios))
    header = ["Outcome", "Cases", "Attributable cases (95% interval)"]
    if rates:
        header.append(rate_header(pers[0]) if len(pers) == 1
                      else "Attributable rate (95% interval)")
    if yll:
        header.append(YLL_HEADER)
    for n in names:
        header += [f"Cases averted, {n}"] + ([f"YLL averted, {n}"] if yll else [])
    rows = []
    for label, t in totals:
        row = [label, cases(t.cases), estimate_text(t.attributable, cases)]
        if rates:
            row.append(estimate_text(t.attributable_rate, cases))
        if yll:
            row.append(estimate_text(t.yll, cases))
        for n in names:
            e = _effect(t, n)
            row.append(estimate_text(None if e is None else e.averted, cases))
            if yll:
                row.append(estimate_text(None if e is None else e.averted_yll, cases))
        rows.append(row)
    per = "" if len(pers) == 1 else (
        " Rates are per " + ", ".join(f"{name or 'this analysis'}: {per_text(b.rate_per)}"
                                       for name, b in blocks) + " people.")
    return (table(header, rows, caption="Totals by outcome and across all outcomes")
            + para(GRAND_TOTAL_CAUTION + per)
            + (para(YLL_NOTE) if yll else ""))


def outcomes_section(results: Results, images: Mapping[str, bytes]) -> str:
    """Several outcomes side by side: one column per outcome."""
    outcomes = results.outcomes
    if not outcomes:
        return ""
    unit = results.unit
    header = [""] + [name for name, _ in outcomes]
    rows = [["RR curve"] + [_curve_text(o) for _, o in outcomes],
            ["PAF"] + [estimate_text(o.paf) for _, o in outcomes]]
    names = list(dict.fromkeys(s.name for _, o in outcomes for s in o.scenarios))
    for n in names:
        rows.append([f"PIF, {n}"] + [estimate_text(_scenario_pif(o, n)) for _, o in outcomes])
    totals = [None if o.burden is None else o.burden.total for _, o in outcomes]
    if any(t is not None for t in totals):
        rows.append(["Cases (all strata)"] + [NA if t is None else cases(t.cases)
                                              for t in totals])
        rows.append(["Attributable cases"] + [NA if t is None else
                                              estimate_text(t.attributable, cases)
                                              for t in totals])
        for n in names:
            rows.append([f"Cases averted, {n}"] + [_averted(t, n) for t in totals])
    m = with_unit(float(results.minimum_risk), unit)
    rng = results.minimum_risk_range
    if rng:
        m += (f", the middle of the range {with_unit(float(rng[0]), unit)} to "
              f"{with_unit(float(rng[1]), unit)}")
    text = (f"Each outcome has its own relative-risk curve and strata; the exposure, the "
            f"scenarios and the minimum-risk level ({m}) are shared.")
    return (para(text) + table(header, rows, caption="PAF, PIF and cases per outcome")
            + figure(images, "outcome_curves",
                     "The relative-risk curve of each outcome, side by side on the same axes, "
                     "with its study's band estimates."))


def outcome_warnings(results: Results) -> list[str]:
    """Each outcome's warnings that are not already among the top-level
    ones (those are the first outcome's, or the file's own curve's), named
    by outcome."""
    shown = set(results.warnings)
    return [f"{name}: {w}" for name, o in results.outcomes for w in o.warnings
            if w not in shown]


def _curve_text(o: Results) -> str:
    c = o.curve
    text = c.model.name
    if c.fit is not None:
        p = c.fit.p_value
        text += f" (fit p = {num(float(p), 3)})" if p is not None else " (fit: 0 df)"
    return text


def _scenario_pif(o: Results, name: str) -> Estimate | None:
    return next((s.pif for s in o.scenarios if s.name == name), None)


def _averted(total: StratumResult | None, name: str) -> str:
    if total is None:
        return NA
    for s in total.scenarios:
        if s.name == name:
            return estimate_text(s.averted, cases)
    return NA
