"""The text summary of a run (:meth:`Results.summary`): the PAF, the
scenarios, the curve, the exposure and the categorical comparison as plain
aligned tables."""

from __future__ import annotations

import textwrap
from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np

from doseattr.results.estimate import Estimate
from doseattr.results.numbers import share_or_dash as _share
from doseattr.results.numbers import share_text
from doseattr.results.records import CASE_WEIGHTED_PAF, POPULATION_PAF, StratumExposure

if TYPE_CHECKING:  # pragma: no cover
    from doseattr.results.run import Results

WIDTH = 78


def render(r: Results, brief: bool = False) -> str:
    """The summary text; ``brief`` keeps only the PAF and scenario lines."""
    unit = r.unit
    lines = [r.title or "doseattr results", f"unit: {unit}", ""]
    lines += _limit(r)
    lines.append(f"PAF (minimum-risk level {r.minimum_risk:g} {unit}): {r.paf.text()}")
    if r.burden is not None:
        lines += textwrap.wrap(f"(the {POPULATION_PAF}; the burden table's total, "
                               f"{r.burden.total.paf.text()}, is the {CASE_WEIGHTED_PAF})", WIDTH)
    if r.scenarios:
        lines.append("")
        lines += table(["scenario", "change", "PIF"],
                       [[s.name, s.description, s.pif.text()] for s in r.scenarios])
    if brief:
        if r.warnings:
            lines += ["", f"{len(r.warnings)} warning(s): see results.json or the report"]
        return "\n".join(lines)
    lines += ["", *_curve(r), "", *_exposure(r), "", *_categorical(r), *_burden(r)]
    lines += _variants(r) + _widths(r)
    for title, items in (("Warnings", r.warnings), ("Notes", r.notes), ("Cautions", r.cautions)):
        if items:
            lines += ["", f"{title}:"]
            for item in items:
                lines += textwrap.wrap(item, WIDTH, initial_indent="- ", subsequent_indent="  ")
    return "\n".join(lines)


def _limit(r: Results) -> list[str]:
    """The compliance statement and its figures (``[limit]``)."""
    lim = r.limit
    if lim is None:
        return []
    s, d, u = lim.stats, lim.stats.decision, r.unit
    lines = textwrap.wrap(f"Limit {s.limit:.4g} {u}, {s.n} samples: {d.verdict} ({d.test} "
                          f"test; {d.rule})", WIDTH)
    e, p95 = s.exceedance, s.p95
    lines.append(f"exceedance fraction {_share(e.estimate)}, upper limit at "
                 f"{s.confidence:.0%} {_share(e.ucl)}; 95th percentile {p95.estimate:.4g} {u}, "
                 f"UTL {_num(p95.ucl)} {u}")
    if lim.worker_exceedance is not None and lim.workers is not None:
        w = lim.workers
        lines.append(f"workers: GSD within {w.gsd_within:.3g}, between {w.gsd_between:.3g}; a "
                     f"worker's long-term mean above the limit: "
                     f"{_share(lim.worker_exceedance.estimate)}; {len(lim.workers_above)} of "
                     f"{w.n_workers} workers above it")
    return lines + [""]


def _num(v: float | None) -> str:
    return "-" if v is None else f"{v:.4g}"


def _curve(r: Results) -> list[str]:
    c = r.curve
    se = np.sqrt(np.maximum(np.diag(c.cov), 0.0))
    out = [f"Curve: {c.model.name} ({c.model.describe()}), {c.source}"]
    out += table(["parameter", "estimate", "SE"],
                 [[n, f"{b:.5g}", f"{s:.3g}"] for n, b, s in zip(c.model.param_names, c.coef, se)])
    if c.fit is not None:
        p = "-" if c.fit.p_value is None else f"{c.fit.p_value:.3g}"
        out.append(f"goodness of fit: Q = {c.fit.q:.3g}, df = {c.fit.df}, p = {p} "
                   f"(covariance: {c.fit.covariance_method})")
    share = r.share_beyond_max_dose
    if c.max_dose is not None and share is not None:
        out.append(f"RR held flat above {c.max_dose:g} {r.unit} "
                   f"({share_text(share)} of the population above)")
    else:
        out.append("RR formula extended over all exposures")
    return out


def _exposure(r: Results) -> list[str]:
    ex = r.exposure
    if r.is_empirical:
        n = 0 if ex.fit is None else ex.fit.n
        if getattr(ex, "census", False):
            out = [f"Exposure: {ex.source}, a census of {n} weighted points (no fitted "
                   "distribution, no sampling error)"]
        else:
            out = [f"Exposure: empirical ({n} weighted values, no fitted distribution)"]
    else:
        params = ", ".join(f"{k} = {v:.4g}" for k, v in ex.parameters.items())
        how = ex.source
        if ex.fit is not None and ex.fit.n:
            how = f"fitted to {ex.fit.n} values"
            if ex.fit.censored:
                how += f", {ex.fit.censored} below detection"
        out = [f"Exposure: {ex.family.name}, {params} ({how})"]
    out.append(f"mean {r.exposure_mean:.4g} {r.unit}; unexposed {share_text(r.zero_share)}")
    out += _substitution(r)
    return out


def _substitution(r: Results) -> list[str]:
    """Substitution of non-detects, compared with the censored fit."""
    if not r.substitution:
        return []
    rows = [[f"{v.fraction:.4g} x limit",
             ", ".join(f"{k} = {x:.4g}" for k, x in v.parameters.items()) or "-",
             "-" if v.paf is None else f"{100 * v.paf:.2f}%",
             "-" if v.difference is None else f"{100 * v.difference:+.2f}"]
            for v in r.substitution]
    return ["", "Non-detects substituted (comparison only; the PAF above uses censored "
                "likelihood)"] + table(["substitution", "parameters", "PAF",
                                        "difference (points)"], rows)


def _categorical(r: Results) -> list[str]:
    cat = r.categorical
    edges = np.concatenate([[0.0], cat.cutpoints])
    labels = [f"{a:g}-{b:g}" for a, b in zip(edges[:-1], cat.cutpoints)]
    labels.append(f"{cat.cutpoints[-1]:g}+")
    out = [f"Categorical comparison (continuous PAF {100 * cat.continuous_paf:.2f}%)"]
    head = ["band", "share"] + [m.method for m in cat.methods]
    rows = [[lab, f"{100 * p:.1f}%"] + [f"{m.rr[i]:.3g}" for m in cat.methods]
            for i, (lab, p) in enumerate(zip(labels, cat.shares))]
    rows.append(["PAF", ""] + [f"{100 * m.paf:.2f}%" for m in cat.methods])
    rows.append(["difference (points)", ""] + [f"{100 * m.difference:+.2f}" for m in cat.methods])
    out += table(head, rows)
    return out


def _burden(r: Results) -> list[str]:
    """Attributable cases by stratum (and group), with the exposure each
    used, the attributable rate and the years of life lost where the burden
    table gives them; then the totals across outcomes."""
    b = r.burden
    if b is None:
        return _grand_total(r)
    groups, rates, yll = b.has_groups, b.has_rates, b.has_yll
    rows = []
    for s in (*b.strata, b.total):
        total = s is b.total
        row = ["total" if total else s.stratum]
        if groups:
            row.append("" if total or s.group is None else s.group)
        row += [f"{s.cases:g}", s.paf.text(), s.attributable.text(percent=False)]
        if rates:
            row.append(_count(s.attributable_rate))
        if yll:
            row.append(_count(s.yll))
        rows.append(row + ["" if total else _stratum_exposure(s.exposure)])
    head = ["stratum", *(["group"] if groups else []), "cases", "PAF", "attributable",
            *([f"per {_per(b.rate_per)}"] if rates else []), *(["YLL"] if yll else []),
            "exposure"]
    out = ["", "Attributable cases by stratum" + (" and group" if groups else "")]
    out += table(head, rows)
    if b.any_own_exposure:
        out += textwrap.wrap("strata marked 'own' have their own exposure from the burden "
                             "table; the others use the shared distribution", WIDTH)
    if yll:
        out += textwrap.wrap("YLL: attributable deaths x remaining life expectancy from the "
                             "life table given (deaths-based; not discounted nor "
                             "age-weighted)", WIDTH)
    return out + _grand_total(r)


def _grand_total(r: Results) -> list[str]:
    """Each outcome's total and the grand total across outcomes (with the
    caution that adding outcomes double counts overlapping ones)."""
    g = r.grand_total
    if g is None:
        return []
    totals = [(name, o.burden.total) for name, o in r.outcomes if o.burden is not None]
    rates = g.attributable_rate is not None
    yll = g.yll is not None
    rows = []
    for name, t in (*totals, ("all outcomes", g)):
        rows.append([name, f"{t.cases:g}", _count(t.attributable)]
                    + ([_count(t.attributable_rate)] if rates else [])
                    + ([_count(t.yll)] if yll else []))
    per = r.burden.rate_per if r.burden is not None else 100_000.0
    head = ["outcome", "cases", "attributable", *([f"per {_per(per)}"] if rates else []),
            *(["YLL"] if yll else [])]
    line = f"Grand total across outcomes: {_count(g.attributable)} attributable cases"
    if rates:
        line += f", {_count(g.attributable_rate)} per {_per(per)}"
    if yll:
        line += f", {_count(g.yll)} years of life lost"
    out = ["", "Totals by outcome", *table(head, rows), *textwrap.wrap(line, WIDTH)]
    for e in g.scenarios:
        averted = f"scenario {e.name}: {_count(e.averted)} cases averted"
        if e.averted_yll is not None:
            averted += f", {_count(e.averted_yll)} years of life lost averted"
        out += textwrap.wrap(averted, WIDTH, initial_indent="  ", subsequent_indent="    ")
    out += textwrap.wrap("(meaningful only when the outcomes do not overlap: all-cause and "
                         "cause-specific deaths double count; these numbers support, not "
                         "replace, local regulations and the advice of licensed "
                         "professionals)", WIDTH, break_on_hyphens=False)
    return out


def _count(e: Estimate | None) -> str:
    """A count or rate with its interval: whole numbers from 1000 on
    (``"12,345 (10,002 to 14,870)"``), else four significant digits."""
    if e is None:
        return "-"

    def f(v: float) -> str:
        return f"{v:,.0f}" if abs(v) >= 1000 else f"{v:.4g}"

    if e.lower is None or e.upper is None:
        return f(e.estimate)
    return f"{f(e.estimate)} ({f(e.lower)} to {f(e.upper)})"


def _per(rate_per: float) -> str:
    return f"{rate_per:,.0f}" if float(rate_per).is_integer() else f"{rate_per:g}"


def _stratum_exposure(e: StratumExposure | None) -> str:
    if e is None or not e.own:
        return "shared"
    given = e.given if e.given is not None else e.parameters
    return "own: " + ", ".join(f"{k} {v:.4g}" for k, v in given.items())


def _variants(r: Results) -> list[str]:
    """PAF under other models, dose rules and exposure descriptions."""
    out = []
    for title, rows in (("PAF by curve model", r.model_comparison),
                        ("PAF by dose assignment", r.dose_sensitivity)):
        if rows:
            out += ["", title]
            out += table(["", "coefficients", "PAF"],
                         [[v.label,
                           "-" if v.curve is None else ", ".join(f"{b:.4g}" for b in v.curve.coef),
                           "-" if v.paf is None else f"{100 * v.paf:.2f}%"] for v in rows])
    if r.exposure_comparison:
        out += ["", "PAF by exposure description"]
        out += table(["family", "AIC", "PAF"],
                     [[v.label, "-" if v.aic is None else f"{v.aic:.2f}",
                       "-" if v.paf is None else f"{100 * v.paf:.2f}%"]
                      for v in r.exposure_comparison])
    return out


def _widths(r: Results) -> list[str]:
    """The overall PAF's 95% interval with one source varying at a time."""
    if not r.width_by_source:
        return []
    rows = [[w.source, f"{100 * w.lower:.2f}% to {100 * w.upper:.2f}%", f"{100 * w.width:.2f}"]
            for w in r.width_by_source + ((r.width_all,) if r.width_all else ())]
    explains = r.uncertainty.explains if r.uncertainty is not None else ""
    return ["", "Width of the PAF's 95% interval by source of uncertainty"
            + (f" (the {explains})" if explains else "")] + table(
        ["varying", "interval", "width (points)"], rows)


def table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    """Left-aligned first column, right-aligned others, two spaces apart."""
    cols = list(zip(*([header] + [list(r) for r in rows])))
    widths = [max(len(str(v)) for v in col) for col in cols]

    def fmt(row: Sequence[str]) -> str:
        cells = [str(v).ljust(w) if i == 0 else str(v).rjust(w)
                 for i, (v, w) in enumerate(zip(row, widths))]
        return "  ".join(cells).rstrip()

    return [fmt(header), "  ".join("-" * w for w in widths)] + [fmt(r) for r in rows]
