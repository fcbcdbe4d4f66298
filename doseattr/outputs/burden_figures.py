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

from doseattr.outputs.style import COLORS, new_axes, styled

if TYPE_CHECKING:
    from matplotlib.axes import Axes

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


def _limits(values: Sequence[float | None] | None, n: int) -> np.ndarray:
    if values is None:
        return np.full(n, np.nan)
    return np.array([np.nan if v is None else float(v) for v in values], float)
