"""The project's plotting style: one palette, plain axes, figures to PNG.

The palette is the eight-colour set of Okabe & Ito (2008, "Color Universal
Design", web publication), chosen because it stays distinguishable under
the common forms of colour-vision deficiency. matplotlib is imported inside
functions so that importing :mod:`doseattr.outputs` does not pick a backend.
"""

from __future__ import annotations

import io
from collections.abc import Iterator
from contextlib import contextmanager

#: Okabe-Ito colours by role.
COLORS = {
    "curve": "#0072B2",      # blue
    "band": "#56B4E9",       # sky blue
    "study": "#D55E00",      # vermillion
    "data": "#999999",       # grey bars
    "censored": "#CC79A7",   # reddish purple
    "density": "#0072B2",
    "burden": "#009E73",     # bluish green
    "limit": "#000000",
    "accent": "#E69F00",     # orange
}

#: Colours for a sequence of categories (methods, models).
CYCLE = ("#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7", "#F0E442", "#000000")

RC = {
    "font.size": 9.5,
    "axes.titlesize": 10.5,
    "axes.labelsize": 9.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#e4e4e4",
    "grid.linewidth": 0.6,
    "legend.frameon": False,
    "legend.fontsize": 8.5,
    "figure.dpi": 100,
    "savefig.dpi": 150,
    "svg.hashsalt": "doseattr",  # the same ids in every run, so the same SVG bytes
}


def pyplot():
    """matplotlib.pyplot on the non-interactive Agg backend."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


@contextmanager
def styled() -> Iterator[None]:
    """Apply :data:`RC` for the duration of a plot."""
    plt = pyplot()
    with plt.rc_context(RC):
        yield


def new_axes(ax=None, size: tuple[float, float] = (8.0, 3.6)):
    """Return ``ax`` or the axes of a new figure of ``size`` inches."""
    if ax is not None:
        return ax
    plt = pyplot()
    _fig, ax = plt.subplots(figsize=size, layout="constrained")
    return ax


def outside_legend(ax, **kwargs) -> None:
    """Legend to the right of the axes, so it never hides data."""
    handles, _labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0, **kwargs)


def axis_label(what: str, unit: str | None) -> str:
    """``"what (unit)"``, or ``what`` alone when there is no unit."""
    return f"{what} ({unit})" if unit else what


#: zlib level 3 instead of Pillow's 6: about half the encoding time of a
#: map, files a few per cent larger.
PNG_OPTIONS = {"compress_level": 3}


def png_bytes(fig, dpi: int | None = None) -> bytes:
    """Render ``fig`` to PNG bytes (at ``dpi``, default ``savefig.dpi``)
    and close it.

    The PNG metadata is fixed so the same figure gives the same bytes.
    """
    return figure_bytes(fig, ("png",), dpi)["png"]


def figure_bytes(fig, formats: tuple[str, ...] = ("png",), dpi: int | None = None
                 ) -> dict[str, bytes]:
    """Render ``fig`` once per format (``"png"``, ``"svg"``) and close it;
    ``{format: bytes}``. Dates and software names are left out of the
    metadata and the SVG ids are salted with a constant, so the same figure
    gives the same bytes."""
    plt = pyplot()
    out = {}
    try:
        for fmt in formats:
            buf = io.BytesIO()
            if fmt == "png":
                fig.savefig(buf, format="png", dpi=dpi or RC["savefig.dpi"],
                            metadata={"Software": None}, pil_kwargs=PNG_OPTIONS)
            else:
                with plt.rc_context({"svg.hashsalt": RC["svg.hashsalt"]}):
                    fig.savefig(buf, format=fmt, metadata={"Date": None, "Creator": None})
            out[fmt] = buf.getvalue()
    finally:
        plt.close(fig)
    return out
