"""The report's exposure section: the distribution used, every family
fitted with its likelihood and the PAF it gives, the substitution of
non-detects (for comparison only), and work histories.

Everything is read from the results dictionary (``Results.to_dict()``);
figures are passed in as PNG bytes by name.
"""

from __future__ import annotations

from typing import Any

from doseattr.outputs.markup import (
    NA,
    definition_list,
    image,
    notes_list,
    num,
    para,
    pct,
    signed_points,
    table,
    with_unit,
)
from doseattr.outputs.records import substitution
from doseattr.outputs.text import PARAMETER_UNITS


def exposure_section(d: dict, images: dict) -> str:
    e, unit = d["exposure"], d.get("unit")
    empirical = e["family"] == "empirical"
    params = e.get("parameters") or {}
    family = ("empirical (the measured values with their weights; no fitted family)"
              if empirical else str(e["family"]))
    source = "work histories" if d.get("workers") else str(e.get("source") or NA)
    facts = [("Family", family), ("Source", source)]
    facts += [(k, param_text(k, v, unit)) for k, v in params.items()]
    if e.get("mean") is not None:
        facts.append(("Mean exposure", with_unit(e["mean"], unit)))
    facts.append(("Unexposed share (at zero)", pct(e.get("unexposed", 0.0))))
    if e.get("source") == "bands":
        facts.append(("Data", (f"{e['n']:g} people counted in bands" if e.get("n")
                               else "shares of people in bands")
                      + " (grouped maximum likelihood)"))
    elif e.get("n") and d.get("workers"):
        facts.append(("Data", f"cumulative exposures of {e['n']} workers, from their work "
                              "histories"))
    elif e.get("n"):
        facts.append(("Measurements", f"{e['n']} ({e.get('detected', NA)} detected, "
                                      f"{e.get('censored', NA)} below a detection limit)"))
    if e.get("loglik") is not None:
        facts.append(("Log-likelihood / AIC", f"{num(e['loglik'], 6)} / {num(e.get('aic'), 6)}"))
    if gof_text(e.get("goodness_of_fit")):
        facts.append(("Goodness of fit (detected values)", gof_text(e["goodness_of_fit"])))
    parts = [definition_list(facts)]
    if empirical:
        parts.append(para(EMPIRICAL_TEXT))
    parts.append(families_table(d))
    parts.append(substitution_block(d))
    parts.append(notes_list(e.get("notes")))
    parts.append(image(images.get("exposure"), exposure_caption(d)))
    parts.append(image(images.get("qq"), QQ_CAPTION))
    parts.append(workers_block(d, images))
    return "".join(p for p in parts if p)


EMPIRICAL_TEXT = (
    "No distribution was fitted: the PAF is a weighted mean over the measured values, "
    "PAF = 1 \u2212 1 / E[RR_m(X)] with E[RR_m(X)] = u + (1 \u2212 u) \u03a3 w_i RR_m(x_i) "
    "(weights w_i summing to 1, u the unexposed share). Nothing is assumed about exposures "
    "between or beyond the values measured; any family drawn below was fitted to the same "
    "values for comparison only.")

QQ_CAPTION = (
    "Quantile-quantile plot: measured values against the fitted distribution's quantiles at "
    "censored-data plotting positions (Helsel 2012); points near the line mean the family "
    "fits. Non-detects are drawn at their detection limit (their true value lies below).")


def exposure_caption(d: dict) -> str:
    e = d["exposure"]
    if e["family"] == "empirical":
        return ("The measured values (weighted histogram; areas are weighted shares); the PAF "
                "is a weighted mean over them, with no fitted density. Dotted lines, where "
                "present, are families fitted to the same values for comparison only.")
    if not e.get("n"):
        return "The exposure distribution used (no measurements behind it)."
    many = len(e.get("fits") or []) > 1
    if e.get("source") == "bands":
        return ("Counts in bands drawn as bars over each band (bar areas are the bands' shares) "
                "against the fitted density.")
    if d.get("workers"):
        return ("Workers' cumulative exposure (bars) against the fitted density"
                + (" used (solid) and every other family fitted (dashed)." if many else "."))
    return ("Measured exposure: detected values as bars (areas are weighted shares), values "
            "below a detection limit as triangles at their limit; against the fitted density"
            + (" used (solid) and every other family fitted (dashed)." if many else "."))


def param_text(name: str, value: Any, unit: str | None) -> str:
    return with_unit(value, unit) if PARAMETER_UNITS.get(name) else num(value, 5)


def params_inline(params: dict, unit: str | None) -> str:
    return ", ".join(f"{k} = {param_text(k, v, unit)}" for k, v in (params or {}).items()) or NA


def families_table(d: dict) -> str:
    """Every family fitted (log-likelihood, AIC, difference in AIC from the
    best) beside the PAF it gives (``exposure_comparison``), the empirical
    distribution of the values included."""
    e, unit = d["exposure"], d.get("unit")
    fits = list(e.get("fits") or [])
    compared = {r.get("family"): r for r in d.get("exposure_comparison") or []}
    if len(fits) < 2 and len(compared) < 2:
        return ""
    names = [f["family"] for f in fits] + [k for k in compared if k not in
                                           {f["family"] for f in fits}]
    by_family = {f["family"]: f for f in fits}
    aics = [f["aic"] for f in fits if f.get("aic") is not None]
    best = min(aics) if aics else None
    main = d["paf"]["estimate"]
    rows = []
    for name in names:
        f, c = by_family.get(name, {}), compared.get(name, {})
        aic = f.get("aic", c.get("aic"))
        paf = c.get("paf")
        used = name == e["family"]
        rows.append([name + (" (used)" if used else ""),
                     params_inline(f.get("parameters") or c.get("parameters"), unit),
                     num(f.get("loglik"), 6), num(aic, 6), gof_text(f.get("goodness_of_fit")) or NA,
                     NA if aic is None or best is None else num(aic - best, 3),
                     pct(paf), NA if used or paf is None else signed_points(paf - main),
                     c.get("problem") or ""])
    if e.get("family") == "empirical":
        caption = ("Parametric families fitted to the same values for comparison only, and the "
                   "PAF under each (point estimates); the analysis uses the values themselves")
    elif len(fits) > 1:
        caption = ("Exposure families fitted to the measurements (lowest AIC used) and the PAF "
                   "under each (point estimates)")
    else:
        caption = "PAF under each description of the measurements (point estimates)"
    header = ["Family", "Parameters", "Log-likelihood", "AIC", "Goodness of fit", "\u0394AIC", "PAF",
              "Difference from the PAF used", "Note"]
    if not any(r[-1] for r in rows):
        header, rows = header[:-1], [r[:-1] for r in rows]
    return table(header, rows, caption=caption)


def substitution_block(d: dict) -> str:
    """Non-detects replaced by a fraction of their detection limit, shown
    only to compare with the censored maximum-likelihood fit used."""
    rows_in = substitution(d)
    if not rows_in:
        return ""
    unit = d.get("unit")
    rows = [[_fraction_text(r.get("fraction")), params_inline(r.get("parameters"), unit),
             pct(r.get("paf")), signed_points(r.get("difference")), r.get("problem") or ""]
            for r in rows_in]
    header = ["Non-detects replaced by", "Parameters fitted", "PAF",
              "Difference from the censored fit", "Note"]
    if not any(r[-1] for r in rows):
        header, rows = header[:-1], [r[:-1] for r in rows]
    return (table(header, rows, caption="Substituting non-detects (for comparison only)")
            + para("The analysis treats values below a detection limit as left-censored in "
                   "the likelihood. Replacing them by a fixed fraction of the limit, a common "
                   "shortcut, is shown only to say how much that shortcut would change the "
                   "PAF; it is not used for any result (Helsel 2012 explains why "
                   "substitution biases the fit)."))


def _fraction_text(f: Any) -> str:
    if f is None:
        return NA
    if abs(f - 2 ** -0.5) < 1e-9:
        return "limit / \u221a2"
    if f == 0:
        return "zero"
    if f == 1:
        return "the limit itself"
    return f"{num(f, 3)} \u00d7 limit"


def workers_block(d: dict, images: dict) -> str:
    """Cumulative exposure from work histories: a count, the range, and
    the histogram."""
    workers = [w for w in d.get("workers") or [] if w.get("cumulative") is not None]
    if not workers:
        return ""
    unit = d.get("unit")
    values = sorted(w["cumulative"] for w in workers)
    text = (f"Cumulative exposure was computed from the work histories of {len(values)} "
            f"workers (intensity \u00d7 time in each job, summed; per-worker values in "
            f"workers.csv): from {with_unit(values[0], unit)} to {with_unit(values[-1], unit)}.")
    return para(text) + image(images.get("workers"),
                              "Histogram of the workers' cumulative exposure.")


def gof_text(g: dict | None) -> str:
    """``"Kolmogorov-Smirnov D = 0.081 (p = 0.62, approximate)"`` or
    ``"probability plot correlation r = 0.983"``; empty when not computed."""
    if not g or not g.get("test") or g.get("statistic") is None:
        return ""
    if g["test"] == "Kolmogorov-Smirnov":
        return f"Kolmogorov-Smirnov D = {g['statistic']:.3g} (p = {g['p_value']:.2g}, approximate)"
    return f"{g['test']} r = {g['statistic']:.4g}"
