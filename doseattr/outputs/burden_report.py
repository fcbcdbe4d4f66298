"""The report's uncertainty, attributable-cases and outcomes sections.

Every estimate is shown with its 95% interval where the results hold one.
Everything is read from the results dictionary (``Results.to_dict()``);
figures are passed in as PNG bytes by name.
"""

from __future__ import annotations

from typing import Any

from doseattr.outputs.markup import (
    NA,
    estimate_text,
    image,
    interval,
    num,
    para,
    pct,
    table,
    with_unit,
)
from doseattr.outputs.records import (
    burden_blocks,
    estimate_of,
    scenario_effects,
    width_by_source,
)

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


def cases(v: Any) -> str:
    """A number of cases: whole numbers above 100, else 3 significant figures."""
    if v is None:
        return NA
    return f"{v:,.0f}" if abs(v) >= 100 else num(v, 3)


def uncertainty_section(d: dict, images: dict) -> str:
    paf = d["paf"]
    if paf.get("lower") is None:
        return ""
    rows = [["PAF", pct(paf["estimate"]), interval(paf["lower"], paf["upper"]),
             pct(paf.get("mcse"), 2)]]
    for s in d.get("scenarios", []):
        p = s["pif"]
        rows.append([f"PIF, {s['name']}", pct(p["estimate"]),
                     interval(p.get("lower"), p.get("upper")), pct(p.get("mcse"), 2)])
    unc = d.get("uncertainty") or {}
    parts = []
    if unc.get("draws"):
        parts.append(para(f"Intervals are the 2.5th and 97.5th percentiles of "
                          f"{unc['draws']} Monte Carlo draws"
                          + (f" (seed {unc['seed']})" if unc.get("seed") is not None else "")
                          + "; the Monte Carlo SE is the simulation error of the estimate."))
    names = [SOURCE_NAMES.get(str(x), str(x)) for x in unc.get("sources") or []
             if str(x) not in _fixed_sources(d)]
    if names:
        parts.append(para("Sources of uncertainty drawn: " + "; ".join(names) + "."))
    if d.get("outcomes"):
        parts.append(para("The PAF and PIFs below are those of the results above the outcomes "
                          "(see the notes under Key numbers); each outcome's own intervals are "
                          "in the outcomes table."))
    parts.append(table(["Quantity", "Estimate", "95% interval", "Monte Carlo SE"], rows))
    parts.append(image(images.get("paf_draws"),
                       "Monte Carlo draws of the PAF, with the estimate and the 2.5th and "
                       "97.5th percentiles."))
    parts.append(width_block(d))
    return "".join(parts)


def _fixed_sources(d: dict) -> set[str]:
    """Sources named by the core but not varied in this run."""
    fixed = {"minimum_risk"} if d.get("minimum_risk_range") is None else set()
    if not burden_blocks(d):
        fixed.add("cases")
    return fixed


def width_block(d: dict) -> str:
    """Which input drives the width of the interval: one table for the
    analysis, or one per outcome when there are several."""
    outcomes = [o for o in d.get("outcomes") or [] if width_by_source(o)]
    tables = ([width_table(o, f"{o.get('name')}: ") for o in outcomes] if outcomes
              else [width_table(d, "")])
    if not any(tables):
        return ""
    what = ("the total PAF over the strata (total attributable over total cases)"
            if burden_blocks(d) else "the PAF")
    return "".join(tables) + para(
        f"Each row reruns the Monte Carlo draws with one source of uncertainty varying and the "
        f"others held at their estimates, and gives the 95% interval of {what}. The widths "
        f"of the rows need not add up to the full width.")


def width_table(d: dict, prefix: str) -> str:
    """The overall PAF's interval with one source of uncertainty varied at a
    time, widest first, beside the interval with all of them
    (``uncertainty.width_all``); with strata also the interval of the total
    attributable cases. The overall PAF is the burden's total PAF when the
    analysis has strata, else the PAF."""
    unc = d.get("uncertainty") or {}
    rows_in = sorted(width_by_source(d), key=lambda r: -(r.get("width") or 0.0))
    if not rows_in:
        return ""
    full = unc.get("width_all") if isinstance(unc.get("width_all"), dict) else None
    if full:
        rows_in.append({**full, "source": "all sources together"})
    width = (full or {}).get("width")
    cases_too = any(isinstance(r.get("attributable"), dict) for r in rows_in)
    rows = []
    for r in rows_in:
        row = [SOURCE_LABELS.get(str(r.get("source")), str(r.get("source"))),
               interval(r.get("lower"), r.get("upper")), _points(r.get("width")),
               NA if not width or r.get("width") is None else f"{100 * r['width'] / width:.0f}%"]
        if cases_too:
            att = r.get("attributable") or {}
            row += [interval(att.get("lower"), att.get("upper"), cases)]
        rows.append(row)
    header = ["Source varied alone", "95% interval of the PAF", "Width",
              "Share of the full width"] + (["Attributable cases, 95% interval"]
                                            if cases_too else [])
    return table(header, rows, caption=f"{prefix}which input drives the width of the interval "
                                       "(each source varied alone, widest first)")


def _points(v: Any) -> str:
    return NA if v is None else f"{100 * v:.3g} points"


def burden_section(d: dict, images: dict) -> str:
    """Per outcome: attributable cases and PAF by stratum and in total, and
    the cases each scenario averts, all with intervals."""
    parts = []
    for name, burden in burden_blocks(d):
        prefix = f"{name}: " if name else ""
        parts.append(strata_table(burden, f"{prefix}attributable cases by stratum"))
        parts.append(scenarios_table(burden, f"{prefix}cases averted by each scenario"))
    if not parts:
        return ""
    parts.append(image(images.get("burden"),
                       "Attributable cases by stratum (left) and, in total, all cases "
                       "attributable to exposure above the minimum-risk level and the cases "
                       "each scenario averts (right); whiskers are 95% intervals."))
    parts.append(para("Totals are sums over the strata draw by draw, so their intervals are "
                      "consistent with the strata; the total PAF is the total attributable over "
                      "the total cases."))
    return "".join(p for p in parts if p)


def strata_table(burden: dict, caption: str) -> str:
    rows = [_stratum_row(str(s.get("stratum")), s) for s in burden["strata"]]
    if burden.get("total"):
        rows.append(_stratum_row("Total", burden["total"]))
    return table(["Stratum", "Cases", "Attributable cases", "95% interval", "PAF",
                  "95% interval"], rows, caption=caption)


def _stratum_row(label: str, r: dict) -> list[str]:
    att = estimate_of(r, "attributable") or {}
    paf = estimate_of(r, "paf") or {}
    return [label, cases(r.get("cases")), cases(att.get("estimate")),
            interval(att.get("lower"), att.get("upper"), cases), pct(paf.get("estimate")),
            interval(paf.get("lower"), paf.get("upper"))]


def scenarios_table(burden: dict, caption: str) -> str:
    """One row per stratum (and the total), one column pair per scenario:
    the PIF and the cases averted, each with its interval."""
    records = list(burden["strata"])
    if burden.get("total"):
        records.append({**burden["total"], "stratum": "Total"})
    names = [s["name"] for s in scenario_effects(records[0])] if records else []
    if not names:
        return ""
    rows = []
    for r in records:
        effects = {s["name"]: s for s in scenario_effects(r)}
        row = [str(r.get("stratum"))]
        for n in names:
            e = effects.get(n) or {}
            row += [estimate_text(e.get("pif")), estimate_text(e.get("averted"), cases)]
        rows.append(row)
    header = ["Stratum"]
    for n in names:
        header += [f"{n}: PIF", f"{n}: cases averted"]
    return table(header, rows, caption=caption)


def outcomes_section(d: dict, images: dict) -> str:
    """Several outcomes side by side: one column per outcome."""
    outcomes = d.get("outcomes") or []
    if len(outcomes) < 1:
        return ""
    unit = d.get("unit")
    header = [""] + [str(o.get("name")) for o in outcomes]
    rows = [["RR curve"] + [_curve_text(o.get("curve") or {}) for o in outcomes],
            ["PAF"] + [estimate_text(o.get("paf")) for o in outcomes]]
    names = list(dict.fromkeys(s["name"] for o in outcomes for s in o.get("scenarios") or []))
    for n in names:
        rows.append([f"PIF, {n}"] + [estimate_text(_scenario(o, n)) for o in outcomes])
    totals = [(o.get("burden") or {}).get("total") for o in outcomes]
    if any(totals):
        rows.append(["Cases (all strata)"] + [cases((t or {}).get("cases")) for t in totals])
        rows.append(["Attributable cases"] + [estimate_text(estimate_of(t, "attributable"), cases)
                                              if t else NA for t in totals])
        for n in names:
            rows.append([f"Cases averted, {n}"] + [_averted(t, n) for t in totals])
    m = with_unit(d.get("minimum_risk"), unit)
    rng = d.get("minimum_risk_range")
    if rng:
        m += f", the middle of the range {with_unit(rng[0], unit)} to {with_unit(rng[1], unit)}"
    text = (f"Each outcome has its own relative-risk curve and strata; the exposure, the "
            f"scenarios and the minimum-risk level ({m}) are shared.")
    return (para(text) + table(header, rows, caption="PAF, PIF and cases per outcome")
            + image(images.get("outcome_curves"),
                    "The relative-risk curve of each outcome, side by side on the same axes, "
                    "with its study's band estimates."))


def outcome_warnings(d: dict) -> list[str]:
    """Each outcome's warnings that are not already among the top-level
    ones (those are the first outcome's, or the file's own curve's), named
    by outcome."""
    shown = set(d.get("warnings") or [])
    return [f"{o.get('name')}: {w}" for o in d.get("outcomes") or []
            for w in o.get("warnings") or [] if w not in shown]


def _curve_text(c: dict) -> str:
    fit = c.get("p_value")
    text = str(c.get("model") or NA)
    if c.get("q") is not None:
        text += f" (fit p = {num(fit, 3)})" if fit is not None else " (fit: 0 df)"
    return text


def _scenario(o: dict, name: str) -> dict | None:
    for s in o.get("scenarios") or []:
        if s.get("name") == name:
            return s.get("pif")
    return None


def _averted(total: dict | None, name: str) -> str:
    if not total:
        return NA
    for s in scenario_effects(total):
        if s["name"] == name:
            return estimate_text(s["averted"], cases)
    return NA
