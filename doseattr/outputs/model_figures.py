"""Several relative-risk curves side by side: the models of
``compare_models`` fitted to one study table, or the curves of several
outcomes.

Each panel is drawn by :func:`doseattr.outputs.figures.plot_curve` (so the
line carries ``gid="fitted-rr"``, the band ``gid="rr-band"``), on one
shared dose axis and one shared RR axis so the panels compare at a glance.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from doseattr.core.curves.base import Curve
from doseattr.outputs.figures import curve_extent, plot_curve
from doseattr.outputs.style import pyplot, styled
from doseattr.results.records import BandTable

if TYPE_CHECKING:
    from matplotlib.figure import Figure


@dataclass(frozen=True)
class Panel:
    """One curve to draw: its panel title, the curve, and the study bands
    (with the doses this curve was fitted at) or ``None``."""

    title: str
    curve: Curve
    bands: BandTable | None = None


def plot_curve_panels(panels: Sequence[Panel], unit: str | None = None, *,
                      x_max: float | None = None, ncols: int | None = None) -> Figure:
    """One panel per curve, with shared axes; returns the figure.

    ``ncols`` defaults to 2 for four panels and 3 otherwise (no row with a
    single panel where that can be avoided).

    The dose axis runs to ``x_max`` or to the widest
    :func:`~doseattr.outputs.figures.curve_extent` of the panels.
    """
    plt = pyplot()
    n = len(panels)
    cols = min(ncols or (2 if n == 4 else 3), n)
    rows = -(-n // cols)
    top = x_max if x_max is not None else max(curve_extent(p.curve, p.bands) for p in panels)
    with styled():
        fig, axes = plt.subplots(rows, cols, figsize=(3.3 * cols + 0.4, 2.9 * rows + 0.4),
                                 sharex=True, sharey=True, layout="constrained", squeeze=False)
    for ax, panel in zip(axes.flat, panels):
        plot_curve(panel.curve, panel.bands, ax=ax, unit=unit, x_max=top, title=panel.title,
                   legend=False)
        ax.set_ylabel("RR" if ax in axes[:, 0] else "")
        ax.set_xlabel(ax.get_xlabel() if ax in axes[-1] else "")
    for ax in list(axes.flat)[n:]:
        ax.set_visible(False)
    return fig


def bands_with_doses(bands: BandTable | None,
                     doses: Sequence[float] | np.ndarray | None) -> BandTable | None:
    """The study's bands with another set of assigned doses (a dose rule
    or model variant was fitted at these); unchanged when ``doses`` is
    ``None`` or does not match the bands."""
    if bands is None or doses is None or len(doses) != len(bands.rr):
        return bands
    return dataclasses.replace(bands, dose=np.asarray(doses, float))
