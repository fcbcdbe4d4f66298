"""The figure of a pooled curve: each study's fitted curve over its own
doses with its band estimates, and the pooled curve with its pointwise 95%
interval (and the prediction interval of a new population's curve when
``predict = true``).

Reads :class:`~doseattr.results.records.PoolingSection`; colours are the
project's (:mod:`doseattr.outputs.style`): the pooled curve and its band
in the curve's blue, the studies in the other Okabe-Ito colours.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from doseattr.outputs.figures import curve_extent, dose_grid
from doseattr.outputs.style import (
    COLORS,
    CYCLE,
    axis_label,
    new_axes,
    outside_legend,
    styled,
)
from doseattr.results.records import PooledStudy, PoolingSection

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

#: Study colours: the palette without the pooled curve's blue and its band.
STUDY_COLORS = tuple(c for c in CYCLE if c not in (COLORS["curve"], COLORS["band"]))


def plot_pooled(p: PoolingSection, unit: str | None = None, *, x_max: float | None = None,
                level: float = 0.95) -> Figure:
    """Studies and pooled curve on one axis; returns the figure.

    ``gid``: ``"pooled-rr"`` (the pooled curve), ``"pooled-band"`` (its
    pointwise interval), ``"prediction-band"`` (with ``predict``),
    ``"study-<i>"`` and ``"study-<i>-bands"`` (study ``i``'s curve and
    band estimates, 1-based).
    """
    with styled():
        ax = new_axes(size=(8.0, 4.0))
        top = x_max if x_max is not None else max(
            [curve_extent(p.mean)] + [curve_extent(s.curve, s.bands) for s in p.studies])
        for i, study in enumerate(p.studies):
            _draw_study(ax, study, i, STUDY_COLORS[i % len(STUDY_COLORS)])
        x = dose_grid(p.mean, top)
        if p.prediction is not None:
            _, lo, hi = p.prediction.rr_interval(x, level=level)
            ax.fill_between(x, lo, hi, color=COLORS["band"], alpha=0.15, linewidth=0,
                            label=f"{level:.0%} prediction interval (a new population)",
                            gid="prediction-band")
        rr, lo, hi = p.mean.rr_interval(x, level=level)
        ax.fill_between(x, lo, hi, color=COLORS["band"], alpha=0.4, linewidth=0,
                        label=f"pointwise {level:.0%} interval of the pooled curve",
                        gid="pooled-band")
        ax.plot(x, rr, color=COLORS["curve"], linewidth=2.4, label="pooled curve",
                gid="pooled-rr", zorder=5)
        ax.axhline(1.0, color="#777777", linewidth=0.8)
        ax.set_xlim(0.0, top)
        ax.set_xlabel(axis_label("Exposure", unit))
        ax.set_ylabel("Relative risk (RR)")
        ax.set_title(f"{len(p.studies)} studies and the pooled curve")
        outside_legend(ax)
    figure = ax.figure
    return figure  # type: ignore[return-value]


def _draw_study(ax: Axes, s: PooledStudy, i: int, color: str) -> None:
    """Study ``i``'s fitted curve up to its highest dose, its band estimates
    with their reported CIs, and its reference band as an open marker."""
    b = s.bands
    top = float(s.curve.data_max or np.nanmax(b.dose))
    x = dose_grid(s.curve, top)
    weight = f"{s.weight:.0%}"
    ax.plot(x, s.curve.rr(x), color=color, linewidth=1.3, linestyle="--",
            label=f"{s.name} (weight {weight})", gid=f"study-{i + 1}")
    ref = np.asarray(b.reference, bool)
    dose, rr = np.asarray(b.dose, float), np.asarray(b.rr, float)
    lo, hi = np.asarray(b.ci_lower, float)[~ref], np.asarray(b.ci_upper, float)[~ref]
    ok = np.isfinite(lo) & np.isfinite(hi)
    yerr = np.where(ok, np.vstack([rr[~ref] - lo, hi - rr[~ref]]), 0.0)
    ax.errorbar(dose[~ref], rr[~ref], yerr=yerr, fmt="o", color=color, markersize=4,
                capsize=2, linewidth=1.0, gid=f"study-{i + 1}-bands", zorder=4)
    ax.plot(dose[ref], np.ones(int(ref.sum())), "o", markerfacecolor="white",
            markeredgecolor=color, markersize=4, zorder=4)
