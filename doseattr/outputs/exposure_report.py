"""The report's exposure section: the distribution used, every family
fitted with its likelihood and the PAF it gives, the substitution of
non-detects (for comparison only), and work histories.

Everything is read from the run's :class:`~doseattr.results.ExposureSection`;
figures are passed in as PNG bytes by name.
"""

from __future__ import annotations

from collections.abc import Mapping

from doseattr.outputs.markup import (
    NA,
    definition_list,
    figure,
    notes_list,
    num,
    para,
    pct,
    signed_points,
    table,
    with_unit,
)
from doseattr.outputs.text import UNIT_PARAMETERS
from doseattr.results import ExposureSection
from doseattr.results.records import (
    ExposureVariant,
    FamilyFit,
    GoodnessOfFit,
    SubstitutionResult,
    Workers,
)


def exposure_section(e: ExposureSection, unit: str | None, images: Mapping[str, bytes], *,
                     paf: float) -> str:
    """The exposure section; ``paf`` is the analysis's PAF (point estimate),
    against which the PAF under each other description is set."""
    ex = e.exposure
    empirical = e.is_empirical
    n = _n(e)
    family = ("empirical (the measured values with their weights; no fitted family)"
              if empirical else ex.family.name)
    source = "work histories" if _has_workers(e.workers) else str(ex.source or NA)
    facts = [("Family", family), ("Source", source)]
    facts += [(k, param_text(k, v, unit)) for k, v in ex.parameters.items()]
    facts.append(("Mean exposure", with_unit(float(e.mean), unit)))
    facts.append(("Unexposed share (at zero)", pct(e.zero_share)))
    fit = ex.fit
    if ex.source == "bands":
        facts.append(("Data", (f"{n:g} people counted in bands" if n
                               else "shares of people in bands")
                      + " (grouped maximum likelihood)"))
    elif n and fit is not None and _has_workers(e.workers):
        facts.append(("Data", f"cumulative exposures of {n} workers, from their work "
                              "histories"))
    elif n and fit is not None:
        facts.append(("Measurements", f"{n} ({int(fit.detected)} detected, "
                                      f"{int(fit.censored)} below a detection limit)"))
    if fit is not None and fit.loglik is not None:
        aic = None if fit.aic is None else float(fit.aic)
        facts.append(("Log-likelihood / AIC", f"{num(float(fit.loglik), 6)} / {num(aic, 6)}"))
    if gof_text(e.goodness_of_fit):
        facts.append(("Goodness of fit (detected values)", gof_text(e.goodness_of_fit)))
    parts = [definition_list(facts)]
    if empirical:
        parts.append(para(EMPIRICAL_TEXT))
    parts.append(families_table(e, unit, paf=paf))
    parts.append(substitution_block(e.substitution, unit))
    parts.append(notes_list(ex.notes))
    parts.append(figure(images, "exposure", exposure_caption(e)))
    parts.append(figure(images, "qq", QQ_CAPTION))
    parts.append(workers_block(e.workers, unit, images))
    return "".join(p for p in parts if p)


def _n(e: ExposureSection) -> int | None:
    """The number of values behind the fit, or ``None`` without data."""
    fit = e.exposure.fit
    return int(fit.n) if fit is not None and fit.n > 0 else None


def _has_workers(w: Workers | None) -> bool:
    return w is not None and len(w.worker) > 0


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


def exposure_caption(e: ExposureSection) -> str:
    if e.is_empirical:
        return ("The measured values (weighted histogram; areas are weighted shares); the PAF "
                "is a weighted mean over them, with no fitted density. Dotted lines, where "
                "present, are families fitted to the same values for comparison only.")
    if not _n(e):
        return "The exposure distribution used (no measurements behind it)."
    many = len(e.fits) > 1
    if e.exposure.source == "bands":
        return ("Counts in bands drawn as bars over each band (bar areas are the bands' shares) "
                "against the fitted density.")
    if _has_workers(e.workers):
        return ("Workers' cumulative exposure (bars) against the fitted density"
                + (" used (solid) and every other family fitted (dashed)." if many else "."))
    return ("Measured exposure: detected values as bars (areas are weighted shares), values "
            "below a detection limit as triangles at their limit; against the fitted density"
            + (" used (solid) and every other family fitted (dashed)." if many else "."))


def param_text(name: str, value: float, unit: str | None) -> str:
    """A parameter's value, with the unit when the parameter carries it."""
    if name in UNIT_PARAMETERS:
        return with_unit(float(value), unit)
    return num(float(value), 5)


def params_inline(params: Mapping[str, float], unit: str | None) -> str:
    return ", ".join(f"{k} = {param_text(k, v, unit)}" for k, v in params.items()) or NA


def families_table(e: ExposureSection, unit: str | None, *, paf: float) -> str:
    """Every family fitted (log-likelihood, AIC, difference in AIC from the
    best) beside the PAF it gives (``ExposureSection.comparison``), the
    empirical distribution of the values included."""
    fits = e.fits
    compared = e.comparison
    labels = list(dict.fromkeys(v.label for v in compared))
    if len(fits) < 2 and len(labels) < 2:
        return ""
    fitted = {f.family for f in fits}
    names = [f.family for f in fits] + [k for k in labels if k not in fitted]
    aics = [float(f.aic) for f in fits if f.aic is not None]
    best = min(aics) if aics else None
    rows = []
    for name in names:
        f = _fit_named(fits, name)
        c = _variant_named(compared, name)
        aic = f.aic if f is not None else None if c is None else c.aic
        value = None if c is None else c.paf
        used = name == e.exposure.family.name
        params = f.parameters if f is not None and f.parameters else \
            None if c is None else c.parameters
        rows.append([name + (" (used)" if used else ""),
                     NA if params is None else params_inline(params, unit),
                     num(None if f is None or f.loglik is None else float(f.loglik), 6),
                     num(None if aic is None else float(aic), 6),
                     gof_text(None if f is None else f.goodness_of_fit) or NA,
                     NA if aic is None or best is None else num(float(aic) - best, 3),
                     pct(value), NA if used or value is None else signed_points(value - paf),
                     (None if c is None else c.problem) or ""])
    if e.is_empirical:
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


def _fit_named(fits: tuple[FamilyFit, ...], name: str) -> FamilyFit | None:
    return next((f for f in fits if f.family == name), None)


def _variant_named(variants: tuple[ExposureVariant, ...], name: str) -> ExposureVariant | None:
    """The last variant labelled ``name`` (as a mapping by label would keep)."""
    return next((v for v in reversed(variants) if v.label == name), None)


def substitution_block(rows_in: tuple[SubstitutionResult, ...], unit: str | None) -> str:
    """Non-detects replaced by a fraction of their detection limit, shown
    only to compare with the censored maximum-likelihood fit used."""
    if not rows_in:
        return ""
    rows = [[_fraction_text(float(r.fraction)), params_inline(r.parameters, unit),
             pct(r.paf), signed_points(r.difference), r.problem or ""]
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


def _fraction_text(f: float) -> str:
    if abs(f - 2 ** -0.5) < 1e-9:
        return "limit / \u221a2"
    if f == 0:
        return "zero"
    if f == 1:
        return "the limit itself"
    return f"{num(f, 3)} \u00d7 limit"


def workers_block(workers: Workers | None, unit: str | None,
                  images: Mapping[str, bytes]) -> str:
    """Cumulative exposure from work histories: a count, the range, and
    the histogram."""
    if workers is None or not workers.cumulative:
        return ""
    values = sorted(float(v) for v in workers.cumulative)
    text = (f"Cumulative exposure was computed from the work histories of {len(values)} "
            f"workers (intensity \u00d7 time in each job, summed; per-worker values in "
            f"workers.csv): from {with_unit(values[0], unit)} to {with_unit(values[-1], unit)}.")
    return para(text) + figure(images, "workers",
                               "Histogram of the workers' cumulative exposure.")


def gof_text(g: GoodnessOfFit | None) -> str:
    """``"Kolmogorov-Smirnov D = 0.081 (p = 0.62, approximate)"`` or
    ``"probability plot correlation r = 0.983"``; empty when not computed."""
    if g is None or not g.test or g.statistic is None:
        return ""
    if g.test == "Kolmogorov-Smirnov":
        return f"Kolmogorov-Smirnov D = {g.statistic:.3g} (p = {g.p_value:.2g}, approximate)"
    return f"{g.test} r = {g.statistic:.4g}"
