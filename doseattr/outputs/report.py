"""The HTML report: one self-contained page a practitioner can hand over.

Inline CSS, figures embedded as base64 PNG ``data:`` URIs, no scripts, no
network. Numbers come from ``results.to_dict()`` (the results.json
contract), so the page and results.json always agree; figures come from the
core objects on the ``Results``. The curve, exposure and uncertainty/burden
sections are built in :mod:`~doseattr.outputs.curve_report`,
:mod:`~doseattr.outputs.exposure_report` and
:mod:`~doseattr.outputs.burden_report`. All text that a user typed (title, unit,
scenario names, file names) and all warning text is escaped with
:func:`html.escape`. Sections for optional results (intervals, burden by
stratum, several fits) appear only when the results hold them.
"""

from __future__ import annotations

import datetime as _dt
import os
from html import escape
from typing import Any

from doseattr.outputs.burden_report import (
    burden_section,
    cases,
    outcome_warnings,
    outcomes_section,
    uncertainty_section,
)
from doseattr.outputs.css import CSS
from doseattr.outputs.curve_report import curve_section
from doseattr.outputs.exposure_report import exposure_section
from doseattr.outputs.markup import (  # noqa: F401  (num, pct, NA used by callers)
    NA,
    bullets,
    definition_list,
    estimate_text,
    image,
    interval,
    notes_list,
    num,
    para,
    pct,
    section,
    signed_points,
    table,
    with_unit,
)
from doseattr.outputs.records import estimate_of
from doseattr.outputs.text import (
    DEFAULT_CAUTIONS,
    METHODS_TEXT,
    computed_paragraph,
    references,
)


# ---------------------------------------------------------------- sections
def key_numbers(d: dict) -> str:
    paf = d["paf"]
    has_ci = paf.get("lower") is not None or any(
        s["pif"].get("lower") is not None for s in d.get("scenarios", []))
    header = ["Quantity", "Estimate"] + (["95% interval"] if has_ci else [])
    m = with_unit(d.get("minimum_risk"), d.get("unit"))
    rows = [[f"PAF: share of cases attributable to exposure above {m}", pct(paf["estimate"])]
            + ([interval(paf.get("lower"), paf.get("upper"))] if has_ci else [])]
    for s in d.get("scenarios", []):
        rows.append([f"PIF: share of cases prevented by scenario \u201c{s['name']}\u201d",
                     pct(s["pif"]["estimate"])]
                    + ([interval(s["pif"].get("lower"), s["pif"].get("upper"))] if has_ci else []))
    total = (d.get("burden") or {}).get("total")
    if total:
        att = total["attributable"]
        rows.append([f"Attributable cases in all strata (total PAF "
                     f"{pct(estimate_of(total, 'paf')['estimate'])})", cases(att["estimate"])]
                    + ([interval(att.get("lower"), att.get("upper"), cases)] if has_ci else []))
        for s in d.get("scenarios", []):
            a = s.get("averted")
            if a:
                rows.append([f"Cases averted by scenario \u201c{s['name']}\u201d",
                             cases(a["estimate"])]
                            + ([interval(a.get("lower"), a.get("upper"), cases)]
                               if has_ci else []))
    return table(header, rows, cls="key")


def _outcomes_hint(d: dict) -> str:
    names = [str(o.get("name")) for o in d.get("outcomes") or []]
    if not names:
        return ""
    return para(f"This analysis has {len(names)} outcomes ({', '.join(names)}); the table "
                "below holds the results above the outcomes (see the notes under it), and "
                "each outcome's own numbers are in the next section.")


def warnings_block(d: dict) -> str:
    """Every warning of the run, those of each outcome named by outcome."""
    warnings = list(d.get("warnings") or []) + outcome_warnings(d)
    if not warnings:
        return '<p class="ok">No warnings were raised for this analysis.</p>'
    return ('<div class="warnings"><p><strong>Read before using these numbers:</strong></p>'
            + bullets(warnings) + "</div>")


def attribution_section(d: dict, images: dict) -> str:
    e, c, unit = d["exposure"], d["curve"], d.get("unit")
    m = with_unit(d.get("minimum_risk"), unit)
    parts = [para(f"Each person's relative risk is counted against the minimum-risk level "
                  f"{m}: RR_m(x) = RR(max(x, m)) / RR(m), so nobody gains from exposure below "
                  f"it. PAF = 1 \u2212 1 / E[RR_m(X)]; a scenario g gives "
                  f"PIF = 1 \u2212 E[RR_m(g(X))] / E[RR_m(X)].")]
    facts = []
    if e.get("share_beyond_max_dose") is not None and c.get("max_dose") is not None:
        same = c.get("data_max") == c.get("max_dose")
        facts.append((f"Population above {with_unit(c['max_dose'], unit)} (RR held flat"
                      + (", beyond the study's data" if same else "") + ")",
                      pct(e["share_beyond_max_dose"])))
    if (e.get("share_beyond_data") is not None and c.get("data_max") is not None
            and c.get("data_max") != c.get("max_dose")):
        facts.append((f"Population above {with_unit(c['data_max'], unit)} (beyond the "
                      f"study's data: extrapolation)", pct(e["share_beyond_data"])))
    median = (d.get("contribution") or {}).get("median")
    if median is not None:
        facts.append(("Half of the attributable cases arise below", with_unit(median, unit)))
    if facts:
        parts.append(definition_list(facts))
    scen = d.get("scenarios") or []
    if scen:
        has_ci = any(s["pif"].get("lower") is not None for s in scen)
        parts.append(table(["Scenario", "What changes", "PIF"]
                           + (["95% interval"] if has_ci else []),
                           [[s["name"], _scenario_text(s, unit), pct(s["pif"]["estimate"])]
                            + ([interval(s["pif"].get("lower"), s["pif"].get("upper"))]
                               if has_ci else []) for s in scen], caption="Scenarios"))
    parts.append(image(images.get("contribution"), _contribution_caption(d)))
    return "".join(parts)


def _contribution_caption(d: dict) -> str:
    if (d.get("exposure") or {}).get("family") == "empirical":
        return ("Where the attributable cases come from: the share of them arising at or below "
                "each exposure (on the empirical path each measured value carries its share "
                "w_i (RR_m(x_i) \u2212 1) / E[RR_m(X)]).")
    return ("Where the attributable cases come from: the density "
            "f(x)(RR_m(x) \u2212 1)/E[RR_m(X)] along the exposure axis; its area is the PAF.")


def _scenario_text(s: dict, unit: str | None) -> str:
    kind, v = s.get("kind"), s.get("value")
    if kind == "cap":
        return f"exposure capped at {with_unit(v, unit)}"
    if kind == "scale":
        return f"everyone's exposure multiplied by {num(v)}"
    if kind == "reduce_by":
        return (f"everyone's exposure lowered by {with_unit(v, unit)}, not below the "
                "minimum-risk level")
    return f"{kind} {num(v)}"


def categorical_section(d: dict, images: dict) -> str:
    cat, unit = d.get("categorical"), d.get("unit")
    if not cat:
        return ""
    cuts = list(cat["cutpoints"])
    lowers, uppers = [0.0, *cuts], [*cuts, None]
    methods = cat["methods"]
    u = f" ({unit})" if unit else ""
    header = [f"Band{u}", "Population share", f"Midpoint{u}", f"Band mean{u}",
              *[f"RR: {METHOD_NAMES.get(m['method'], m['method'])}" for m in methods]]
    rows = []
    for i, share in enumerate(cat["shares"]):
        band = (f"{num(lowers[i])} to {num(uppers[i])}" if uppers[i] is not None
                else f"{num(lowers[i])} and above")
        rows.append([band, pct(share), num(_at(cat.get("midpoints"), i)),
                     num(_at(cat.get("band_means"), i)),
                     *[num(_at(m["rr"], i)) for m in methods]])
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
                   [[METHOD_NAMES.get(m["method"], m["method"]), pct(m["paf"]),
                     signed_points(m.get("difference"))] for m in methods]
                   + [["Continuous (this analysis)", estimate_text(_continuous(d)), NA]],
                   caption="Categorical against continuous PAF (the categorical PAFs are "
                           "point estimates)")]
    conv = cat.get("convergence") or []
    if conv:
        parts.append(para(f"With {conv[0]['bands']} equal-share bands the categorical PAF is "
                          f"{pct(conv[0]['paf'])}; with {conv[-1]['bands']} it is "
                          f"{pct(conv[-1]['paf'])}, against {pct(cat['continuous_paf'])} "
                          f"from the continuous calculation."))
    parts.append(image(images.get("categorical"),
                       "Left: PAF by the multi-category formula under each way of assigning "
                       "band RRs, with the continuous PAF as a dashed line. Right: the "
                       "categorical PAF with more and more equal-share bands."))
    return "".join(parts)


METHOD_NAMES = {"reported": "study's reported RRs", "midpoint": "curve at band midpoints",
                "band-mean": "curve at band means"}


def _continuous(d: dict) -> dict:
    """The continuous PAF with the interval of the analysis's PAF (the same
    number: ``categorical.continuous_paf`` is ``paf.estimate``)."""
    cat = d["categorical"]
    paf = d["paf"]
    if paf.get("estimate") == cat["continuous_paf"]:
        return paf
    return {"estimate": cat["continuous_paf"]}


def _at(seq: Any, i: int) -> Any:
    return None if seq is None or i >= len(seq) else seq[i]


def cautions_section(d: dict) -> str:
    cautions = list(d.get("cautions") or []) or list(DEFAULT_CAUTIONS)
    return '<div class="cautions">' + bullets(cautions) + "</div>"


def methods_section(d: dict) -> str:
    refs = "".join(f"<li>{escape(r)}</li>" for r in references(d))
    return ("".join(para(t) for t in METHODS_TEXT)
            + f"<h3>References</h3><ol class='refs'>{refs}</ol>"
            + para("References marked \u2020 were cited from memory when this software was "
                   "written; check volume and page numbers before citing them."))


# ---------------------------------------------------------------- page
def report_date() -> _dt.date:
    """Today, or the UTC date of ``SOURCE_DATE_EPOCH`` (seconds) when set
    (the reproducible-builds convention)."""
    epoch = os.environ.get("SOURCE_DATE_EPOCH", "").strip()
    if epoch.isdigit():
        return _dt.datetime.fromtimestamp(int(epoch), tz=_dt.timezone.utc).date()
    return _dt.date.today()


def _analysis_hash(d: dict) -> str:
    """`` · analysis SHA-256 1a2b3c4d5e6f`` (first 12 hex digits; the full
    hash in the tooltip), or ``""`` without provenance."""
    sha = (d.get("provenance") or {}).get("analysis_sha256")
    if not sha:
        return ""
    return (f" \u00b7 analysis SHA-256 <code title='{escape(sha)}'>"
            f"{escape(sha[:12])}</code>")


def render_report(results: Any, *, images: dict[str, bytes] | None = None,
                  figures: bool = True, date: _dt.date | None = None,
                  data: dict | None = None) -> str:
    """The self-contained HTML report for ``results``.

    Parameters
    ----------
    results
        A ``Results`` object (``to_dict()`` and the core objects).
    images
        Pre-rendered figures ``{name: png_bytes}``; rendered here when
        ``None`` and ``figures`` is true.
    figures
        ``False`` leaves figures out (quick previews).
    date
        Date printed under the title (default: today, or the date of the
        ``SOURCE_DATE_EPOCH`` environment variable when set, so that
        reruns can give byte-identical reports).
    data
        ``results.to_dict()`` when the caller already has it.
    """
    d = results.to_dict() if data is None else data
    if images is None:
        from doseattr.outputs.gallery import render_figures

        images = render_figures(results) if figures else {}
    title = str(d.get("title") or "Attributable fraction analysis")
    date = date or report_date()
    sections = [
        section("summary", "Key numbers",
                para(computed_paragraph(d)) + _outcomes_hint(d) + key_numbers(d)
                + warnings_block(d)
                + notes_list(d.get("notes"), "How the inputs were read:")),
        section("outcomes", "Outcomes side by side", outcomes_section(d, images)),
        section("curve", "Relative-risk curve", curve_section(d, images)),
        section("exposure", "Exposure distribution", exposure_section(d, images)),
        section("attribution", "Attribution against the minimum-risk level",
                attribution_section(d, images)),
        section("categorical", "Continuous against categorical",
                categorical_section(d, images)),
        section("uncertainty", "Uncertainty", uncertainty_section(d, images)),
        section("burden", "Attributable cases", burden_section(d, images)),
        section("cautions", "Cautions", cautions_section(d)),
        section("methods", "Methods and references", methods_section(d)),
    ]
    unit = d.get("unit")
    meta = f"{date.isoformat()} \u00b7 doseattr {d.get('doseattr_version', '')}".strip()
    if unit:
        meta += f" \u00b7 exposure unit: {unit}"
    return ("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            f"<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>{escape(title)}</title><style>{CSS}</style></head><body><main>"
            f"<header><h1>{escape(title)}</h1><p class='meta'>{escape(meta)}"
            f"{_analysis_hash(d)}</p></header>"
            + "".join(sections) + "</main></body></html>\n")
