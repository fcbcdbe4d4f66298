"""Every figure of the report, rendered once to PNG bytes.

:func:`render_figures` reads a :class:`~doseattr.results.run.Results` and
returns ``{name: png_bytes}``; the report embeds them and
:func:`write_outputs` also saves them as files. Each figure is built from
one section record of the results; figures whose inputs are absent are
skipped.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from doseattr.core.attribution.categorical import CategoricalComparison
from doseattr.core.curves.base import Curve
from doseattr.core.exposure.base import Exposure
from doseattr.outputs import burden_figures as bf
from doseattr.outputs import figures as fig
from doseattr.outputs import grid_figures as gf
from doseattr.outputs.figures import AnyExposure
from doseattr.outputs.markup import pct
from doseattr.outputs.model_figures import Panel, bands_with_doses, plot_curve_panels
from doseattr.outputs.style import figure_bytes, pyplot, styled
from doseattr.results.estimate import Estimate
from doseattr.results.records import (
    AttributionSection,
    BurdenResult,
    CurveSection,
    ExposureSection,
    StratumResult,
    UncertaintySection,
)
from doseattr.results.run import Results

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

#: File names (without ``.png``) in report order.
FIGURE_NAMES = ("curve", "pooled", "models", "outcome_curves", "exposure", "qq", "workers", "contribution",
                "categorical", "paf_draws", "burden", "burden_rates", "grid_concentration",
                "grid_attributable")


def render_figures(results: Results) -> dict[str, bytes]:
    """PNG bytes of every figure the results support, keyed by name."""
    return {name: files["png"] for name, files in render_figure_files(results).items()}


def render_figure_files(results: Results, formats: Sequence[str] = ("png",),
                        dpi: int | None = None) -> dict[str, dict[str, bytes]]:
    """``{name: {format: bytes}}`` of every figure the results support, in
    PNG (always: the report embeds it, at ``dpi``) and each of ``formats``."""
    unit = results.unit
    curve, exposure = results.curve_section, results.exposure_section
    makers: dict[str, Callable[[], Figure | None]] = {
        "curve": lambda: _curve(curve, exposure.exposure, unit),
        "pooled": lambda: _pooled(curve, exposure.exposure, unit),
        "models": lambda: _models(curve, exposure.exposure, unit),
        "outcome_curves": lambda: _outcome_curves(results.outcomes, unit, exposure.exposure),
        "exposure": lambda: _exposure(exposure, unit),
        "qq": lambda: _qq(exposure, unit),
        "workers": lambda: _workers(exposure, unit),
        "contribution": lambda: _contribution(results.attribution, exposure.is_empirical, unit),
        "categorical": lambda: _categorical(results.categorical),
        "paf_draws": lambda: _paf_draws(results.uncertainty, results.attribution.paf),
        "burden": lambda: _burden(results.burden_blocks),
        "burden_rates": lambda: _burden_rates(results.burden_blocks),
        "grid_concentration": lambda: gf.grid_map(results.grid, "concentration", unit),
        "grid_attributable": lambda: gf.grid_map(results.grid, "attributable", unit),
    }
    out = {}
    for name in FIGURE_NAMES:
        figure = makers[name]()
        if figure is not None:
            out[name] = figure_bytes(figure, tuple(dict.fromkeys(("png", *formats))), dpi)
    return out


def _figure(ax: Axes) -> Figure:
    """The figure a plot function drew ``ax`` on (a plain figure, never a
    subfigure)."""
    from matplotlib.figure import Figure

    figure = ax.figure
    assert isinstance(figure, Figure)
    return figure


def _curve(section: CurveSection, exposure: AnyExposure, unit: str | None) -> Figure:
    """The analysis's curve with its band and the study's estimates, and
    every other model of ``compare_models`` as a dashed line."""
    top = fig.curve_extent(section.curve, section.bands, exposure)
    ax = fig.plot_curve(section.curve, section.bands, unit=unit, x_max=top)
    with styled():
        for i, (label, other) in enumerate(other_models(section)):
            fig.add_curve(ax, other, color=MODEL_COLORS[i % len(MODEL_COLORS)], label=label,
                          x_max=top)
    return _figure(ax)


def _pooled(section: CurveSection, exposure: AnyExposure, unit: str | None) -> Figure | None:
    """Each pooled study's curve and band estimates with the pooled curve
    (:func:`~doseattr.outputs.pooling_figures.plot_pooled`)."""
    if section.pooling is None:
        return None
    from doseattr.outputs.pooling_figures import plot_pooled

    return plot_pooled(section.pooling, unit, x_max=fig.curve_extent(section.curve, None,
                                                                     exposure))


#: Line colours of the other models on the curve plot: the Okabe-Ito
#: colours left after the fitted curve, its band and the study's points.
MODEL_COLORS = ("#E69F00", "#009E73", "#CC79A7", "#000000")


def other_models(section: CurveSection) -> list[tuple[str, Curve]]:
    """``(label, curve)`` of every model in ``section.model_comparison``
    other than the one the analysis used (variants that failed have none)."""
    return [(str(v.label), v.curve) for v in section.model_comparison
            if v.curve is not None and not v.used]


def model_panels(section: CurveSection) -> list[Panel]:
    """One panel per model of ``compare_models`` that could be fitted, with
    the study's bands at the doses that model was fitted at."""
    variants = [(v, v.curve) for v in section.model_comparison if v.curve is not None]
    if len(variants) < 2:
        return []
    return [Panel(f"{v.label}: PAF {pct(v.paf)}", curve, bands_with_doses(section.bands, v.doses))
            for v, curve in variants]


def _models(section: CurveSection, exposure: AnyExposure, unit: str | None) -> Figure | None:
    panels = model_panels(section)
    if not panels:
        return None
    top = fig.curve_extent(section.curve, section.bands, exposure)
    return plot_curve_panels(panels, unit, x_max=top)


def outcome_panels(outcomes: Sequence[tuple[str, Results]]) -> list[Panel]:
    """One panel per ``[[outcome]]``: its curve and its study's bands."""
    if len(outcomes) < 2:
        return []
    return [Panel(f"{name}: PAF {pct(r.attribution.paf.estimate)}", r.curve_section.curve,
                  r.curve_section.bands)
            for name, r in outcomes]


def _outcome_curves(outcomes: Sequence[tuple[str, Results]], unit: str | None,
                    exposure: AnyExposure | None = None) -> Figure | None:
    """One panel per outcome, all over the same dose axis: to the 99th
    percentile of the exposure at least (a curve without ``max_dose`` or
    study bands has no range of its own)."""
    panels = outcome_panels(outcomes)
    if not panels:
        return None
    top = max(fig.curve_extent(p.curve, p.bands, exposure) for p in panels)
    return plot_curve_panels(panels, unit, x_max=top)


def _exposure(section: ExposureSection, unit: str | None) -> Figure:
    compare = section.parametric_fits if section.is_empirical else ()
    label = ("workers' cumulative exposures" if section.workers is not None
             else "measurements")
    if section.samples is not None and isinstance(section.exposure, Exposure):
        # a worker column: the single samples, and workers' long-term means
        ax = fig.plot_exposure(section.samples, unit=unit, data_label="single samples",
                               long_term=section.exposure)
    else:
        ax = fig.plot_exposure(section.exposure, unit=unit, compare=compare, data_label=label)
    return _figure(ax)


def _qq(section: ExposureSection, unit: str | None) -> Figure | None:
    """Q-Q plot of the measurements against the family used, and beside it
    against every other family tried (``family = "best"``)."""
    exposure = section.exposure if section.samples is None else section.samples
    fit = exposure.fit
    if (section.is_empirical or fit is None or fig.is_banded(fit) or fit.values is None
            or fit.loglik is None or fit.n < 3):
        return None
    others = list(exposure.alternatives)
    if not others:
        return _figure(fig.plot_qq(exposure, unit=unit))
    plt = pyplot()
    n = 1 + len(others)
    with styled():
        figure, axes = plt.subplots(1, n, figsize=(3.3 * n + 0.4, 3.4), layout="constrained")
    fig.plot_qq(exposure, ax=axes[0], unit=unit, legend=False)
    axes[0].set_title(f"{exposure.family.name} (used)")
    for ax, (family, params, _fit) in zip(axes[1:], others):
        fig.plot_qq(exposure, ax=ax, unit=unit, family=family, params=params, legend=False)
    return figure


def _workers(section: ExposureSection, unit: str | None) -> Figure | None:
    workers = section.workers
    if workers is None or not workers.cumulative:
        return None
    return _figure(fig.plot_cumulative(list(workers.cumulative), unit=unit))


def _contribution(attribution: AttributionSection, empirical: bool,
                  unit: str | None) -> Figure:
    """Where the attributable cases come from; with an empirical exposure
    (``empirical``) as the cumulative share over the values."""
    ax = fig.plot_contribution(attribution.contribution, unit=unit,
                               minimum_risk=attribution.minimum_risk, cumulative=empirical)
    return _figure(ax)


def _categorical(cat: CategoricalComparison) -> Figure:
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


def paf_draws(uncertainty: UncertaintySection | None) -> NDArray[np.float64] | None:
    """The PAF's Monte Carlo draws when uncertainty was propagated
    (``uncertainty.propagation.paf[0]``: the single population stratum)."""
    if uncertainty is None or uncertainty.propagation is None:
        return None
    draws = np.asarray(uncertainty.propagation.paf, float)
    draws = draws[0] if draws.ndim == 2 else draws
    return draws if draws.ndim == 1 and draws.size > 1 else None


def _paf_draws(uncertainty: UncertaintySection | None, paf: Estimate) -> Figure | None:
    draws = paf_draws(uncertainty)
    if draws is None:
        return None
    ax = fig.plot_draws(draws, estimate=paf.estimate, lower=paf.lower, upper=paf.upper)
    return _figure(ax)


@dataclass(frozen=True)
class Bars:
    """One bar chart's numbers: names (top first), estimates, interval
    limits (``None`` without an interval) and, for strata, which use their
    own exposure."""

    names: tuple[str, ...]
    estimate: tuple[float, ...]
    lower: tuple[float | None, ...]
    upper: tuple[float | None, ...]
    own: tuple[bool, ...] = ()


@dataclass(frozen=True)
class BurdenPanel:
    """One burden block: its outcome (``None`` for a single curve), the
    strata bars and the scenario bars (``None`` without scenarios)."""

    outcome: str | None
    strata: Bars
    scenarios: Bars | None


def burden_panels(blocks: Sequence[tuple[str | None, BurdenResult]]) -> list[BurdenPanel]:
    """One :class:`BurdenPanel` per burden block (one per outcome).

    The scenario bars start with the cases attributable to all exposure
    above the minimum-risk level, then the cases each scenario averts (in
    total over the strata).
    """
    out = []
    for outcome, burden in blocks:
        strata = capped_bars(_bars([(s.stratum, s.attributable) for s in burden.strata],
                                   own=tuple(_own_exposure(s) for s in burden.strata)))
        total = burden.total
        scen = None
        if total.scenarios:
            scen = _bars([("all above minimum risk", total.attributable)]
                         + [(e.name, e.averted) for e in total.scenarios])
        out.append(BurdenPanel(outcome, strata, scen))
    return out


def _own_exposure(stratum: StratumResult) -> bool:
    return stratum.exposure is not None and stratum.exposure.own


#: At most this many strata get their own bar or row in a burden figure.
MAX_STRATA = bf.MAX_STRATA


def capped_bars(bars: Bars, cap: int = MAX_STRATA) -> Bars:
    """``bars`` unchanged when it has at most ``cap`` bars; otherwise the
    ``cap`` largest estimates (largest first) and one bar ``"other N
    strata"`` holding the sum of the rest's estimates, without an interval
    (the sum of limits is not a limit of the sum), so the figure's height
    stays bounded whatever the number of strata."""
    n = len(bars.names)
    if n <= cap:
        return bars
    keep, rest = _largest(bars.estimate, cap)
    own = bars.own or (False,) * n
    other = float(np.sum(np.asarray(bars.estimate, float)[rest]))
    return Bars(tuple(bars.names[i] for i in keep) + (f"other {rest.size:,} strata",),
                tuple(bars.estimate[i] for i in keep) + (other,),
                tuple(bars.lower[i] for i in keep) + (None,),
                tuple(bars.upper[i] for i in keep) + (None,),
                tuple(own[i] for i in keep) + (False,))


def _largest(estimate: Sequence[float], cap: int) -> tuple[list[int], NDArray[np.intp]]:
    """Indices of the ``cap`` largest estimates (largest first, ties in
    table order; NaN counts as smallest) and of the rest, in table order."""
    est = np.asarray(estimate, float)
    order = np.argsort(-np.nan_to_num(est, nan=-np.inf), kind="stable")
    return [int(i) for i in order[:cap]], np.sort(order[cap:])


def _bars(items: Sequence[tuple[str, Estimate]], own: tuple[bool, ...] = ()) -> Bars:
    return Bars(tuple(str(n) for n, _ in items), tuple(e.estimate for _, e in items),
                tuple(e.lower for _, e in items), tuple(e.upper for _, e in items), own)


def _burden(blocks: Sequence[tuple[str | None, BurdenResult]]) -> Figure | None:
    """Attributable cases by stratum (left) and by scenario (right), one
    row per outcome; a stratum with its own exposure is marked."""
    panels = burden_panels(blocks)
    if not panels:
        return None
    plt = pyplot()
    cols = 2 if any(p.scenarios for p in panels) else 1
    rows = [0.32 * max(len(p.strata.names), len(p.scenarios.names) if p.scenarios else 0) + 1.3
            for p in panels]
    with styled():
        figure, axes = plt.subplots(len(panels), cols, squeeze=False, layout="constrained",
                                    figsize=(5.2 * cols + 0.6, sum(rows)), height_ratios=rows)
    for row, panel in zip(axes, panels):
        prefix = f"{panel.outcome}: " if panel.outcome else ""
        st, scen = panel.strata, panel.scenarios
        bf.plot_strata(st.names, st.estimate, row[0], lower=st.lower, upper=st.upper,
                       own=st.own, title=f"{prefix}attributable cases by stratum")
        if cols == 2 and scen:
            bf.plot_averted(scen.names, scen.estimate, row[1], lower=scen.lower,
                            upper=scen.upper, title=f"{prefix}cases by scenario (total)")
        elif cols == 2:
            row[1].set_visible(False)
    return figure


@dataclass(frozen=True)
class RatePanel:
    """One outcome's attributable rates by stratum (rows) and group
    (columns, first-seen order), with their limits (``None`` where a
    stratum has no such group or no interval)."""

    outcome: str | None
    rate_per: float
    strata: tuple[str, ...]
    groups: tuple[str, ...]
    estimate: tuple[tuple[float | None, ...], ...]
    lower: tuple[tuple[float | None, ...], ...]
    upper: tuple[tuple[float | None, ...], ...]
    #: Strata left out (beyond the :data:`MAX_STRATA` with most cases).
    hidden: int = 0


def rate_panels(blocks: Sequence[tuple[str | None, BurdenResult]]) -> list[RatePanel]:
    """One :class:`RatePanel` per burden block that has both groups and
    rates (the other outcomes have nothing to draw)."""
    out = []
    for outcome, burden in blocks:
        if not (burden.has_groups and burden.has_rates):
            continue
        rows = [s for s in burden.strata if s.group is not None]
        strata = tuple(dict.fromkeys(s.stratum for s in rows))
        strata, hidden = _largest_strata(burden, strata)
        groups = tuple(dict.fromkeys(str(s.group) for s in rows))
        cell = {(s.stratum, str(s.group)): s.attributable_rate for s in rows}
        est, lo, hi = (_grid(cell, strata, groups, part) for part in ("estimate", "lower", "upper"))
        out.append(RatePanel(outcome, float(burden.rate_per), strata, groups, est, lo, hi,
                             hidden))
    return out


def _largest_strata(burden: BurdenResult, strata: tuple[str, ...],
                    cap: int = MAX_STRATA) -> tuple[tuple[str, ...], int]:
    """The ``cap`` strata with the most attributable cases (summed over
    their groups; largest first) and how many are left out, when there are
    more than ``cap`` (rates do not add, so the rest are not summed)."""
    if len(strata) <= cap:
        return strata, 0
    cases = {s.stratum: s.attributable.estimate for s in burden.stratum_totals}
    keep, _ = _largest([cases.get(s, np.nan) for s in strata], cap)
    return tuple(strata[i] for i in keep), len(strata) - cap


def _grid(cell: dict[tuple[str, str], Estimate | None], strata: tuple[str, ...],
          groups: tuple[str, ...], part: str) -> tuple[tuple[float | None, ...], ...]:
    """``part`` (estimate, lower or upper) of every stratum and group."""
    return tuple(tuple(_part(cell.get((st, g)), part) for g in groups) for st in strata)


def _part(e: Estimate | None, part: str) -> float | None:
    if e is None:
        return None
    value = getattr(e, part)
    return None if value is None else float(value)


def _burden_rates(blocks: Sequence[tuple[str | None, BurdenResult]]) -> Figure | None:
    """Attributable rates by group across strata, one panel per outcome
    with groups and rates, stacked."""
    panels = rate_panels(blocks)
    if not panels:
        return None
    plt = pyplot()
    heights = [0.22 * len(p.strata) * max(len(p.groups), 2) + 1.3 for p in panels]
    with styled():
        figure, axes = plt.subplots(len(panels), 1, squeeze=False, layout="constrained",
                                    figsize=(6.8, sum(heights)), height_ratios=heights)
    for ax, p in zip(axes[:, 0], panels):
        prefix = f"{p.outcome}: " if p.outcome else ""
        more = (f"\n({MAX_STRATA} strata with most cases; {p.hidden:,} more in burden.csv)"
                if p.hidden else "")
        bf.plot_group_rates(p.strata, p.groups, p.estimate, ax, lower=p.lower, upper=p.upper,
                            xlabel=f"Attributable per {bf.per_text(p.rate_per)} people",
                            title=f"{prefix}attributable rate by group and stratum{more}")
    return figure


__all__ = [
    "FIGURE_NAMES",
    "MAX_STRATA",
    "burden_panels",
    "capped_bars",
    "model_panels",
    "other_models",
    "outcome_panels",
    "paf_draws",
    "rate_panels",
    "render_figure_files",
    "render_figures",
]
