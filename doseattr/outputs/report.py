"""The HTML report: one self-contained page a practitioner can hand over.

Inline CSS, figures embedded as base64 PNG ``data:`` URIs, no scripts, no
network. Every section reads one typed record of the run's
:class:`~doseattr.results.Results` (the records results.json is generated
from, so the page and results.json always agree); figures come from the
same records. The curve, exposure and uncertainty/burden sections are built
in :mod:`~doseattr.outputs.curve_report`,
:mod:`~doseattr.outputs.exposure_report`,
:mod:`~doseattr.outputs.burden_report` and (for a ``[grid]`` analysis)
:mod:`~doseattr.outputs.grid_report`. All text that a user typed (title, unit,
scenario names, file names) and all warning text is escaped with
:func:`html.escape`. Sections for optional results (intervals, burden by
stratum, several fits) appear only when the results hold them.
"""

from __future__ import annotations

import datetime as _dt
import os
from collections.abc import Mapping, Sequence
from html import escape

import numpy as np
from numpy.typing import NDArray

from doseattr import __version__
from doseattr.core.attribution.categorical import CategoricalComparison
from doseattr.outputs.burden_figures import per_text
from doseattr.outputs.burden_report import (
    burden_section,
    cases,
    outcome_warnings,
    outcomes_section,
    totals_block,
    uncertainty_section,
)
from doseattr.outputs.css import CSS
from doseattr.outputs.curve_report import curve_section
from doseattr.outputs.exposure_report import exposure_section
from doseattr.outputs.grid_report import grid_section
from doseattr.outputs.limit_report import limit_section
from doseattr.outputs.markup import (
    NA,
    bullets,
    definition_list,
    estimate_text,
    figure,
    interval,
    notes_list,
    num,
    para,
    pct,
    section,
    signed_points,
    table,
    with_unit,
    worded,
)
from doseattr.outputs.text import (
    METHODS_TEXT,
    burden_methods,
    computed_paragraph,
    references,
)
from doseattr.results import (
    AttributionSection,
    CurveSection,
    Estimate,
    Results,
    ScenarioResult,
)
from doseattr.results.cautions import CAUTIONS
from doseattr.results.records import CASE_WEIGHTED_PAF, POPULATION_PAF, StratumEffect


# ---------------------------------------------------------------- sections
def key_numbers(results: Results) -> str:
    """The PAF, each scenario's PIF and, with a burden table, the
    attributable and averted cases in all strata."""
    a = results.attribution
    paf = a.paf
    has_ci = paf.lower is not None or any(s.pif.lower is not None for s in a.scenarios)
    header = ["Quantity", "Estimate"] + (["95% interval"] if has_ci else [])
    m = with_unit(float(a.minimum_risk), results.unit)
    label = f" ({POPULATION_PAF})" if results.burden is not None else ""
    rows = [[f"PAF: share of cases attributable to exposure above {m}{label}",
             pct(paf.estimate)]
            + ([interval(paf.lower, paf.upper)] if has_ci else [])]
    for s in a.scenarios:
        rows.append([f"PIF: share of cases prevented by scenario \u201c{s.name}\u201d",
                     pct(s.pif.estimate)]
                    + ([interval(s.pif.lower, s.pif.upper)] if has_ci else []))
    if results.burden is not None:
        total = results.burden.total
        att = total.attributable
        rows.append([f"Attributable cases in all strata (total PAF "
                     f"{pct(total.paf.estimate)}, the {CASE_WEIGHTED_PAF})", cases(att.estimate)]
                    + ([interval(att.lower, att.upper, cases)] if has_ci else []))
        rate, yll = total.attributable_rate, total.yll
        if rate is not None:
            rows.append([f"Attributable cases per {per_text(results.burden.rate_per)} people "
                         "in all strata", cases(rate.estimate)]
                        + ([interval(rate.lower, rate.upper, cases)] if has_ci else []))
        if yll is not None:
            rows.append(["Years of life lost to attributable deaths in all strata",
                         cases(yll.estimate)]
                        + ([interval(yll.lower, yll.upper, cases)] if has_ci else []))
        for s in a.scenarios:
            averted = s.averted
            if averted is not None:
                rows.append([f"Cases averted by scenario \u201c{s.name}\u201d",
                             cases(averted.estimate)]
                            + ([interval(averted.lower, averted.upper, cases)]
                               if has_ci else []))
            saved = _averted_yll(total.scenarios, s.name)
            if saved is not None:
                rows.append([f"Years of life lost averted by scenario \u201c{s.name}\u201d",
                             cases(saved.estimate)]
                            + ([interval(saved.lower, saved.upper, cases)] if has_ci else []))
    return table(header, rows, cls="key")


def _averted_yll(effects: Sequence[StratumEffect], name: str) -> Estimate | None:
    return next((e.averted_yll for e in effects if e.name == name), None)


def _outcomes_hint(results: Results) -> str:
    names = [name for name, _ in results.outcomes]
    if not names:
        return ""
    return para(f"This analysis has {len(names)} outcomes ({', '.join(names)}); the table "
                "below holds the results above the outcomes (see the notes under it), and "
                "each outcome's own numbers are in the next section.")


def warnings_block(results: Results) -> str:
    """Every warning of the run, those of each outcome named by outcome."""
    warnings = list(results.warnings) + outcome_warnings(results)
    if not warnings:
        return '<p class="ok">No warnings were raised for this analysis.</p>'
    return ('<div class="warnings"><p><strong>Read before using these numbers:</strong></p>'
            + bullets(warnings) + "</div>")


def attribution_section(a: AttributionSection, curve: CurveSection, unit: str | None,
                        images: Mapping[str, bytes], *, empirical: bool = False) -> str:
    """The PAF's definition against the minimum-risk level, the population
    beyond the curve's range (``curve``), where the burden lies, and each
    scenario's PIF; ``empirical`` for the empirical exposure path."""
    c = curve.curve
    m = with_unit(float(a.minimum_risk), unit)
    parts = [para(f"Each person's relative risk is counted against the minimum-risk level "
                  f"{m}: RR_m(x) = RR(max(x, m)) / RR(m), so nobody gains from exposure below "
                  f"it. PAF = 1 \u2212 1 / E[RR_m(X)]; a scenario g gives "
                  f"PIF = 1 \u2212 E[RR_m(g(X))] / E[RR_m(X)].")]
    facts = []
    if curve.share_beyond_max_dose is not None and c.max_dose is not None:
        same = c.data_max == c.max_dose
        facts.append((f"Population above {with_unit(float(c.max_dose), unit)} (RR held flat"
                      + (", beyond the study's data" if same else "") + ")",
                      pct(curve.share_beyond_max_dose)))
    if (curve.share_beyond_data is not None and c.data_max is not None
            and c.data_max != c.max_dose):
        facts.append((f"Population above {with_unit(float(c.data_max), unit)} (beyond the "
                      f"study's data: extrapolation)", pct(curve.share_beyond_data)))
    median = a.contribution.median
    if median is not None:
        facts.append(("Half of the attributable cases arise below",
                      with_unit(float(median), unit)))
    if facts:
        parts.append(definition_list(facts))
    scen = a.scenarios
    if scen:
        has_ci = any(s.pif.lower is not None for s in scen)
        parts.append(table(["Scenario", "What changes", "PIF"]
                           + (["95% interval"] if has_ci else []),
                           [[s.name, _scenario_text(s, unit), pct(s.pif.estimate)]
                            + ([interval(s.pif.lower, s.pif.upper)] if has_ci else [])
                            for s in scen], caption="Scenarios"))
    parts.append(figure(images, "contribution", _contribution_caption(empirical)))
    return "".join(parts)


def _contribution_caption(empirical: bool) -> str:
    if empirical:
        return ("Where the attributable cases come from: the share of them arising at or below "
                "each exposure (on the empirical path each measured value carries its share "
                "w_i (RR_m(x_i) \u2212 1) / E[RR_m(X)]).")
    return ("Where the attributable cases come from: the density "
            "f(x)(RR_m(x) \u2212 1)/E[RR_m(X)] along the exposure axis; its area is the PAF.")


def _scenario_text(s: ScenarioResult, unit: str | None) -> str:
    kind, v = s.kind, float(s.value)
    if kind == "cap":
        return f"exposure capped at {with_unit(v, unit)}"
    if kind == "scale":
        return f"everyone's exposure multiplied by {num(v)}"
    if kind == "reduce_by":
        return (f"everyone's exposure lowered by {with_unit(v, unit)}, not below the "
                "minimum-risk level")
    return f"{kind} {num(v)}"


def categorical_section(cat: CategoricalComparison, unit: str | None,
                        images: Mapping[str, bytes], *, paf: Estimate) -> str:
    """The multi-category formula under each way of assigning band RRs,
    against the continuous PAF (``paf``: the analysis's, with its interval)."""
    cuts = [float(c) for c in cat.cutpoints]
    lowers, uppers = [0.0, *cuts], [*cuts, None]
    methods = cat.methods
    u = f" ({unit})" if unit else ""
    header = [f"Band{u}", "Population share", f"Midpoint{u}", f"Band mean{u}",
              *[f"RR: {worded(METHOD_NAMES, m.method)}" for m in methods]]
    rows = []
    for i, share in enumerate(cat.shares):
        upper = uppers[i]
        band = (f"{num(lowers[i])} to {num(upper)}" if upper is not None
                else f"{num(lowers[i])} and above")
        rows.append([band, pct(share), num(_at(cat.midpoints, i)),
                     num(_at(cat.band_means, i)),
                     *[num(_at(m.rr, i)) for m in methods]])
    parts = [para("The classic multi-category formula PAF = \u03a3 p_i (RR_i \u2212 1) / "
                  "(1 + \u03a3 p_i (RR_i \u2212 1)) treats everyone in a band as sharing one RR. "
                  "Below, the band RRs are taken from the study where its own bands are used, "
                  "from the curve at each band's midpoint, and from the curve at each band's "
                  "mean exposure under the fitted distribution. Band means here are over the "
                  "whole population, so the first band's mean counts the unexposed at zero; "
                  "the study-dose rule band-mean (if used for the curve) averages over the "
                  "exposed only."),
             table(header, rows, caption="Bands"),
             table(["Method", "PAF", "Difference from continuous"],
                   [[worded(METHOD_NAMES, m.method), pct(m.paf), signed_points(m.difference)]
                    for m in methods]
                   + [["Continuous (this analysis)", estimate_text(_continuous(cat, paf)), NA]],
                   caption="Categorical against continuous PAF (the categorical PAFs are "
                           "point estimates)")]
    conv = cat.convergence
    if conv:
        parts.append(para(f"With {int(conv[0][0])} equal-share bands the categorical PAF is "
                          f"{pct(conv[0][1])}; with {int(conv[-1][0])} it is "
                          f"{pct(conv[-1][1])}, against {pct(cat.continuous_paf)} "
                          f"from the continuous calculation."))
    parts.append(figure(images, "categorical",
                        "Left: PAF by the multi-category formula under each way of assigning "
                        "band RRs, with the continuous PAF as a dashed line. Right: the "
                        "categorical PAF with more and more equal-share bands."))
    return "".join(parts)


METHOD_NAMES = {"reported": "study's reported RRs", "midpoint": "curve at band midpoints",
                "band-mean": "curve at band means"}


def _continuous(cat: CategoricalComparison, paf: Estimate) -> Estimate:
    """The continuous PAF with the interval of the analysis's PAF (the same
    number: ``categorical.continuous_paf`` is ``paf.estimate``)."""
    if paf.estimate == cat.continuous_paf:
        return paf
    return Estimate(float(cat.continuous_paf))


def _at(values: NDArray[np.float64], i: int) -> float | None:
    return float(values[i]) if i < len(values) else None


def cautions_section(results: Results) -> str:
    cautions = list(results.cautions) or list(CAUTIONS)  # never a report without them
    return '<div class="cautions">' + bullets(cautions) + "</div>"


def methods_section(results: Results) -> str:
    refs = "".join(f"<li>{escape(r)}</li>" for r in references(results))
    return ("".join(para(t) for t in (*METHODS_TEXT, *burden_methods(results)))
            + f"<h3>References</h3><ol class='refs'>{refs}</ol>"
            + para("References marked \u2020 were cited from memory when this software was "
                   "written; check volume and page numbers before citing them."))


# ---------------------------------------------------------------- page
def report_date() -> _dt.date:
    """Today, or the UTC date of ``SOURCE_DATE_EPOCH`` (seconds) when set
    (the reproducible-builds convention)."""
    epoch = os.getenv("SOURCE_DATE_EPOCH", "").strip()
    if epoch.isdigit():
        return _dt.datetime.fromtimestamp(int(epoch), tz=_dt.UTC).date()
    return _dt.date.today()


def _analysis_hash(results: Results) -> str:
    """`` · analysis SHA-256 1a2b3c4d5e6f`` (first 12 hex digits; the full
    hash in the tooltip) from the run's provenance, or ``""`` for a record
    built by hand."""
    if results.inputs is None:
        return ""
    sha = str(results.inputs.provenance["analysis_sha256"])
    return (f" \u00b7 analysis SHA-256 <code title='{escape(sha)}'>"
            f"{escape(sha[:12])}</code>")


def render_report(results: Results, *, images: Mapping[str, bytes] | None = None,
                  figures: bool = True, date: _dt.date | None = None) -> str:
    """The self-contained HTML report for ``results``.

    Parameters
    ----------
    results
        The run's typed record.
    images
        Pre-rendered figures ``{name: png_bytes}``; rendered here when
        ``None`` and ``figures`` is true.
    figures
        ``False`` leaves figures out (quick previews).
    date
        Date printed under the title (default: today, or the date of the
        ``SOURCE_DATE_EPOCH`` environment variable when set, so that
        reruns can give byte-identical reports).
    """
    if images is None:
        from doseattr.outputs.gallery import render_figures

        images = render_figures(results) if figures else {}
    title = results.title or "Attributable fraction analysis"
    date = date or report_date()
    unit = results.unit
    a = results.attribution
    strata = bool(results.burden_blocks)
    sections = [
        section("summary", "Key numbers",
                para(computed_paragraph(results)) + _outcomes_hint(results)
                + key_numbers(results) + totals_block(results) + warnings_block(results)
                + notes_list(results.notes, "How the inputs were read:")),
        section("outcomes", "Outcomes side by side", outcomes_section(results, images)),
        section("limit", "Compliance with the limit value",
                limit_section(results.limit, unit, a.scenarios)),
        section("curve", "Relative-risk curve",
                curve_section(results.curve_section, unit, images, paf=a.paf.estimate)),
        section("exposure", "Exposure distribution",
                exposure_section(results.exposure_section, unit, images, paf=a.paf.estimate)),
        section("attribution", "Attribution against the minimum-risk level",
                attribution_section(a, results.curve_section, unit, images,
                                    empirical=results.is_empirical)),
        section("categorical", "Continuous against categorical",
                categorical_section(results.categorical, unit, images, paf=a.paf)),
        section("uncertainty", "Uncertainty",
                uncertainty_section(results.uncertainty, a, images, strata=strata,
                                    outcomes=[(name, o.uncertainty)
                                              for name, o in results.outcomes])),
        section("burden", "Attributable cases",
                burden_section(results.burden, unit, images,
                               outcomes=[(name, o.burden) for name, o in results.outcomes])),
        section("grid", "Gridded exposure by zone",
                grid_section(results.grid, results.burden, unit, images)),
        section("cautions", "Cautions", cautions_section(results)),
        section("methods", "Methods and references", methods_section(results)),
    ]
    meta = f"{date.isoformat()} \u00b7 doseattr {__version__}".strip()
    if unit:
        meta += f" \u00b7 exposure unit: {unit}"
    return ("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            f"<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>{escape(title)}</title><style>{CSS}</style></head><body><main>"
            f"<header><h1>{escape(title)}</h1><p class='meta'>{escape(meta)}"
            f"{_analysis_hash(results)}</p></header>"
            + "".join(sections) + "</main></body></html>\n")
