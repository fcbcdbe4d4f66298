"""The report's relative-risk curve section: the curve, its fit to the
study's bands, the models compared, and the sensitivity to dose assignment.

Everything is read from the run's :class:`~doseattr.results.CurveSection`;
figures are passed in as PNG bytes by name.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from doseattr.core.curves.base import Curve
from doseattr.core.curves.fit import POOR_FIT_P
from doseattr.outputs.markup import (
    NA,
    definition_list,
    figure,
    finite,
    interval,
    notes_list,
    num,
    para,
    pct,
    signed_points,
    table,
    warning_box,
    with_unit,
    worded,
)
from doseattr.outputs.pooling_report import pooling_block
from doseattr.outputs.text import COVARIANCE_MEANING
from doseattr.results import BandTable, CurveSection, CurveVariant


def curve_section(s: CurveSection, unit: str | None, images: Mapping[str, bytes], *,
                  paf: float) -> str:
    """The curve section; ``paf`` is the analysis's PAF (point estimate),
    against which the models and dose rules compared are set."""
    c = s.curve
    names = list(c.model.param_names) or [f"b{i}" for i in range(len(c.coef))]
    facts = [("Model", c.model.name), ("Formula", c.model.describe() or c.model.name),
             ("Reference dose", with_unit(float(c.model.reference_dose), unit)),
             ("Source", _source_text(c.source))]
    if c.max_dose is not None:
        facts.append(("RR held flat beyond", with_unit(float(c.max_dose), unit)))
    else:
        facts.append(("Beyond the data", "the model formula is extended without limit"))
    if c.data_max is not None:
        facts.append(("Highest dose with data", with_unit(float(c.data_max), unit)))
    parts = [definition_list(facts),
             table(["Coefficient", "Estimate", "Standard error"],
                   [[n, num(float(b), 5), num(se, 4)]
                    for n, b, se in zip(names, c.coef, standard_errors(c))],
                   caption="Coefficients")]
    method = None if c.fit is None else c.fit.covariance_method
    if method:
        parts.append(para(f"Covariance of the study's log RRs: {method}. "
                          + worded(COVARIANCE_MEANING, method, "")))
    elif c.source == "entered":
        parts.append(para(COVARIANCE_MEANING["entered"]))
    parts.append(pooling_block(s.pooling, unit, images))
    parts.append(bands_table(s, unit))
    parts.append(fit_block(c))
    if s.nonlinearity_p is not None:
        parts.append(para(f"Test of non-linearity (all non-linear spline coefficients zero, "
                          f"Wald test): p = {num(float(s.nonlinearity_p), 3)}. "
                          + _nonlinearity_meaning(s.nonlinearity_p)))
    parts.append(notes_list(c.notes))
    others = [v.label for v in s.model_comparison if not v.used and v.curve is not None]
    caption = ("Fitted relative-risk curve with its pointwise 95% interval; points are the "
               "study's band estimates at their assigned doses with reported 95% CIs."
               if _has_bands(s.bands) else "Relative-risk curve with its pointwise 95% interval.")
    if s.pooling is not None and s.pooling.predict:
        caption += (" Pooled curve (predict = true): the interval is that of a new "
                    "population's curve.")
    if others:
        caption += " Dashed lines: the other models compared (" + ", ".join(others) + ")."
    parts.append(figure(images, "curve", caption))
    parts.append(model_comparison_block(s, images, paf=paf))
    parts.append(dose_sensitivity_block(s, unit, paf=paf))
    return "".join(p for p in parts if p)


def standard_errors(c: Curve) -> list[float]:
    """Square roots of the covariance's diagonal (negative rounding noise
    read as zero)."""
    return [float(v) for v in np.sqrt(np.maximum(np.diag(c.cov), 0.0))]


def _has_bands(b: BandTable | None) -> bool:
    return b is not None and len(b.rr) > 0


def bands_table(s: CurveSection, unit: str | None) -> str:
    """The study's bands with assigned dose, reported RR and CI, fitted RR."""
    u = f" ({unit})" if unit else ""
    fit = s.curve.fit
    fitted = [] if fit is None else [
        (float(x), math.exp(y), math.exp(f))
        for x, y, f in zip(fit.doses, fit.log_rr, fit.fitted_log_rr, strict=True)]
    caption = "Study bands: reported against fitted RR"
    b = s.bands
    if b is None or not _has_bands(b):
        if not fitted:
            return ""
        return table([f"Assigned dose{u}", "RR reported", "RR fitted"],
                     [[num(x), num(rr), num(rf)] for x, rr, rf in fitted], caption=caption)
    rows, it = [], iter(fitted)
    for i in range(len(b.rr)):
        ref = bool(b.reference[i])
        row_fit = None if ref else next(it, None)
        upper = finite(b.upper[i])
        limits = (f"{num(float(b.lower[i]))} to {num(upper)}" if upper is not None
                  else f"{num(float(b.lower[i]))} and above")
        rule = b.dose_rule[i]
        rows.append([limits, num(float(b.dose[i])) + (f" ({rule})" if rule else ""),
                     num(float(b.rr[i])) + (" (reference)" if ref else ""),
                     interval(finite(b.ci_lower[i]), finite(b.ci_upper[i]), num),
                     "1" if ref else num(None if row_fit is None else row_fit[2])])
    return table([f"Band{u}", f"Assigned dose{u}", "RR reported", "95% CI reported",
                  "RR fitted"], rows, caption=caption)


def poor_fit(p_value: float | None) -> bool:
    """A goodness-of-fit p-value below ``POOR_FIT_P`` (0.05, the core's
    threshold; common practice)."""
    return p_value is not None and p_value < POOR_FIT_P


def fit_block(c: Curve) -> str:
    """Q on df with its p-value, and a warning box when the fit is poor."""
    if c.fit is None:
        return ""
    p = c.fit.p_value
    model = c.model.name
    text = (f"Goodness of fit of the {model} model to the band estimates: "
            f"Q = {num(float(c.fit.q), 4)} on {int(c.fit.df)} degrees of freedom"
            + (f", p = {num(float(p), 3)}." if p is not None else " (no test possible with 0 "
               "degrees of freedom)."))
    if not poor_fit(p):
        return para(text + f" A p-value below {POOR_FIT_P:g} would mean the model does not "
                    "describe the band estimates well.")
    return para(text) + warning_box(
        [f"The {model} model fits the study's band estimates poorly (p = {num(p, 3)} "
         f"< {POOR_FIT_P:g}): the fitted RRs above depart from the reported ones by more than "
         "their uncertainty allows. Prefer another model (for example a spline, or the models "
         "in compare_models) before using this PAF."], "Poor fit:")


def _nonlinearity_meaning(p: float) -> str:
    if p < 0.05:
        return "The band estimates depart from a straight line on the log-RR scale."
    return "The band estimates give no clear evidence against a straight line on the log-RR scale."


def _source_text(source: str | None) -> str:
    return worded({"fitted": "fitted to the study's category-level estimates",
                   "pooled": "pooled from several studies' fitted curves",
                   "entered": "entered as published"}, str(source), str(source or NA))


def _coefficients(v: CurveVariant) -> str:
    if v.curve is None:
        return NA
    return ", ".join(f"{num(float(b), 4)} ({num(se, 3)})"
                     for b, se in zip(v.curve.coef, standard_errors(v.curve))) or NA


def _fit_cells(v: CurveVariant) -> list[str]:
    fit = None if v.curve is None else v.curve.fit
    if fit is None:
        return [NA, num(None, 3)]
    p = fit.p_value
    flag = " (poor fit)" if poor_fit(p) else ""
    return [f"{num(float(fit.q), 3)} / {int(fit.df)}", num(p, 3) + flag]


def _variant_p(v: CurveVariant) -> float | None:
    fit = None if v.curve is None else v.curve.fit
    return None if fit is None else fit.p_value


def model_comparison_block(s: CurveSection, images: Mapping[str, bytes], *, paf: float) -> str:
    """The PAF under each model of ``compare_models``, with each model's
    fit, and the models drawn side by side."""
    variants = s.model_comparison
    if not variants:
        return ""
    rows = []
    for v in variants:
        label = v.label + (" (used)" if v.used else "")
        lin = v.nonlinearity_p
        rows.append([label, _coefficients(v), *_fit_cells(v), num(lin, 3),
                     pct(v.paf), _difference(v.paf, paf, v.used), v.problem or ""])
    header = ["Model", "Coefficients (SE)", "Q / df", "p (fit)", "p (non-linearity)", "PAF",
              "Difference from the PAF used", "Problem"]
    parts = [_table_without_empty_last(header, rows, "PAF under each curve model fitted to the "
                                                     "same bands (point estimates)")]
    poor = [v.label for v in variants if poor_fit(_variant_p(v))]
    if poor:
        parts.append(warning_box([f"Poor fit to the band estimates (p < {POOR_FIT_P:g}): "
                                  + ", ".join(poor) + "."], "Poor fit:"))
    parts.append(figure(images, "models",
                        "Each model compared, side by side on the same axes: the fitted curve "
                        "with its pointwise 95% interval and the study's band estimates; the "
                        "panel title gives the PAF under that model."))
    return "".join(parts)


def dose_sensitivity_block(s: CurveSection, unit: str | None, *, paf: float) -> str:
    """The PAF when each band's dose is assigned by another rule; the rule
    the analysis used (``CurveVariant.used``) is marked."""
    variants = s.dose_sensitivity
    if not variants:
        return ""
    u = f" ({unit})" if unit else ""
    rows = []
    for v in variants:
        label = worded(DOSE_RULES, v.label) + (" (used)" if v.used else "")
        doses = NA if v.doses is None else ", ".join(num(float(x)) for x in v.doses) or NA
        rows.append([label, doses, _coefficients(v), *_fit_cells(v), pct(v.paf),
                     _difference(v.paf, paf, v.used), v.problem or ""])
    header = ["Dose rule", f"Assigned doses{u}", "Coefficients (SE)", "Q / df", "p (fit)", "PAF",
              "Difference from the PAF used", "Problem"]
    return _table_without_empty_last(header, rows, "Sensitivity to the dose assigned to each "
                                                   "band (point estimates)")


def _difference(value: float | None, main: float, used: bool) -> str:
    return NA if used or value is None else signed_points(value - main)


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
