"""Figures of attributable and averted cases, with their intervals.

Each function takes plain numbers (read from the burden record by the
caller), draws on the given axes or a new figure, and returns the axes.
Bars carry ``gid="<prefix>-bars"`` and interval whiskers
``gid="<prefix>-whiskers"`` (a line collection, one segment per bar from
the lower to the upper limit), so tests can read back what was drawn.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np

from doseattr.outputs.style import COLORS, CYCLE, new_axes, outside_legend, styled

if TYPE_CHECKING:
    from matplotlib.axes import Axes

#: At most this many strata get their own bar or row in a burden figure;
#: the rest are summed into one bar (the full table is burden.csv).
MAX_STRATA = 40
#: Mark after the name of a stratum whose fractions use its own exposure.
OWN_MARK = "\u2020"
#: Legend note explaining :data:`OWN_MARK`.
OWN_NOTE = f"{OWN_MARK} own exposure from the burden table"


def plot_bars(names: Sequence[str], estimate: Sequence[float], ax: Axes | None = None, *,
              lower: Sequence[float | None] | None = None,
              upper: Sequence[float | None] | None = None,
              xlabel: str = "Cases", title: str = "", color: str = COLORS["burden"],
              prefix: str = "strata") -> Axes:
    """Horizontal bars, first name at the top, with interval whiskers
    wherever both limits are given."""
    with styled():
        n = len(names)
        ax = new_axes(ax, size=(6.0, max(2.0, 0.32 * n + 1.0)))
        est = np.asarray(estimate, float)
        pos = np.arange(n)[::-1].astype(float)
        ax.barh(pos, est, color=color, alpha=0.8, height=0.6, gid=f"{prefix}-bars")
        lo, hi = _limits(lower, n), _limits(upper, n)
        ok = np.isfinite(lo) & np.isfinite(hi)
        if ok.any():
            ax.hlines(pos[ok], lo[ok], hi[ok], colors="#333333", linewidth=1.1,
                      gid=f"{prefix}-whiskers", label="95% interval")
            caps = np.concatenate([lo[ok], hi[ok]])
            ax.plot(caps, np.concatenate([pos[ok], pos[ok]]), "|", color="#333333",
                    markersize=8)
        ax.set_yticks(pos, [str(s) for s in names])
        ax.set_xlabel(xlabel)
        ax.set_xlim(left=min(0.0, float(np.nanmin(np.r_[est, lo[ok]])) if n else 0.0))
        ax.grid(axis="y", visible=False)
        if title:
            ax.set_title(title)
    return ax


def plot_strata(names: Sequence[str], estimate: Sequence[float], ax: Axes | None = None, *,
                lower: Sequence[float | None] | None = None,
                upper: Sequence[float | None] | None = None,
                own: Sequence[bool] | None = None,
                xlabel: str = "Attributable cases", title: str = "By stratum") -> Axes:
    """Attributable cases per stratum (``gid="strata-bars"`` and
    ``"strata-whiskers"``).

    A stratum flagged in ``own`` (its fractions use its own exposure, not
    the shared one) gets :data:`OWN_MARK` after its name and the legend
    explains the mark (:data:`OWN_NOTE`), so the figure does not suggest
    that every stratum shares one distribution.
    """
    flags = [False] * len(names) if own is None else [bool(o) for o in own]
    labels = [f"{n} {OWN_MARK}" if o else str(n) for n, o in zip(names, flags)]
    ax = plot_bars(labels, estimate, ax, lower=lower, upper=upper, xlabel=xlabel,
                   title=title, prefix="strata")
    if any(flags):
        _note_below(ax, OWN_NOTE)
    return ax


def _note_below(ax: Axes, text: str) -> None:
    """``text`` as a one-line legend under the x-axis label, left-aligned
    with the axes (36 points down clears the tick labels and the label)."""
    from matplotlib.transforms import ScaledTranslation

    with styled():
        note = ax.plot([], [], " ", label=text)
        below = ax.transAxes + ScaledTranslation(0.0, -36.0 / 72.0, ax.figure.dpi_scale_trans)
        ax.legend(handles=note, loc="upper left", bbox_to_anchor=(0.0, 0.0),
                  bbox_transform=below, borderaxespad=0.0, borderpad=0.0,
                  handlelength=0.0, handletextpad=0.0)


def plot_averted(names: Sequence[str], estimate: Sequence[float], ax: Axes | None = None, *,
                 lower: Sequence[float | None] | None = None,
                 upper: Sequence[float | None] | None = None,
                 xlabel: str = "Cases", title: str = "By scenario") -> Axes:
    """Cases attributable (all exposure above the minimum-risk level, first
    bar) and averted by each scenario (``gid="scenario-bars"`` and
    ``"scenario-whiskers"``)."""
    return plot_bars(names, estimate, ax, lower=lower, upper=upper, xlabel=xlabel,
                     title=title, color=COLORS["curve"], prefix="scenario")


def per_text(rate_per: float) -> str:
    """``"100,000"``: how many people a rate is per."""
    return f"{rate_per:,.0f}" if float(rate_per).is_integer() else f"{rate_per:g}"


def _limits(values: Sequence[float | None] | None, n: int) -> np.ndarray:
    if values is None:
        return np.full(n, np.nan)
    return np.array([np.nan if v is None else float(v) for v in values], float)


def plot_group_rates(strata: Sequence[str], groups: Sequence[str],
                     estimate: Sequence[Sequence[float | None]], ax: Axes | None = None, *,
                     lower: Sequence[Sequence[float | None]] | None = None,
                     upper: Sequence[Sequence[float | None]] | None = None,
                     xlabel: str = "Attributable per 100,000", title: str = "") -> Axes:
    """Attributable rates by group across strata: one row per stratum
    (first at the top), one colour and marker per group, dodged within the
    row, with interval whiskers wherever both limits are given.

    ``estimate[i][j]`` is stratum ``i``'s rate in group ``j`` (``None``
    where the stratum has no such group). Group ``j``'s points carry
    ``gid="rates-points"`` and its label, its whiskers
    ``gid="rates-whiskers"`` (one segment per point with limits, in
    stratum order); colours follow :data:`~doseattr.outputs.style.CYCLE`.
    """
    n, k = len(strata), len(groups)
    with styled():
        ax = new_axes(ax, size=(6.4, max(2.2, 0.22 * n * max(k, 2) + 1.2)))
        pos = np.arange(n)[::-1].astype(float)
        step = 0.7 / max(k, 1)
        for j, group in enumerate(groups):
            y = pos + 0.35 - step * (j + 0.5)
            est = _column(estimate, j, n)
            lo, hi = _column(lower, j, n), _column(upper, j, n)
            color = CYCLE[j % len(CYCLE)]
            shown = np.isfinite(est)
            ax.plot(est[shown], y[shown], MARKERS[j % len(MARKERS)], color=color,
                    markersize=5.5, label=str(group), gid="rates-points", linestyle="none")
            ok = shown & np.isfinite(lo) & np.isfinite(hi)
            if ok.any():
                ax.hlines(y[ok], lo[ok], hi[ok], colors=color, linewidth=1.1,
                          gid="rates-whiskers")
        ax.set_yticks(pos, [str(s) for s in strata])
        ax.set_xlabel(xlabel)
        low = [np.nanmin(v) for v in (_table(estimate), _table(lower)) if np.isfinite(v).any()]
        ax.set_xlim(left=min([0.0, *low]))
        ax.grid(axis="y", visible=False)
        if title:
            ax.set_title(title)
        outside_legend(ax, title="group")
    return ax


#: Marker of each group in :func:`plot_group_rates` (with its colour, so
#: the groups differ without colour too).
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")


def _table(values: Sequence[Sequence[float | None]] | None) -> np.ndarray:
    if values is None:
        return np.full(1, np.nan)
    return np.array([[np.nan if v is None else float(v) for v in row] for row in values],
                    float).reshape(-1)


def _column(values: Sequence[Sequence[float | None]] | None, j: int, n: int) -> np.ndarray:
    """Column ``j`` of a stratum-by-group table (NaN where missing)."""
    if values is None:
        return np.full(n, np.nan)
    cells = [row[j] for row in values]
    return np.array([np.nan if v is None else float(v) for v in cells], float)
