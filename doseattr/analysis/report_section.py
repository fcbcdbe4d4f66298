"""The ``[report]`` section: which figure files a run writes, and at what
resolution.

::

    [report]
    figures = ["png", "svg"]   # default ["png"]
    dpi = 150                  # PNG resolution, default 150
    contribution_table = true  # contribution.csv: the burden curve at every point

The report itself always embeds PNG; ``figures`` names the files written
into ``figures/``. Types are checked by the schema
(:mod:`doseattr.analysis.schema`); this module checks the values.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from doseattr.analysis.schema import key_location, suggest
from doseattr.errors import InputError

FIGURE_FORMATS = ("png", "svg")
DEFAULT_DPI = 150
#: Below this a figure's text is unreadable; above it a report grows past
#: tens of megabytes (common practice for screen and print figures).
DPI_RANGE = (50, 600)


@dataclass(frozen=True)
class ReportSettings:
    """``figures``: the formats written for each figure; ``dpi``: the PNG
    resolution; ``contribution_table``: write ``contribution.csv`` (the
    burden curve at every point it was computed at: each value on the
    empirical path, where results.json holds a summary of at most 201)."""

    figures: tuple[str, ...] = ("png",)
    dpi: int = DEFAULT_DPI
    contribution_table: bool = False


def report_settings(data: Mapping[str, Any] | None, source: str | None = None
                    ) -> ReportSettings:
    """The checked ``[report]`` section (``None``: the defaults).

    Raises
    ------
    InputError
        For an unknown format, a format given twice, or a dpi outside
        :data:`DPI_RANGE`.
    """
    if not data:
        return ReportSettings()
    figures = tuple(data.get("figures", ("png",)))
    for f in figures:
        if f not in FIGURE_FORMATS:
            raise InputError(f"'{f}' is not a figure format doseattr writes; use "
                             f"{' or '.join(FIGURE_FORMATS)}{suggest(f, FIGURE_FORMATS)}",
                             source=source, location=key_location("report", "figures"))
    if len(set(figures)) < len(figures):
        raise InputError("names a format twice; list each once, for example "
                         '["png", "svg"]', source=source,
                         location=key_location("report", "figures"))
    dpi = data.get("dpi", DEFAULT_DPI)
    low, high = DPI_RANGE
    if not low <= dpi <= high:
        raise InputError(f"must be between {low} and {high} (150 suits screens and most "
                         "printing)", source=source, location=key_location("report", "dpi"))
    return ReportSettings(figures=figures, dpi=int(dpi),
                          contribution_table=bool(data.get("contribution_table", False)))


def report_settings_of(settings: Mapping[str, Any] | None) -> ReportSettings:
    """The ``[report]`` settings of a parsed analysis (``Analysis.settings``)."""
    return report_settings((settings or {}).get("report"))
