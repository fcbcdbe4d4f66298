"""Reading a CSV table line by line, keeping each row's line number, and the
cell checks every table shares.

Row numbers in messages are line numbers in the file, as a text editor or
spreadsheet shows them: the header is row 1 and the first data row is row 2
(comment lines starting with ``#`` and blank lines count as lines too, so
the numbers still match the file when it has a comment header). Column
names are matched without regard to case or surrounding spaces; columns a
reader does not know are ignored (a ``label`` column is fine).

Every problem raises :class:`~doseattr.errors.InputError` with the file as
``source`` and ``"row N, column 'x'"`` as ``location``.

The reader is the standard library's :mod:`csv` module, line by line, so
that each row keeps its line number (pandas' reader renumbers rows once
comment and blank lines are dropped).
"""

from __future__ import annotations

import csv
import difflib
import math
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Literal, overload

import numpy as np
from numpy.typing import NDArray

from doseattr.errors import InputError

FloatArray = NDArray[np.float64]

#: The largest number whose square is still a float (about 1.34e154):
#: values that enter sums of squares (fits, summaries, weights) stay below it.
SQRT_MAX = math.sqrt(sys.float_info.max)


@dataclass(frozen=True)
class Row:
    """One data row: its line number in the file and its cells by column."""

    line: int
    cells: dict[str, str]


@dataclass(frozen=True)
class RawTable:
    source: str
    columns: tuple[str, ...]
    rows: tuple[Row, ...]


# -- reading ----------------------------------------------------------------
def read_raw(path: str | Path, source: str | None = None) -> RawTable:
    """Read a CSV file into rows of text cells, keeping line numbers."""
    source = str(path) if source is None else source
    data = b""
    try:
        data = Path(path).read_bytes()
        text = data.decode("utf-8-sig")
    except FileNotFoundError:
        raise InputError("file not found", source=source) from None
    except IsADirectoryError:
        raise InputError("is a folder, not a CSV file", source=source) from None
    except UnicodeDecodeError as exc:
        bad_line = data[:exc.start].count(b"\n") + 1
        raise InputError("cannot be read as UTF-8 text; save it as CSV (UTF-8)",
                         source=source, location=f"row {bad_line}") from None
    except OSError as exc:
        raise InputError(f"cannot be read: {exc.strerror or exc}", source=source) from None
    header: list[str] | None = None
    rows: list[Row] = []
    lines = text.splitlines()
    for line_no, line in enumerate(lines, start=1):
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        cells = _cells(line, source, line_no)
        if header is None:
            header = _header(cells, line, source, line_no)
            continue
        if len(cells) != len(header):
            raise InputError(f"has {len(cells)} values but the header has {len(header)} "
                             "columns", source=source, location=f"row {line_no}")
        rows.append(Row(line_no, dict(zip(header, cells))))
    if header is None:
        raise InputError("the file is empty (no header row)", source=source, location="row 1")
    if not rows:
        raise InputError("the file has a header but no data rows", source=source,
                         location=f"row {len(lines) + 1}")
    return RawTable(source, tuple(header), tuple(rows))


def _cells(line: str, source: str, line_no: int) -> list[str]:
    """One line's cells. A cell can be as long as its line: the csv
    module's field size limit (128k characters by default) is raised for
    the call and restored after."""
    previous = csv.field_size_limit()
    csv.field_size_limit(max(previous, len(line) + 1))
    try:
        return [c.strip() for c in next(csv.reader([line]), [])]
    except csv.Error as exc:
        raise InputError(f"cannot be read as CSV: {exc}", source=source,
                         location=f"row {line_no}") from None
    finally:
        csv.field_size_limit(previous)


def shown(text: str, limit: int = 40) -> str:
    """A cell's text for a message, cut to ``limit`` characters."""
    return text if len(text) <= limit else f"{text[:limit]}... ({len(text)} characters)"


def _header(cells: list[str], line: str, source: str, line_no: int) -> list[str]:
    names = [c.lower() for c in cells]
    if len(names) == 1 and ";" in line:
        raise InputError("the columns are separated by ';'; save the file as "
                         "comma-separated CSV with '.' as decimal point",
                         source=source, location=f"row {line_no}")
    for i, name in enumerate(names):
        if not name:
            raise InputError(f"column {i + 1} of the header has no name", source=source,
                             location=f"row {line_no}")
        if name in names[:i]:
            raise InputError(f"column '{name}' appears twice in the header", source=source,
                             location=f"row {line_no}")
    return names


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
    try:
        value = float(text)
    except ValueError:
        hint = " (use '.' as decimal point)" if "," in text else ""
        raise InputError(f"text '{shown(text)}' where a number belongs{hint}",
                         source=raw.source, location=where) from None
    if not math.isfinite(value):
        raise InputError(f"'{shown(text)}' is not a finite number (numbers must lie within "
                         "about +-1.8e308)", source=raw.source, location=where)
    return value


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
