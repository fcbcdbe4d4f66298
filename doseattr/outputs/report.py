"""The HTML report: one self-contained page a practitioner can hand over.

Inline CSS, figures embedded as base64 PNG ``data:`` URIs, no scripts, no
network. Numbers come from ``results.to_dict()`` (the results.json
contract), so the page and results.json always agree; figures come from the
core objects on the ``Results``. All text that a user typed (title, unit,
scenario names, file names) and all warning text is escaped with
:func:`html.escape`. Sections for optional results (intervals, burden by
stratum, several fits) appear only when the results hold them.
"""

from __future__ import annotations

import datetime as _dt
import os
from html import escape
from typing import Any

from doseattr.outputs.css import CSS
from doseattr.outputs.markup import (  # noqa: F401  (num, pct, NA used by callers)
    NA, bullets, definition_list, image, interval, notes_list, num, para, pct, section, table,
    with_unit,
)
from doseattr.outputs.text import (
    COVARIANCE_MEANING, DEFAULT_CAUTIONS, METHODS_TEXT, PARAMETER_UNITS, references,
    computed_paragraph,
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
    return table(header, rows, cls="key")


def warnings_block(d: dict) -> str:
    warnings = list(d.get("warnings") or [])
    if not warnings:
        return '<p class="ok">No warnings were raised for this analysis.</p>'
    return ('<div class="warnings"><p><strong>Read before using these numbers:</strong></p>'
            + bullets(warnings) + "</div>")


def curve_section(d: dict, images: dict) -> str:
    c, unit = d["curve"], d.get("unit")
    names = c.get("parameter_names") or [f"b{i}" for i in range(len(c["coefficients"]))]
    ses = c.get("standard_errors") or [None] * len(names)
    facts = [("Model", str(c["model"])), ("Formula", str(c.get("formula") or c["model"])),
             ("Reference dose", with_unit(c.get("reference_dose"), unit)),
             ("Source", _source_text(c.get("source")))]
    if c.get("max_dose") is not None:
        facts.append(("RR held flat beyond", with_unit(c["max_dose"], unit)))
    else:
        facts.append(("Beyond the data", "the model formula is extended without limit"))
    if c.get("data_max") is not None:
        facts.append(("Highest dose with data", with_unit(c["data_max"], unit)))
    parts = [definition_list(facts),
             table(["Coefficient", "Estimate", "Standard error"],
                   [[n, num(b, 5), num(se, 4)] for n, b, se in zip(names, c["coefficients"], ses)],
                   caption="Coefficients")]
    method = c.get("covariance_method")
    if method:
        parts.append(para(f"Covariance of the study's log RRs: {method}. "
                          + COVARIANCE_MEANING.get(method, "")))
    elif c.get("source") == "entered":
        parts.append(para(COVARIANCE_MEANING["entered"]))
    parts.append(_fit_text(c))
    if c.get("nonlinearity_p") is not None:
        parts.append(para(f"Test of non-linearity (all non-linear spline coefficients zero): "
                          f"p = {num(c['nonlinearity_p'], 3)}."))
    parts.append(bands_table(d))
    parts.append(notes_list(c.get("notes")))
    caption = ("Fitted relative-risk curve with its pointwise 95% interval; points are the "
               "study's band estimates at their assigned doses with reported 95% CIs."
               if d.get("bands") else
               "Relative-risk curve with its pointwise 95% interval.")
    parts.append(image(images.get("curve"), caption))
    return "".join(p for p in parts if p)


def bands_table(d: dict) -> str:
    """The study's bands with assigned dose, reported RR and CI, fitted RR."""
    unit = d.get("unit")
    u = f" ({unit})" if unit else ""
    fitted = list(d["curve"].get("fitted") or [])
    bands = d.get("bands") or []
    if not bands:
        if not fitted:
            return ""
        return table([f"Assigned dose{u}", "RR reported", "RR fitted"],
                     [[num(f["dose"]), num(f["rr_reported"]), num(f["rr_fitted"])]
                      for f in fitted], caption="Study bands: reported against fitted")
    rows, it = [], iter(fitted)
    for b in bands:
        ref = bool(b.get("reference"))
        fit = None if ref else next(it, None)
        limits = (f"{num(b['lower'])} to {num(b['upper'])}" if b.get("upper") is not None
                  else f"{num(b['lower'])} and above")
        rule = b.get("dose_rule")
        rows.append([limits, num(b.get("dose")) + (f" ({rule})" if rule else ""),
                     num(b.get("rr")) + (" (reference)" if ref else ""),
                     interval(b.get("ci_lower"), b.get("ci_upper"), num),
                     "1" if ref else num((fit or {}).get("rr_fitted"))])
    return table([f"Band{u}", f"Assigned dose{u}", "RR reported", "95% CI reported",
                  "RR fitted"], rows, caption="Study bands: reported against fitted")


def _source_text(source: Any) -> str:
    return {"fitted": "fitted to the study's category-level estimates",
            "entered": "entered as published"}.get(str(source), str(source or NA))


def _fit_text(c: dict) -> str:
    if c.get("q") is None:
        return ""
    p = c.get("p_value")
    text = (f"Goodness of fit: Q = {num(c['q'], 4)} on {c.get('df')} degrees of freedom"
            + (f", p = {num(p, 3)}." if p is not None else " (no test possible with 0 degrees "
               "of freedom)."))
    text += (" A p-value below 0.05 means the model does not describe the band estimates "
             "well; try another model.")
    return para(text)


def exposure_section(d: dict, images: dict) -> str:
    e, unit = d["exposure"], d.get("unit")
    params = e.get("parameters") or {}
    facts = [("Family", str(e["family"])), ("Source", str(e.get("source") or NA))]
    facts += [(k, _param_text(k, v, unit)) for k, v in params.items()]
    if e.get("mean") is not None:
        facts.append(("Mean exposure", with_unit(e["mean"], unit)))
    facts.append(("Unexposed share (at zero)", pct(e.get("unexposed", 0.0))))
    if e.get("n"):
        facts.append(("Measurements", f"{e['n']} ({e.get('detected', NA)} detected, "
                                      f"{e.get('censored', NA)} below a detection limit)"))
    if e.get("loglik") is not None:
        facts.append(("Log-likelihood / AIC", f"{num(e['loglik'], 6)} / {num(e.get('aic'), 6)}"))
    parts = [definition_list(facts)]
    fits = e.get("fits") or []
    if len(fits) > 1:
        parts.append(table(["Family", "Parameters", "Log-likelihood", "AIC", "Used"],
                           [[f["family"], _params_inline(f["parameters"], unit),
                             num(f.get("loglik"), 6), num(f.get("aic"), 6),
                             "yes" if f["family"] == e["family"] else ""] for f in fits],
                           caption="Families fitted (lowest AIC used)"))
    parts.append(notes_list(e.get("notes")))
    caption = ("Measured exposure (bars; non-detects marked at their detection limit) "
               "against the fitted density." if e.get("n") else
               "The exposure distribution used (no measurements behind it).")
    parts.append(image(images.get("exposure"), caption))
    parts.append(image(images.get("workers"),
                       "Cumulative exposure per worker (per-worker values in workers.csv)."))
    parts.append(image(images.get("qq"),
                       "Quantile-quantile plot: measured values against the fitted "
                       "distribution's quantiles at censored-data plotting positions (Helsel "
                       "2012); points near the line mean the family fits."))
    return "".join(p for p in parts if p)


def _param_text(name: str, value: Any, unit: str | None) -> str:
    return with_unit(value, unit) if PARAMETER_UNITS.get(name) else num(value, 5)


def _params_inline(params: dict, unit: str | None) -> str:
    return ", ".join(f"{k} = {_param_text(k, v, unit)}" for k, v in params.items())


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
        parts.append(table(["Scenario", "What changes", "PIF"],
                           [[s["name"], _scenario_text(s, unit), pct(s["pif"]["estimate"])]
                            for s in scen], caption="Scenarios"))
    parts.append(image(images.get("contribution"),
                       "Where the attributable cases come from: the density "
                       "f(x)(RR_m(x) \u2212 1)/E[RR_m(X)] along the exposure axis; its area "
                       "is the PAF."))
    return "".join(parts)


def _scenario_text(s: dict, unit: str | None) -> str:
    kind, v = s.get("kind"), s.get("value")
    if kind == "cap":
        return f"exposure capped at {with_unit(v, unit)}"
    if kind == "scale":
        return f"everyone's exposure multiplied by {num(v)}"
    if kind == "reduce_by":
        return f"everyone's exposure lowered by {with_unit(v, unit)}, not below the minimum-risk level"
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
                  "mean exposure under the fitted distribution."),
             table(header, rows, caption="Bands"),
             table(["Method", "PAF", "Difference from continuous"],
                   [[METHOD_NAMES.get(m["method"], m["method"]), pct(m["paf"]),
                     _signed_pct(m.get("difference"))] for m in methods]
                   + [["Continuous (this analysis)", pct(cat["continuous_paf"]), NA]],
                   caption="Categorical against continuous PAF")]
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


def _signed_pct(v: Any) -> str:
    if v is None:
        return NA
    return ("+" if v > 0 else "") + f"{100 * v:.3g} points"


def _at(seq: Any, i: int) -> Any:
    return None if seq is None or i >= len(seq) else seq[i]


def uncertainty_section(d: dict, images: dict) -> str:
    paf = d["paf"]
    if paf.get("lower") is None:
        return ""
    rows = [["PAF", pct(paf["estimate"]), interval(paf["lower"], paf["upper"]),
             pct(paf.get("mcse"), 2) if paf.get("mcse") is not None else NA]]
    for s in d.get("scenarios", []):
        p = s["pif"]
        rows.append([f"PIF, {s['name']}", pct(p["estimate"]), interval(p.get("lower"),
                                                                        p.get("upper")),
                     pct(p.get("mcse"), 2) if p.get("mcse") is not None else NA])
    unc = d.get("uncertainty") or {}
    parts = []
    if unc.get("draws"):
        parts.append(para(f"Intervals are the 2.5th and 97.5th percentiles of "
                          f"{unc['draws']} Monte Carlo draws"
                          + (f" (seed {unc['seed']})" if unc.get("seed") is not None else "")
                          + "; the Monte Carlo SE is the simulation error of the estimate."))
    sources = unc.get("sources") or []
    fixed = {"minimum_risk"} if d.get("minimum_risk_range") is None else set()
    if not d.get("burden") and not d.get("outcomes"):
        fixed.add("cases")
    names = [SOURCE_NAMES.get(str(x), str(x)) for x in sources
             if not isinstance(x, dict) and str(x) not in fixed]
    if names:
        parts.append(para("Sources of uncertainty drawn: " + "; ".join(names) + "."))
    parts.append(table(["Quantity", "Estimate", "95% interval", "Monte Carlo SE"], rows))
    parts.append(image(images.get("paf_draws"), "Monte Carlo draws of the PAF."))
    widths = unc.get("contributions") or [x for x in sources if isinstance(x, dict)]
    if widths:
        keys = list(dict.fromkeys(k for r in widths for k in r))
        parts.append(table([k.replace("_", " ") for k in keys],
                           [[_record_cell(k, r.get(k)) for k in keys] for r in widths],
                           caption="Interval with one source of uncertainty at a time"))
    return "".join(parts)


SOURCE_NAMES = {
    "curve": "the curve's coefficients (their fitted normal distribution, or the curve's own "
             "draws)",
    "exposure": "the exposure distribution's parameters (asymptotic normal of the fit; "
                "bootstrap for the empirical path)",
    "minimum_risk": "the minimum-risk level (uniform over its range)",
    "cases": "Poisson variation of the observed cases",
}


def _cell(v: Any) -> str:
    if isinstance(v, dict) and "estimate" in v:
        return f"{num(v['estimate'])} ({interval(v.get('lower'), v.get('upper'), num)})"
    return num(v) if isinstance(v, (int, float)) or v is None else str(v)


def burden_section(d: dict, images: dict) -> str:
    blocks = [(o.get("name"), o.get("burden", o)) for o in d.get("outcomes") or []]
    if not blocks and d.get("burden"):
        blocks = [(None, d["burden"])]
    parts = []
    for name, burden in blocks:
        if not burden or "strata" not in burden:
            continue
        rows = [[s["stratum"], num(s.get("cases")), *_est_cells(s["attributable"]),
                 pct(_estimate(s.get("paf")))] for s in burden["strata"]]
        total = burden.get("total")
        if total:
            rows.append(["Total", num(total.get("cases")), *_est_cells(total["attributable"]),
                         pct(_estimate(total.get("paf")))])
        parts.append(table(["Stratum", "Cases", "Attributable cases", "95% interval", "PAF"],
                           rows, caption=f"Outcome: {name}" if name else "Attributable cases"))
    if not parts:
        return ""
    parts.append(image(images.get("burden"), "Attributable cases by stratum with 95% intervals."))
    return "".join(parts)


def _estimate(v: Any) -> Any:
    return v.get("estimate") if isinstance(v, dict) else v


def _est_cells(v: Any) -> list[str]:
    if isinstance(v, dict):
        return [num(v.get("estimate")), interval(v.get("lower"), v.get("upper"), num)]
    return [num(v), NA]


#: Optional comparison tables: (where in the results dictionary, caption).
COMPARISONS = (
    (("model_comparison",), "PAF under each curve model"),
    (("curve", "dose_sensitivity"), "Sensitivity to the dose assigned to each band"),
    (("exposure", "comparison"), "Exposure fits compared (fitted families, empirical, "
                                 "substitution of non-detects)"),
)


def comparison_section(d: dict) -> str:
    """Tables of optional comparisons (lists of records) when present.

    Keys named like a fraction (containing ``paf``, ``pif`` or ``share``)
    are shown as percentages; an estimate record shows its interval.
    """
    parts = []
    for path, caption in COMPARISONS:
        records = d
        for key in path:
            records = records.get(key) if isinstance(records, dict) else None
        if isinstance(records, list) and records and isinstance(records[0], dict):
            keys = list(dict.fromkeys(k for r in records for k in r))
            parts.append(table([k.replace("_", " ") for k in keys],
                               [[_record_cell(k, r.get(k)) for k in keys] for r in records],
                               caption=caption))
    return "".join(parts)


def _record_cell(key: str, v: Any) -> str:
    fraction = any(w in key.lower() for w in ("paf", "pif", "share"))
    fmt = pct if fraction else num
    if isinstance(v, dict):
        if "estimate" in v:
            text = fmt(v["estimate"])
            if v.get("lower") is not None and v.get("upper") is not None:
                text += f" ({interval(v['lower'], v['upper'], fmt)})"
            return text
        return ", ".join(f"{k} = {num(x) if isinstance(x, (int, float)) else x}"
                         for k, x in v.items())
    if isinstance(v, (list, tuple)):
        return ", ".join(num(x) if isinstance(x, (int, float)) else str(x) for x in v)
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        return fmt(v)
    return NA if v is None else str(v)


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

        images = render_figures(results, d) if figures else {}
    title = str(d.get("title") or "Attributable fraction analysis")
    date = date or report_date()
    sections = [
        section("summary", "Key numbers",
                para(computed_paragraph(d)) + key_numbers(d) + warnings_block(d)
                + notes_list(d.get("notes"), "How the inputs were read:")),
        section("curve", "Relative-risk curve", curve_section(d, images)),
        section("exposure", "Exposure distribution", exposure_section(d, images)),
        section("attribution", "Attribution against the minimum-risk level",
                attribution_section(d, images)),
        section("categorical", "Continuous against categorical",
                categorical_section(d, images)),
        section("comparisons", "Comparisons", comparison_section(d)),
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
            f"<header><h1>{escape(title)}</h1><p class='meta'>{escape(meta)}</p></header>"
            + "".join(sections) + "</main></body></html>\n")
