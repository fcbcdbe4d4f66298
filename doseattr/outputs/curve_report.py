"""The report's relative-risk curve section: the curve, its fit to the
study's bands, the models compared, and the sensitivity to dose assignment.

Everything is read from the results dictionary (``Results.to_dict()``);
figures are passed in as PNG bytes by name.
"""

from __future__ import annotations

from typing import Any

from doseattr.core.curves.fit import POOR_FIT_P
from doseattr.outputs.markup import (
    NA,
    definition_list,
    image,
    interval,
    notes_list,
    num,
    para,
    pct,
    signed_points,
    table,
    warning_box,
    with_unit,
)
from doseattr.outputs.records import used_dose_variant
from doseattr.outputs.text import COVARIANCE_MEANING


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
    parts.append(bands_table(d))
    parts.append(fit_block(c))
    if c.get("nonlinearity_p") is not None:
        parts.append(para(f"Test of non-linearity (all non-linear spline coefficients zero, "
                          f"Wald test): p = {num(c['nonlinearity_p'], 3)}. "
                          + _nonlinearity_meaning(c["nonlinearity_p"])))
    parts.append(notes_list(c.get("notes")))
    others = [str(v["label"]) for v in d.get("model_comparison") or []
              if v.get("label") != c["model"] and v.get("coefficients") is not None]
    caption = ("Fitted relative-risk curve with its pointwise 95% interval; points are the "
               "study's band estimates at their assigned doses with reported 95% CIs."
               if d.get("bands") else "Relative-risk curve with its pointwise 95% interval.")
    if others:
        caption += " Dashed lines: the other models compared (" + ", ".join(others) + ")."
    parts.append(image(images.get("curve"), caption))
    parts.append(model_comparison_block(d, images))
    parts.append(dose_sensitivity_block(d))
    return "".join(p for p in parts if p)


def bands_table(d: dict) -> str:
    """The study's bands with assigned dose, reported RR and CI, fitted RR."""
    unit = d.get("unit")
    u = f" ({unit})" if unit else ""
    fitted = list(d["curve"].get("fitted") or [])
    bands = d.get("bands") or []
    caption = "Study bands: reported against fitted RR"
    if not bands:
        if not fitted:
            return ""
        return table([f"Assigned dose{u}", "RR reported", "RR fitted"],
                     [[num(f["dose"]), num(f["rr_reported"]), num(f["rr_fitted"])]
                      for f in fitted], caption=caption)
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
                  "RR fitted"], rows, caption=caption)


def poor_fit(p_value: Any) -> bool:
    """A goodness-of-fit p-value below ``POOR_FIT_P`` (0.05, the core's
    threshold; common practice)."""
    return p_value is not None and p_value < POOR_FIT_P


def fit_block(c: dict) -> str:
    """Q on df with its p-value, and a warning box when the fit is poor."""
    if c.get("q") is None:
        return ""
    p = c.get("p_value")
    text = (f"Goodness of fit of the {c.get('model')} model to the band estimates: "
            f"Q = {num(c['q'], 4)} on {c.get('df')} degrees of freedom"
            + (f", p = {num(p, 3)}." if p is not None else " (no test possible with 0 degrees "
               "of freedom)."))
    if not poor_fit(p):
        return para(text + f" A p-value below {POOR_FIT_P:g} would mean the model does not "
                    "describe the band estimates well.")
    return para(text) + warning_box(
        [f"The {c.get('model')} model fits the study's band estimates poorly (p = {num(p, 3)} "
         f"< {POOR_FIT_P:g}): the fitted RRs above depart from the reported ones by more than "
         "their uncertainty allows. Prefer another model (for example a spline, or the models "
         "in compare_models) before using this PAF."], "Poor fit:")


def _nonlinearity_meaning(p: float) -> str:
    if p < 0.05:
        return "The band estimates depart from a straight line on the log-RR scale."
    return "The band estimates give no clear evidence against a straight line on the log-RR scale."


def _source_text(source: Any) -> str:
    return {"fitted": "fitted to the study's category-level estimates",
            "entered": "entered as published"}.get(str(source), str(source or NA))


def _coefficients(v: dict) -> str:
    coef, ses = v.get("coefficients") or [], v.get("standard_errors") or []
    return ", ".join(f"{num(b, 4)} ({num(se, 3)})" for b, se in zip(coef, ses)) or NA


def _fit_cells(v: dict) -> list[str]:
    q, p = v.get("q"), v.get("p_value")
    flag = " (poor fit)" if poor_fit(p) else ""
    return [NA if q is None else f"{num(q, 3)} / {v.get('df')}", num(p, 3) + flag]


def model_comparison_block(d: dict, images: dict) -> str:
    """The PAF under each model of ``compare_models``, with each model's
    fit, and the models drawn side by side."""
    variants = d.get("model_comparison") or []
    if not variants:
        return ""
    main, used = d["paf"]["estimate"], d["curve"]["model"]
    rows = []
    for v in variants:
        is_used = v.get("label") == used
        label = str(v.get("label")) + (" (used)" if is_used else "")
        rows.append([label, _coefficients(v), *_fit_cells(v), num(v.get("nonlinearity_p"), 3),
                     pct(v.get("paf")), _difference(v.get("paf"), main, is_used),
                     v.get("problem") or ""])
    header = ["Model", "Coefficients (SE)", "Q / df", "p (fit)", "p (non-linearity)", "PAF",
              "Difference from the PAF used", "Problem"]
    parts = [_table_without_empty_last(header, rows, "PAF under each curve model fitted to the "
                                                     "same bands (point estimates)")]
    poor = [v["label"] for v in variants if poor_fit(v.get("p_value"))]
    if poor:
        parts.append(warning_box([f"Poor fit to the band estimates (p < {POOR_FIT_P:g}): "
                                  + ", ".join(map(str, poor)) + "."], "Poor fit:"))
    parts.append(image(images.get("models"),
                       "Each model compared, side by side on the same axes: the fitted curve "
                       "with its pointwise 95% interval and the study's band estimates; the "
                       "panel title gives the PAF under that model."))
    return "".join(parts)


def dose_sensitivity_block(d: dict) -> str:
    """The PAF when each band's dose is assigned by another rule."""
    variants = d.get("dose_sensitivity") or []
    if not variants:
        return ""
    unit, main = d.get("unit"), d["paf"]["estimate"]
    u = f" ({unit})" if unit else ""
    rows = []
    for v in variants:
        label = DOSE_RULES.get(str(v.get("label")), str(v.get("label")))
        if used_dose_variant(d, v):
            label += " (used)"
        doses = ", ".join(num(x) for x in v.get("doses") or []) or NA
        rows.append([label, doses, _coefficients(v), *_fit_cells(v), pct(v.get("paf")),
                     _difference(v.get("paf"), main, used_dose_variant(d, v)),
                     v.get("problem") or ""])
    header = ["Dose rule", f"Assigned doses{u}", "Coefficients (SE)", "Q / df", "p (fit)", "PAF",
              "Difference from the PAF used", "Problem"]
    return _table_without_empty_last(header, rows, "Sensitivity to the dose assigned to each "
                                                   "band (point estimates)")


def _difference(paf: Any, main: float, used: bool) -> str:
    return NA if used or paf is None else signed_points(paf - main)


def _table_without_empty_last(header: list[str], rows: list[list[str]], caption: str) -> str:
    """The table, without its last column (problems) when no row has one."""
    if not any(r[-1] for r in rows):
        header, rows = header[:-1], [r[:-1] for r in rows]
    return table(header, rows, caption=caption)


#: How each dose-assignment rule reads in the report.
DOSE_RULES = {
    "given": "the table's dose column",
    "midpoint": "band midpoint",
    "band-mean": "band mean under the exposure distribution",
    "band-median": "band median under the exposure distribution",
}
