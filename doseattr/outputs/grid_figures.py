"""Maps of a ``[grid]`` analysis: the concentration and the attributable
cases per 1,000 people of each displayed cell.

The maps are the analysis's decimated rasters
(:class:`~doseattr.results.records.GridMaps`: every ``step``-th cell in each
direction), drawn for display only; every number of the run comes from all
cells. Row 0 of a map is drawn at the top (the ``top`` edge of its
``extent``, as in a north-up raster). Cells without data (``NaN``) are a
light neutral grey. The colour scales are this module's own, light to dark
so that more reads as darker. Figures have a fixed width and a bounded
height whatever the grid's size. The image carries ``gid="grid-<kind>"``
(``grid-concentration``, ``grid-attributable``) so tests can read back what
was drawn.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Literal

import numpy as np
from numpy.typing import NDArray

from doseattr.outputs.style import axis_label, pyplot, styled
from doseattr.results.records import GridMaps, GridSection

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.colors import Colormap
    from matplotlib.figure import Figure

FloatArray = NDArray[np.float64]

#: The concentration scale: cream through amber to a dark brown-red.
CONCENTRATION_COLOURS = ("#fbf1cf", "#f2c46d", "#dd8537", "#a9452b", "#4f1c17")
#: The burden scale: pale mint through teal to a dark navy.
BURDEN_COLOURS = ("#e9f4ed", "#a3d2bf", "#4c9f98", "#21627c", "#192b4d")
#: Cells without data: a light neutral grey, distinct from both light ends.
NO_DATA = "#cfcfcf"
#: Figure width (inches) and the bounds of the map's height (inches).
WIDTH = 6.4
MAP_HEIGHT = (2.2, 5.6)
#: Width of the map itself inside :data:`WIDTH` (the rest holds the colour bar).
MAP_WIDTH = 5.0
#: Beyond this ratio of height to width (or its inverse) the cells are not
#: drawn square, so that a long strip of a grid stays readable.
MAX_ASPECT = 8.0
#: The longest coordinate reference text shown under a map.
CRS_CHARS = 60

#: ``kind: (title, colour-bar label or None for the concentration's unit, colours)``.
KINDS = {
    "concentration": ("Concentration", None, CONCENTRATION_COLOURS),
    "attributable": ("Attributable cases per 1,000 people", "Attributable cases per 1,000 "
                     "people", BURDEN_COLOURS),
}


def sequential_colormap(name: str, colours: Sequence[str], no_data: str = NO_DATA) -> Colormap:
    """A continuous colour scale through ``colours`` (lowest first), with
    ``no_data`` for masked (NaN) cells."""
    from matplotlib.colors import LinearSegmentedColormap

    cmap = LinearSegmentedColormap.from_list(name, list(colours), N=256)
    return cmap.with_extremes(bad=no_data)


def decimation_text(step: int) -> str:
    """The caption line every map carries: how it was thinned, and that it
    is for display only."""
    if step <= 1:
        return "Every cell of the grid is shown; the map is for display only."
    return (f"Decimated for display: every {_ordinal(step)} cell in each direction is shown "
            "(the results use every cell); for display only.")


def _ordinal(n: int) -> str:
    if 10 <= n % 100 <= 20:
        suffix = "th"
    else:
        suffix = {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def map_extent(shape: tuple[int, int], step: int,
               extent: tuple[float, float, float, float] | None
               ) -> tuple[float, float, float, float]:
    """``(left, right, bottom, top)`` of the drawn map: ``extent`` when
    given, else the grid's cell indices (column, row) of the shown cells,
    row 0 at the top (so bottom > top)."""
    if extent is not None:
        left, right, bottom, top = (float(v) for v in extent)
        return left, right, bottom, top
    rows, cols = shape
    s = max(int(step), 1)
    return (-0.5 * s, (cols - 0.5) * s, (rows - 0.5) * s, -0.5 * s)


def _ratio(shape: tuple[int, int], step: int,
           extent: tuple[float, float, float, float] | None) -> float:
    """Height over width of the map in its own units (1 for an empty one)."""
    left, right, bottom, top = map_extent(shape, step, extent)
    width, height = abs(right - left), abs(top - bottom)
    return height / width if width > 0 and height > 0 else 1.0


def figure_size(ratio: float) -> tuple[float, float]:
    """``(width, height)`` in inches for a map of height/width ``ratio``:
    the width is fixed and the height bounded by :data:`MAP_HEIGHT`."""
    lo, hi = MAP_HEIGHT
    height = min(max(MAP_WIDTH * ratio, lo), hi)
    return WIDTH, height + 1.0  # room for the axis labels and the caption line


def value_limits(values: FloatArray) -> tuple[float, float] | None:
    """Lowest and highest finite value, widened when they are equal (one
    cell, or a uniform map); ``None`` when no cell has data."""
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return None
    lo, hi = float(finite.min()), float(finite.max())
    if lo == hi:
        pad = 0.5 * abs(lo) if lo != 0 else 0.5
        lo, hi = lo - pad, hi + pad
    return lo, hi


def plot_grid_map(values: FloatArray, ax: Axes | None = None, *, step: int = 1,
                  extent: tuple[float, float, float, float] | None = None,
                  crs: str | None = None, title: str = "", label: str = "",
                  colours: Sequence[str] = CONCENTRATION_COLOURS,
                  gid: str = "grid-map") -> Axes:
    """One map of ``values`` (``(rows, cols)``, NaN where there is no data)
    with a colour bar labelled ``label``.

    The axes are ``extent`` (the grid's coordinates, ``crs`` named under the
    map) when given, else the grid's column and row indices of the shown
    cells. With no finite value the map is all grey, says so, and has no
    colour bar.
    """
    a = np.atleast_2d(np.asarray(values, dtype=float))
    shape = (int(a.shape[0]), int(a.shape[1]))
    ratio = _ratio(shape, step, extent)
    with styled():
        if ax is None:
            plt = pyplot()
            _fig, ax = plt.subplots(figsize=figure_size(ratio), layout="constrained")
        cmap = sequential_colormap(gid, colours)
        limits = value_limits(a)
        lo, hi = limits if limits is not None else (0.0, 1.0)
        aspect: Literal["equal", "auto"] = ("equal" if 1 / MAX_ASPECT <= ratio <= MAX_ASPECT
                                             else "auto")
        image = ax.imshow(np.ma.masked_invalid(a), cmap=cmap, vmin=lo, vmax=hi,
                          extent=map_extent(shape, step, extent), origin="upper",
                          interpolation="nearest", aspect=aspect, gid=gid)
        ax.grid(False)
        if limits is None:
            ax.text(0.5, 0.5, "no cell with data", transform=ax.transAxes, ha="center",
                    va="center", color="#333333")
        else:
            ax.figure.colorbar(image, ax=ax, label=label, shrink=0.9)
        from matplotlib.ticker import MaxNLocator

        if extent is None:
            ax.xaxis.set_major_locator(MaxNLocator(integer=True))
            ax.yaxis.set_major_locator(MaxNLocator(integer=True))
            ax.set_xlabel("Column of the grid (cell index)")
            ax.set_ylabel("Row of the grid (cell index)")
        else:
            ax.set_xlabel(axis_label("x", _short(crs)))
            ax.set_ylabel(axis_label("y", _short(crs)))
            ax.ticklabel_format(style="plain", useOffset=False)
            ax.xaxis.set_major_locator(MaxNLocator(nbins=4))  # projected x labels are long
        if title:
            ax.set_title(title)
    return ax


def _short(text: str | None) -> str | None:
    """``text`` cut to :data:`CRS_CHARS` characters (a CRS may be long WKT)."""
    if not text:
        return None
    text = " ".join(str(text).split())
    return text if len(text) <= CRS_CHARS else text[:CRS_CHARS - 1] + "\u2026"


def map_figure(maps: GridMaps, kind: str, unit: str | None = None) -> Figure:
    """The map of ``kind`` (``"concentration"`` or ``"attributable"``) with
    its colour bar and the decimation caption line under it."""
    title, label, colours = KINDS[kind]
    values = maps.concentration if kind == "concentration" else maps.attributable_per_1000
    ax = plot_grid_map(values, step=maps.step, extent=maps.extent, crs=maps.crs, title=title,
                       label=label or axis_label("Concentration", unit), colours=colours,
                       gid=f"grid-{kind}")
    from matplotlib.figure import Figure

    figure = ax.figure
    assert isinstance(figure, Figure)  # a new figure of plot_grid_map, never a subfigure
    with styled():
        figure.supxlabel(decimation_text(maps.step), fontsize=8, color="#5c5c5c")
    return figure


def grid_map(grid: GridSection | None, kind: str, unit: str | None = None) -> Figure | None:
    """:func:`map_figure` of the run's grid, or ``None`` without maps."""
    if grid is None or grid.maps is None:
        return None
    return map_figure(grid.maps, kind, unit)
