"""Reading a table row by row, keeping each row's number, and the cell
checks every table shares.

Row numbers in messages are what a user finds the row by (see
:mod:`doseattr.analysis.tablefile`, which reads CSV, TSV, .xlsx, Parquet
and tables in memory): in a text file the line number, as a text editor or
spreadsheet shows it: the header is row 1 and the first data row is row 2
(comment lines starting with ``#`` and blank lines count as lines too, so
the numbers still match the file when it has a comment header). Column
names are matched without regard to case or surrounding spaces, after a
trailing unit in brackets or parentheses is taken off (``value (ug/m3)``
is the column ``value``); columns a reader does not know are ignored (a
``label`` column is fine).

Every problem raises :class:`~doseattr.errors.InputError` with the file as
``source`` and ``"row N, column 'x'"`` as ``location``.

A :class:`RawTable` gives its cells row by row (:attr:`RawTable.rows`) and
column by column (:meth:`RawTable.texts`, :meth:`RawTable.numbers`); a
large text table read column by column builds its rows only when asked.
"""

from __future__ import annotations

import difflib
import math
import re
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any, Literal, overload

import numpy as np
from numpy.typing import NDArray

from doseattr.analysis.tablefile import Columns, Grid, read_grid
from doseattr.errors import InputError, ModelError

FloatArray = NDArray[np.float64]

#: The largest number whose square is still a float (about 1.34e154):
#: values that enter sums of squares (fits, summaries, weights) stay below it.
SQRT_MAX = math.sqrt(sys.float_info.max)


@dataclass(frozen=True)
class Row:
    """One data row: its row number and its cells by column."""

    line: int
    cells: dict[str, str]


@dataclass(frozen=True, eq=False)
class RawTable:
    """A table's text cells by row (:attr:`rows`) and by column
    (:meth:`texts`, :meth:`numbers`). ``units`` holds the unit written after a
    column's name in the header (``value (ug/m3)``); ``decimal`` is the
    decimal mark of a text table; ``kind`` its format (``"text"``,
    ``"xlsx"``, ``"parquet"`` or ``"frame"``); ``unit`` and ``unit_origin``
    the unit expected in the header and where it was said. ``given_rows``
    holds the rows of a table read row by row, ``cells`` (with the header
    position of each column in ``positions``) those of a table read column
    by column."""

    source: str
    columns: tuple[str, ...]
    given_rows: tuple[Row, ...] | None = None
    units: Mapping[str, str] = field(default_factory=dict)
    header_line: int = 1
    decimal: str = "."
    kind: str = "text"
    unit: str | None = None
    unit_origin: str = "the file's unit"
    cells: Columns | None = None
    positions: Mapping[str, int] = field(default_factory=dict)

    @cached_property
    def rows(self) -> tuple[Row, ...]:
        if self.given_rows is not None:
            return self.given_rows
        texts = [self.texts(c).tolist() for c in self.columns]
        return tuple(Row(line, dict(zip(self.columns, cells)))
                     for line, cells in zip(self.lines.tolist(), zip(*texts)))

    @property
    def n(self) -> int:
        """The number of data rows."""
        return len(self.lines)

    @cached_property
    def lines(self) -> NDArray[np.int64]:
        """Each data row's row number."""
        if self.cells is not None:
            return self.cells.lines
        return np.array([r.line for r in self.rows], dtype=np.int64)

    def row(self, i: int) -> Row:
        """Data row ``i`` (from 0)."""
        if self.given_rows is not None or "rows" in self.__dict__:
            return self.rows[i]
        return Row(int(self.lines[i]), {c: self.texts(c)[i] for c in self.columns})

    def texts(self, column: str) -> NDArray[np.object_]:
        """The column's cells as text (``""`` for an empty cell)."""
        found = self._texts.get(column)
        if found is None:
            if self.cells is not None:
                found = self.cells.text(self.positions[column])
            else:
                found = np.array([r.cells[column] for r in self.rows], dtype=object)
            self._texts[column] = found
        return found

    def strings(self, column: str) -> NDArray[np.str_]:
        """The column's cells as a numpy string array."""
        if self.cells is not None:
            return self.cells.strings(self.positions[column])
        return self.texts(column).astype(str)

    def column(self, column: str) -> NDArray[Any]:
        """The column as read: float64 or bool where a table read column by
        column holds only numbers or only true/false, else its texts."""
        if self.cells is not None:
            return self.cells.cells(self.positions[column])
        return self.texts(column)

    def below(self, column: str) -> NDArray[np.bool_] | None:
        """Where a number column of a table read column by column holds
        ``<L`` (:meth:`column` holds ``L``), or ``None``."""
        if self.cells is None:
            return None
        return self.cells.below(self.positions[column])

    def numbers(self, column: str) -> tuple[FloatArray, NDArray[np.bool_]]:
        """The column's finite numbers and where the cells hold one: where
        :func:`number` would return the value (NaN elsewhere)."""
        cells = self.column(column)
        if cells.dtype == np.float64:
            below = self.below(column)
            ok = np.isfinite(cells)
            return (cells, ok) if below is None else (np.where(below, math.nan, cells),
                                                      ok & ~below)
        if cells.dtype == bool:
            return np.full(len(cells), math.nan), np.zeros(len(cells), dtype=bool)
        return parse_numbers(cells, self.decimal)

    @cached_property
    def _texts(self) -> dict[str, NDArray[np.object_]]:
        return {}


# -- reading ----------------------------------------------------------------
def read_raw(path: str | Path, source: str | None = None) -> RawTable:
    """Read a table (CSV, TSV, .xlsx, Parquet, or a
    :class:`~doseattr.analysis.tablefile.TableRef` to a table in memory)
    into rows of text cells, keeping row numbers.

    Rows whose every cell is empty (``,,`` as spreadsheets export them) are
    skipped like blank lines, and so are columns with neither a name nor a
    value."""
    source = str(path) if source is None else source
    grid = read_grid(path, source)
    source = grid.source
    header, units, keep = _header(grid)
    options = getattr(path, "options", None)
    unit, origin = getattr(options, "unit", None), getattr(options, "unit_origin",
                                                            "the file's unit")
    if grid.columns is not None:
        return RawTable(source, tuple(header), None, units, grid.header_line, grid.decimal,
                        grid.kind, unit, origin, grid.columns, dict(zip(header, keep)))
    rows: list[Row] = []
    for line_no, cells in grid.rows:
        if not any(cells):
            continue
        width = len(grid.header)
        kept = _kept(cells, keep, width)
        if kept is None:
            raise InputError(f"has {len(cells)} values but the header has {width} "
                             f"columns{_split_hint(grid, cells)}", source=source,
                             location=f"row {line_no}")
        rows.append(Row(line_no, dict(zip(header, kept))))
    if not rows:
        last = grid.rows[-1][0] + 1 if grid.rows else grid.header_line + 1
        raise InputError("the file has a header but no data rows", source=source,
                         location=f"row {last}")
    return RawTable(source, tuple(header), tuple(rows), units, grid.header_line,
                    grid.decimal, grid.kind, unit, origin)


def _split_hint(grid: Grid, cells: list[str]) -> str:
    if grid.kind == "text" and grid.decimal == "." and len(cells) > len(grid.header):
        return ("; a decimal comma splits a number in two in a comma-separated file: write "
                "'.' as decimal point, or save with ';' between columns and set "
                "delimiter = \";\" and decimal = \",\" in [tables]")
    return ""


def _kept(cells: list[str], keep: list[int], width: int) -> list[str] | None:
    """The cells under the kept columns, or ``None`` when the row does not
    fit the header. Empty cells beyond the header are dropped; a row may
    stop before trailing columns that have neither a name nor a value."""
    n = len(cells)
    if n > width and not any(cells[width:]):
        cells, n = cells[:width], width
    if keep and keep[-1] < n < width:
        cells, n = cells + [""] * (width - n), width
    if n != width:
        return None
    return [cells[i] for i in keep]


#: A unit at the end of a column name: ``value (ug/m3)`` or ``value [mg/m3]``.
UNIT_IN_NAME = re.compile(r"^(?P<name>.*?)\s*(?:\((?P<p>[^()]*)\)|\[(?P<b>[^\[\]]*)\])$")


def split_unit(name: str) -> tuple[str, str | None]:
    """``("value", "ug/m3")`` from ``"value (ug/m3)"``; ``(name, None)``
    without a unit."""
    found = UNIT_IN_NAME.match(name)
    if not found or not found.group("name"):
        return name, None
    unit = found.group("p") if found.group("p") is not None else found.group("b")
    return found.group("name").strip(), unit.strip() or None


def _header(grid: Grid) -> tuple[list[str], dict[str, str], list[int]]:
    """The column names (lower case, units taken off), their units, and the
    positions kept (columns with neither a name nor a value are dropped)."""
    cells, source, line = grid.header, grid.source, grid.header_line
    used: set[int] = set()
    if grid.columns is not None:
        used.update(i for i, c in enumerate(cells) if not c and grid.columns.used(i))
    for _, row in grid.rows:
        used.update(i for i, c in enumerate(row) if c)
    keep = [i for i, c in enumerate(cells) if c or i in used]
    names: list[str] = []
    units: dict[str, str] = {}
    for i in keep:
        name, unit = split_unit(cells[i])
        name = name.lower()
        if not name:
            raise InputError(f"column {i + 1} of the header has no name", source=source,
                             location=f"row {line}")
        if name in names:
            raise InputError(f"column '{name}' appears twice in the header", source=source,
                             location=f"row {line}")
        names.append(name)
        if unit is not None:
            units[name] = unit
    return names, units, keep


def check_units(raw: RawTable, columns: Sequence[str]) -> None:
    """Refuse a unit in the header of an exposure column (``value (mg/m3)``)
    that is not the unit the section's values are in."""
    if raw.unit is None:
        return
    for column in columns:
        given = raw.units.get(column)
        if given is not None and not same_unit(given, raw.unit):
            raise InputError(f"the header gives column '{column}' in {given} but "
                             f"{raw.unit_origin} is {raw.unit}; correct the header, or set "
                             f"unit = \"{given}\" in the section to convert the values",
                             source=raw.source,
                             location=f"row {raw.header_line}, column '{column}'")


def same_unit(a: str, b: str) -> bool:
    """Whether two unit texts name one unit (``ug/m3`` and ``µg/m³`` do)."""
    from doseattr.core.exposure.units import concentration_unit, cumulative_unit

    for parse in (cumulative_unit, concentration_unit):
        try:
            return parse(a) == parse(b)
        except ModelError:
            continue
    return "".join(a.split()).lower() == "".join(b.split()).lower()


def shown(text: str, limit: int = 40) -> str:
    """A cell's text for a message, cut to ``limit`` characters."""
    return text if len(text) <= limit else f"{text[:limit]}... ({len(text)} characters)"


def require_columns(raw: RawTable, required: Sequence[str], what: str) -> None:
    """Refuse a table that lacks any ``required`` column, suggesting the
    nearest column name present."""
    for name in required:
        if name not in raw.columns:
            hint = near_column(name, [c for c in raw.columns if c not in required])
            raise InputError(f"missing column '{name}' ({what} needs columns "
                             f"{', '.join(required)}){hint}",
                             source=raw.source, location=f"column '{name}'")


def near_column(name: str, columns: list[str]) -> str:
    """``"; the file has a column 'x' (misspelt?)"`` for a near miss, or ``""``."""
    close = difflib.get_close_matches(name, columns, n=1, cutoff=0.6)
    return f"; the file has a column '{close[0]}' (misspelt?)" if close else ""


@overload
def number(raw: RawTable, row: Row, column: str, *,
           required: Literal[True] = True) -> float: ...


@overload
def number(raw: RawTable, row: Row, column: str, *, required: bool) -> float | None: ...


def number(raw: RawTable, row: Row, column: str, *, required: bool = True) -> float | None:
    """The cell as a finite float; ``None`` for an empty optional cell."""
    text = row.cells.get(column, "")
    where = f"row {row.line}, column '{column}'"
    if text == "":
        if required:
            raise InputError("empty cell where a number belongs", source=raw.source,
                             location=where)
        return None
    value = _parse(raw, text)
    if value is None:
        raise InputError(f"text '{shown(text)}' where a number belongs{_number_hint(raw, text)}",
                         source=raw.source, location=where)
    if not math.isfinite(value):
        raise InputError(f"'{shown(text)}' is not a finite number (numbers must lie within "
                         "about +-1.8e308)", source=raw.source, location=where)
    return value


#: Digits grouped in threes by ``,``, ``.``, ``'`` or a space: a thousands
#: separator (``1,500``, ``12.345,6``, ``1 500``).
THOUSANDS = re.compile(r"^[+-]?\d{1,3}(?:([,.' \u00a0\u202f])\d{3})(?:\1\d{3})*(?:[.,]\d+)?$")
DECIMAL_COMMA = re.compile(r"^[+-]?\d*,\d+(?:[eE][+-]?\d+)?$")
#: How a laboratory may write a result below the detection limit.
NON_DETECT_TEXT = ("nd", "n.d.", "n.d", "<lod", "< lod", "<dl", "bdl", "<mdl", "not detected")


def _parse(raw: RawTable, text: str) -> float | None:
    """The number a cell holds, or ``None`` when it holds none (with the
    table's decimal mark: ``1,5`` is 1.5 with ``decimal = ","``)."""
    if raw.decimal == ",":
        if "." in text:
            return None
        text = text.replace(",", ".")
    try:
        return float(text)
    except ValueError:
        return None


def parse_numbers(texts: NDArray[np.object_],
                  decimal: str = ".") -> tuple[FloatArray, NDArray[np.bool_]]:
    """Each text's finite number as :func:`number` reads it, and where
    there is one (NaN elsewhere)."""
    if decimal == ",":
        texts = np.array([t.replace(",", ".") if "." not in t else "" for t in texts],
                         dtype=object)
    try:
        # numpy converts text to float as Python's float() does
        values = np.asarray(texts, dtype=object).astype(np.float64)
    except ValueError:
        values = np.array([_float_or_nan(t) for t in texts], dtype=np.float64)
    return values, np.isfinite(values)


def _float_or_nan(text: str) -> float:
    try:
        return float(text)
    except ValueError:
        return math.nan


def _number_hint(raw: RawTable, text: str) -> str:
    """What to do about a cell that is not a number: a non-detect, a
    thousands separator or a decimal mark other than the table's (naming
    the option to set)."""
    if text.lower() in NON_DETECT_TEXT:
        return (" (a result below the detection limit: write <L with the limit L, for "
                "example <0.05)")
    text_table = raw.kind == "text"
    grouped = THOUSANDS.match(text)
    if grouped:
        mark = grouped.group(1)
        if mark == "," and raw.decimal == "." and "." not in text:
            option = " in [tables]" if text_table else " (or enter it as a number)"
            return (f" (',' is a thousands separator or a decimal comma: write "
                    f"{text.replace(',', '')} without the separator, or set decimal = \",\""
                    f"{option} if ',' is the decimal mark)")
        plain = text.replace(mark, "")
        if raw.decimal == "." and "," in plain:
            plain = plain.replace(",", ".")
        elif raw.decimal == "," and "." in plain:
            plain = plain.replace(".", ",")
        return (f" (a thousands separator '{mark}': write {plain} without it; no thousands "
                "separators are read)")
    if raw.decimal == "," and "." in text:
        return (" (decimal = \",\" is set for this table, so '.' is not a decimal mark: write "
                f"{text.replace('.', ',')}, or remove the decimal option)")
    if DECIMAL_COMMA.match(text):
        if not text_table:
            return (" (a decimal comma in a text cell: enter it as the number "
                    f"{text.replace(',', '.')})")
        return (" (a decimal comma: set decimal = \",\" in [tables] or in the table's "
                f"options, or write {text.replace(',', '.')})")
    return ""


def cell_error(raw: RawTable, row: Row, column: str, message: str) -> InputError:
    return InputError(message, source=raw.source, location=f"row {row.line}, column '{column}'")


def check_band_order(raw: RawTable, lower: FloatArray, upper: FloatArray) -> None:
    for i in range(len(lower) - 1):
        if math.isinf(upper[i]) and lower[i + 1] >= lower[i]:
            raise cell_error(raw, raw.rows[i], "upper", "only the top band may be open-ended "
                        "(empty upper)")
    for i in range(1, len(lower)):
        row, prev = raw.rows[i], raw.rows[i - 1]
        if lower[i] < lower[i - 1]:
            raise cell_error(raw, row, "lower", f"bands are out of order: this band starts at "
                        f"{lower[i]:g}, the band before it (row {prev.line}) at {lower[i - 1]:g}; "
                        "list the bands from lowest to highest")
        if lower[i] < upper[i - 1]:
            raise cell_error(raw, row, "lower",
                             f"band [{lower[i]:g}, {upper[i]:g}] overlaps the band "
                        f"before it (row {prev.line}, [{lower[i - 1]:g}, {upper[i - 1]:g}]); "
                        "each band must start where the one before it ends or later")


def below_sqrt_max(raw: RawTable, row: Row, column: str, value: float, advice: str) -> None:
    """Refuse ``value`` at or above :data:`SQRT_MAX`, whose square overflows."""
    if abs(value) >= SQRT_MAX:
        raise cell_error(raw, row, column, f"{value:g} is too large: fits and summaries use "
                         f"squares, which overflow beyond {SQRT_MAX:.3g}; {advice}")
