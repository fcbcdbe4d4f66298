"""Every figure of the report, rendered once to PNG bytes.

:func:`render_figures` reads a ``Results`` object and returns
``{name: png_bytes}``; the report embeds them and :func:`write_outputs`
also saves them as files. Figures whose inputs are absent are skipped.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np

from doseattr.outputs import burden_figures as bf
from doseattr.outputs import figures as fig
from doseattr.outputs.markup import pct
from doseattr.outputs.model_figures import Panel, bands_with_doses, plot_curve_panels
from doseattr.outputs.records import burden_blocks, estimate_of, scenario_effects, workers_source
from doseattr.outputs.style import png_bytes, pyplot, styled
from doseattr.outputs.tables import workers_table

#: File names (without ``.png``) in report order.
FIGURE_NAMES = ("curve", "models", "outcome_curves", "exposure", "qq", "workers", "contribution",
                "categorical", "paf_draws", "burden")


def render_figures(results: Any, data: dict | None = None) -> dict[str, bytes]:
    """PNG bytes of every figure the results support, keyed by name.

    ``data`` is ``results.to_dict()`` when the caller already has it.
    """
    data = results.to_dict() if data is None else data
    unit = data.get("unit")
    makers: dict[str, Callable[[], Any]] = {
        "curve": lambda: _curve(results, unit),
        "models": lambda: _models(results, unit),
        "outcome_curves": lambda: _outcome_curves(results, unit),
        "exposure": lambda: _exposure(results, unit),
        "qq": lambda: _qq(results, unit),
        "workers": lambda: _workers(results, data, unit),
        "contribution": lambda: _contribution(results, unit),
        "categorical": lambda: _categorical(results),
        "paf_draws": lambda: _paf_draws(results),
        "burden": lambda: _burden(data),
    }
    out = {}
    for name in FIGURE_NAMES:
        figure = makers[name]()
        if figure is not None:
            out[name] = png_bytes(figure)
    return out


def _curve(results: Any, unit: str | None):
    """The analysis's curve with its band and the study's estimates, and
    every other model of ``compare_models`` as a dashed line."""
    curve = getattr(results, "curve", None)
    if curve is None:
        return None
    band_table = getattr(results, "band_table", None)
    top = fig.curve_extent(curve, band_table, getattr(results, "exposure", None))
    ax = fig.plot_curve(curve, band_table, unit=unit, x_max=top)
    with styled():
        for i, (label, other) in enumerate(other_models(results)):
            fig.add_curve(ax, other, color=MODEL_COLORS[i % len(MODEL_COLORS)], label=label,
                          x_max=top)
    return ax.figure


#: Line colours of the other models on the curve plot: the Okabe-Ito
#: colours left after the fitted curve, its band and the study's points.
MODEL_COLORS = ("#E69F00", "#009E73", "#CC79A7", "#000000")


def other_models(results: Any) -> list[tuple[str, Any]]:
    """``(label, curve)`` of every model in ``results.model_comparison``
    other than the analysis's own curve (variants that failed have none)."""
    main = getattr(results, "curve", None)
    return [(str(v.label), v.curve) for v in getattr(results, "model_comparison", ()) or ()
            if v.curve is not None and v.curve is not main]


def model_panels(results: Any) -> list[Panel]:
    """One panel per model of ``compare_models`` that could be fitted, with
    the study's bands at the doses that model was fitted at."""
    variants = [v for v in getattr(results, "model_comparison", ()) or () if v.curve is not None]
    if len(variants) < 2:
        return []
    bands = getattr(results, "band_table", None)
    return [Panel(f"{v.label}: PAF {pct(v.paf)}", v.curve, bands_with_doses(bands, v.doses))
            for v in variants]


def _models(results: Any, unit: str | None):
    panels = model_panels(results)
    if not panels:
        return None
    top = fig.curve_extent(results.curve, getattr(results, "band_table", None),
                           getattr(results, "exposure", None))
    return plot_curve_panels(panels, unit, x_max=top)


def outcome_panels(results: Any) -> list[Panel]:
    """One panel per ``[[outcome]]``: its curve and its study's bands."""
    outcomes = getattr(results, "outcomes", ()) or ()
    if len(outcomes) < 2:
        return []
    return [Panel(f"{name}: PAF {pct(r.paf.estimate)}", r.curve, getattr(r, "band_table", None))
            for name, r in outcomes]


def _outcome_curves(results: Any, unit: str | None):
    panels = outcome_panels(results)
    return plot_curve_panels(panels, unit) if panels else None


def _exposure(results: Any, unit: str | None):
    exposure = getattr(results, "exposure", None)
    if exposure is None:
        return None
    compare = getattr(results, "parametric_fits", ()) if fig.is_empirical(exposure) else ()
    label = ("workers' cumulative exposures" if getattr(results, "workers", None) is not None
             else "measurements")
    return fig.plot_exposure(exposure, unit=unit, compare=compare, data_label=label).figure


def _qq(results: Any, unit: str | None):
    """Q-Q plot of the measurements against the family used, and beside it
    against every other family tried (``family = "best"``)."""
    exposure = getattr(results, "exposure", None)
    fit = getattr(exposure, "fit", None)
    if (exposure is None or fig.is_empirical(exposure) or fit is None or fig.is_banded(fit)
            or getattr(fit, "values", None) is None or fit.loglik is None or fit.n < 3):
        return None
    others = list(exposure.alternatives)
    if not others:
        return fig.plot_qq(exposure, unit=unit).figure
    plt = pyplot()
    n = 1 + len(others)
    with styled():
        figure, axes = plt.subplots(1, n, figsize=(3.3 * n + 0.4, 3.4), layout="constrained")
    fig.plot_qq(exposure, ax=axes[0], unit=unit, legend=False)
    axes[0].set_title(f"{exposure.family.name} (used)")
    for ax, (family, params, _fit) in zip(axes[1:], others):
        fig.plot_qq(exposure, ax=ax, unit=unit, family=family, params=params, legend=False)
    return figure


def _workers(results: Any, data: dict, unit: str | None):
    table = workers_table(workers_source(results, data))
    if table is None:
        return None
    header, rows = table
    values = [r[header.index("cumulative")] for r in rows]
    return fig.plot_cumulative(values, unit=unit).figure


def _contribution(results: Any, unit: str | None):
    contribution = getattr(results, "contribution", None)
    if contribution is None:
        return None
    empirical = fig.is_empirical(results.exposure)
    ax = fig.plot_contribution(contribution, unit=unit,
                               minimum_risk=getattr(results, "minimum_risk", None),
                               cumulative=empirical)
    return ax.figure


def _categorical(results: Any):
    cat = getattr(results, "categorical", None)
    if cat is None:
        return None
    plt = pyplot()
    with styled():
        figure, (left, right) = plt.subplots(1, 2, figsize=(8.4, 3.4), layout="constrained",
                                             width_ratios=(1, 1.2))
    fig.plot_categorical(cat, ax=left)
    if cat.convergence:
        fig.plot_convergence(cat, ax=right)
    else:
        right.set_visible(False)
    return figure


def paf_draws(results: Any) -> np.ndarray | None:
    """The PAF's Monte Carlo draws when uncertainty was propagated
    (``results.propagation.paf[0]``: the single population stratum)."""
    prop = getattr(results, "propagation", None)
    draws = getattr(prop, "paf", None)
    if draws is None:
        return None
    draws = np.asarray(draws, float)
    draws = draws[0] if draws.ndim == 2 else draws
    return draws if draws.ndim == 1 and draws.size > 1 else None


def _paf_draws(results: Any):
    draws = paf_draws(results)
    if draws is None:
        return None
    est = getattr(results, "paf", None)
    ax = fig.plot_draws(draws, estimate=getattr(est, "estimate", None),
                        lower=getattr(est, "lower", None), upper=getattr(est, "upper", None))
    return ax.figure


def burden_panels(data: dict) -> list[tuple[str | None, dict, list[dict]]]:
    """Per burden block (one per outcome): ``(outcome, strata bars,
    scenario bars)``, each bars dict holding names, estimate, lower, upper.

    The scenario bars start with the cases attributable to all exposure
    above the minimum-risk level, then the cases each scenario averts (in
    total over the strata); empty when the analysis has no scenarios.
    """
    out = []
    for outcome, burden in burden_blocks(data):
        strata = _bars([(s["stratum"], estimate_of(s, "attributable"))
                        for s in burden["strata"]])
        total = burden.get("total") or {}
        effects = scenario_effects(total)
        scen = []
        if effects and all(e["averted"] for e in effects):
            scen = _bars([("all above minimum risk", estimate_of(total, "attributable"))]
                         + [(e["name"], e["averted"]) for e in effects])
        out.append((outcome, strata, scen))
    return out


def _bars(items: list[tuple[Any, dict | None]]) -> dict:
    ests = [e or {} for _, e in items]
    return {"names": [str(n) for n, _ in items], "estimate": [e.get("estimate") for e in ests],
            "lower": [e.get("lower") for e in ests], "upper": [e.get("upper") for e in ests]}


def _burden(data: dict):
    """Attributable cases by stratum (left) and by scenario (right), one
    row per outcome."""
    panels = burden_panels(data)
    if not panels:
        return None
    plt = pyplot()
    cols = 2 if any(scen for _, _, scen in panels) else 1
    rows = [0.32 * max(len(st["names"]), len(sc["names"]) if sc else 0) + 1.3
            for _, st, sc in panels]
    with styled():
        figure, axes = plt.subplots(len(panels), cols, squeeze=False, layout="constrained",
                                    figsize=(5.2 * cols + 0.6, sum(rows)), height_ratios=rows)
    for row, (outcome, strata, scen) in zip(axes, panels):
        prefix = f"{outcome}: " if outcome else ""
        bf.plot_strata(strata["names"], strata["estimate"], row[0], lower=strata["lower"],
                       upper=strata["upper"], title=f"{prefix}attributable cases by stratum")
        if cols == 2 and scen:
            bf.plot_averted(scen["names"], scen["estimate"], row[1], lower=scen["lower"],
                            upper=scen["upper"], title=f"{prefix}cases by scenario (total)")
        elif cols == 2:
            row[1].set_visible(False)
    return figure


__all__ = ["render_figures", "FIGURE_NAMES", "paf_draws", "burden_panels", "model_panels",
           "outcome_panels", "other_models"]
