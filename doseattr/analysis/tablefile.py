"""Where a table's cells come from: a CSV or TSV file, an ``.xlsx``
workbook, a Parquet file or (from Python) a pandas DataFrame or numpy
array, all turned into the same grid of text cells with each row's number.

The format is chosen by the file's extension: ``.tsv`` and ``.tab`` are
tab-separated text, ``.xlsx`` (and ``.xlsm``) a workbook read with pandas
and openpyxl, ``.parquet`` and ``.pq`` Parquet read with pyarrow; anything
else is read as CSV. How to read a table is a :class:`TableOptions`,
carried by the :class:`TableRef` that names it (see
:meth:`doseattr.analysis.schema.Context.table` for the analysis file's
keys).

Row numbers are what a user finds the row by: the line of a text file,
the sheet's row number in a workbook, and for Parquet files and
DataFrames the row counted with the header as row 1 (the first data row
is row 2, as in the CSV file ``DataFrame.to_csv(index=False)`` writes).

Cells that hold numbers are written as ``repr`` of the float (which reads
back exactly), dates as ISO dates, missing values as empty cells.

A large plain text table (at least :data:`COLUMNAR_MIN_BYTES`, with ASCII
data rows, quotes only around whole cells with no delimiter or line break
inside, no comment or blank lines between data rows and every row as wide
as the header) is read column by column with pandas' C
tokenizer (:func:`columnar_grid`); any other text table, and any table
whose columnar reading finds something unusual, is read line by line with
:mod:`csv`. Both give the same cells, row numbers and messages.
"""

from __future__ import annotations

import codecs
import datetime as dt
import hashlib
import importlib
import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, cast

import numpy as np
from numpy.typing import NDArray

from doseattr.errors import InputError

#: How to install what .xlsx and Parquet tables need (the ``tables`` extra).
TABLES_EXTRA = 'pip install "doseattr[tables]"'
TEXT_SUFFIXES = (".csv", ".txt")
TAB_SUFFIXES = (".tsv", ".tab")
XLSX_SUFFIXES = (".xlsx", ".xlsm")
PARQUET_SUFFIXES = (".parquet", ".pq")
#: Spreadsheet formats that are not read, with what to do instead.
REFUSED_SUFFIXES = {".xls": "an Excel 97-2003 workbook", ".ods": "an OpenDocument spreadsheet",
                    ".numbers": "a Numbers spreadsheet"}
DECIMAL_MARKS = (".", ",")
#: Text tables of at least this many bytes are read column by column (see
#: :func:`columnar_grid`); smaller ones line by line, which is as fast for
#: them and does not import pandas.
COLUMNAR_MIN_BYTES = 256 * 1024
COLUMNAR_DELIMITERS = (",", ";", "\t", "|")
#: Lines searched for the header before a table is read line by line.
HEADER_SEARCH_LINES = 64
#: The bytes data rows read column by column may hold: printable ASCII
#: but quotes (allowed around whole cells, :func:`_whole_cell_quotes`), tab,
#: line feed and carriage return (other control characters break lines for
#: :meth:`str.splitlines` or are stripped).
_PLAIN = bytes([9, 10, 13, *range(0x20, 0x7f)]).replace(b'"', b"")
_COMMENT_LINE = re.compile(rb"(?:^|\n)[ \t]*#")


@dataclass(frozen=True)
class TableOptions:
    """How to read one table.

    ``delimiter`` (``None``: ``","``, or a tab for ``.tsv``/``.tab``),
    ``decimal`` and ``encoding`` apply to text tables, ``sheet`` (a name,
    or a position with 1 for the first sheet) to workbooks. ``unit`` is the
    unit the table's exposure columns are expected in (from the section's
    ``unit`` key or the file's), ``unit_origin`` where it was said
    (``"[exposure] unit"``), both for checking units in headers.
    """

    delimiter: str | None = None
    decimal: str = "."
    encoding: str = "utf-8-sig"
    sheet: str | int | None = None
    unit: str | None = None
    unit_origin: str = "the file's unit"


class TableRef(str):
    """A table's name as messages show it (its path, or
    ``<DataFrame for [exposure] table>`` for a table given from Python),
    with :class:`TableOptions` and, for a table in memory, its data.

    A ``str``, so that it goes wherever a path went before (messages,
    records of where values came from)."""

    options: TableOptions
    data: Any

    def __new__(cls, name: str, options: TableOptions | None = None,
                data: Any = None) -> TableRef:
        ref = super().__new__(cls, name)
        ref.options = options or TableOptions()
        ref.data = data
        return ref

    def __reduce__(self) -> Any:
        return (TableRef, (str(self), self.options, self.data))


@dataclass(frozen=True)
class Grid:
    """A table as text: the header's row number and cells, then each data
    row's number and cells. ``kind`` is ``"text"`` (CSV/TSV, whose cells
    the ``decimal`` option applies to), ``"xlsx"``, ``"parquet"`` or
    ``"frame"``."""

    source: str
    header_line: int
    header: list[str]
    rows: list[tuple[int, list[str]]]
    kind: str
    decimal: str = "."
    #: The data rows column by column when the table was read so (then
    #: ``rows`` is empty).
    columns: Columns | None = None


class Columns:
    """A text table's data rows column by column (from
    :func:`columnar_grid`), each column converted when first asked for.

    ``lines`` holds each row's line number. :meth:`cells` gives a header
    position's cells: float64 where pandas read every cell as a number
    (integers included), bool where it read every cell as true/false
    (``true``, ``True``, ``TRUE``, ``false``...), otherwise an object array
    of the cells' text, stripped. :meth:`below` marks the cells of a number
    column written ``<L`` (``cells`` holds ``L``). :meth:`text` gives any
    column's text as written (stripped), reading the file again for number
    and bool columns. ``marks`` holds, for columns with cells starting with
    ``<`` (which pandas read without it), where those cells are.
    """

    def __init__(self, lines: NDArray[np.int64], frame: Any, reread: Callable[[int], Any],
                 marks: dict[int, NDArray[np.bool_]], *, strip: bool,
                 keep: NDArray[np.bool_] | None = None) -> None:
        self.lines = lines
        self.width = int(frame.shape[1])
        self._frame, self._reread, self._marks, self._strip = frame, reread, marks, strip
        self._keep = keep
        self._cells: dict[int, NDArray[Any]] = {}
        self._below: dict[int, NDArray[np.bool_] | None] = {}
        self._texts: dict[int, NDArray[np.object_]] = {}

    def cells(self, j: int) -> NDArray[Any]:
        if j not in self._cells:
            self._cells[j], self._below[j] = self._convert(j)
        return self._cells[j]

    def below(self, j: int) -> NDArray[np.bool_] | None:
        self.cells(j)
        return self._below[j]

    def used(self, j: int) -> bool:
        """Whether any cell of the column holds something."""
        cells = self.cells(j)
        return j in self._marks or cells.dtype != object or bool(np.any(cells != ""))

    def text(self, j: int) -> NDArray[np.object_]:
        cells = self.cells(j)
        if cells.dtype == object:
            return cells
        if j not in self._texts:
            self._texts[j] = self._text_as_written(j)
        return self._texts[j]

    def strings(self, j: int) -> NDArray[np.str_]:
        """The column's text (stripped) as a numpy string array."""
        series = self._frame[j]
        if j in self._cells or j in self._marks or isinstance(series.dtype, np.dtype):
            return self.text(j).astype(str)
        import pandas as pd

        # each distinct text converted once: ids repeat over many rows
        codes, uniques = pd.factorize(series)
        texts = [str(u) for u in uniques]
        if self._strip:
            texts = [t.strip() for t in texts]
        return self._kept(np.array(texts, dtype=str)[codes])

    def with_rows(self, keep: NDArray[np.bool_]) -> Columns:
        """The columns without the rows where ``keep`` is false."""
        return Columns(self.lines[keep], self._frame, self._reread, self._marks,
                       strip=self._strip, keep=keep)

    def _kept(self, values: NDArray[Any]) -> NDArray[Any]:
        return values if self._keep is None else values[self._keep]

    def _text_as_written(self, j: int) -> NDArray[np.object_]:
        return self._kept(_text_column(self._reread(j)[j], self._strip))

    def _convert(self, j: int) -> tuple[NDArray[Any], NDArray[np.bool_] | None]:
        series = self._frame[j]
        kind = series.dtype.kind if isinstance(series.dtype, np.dtype) else "O"
        marks = self._marks.get(j)
        if kind in "iuf":
            values = self._kept(series.to_numpy(dtype=np.float64))
            return values, None if marks is None else self._kept(marks)
        if marks is not None:  # text with its '<' taken off: read it as written
            return self._text_as_written(j), None
        if kind == "b":
            return self._kept(series.to_numpy(dtype=bool)), None
        return self._kept(_text_column(series, self._strip)), None


def is_in_memory(value: Any) -> bool:
    """A pandas DataFrame or Series, or a numpy array (not a path)."""
    module = type(value).__module__.split(".")[0]
    return module in ("pandas", "numpy") and hasattr(value, "shape")


def suffix(path: str) -> str:
    return Path(path).suffix.lower()


def format_of(path: str) -> str:
    """``"text"``, ``"xlsx"`` or ``"parquet"``, by extension."""
    end = suffix(path)
    if end in XLSX_SUFFIXES:
        return "xlsx"
    if end in PARQUET_SUFFIXES:
        return "parquet"
    return "text"


def check_codec(name: str) -> bool:
    try:
        codecs.lookup(name)
    except LookupError:
        return False
    return True


# -- reading ----------------------------------------------------------------------
def read_grid(path: str | Path, source: str) -> Grid:
    """The cells of the table ``path`` names (a :class:`TableRef` carries
    its options and, for a table in memory, its data)."""
    options = getattr(path, "options", None) or TableOptions()
    data = getattr(path, "data", None)
    if data is not None:
        return frame_grid(data, source)
    name = str(path)
    end = suffix(name)
    if end in REFUSED_SUFFIXES:
        raise InputError(f"is {REFUSED_SUFFIXES[end]}, which is not read; save it as .xlsx, "
                         "CSV (UTF-8) or Parquet", source=source)
    kind = format_of(name)
    if kind == "xlsx":
        return _xlsx_grid(name, source, options.sheet)
    if kind == "parquet":
        return _parquet_grid(name, source)
    return _text_grid(name, source, options)


def _read_bytes(path: str, source: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise InputError("file not found", source=source) from None
    except IsADirectoryError:
        raise InputError("is a folder, not a CSV file", source=source) from None
    except OSError as exc:
        raise InputError(f"cannot be read: {exc.strerror or exc}", source=source) from None


def _text_grid(path: str, source: str, options: TableOptions) -> Grid:
    data = _read_bytes(path, source)
    _refuse_binary(data, source)
    delimiter = options.delimiter or ("\t" if suffix(path) in TAB_SUFFIXES else ",")
    columnar = columnar_grid(data, source, options, delimiter)
    if columnar is not None:
        return columnar
    return _line_grid(data, source, options, delimiter)


def _line_grid(data: bytes, source: str, options: TableOptions, delimiter: str) -> Grid:
    """Read a text table line by line with :mod:`csv`."""
    import csv

    try:
        text = data.decode(options.encoding)
    except UnicodeDecodeError as exc:
        bad_line = data[:exc.start].count(b"\n") + 1
        hint = ("save it as CSV (UTF-8), or give its encoding, e.g. encoding = \"cp1252\" in "
                "[tables]" if options.encoding.replace("-", "").lower().startswith("utf8")
                else "check the encoding option")
        raise InputError(f"cannot be read as {_codec_name(options.encoding)} text; {hint}",
                         source=source, location=f"row {bad_line}") from None
    header: tuple[int, list[str]] | None = None
    rows: list[tuple[int, list[str]]] = []
    lines = text.splitlines()
    previous = csv.field_size_limit()
    csv.field_size_limit(max(previous, max(map(len, lines), default=0) + 1))
    try:
        for line_no, line in enumerate(lines, start=1):
            if _skipped(line):
                continue
            cells = _line_cells(line, delimiter, source, line_no)
            if header is None:
                _check_delimiter(cells, line, delimiter, source, line_no)
                header = (line_no, cells)
            else:
                rows.append((line_no, cells))
    finally:
        csv.field_size_limit(previous)
    if header is None:
        raise InputError("the file is empty (no header row)", source=source, location="row 1")
    return Grid(source, header[0], header[1], rows, "text", options.decimal)


def _skipped(line: str) -> bool:
    """Blank lines and comment lines (``#`` first) are not rows."""
    return not line.strip() or line.lstrip().startswith("#")


def _line_cells(line: str, delimiter: str, source: str, line_no: int) -> list[str]:
    """One line's cells, stripped (the caller has raised the field size limit)."""
    import csv

    if '"' not in line:
        return [c.strip() for c in line.split(delimiter)]
    try:
        return [c.strip() for c in next(csv.reader([line], delimiter=delimiter), [])]
    except csv.Error as exc:
        raise InputError(f"cannot be read as CSV: {exc}", source=source,
                         location=f"row {line_no}") from None


# -- reading a large text table column by column ------------------------------------
def columnar_grid(data: bytes, source: str, options: TableOptions,
                  delimiter: str) -> Grid | None:
    """The table read column by column with pandas' C tokenizer, or
    ``None`` where it would not give what :func:`_line_grid` gives (then
    the caller reads it line by line, which also words any message).

    The header and the comment lines above it are read as text in the
    table's encoding; the data rows after it must be ASCII (the same text
    in every ASCII-compatible encoding) without control characters, lone
    carriage returns or comment lines, with quotes only around whole cells
    holding no delimiter, line break or quote (:func:`_whole_cell_quotes`),
    with as many delimiters on each line as the header has, so that each
    line is one row and each delimiter ends one cell, as :mod:`csv` splits
    them. Rows whose every cell is empty are left out as blank lines are.

    When every ``<`` in the data rows starts a cell, pandas reads them
    without it, so that ``<0.05`` reads as a number, and :class:`Columns`
    marks where each ``<`` was (:func:`_below_marks`)."""
    if (len(data) < COLUMNAR_MIN_BYTES or delimiter not in COLUMNAR_DELIMITERS
            or options.decimal not in DECIMAL_MARKS or not _ascii_codec(options.encoding)):
        return None
    found = _header_line(data, options.encoding, delimiter, source)
    if found is None:
        return None
    header_line, header, end = found
    stop = len(data)
    while stop > end and data[stop - 1] in b" \t\r\n":
        stop -= 1
    body = data[end:stop]
    width = len(header)
    quoted = b'"' in body
    if not body or not _plain(body, quoted):
        return None
    if quoted and not _whole_cell_quotes(body, delimiter):
        return None
    marks: dict[int, NDArray[np.bool_]] | None = None
    if options.decimal == "." and b"<" in body:
        codes = np.frombuffer(body, dtype=np.uint8)
        breaks = np.flatnonzero(codes == ord("\n"))
        n, count = len(breaks) + 1, int(np.count_nonzero(codes == ord(delimiter)))
        if count == n * (width - 1):
            marks = _below_marks(codes, breaks, delimiter, n)
    else:
        n, count = body.count(b"\n") + 1, body.count(delimiter.encode())
    if count != n * (width - 1):
        return None
    read = _frame_reader(delimiter, options.decimal, quoted)
    try:
        frame = read(body if not marks else body.replace(b"<", b""), None)
    except Exception:  # pandas' parser errors: the line-by-line reading words them
        return None
    if frame.shape != (n, width):
        return None
    columns = Columns(np.arange(header_line + 1, header_line + 1 + n, dtype=np.int64), frame,
                      lambda j: read(body, j), marks or {}, strip=_edge_space(body, delimiter))
    cells = [columns.cells(j) for j in range(width)] if all(
        not isinstance(frame[j].dtype, np.dtype) or frame[j].dtype == object
        for j in range(width)) else []
    if cells:
        empty = np.ones(n, dtype=bool)
        for c in cells:
            empty &= c == ""
        if empty.all():
            return None
        if empty.any():
            columns = columns.with_rows(~empty)
    return Grid(source, header_line, header, [], "text", options.decimal, columns)


def _below_marks(codes: NDArray[np.uint8], breaks: NDArray[np.intp], delimiter: str,
                 n: int) -> dict[int, NDArray[np.bool_]] | None:
    """For each column with cells starting with ``<``, the rows of those
    cells (from the data rows' bytes and the offsets of their line
    breaks); ``None`` when some ``<`` does not start a cell (then the data
    rows are read as they are)."""
    where = np.flatnonzero(codes == ord("<"))
    before = codes[np.maximum(where - 1, 0)]
    if not np.all((where == 0) | (before == ord(delimiter)) | (before == ord("\n"))):
        return None
    row = np.searchsorted(breaks, where)
    starts = np.where(row > 0, breaks[np.maximum(row - 1, 0)] + 1, 0)
    column = _delimiters_between(codes, starts, where, ord(delimiter))
    marks: dict[int, NDArray[np.bool_]] = {}
    for j in np.unique(column).tolist():
        mask = np.zeros(n, dtype=bool)
        mask[row[column == j]] = True
        marks[int(j)] = mask
    return marks


#: Bytes of ``(marks x offset)`` looked at in one pass by :func:`_delimiters_between`.
_WINDOW_BYTES = 1 << 20
#: Longest stretch before a ``<`` taken from a window.
_WINDOW_WIDE = 4096


def _delimiters_between(codes: NDArray[np.uint8], starts: NDArray[np.intp],
                        stops: NDArray[np.intp], delimiter: int) -> NDArray[np.intp]:
    """How many ``delimiter`` bytes lie in ``codes[starts[i]:stops[i]]``,
    for each ``i``: from a window of the bytes before each stop, in parts
    of about :data:`_WINDOW_BYTES`; from the delimiters' offsets where the
    stretches are long (``<`` far into wide rows)."""
    length = stops - starts
    wide = int(length.max(initial=0))
    if wide > _WINDOW_WIDE:
        delimiters = np.flatnonzero(codes == delimiter)
        return cast(NDArray[np.intp], np.searchsorted(delimiters, stops)
                    - np.searchsorted(delimiters, starts))
    back = np.arange(1, wide + 1)
    out = np.empty(len(stops), dtype=np.intp)
    step = max(1, _WINDOW_BYTES // max(wide, 1))
    for lo in range(0, len(stops), step):
        at = stops[lo:lo + step, None] - back
        inside = back <= length[lo:lo + step, None]
        out[lo:lo + step] = ((codes[np.maximum(at, 0)] == delimiter) & inside).sum(axis=1)
    return out


def _ascii_codec(encoding: str) -> bool:
    """Whether the codec reads ASCII bytes as ASCII text."""
    ascii_bytes = bytes(range(128))
    try:
        return ascii_bytes.decode(encoding) == ascii_bytes.decode("ascii")
    except (LookupError, UnicodeDecodeError):
        return False


def _header_line(data: bytes, encoding: str, delimiter: str,
                 source: str) -> tuple[int, list[str], int] | None:
    """The header's line number and cells and the offset of the byte after
    its line, read as :func:`_line_grid` reads them; ``None`` when the
    header is not among the first lines, those lines break other than at
    line feeds or the header has a problem (which the line-by-line reading
    reports)."""
    end = 0
    for line_no in range(1, HEADER_SEARCH_LINES + 1):
        stop = data.find(b"\n", end)
        if stop < 0:
            return None
        end = stop + 1
        try:
            text = data[:end].decode(encoding)
        except UnicodeDecodeError:
            return None
        lines = text.splitlines()
        if len(lines) != line_no:
            return None
        line = lines[-1]
        if _skipped(line):
            continue
        import csv

        previous = csv.field_size_limit()
        csv.field_size_limit(max(previous, len(line) + 1))
        try:
            cells = _line_cells(line, delimiter, source, line_no)
            _check_delimiter(cells, line, delimiter, source, line_no)
        except InputError:  # raised by the line-by-line reading, after any other problem
            return None
        finally:
            csv.field_size_limit(previous)
        return line_no, cells, end
    return None


def _plain(body: bytes, quoted: bool = False) -> bool:
    if body.translate(None, _PLAIN + b'"' if quoted else _PLAIN):
        return False
    if b"\r" in body and body.count(b"\r") != body.count(b"\r\n"):
        return False
    return not (b"#" in body and _COMMENT_LINE.search(body))


def _whole_cell_quotes(body: bytes, delimiter: str) -> bool:
    """Whether every quote in the data rows opens or closes a whole cell
    (right after a delimiter or line break, or right before one) and the
    quoted text holds no delimiter, line break, carriage return or quote:
    then :mod:`csv` and pandas both take the pair off and nothing else
    (doubled quotes, quoted delimiters or line breaks, text before an
    opening quote take the line-by-line reading)."""
    codes = np.frombuffer(body, dtype=np.uint8)
    is_quote = codes == ord('"')
    ends = (codes == ord(delimiter)) | (codes == ord("\n"))
    # quotes, delimiters and line breaks in order: a pair of quotes must be
    # next to each other among them
    events = np.flatnonzero(ends | is_quote | (codes == ord("\r")))
    pairs = np.flatnonzero(is_quote[events])
    if pairs.size % 2 or not np.array_equal(pairs[1::2], pairs[0::2] + 1):
        return False
    opens, closes = events[pairs[0::2]], events[pairs[1::2]]
    if not np.all((opens == 0) | ends[np.maximum(opens - 1, 0)]):
        return False
    after = np.minimum(closes + 1, codes.size - 1)
    return bool(np.all((closes == codes.size - 1) | ends[after] | (codes[after] == ord("\r"))))


def _edge_space(body: bytes, delimiter: str) -> bool:
    """Whether a cell may start or end with a space or tab (then text
    cells are stripped)."""
    return b" " in body or (delimiter != "\t" and b"\t" in body)


def _frame_reader(delimiter: str, decimal: str,
                  quoted: bool = False) -> Callable[[bytes, int | None], Any]:
    """Read data rows with pandas: every column (numbers where pandas reads
    every cell of a column as one), or column ``j`` as text; with ``quoted``,
    a quote pair around a cell is taken off (:func:`_whole_cell_quotes`)."""
    import csv
    import io
    import warnings

    import pandas as pd

    # pandas before 3.0: "round_trip" parses numbers as Python's float() does
    exact = {} if int(pd.__version__.split(".")[0]) >= 3 else {"float_precision": "round_trip"}

    def read(body: bytes, j: int | None) -> Any:
        # with a decimal comma every cell is read as text and parsed as the
        # line-by-line reading parses it
        as_text = j is not None or decimal != "."
        options = dict(sep=delimiter, header=None, engine="c",
                       dtype=object if as_text else None,
                       usecols=None if j is None else [j], na_filter=False,
                       keep_default_na=False, skip_blank_lines=False,
                       quoting=csv.QUOTE_MINIMAL if quoted else csv.QUOTE_NONE,
                       encoding="ascii", **({} if as_text else exact))
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", pd.errors.DtypeWarning)
            frame = pd.read_csv(io.BytesIO(body), **options)
        if any(issubclass(w.category, pd.errors.DtypeWarning) for w in caught):
            # pandas read the rows in chunks and mixed numbers and text in a
            # column: read it again in one piece
            frame = pd.read_csv(io.BytesIO(body), low_memory=False, **options)
        return frame

    return read


def _text_column(series: Any, strip: bool) -> NDArray[np.object_]:
    """A column's cells as an object array of text, stripped."""
    text = series.to_numpy(dtype=object)
    if strip:
        text = np.array([c.strip() for c in text], dtype=object)
    return text


def _codec_name(encoding: str) -> str:
    return "UTF-8" if encoding.lower().replace("-", "").replace("_", "") in (
        "utf8", "utf8sig") else encoding


def _refuse_binary(data: bytes, source: str) -> None:
    """A workbook or Parquet file under a CSV name says what it is."""
    if data.startswith(b"PK\x03\x04"):
        raise InputError("is a zip file (an .xlsx workbook?), not CSV text; name it .xlsx, or "
                         "save it as CSV (UTF-8)", source=source)
    if data.startswith(b"PAR1"):
        raise InputError("is a Parquet file, not CSV text; name it .parquet", source=source)


def _check_delimiter(cells: list[str], line: str, delimiter: str, source: str,
                     line_no: int) -> None:
    if len(cells) != 1:
        return
    where = "in [tables] or in the table's options (table = {path = ..., delimiter = ...})"
    for mark, name, write in ((";", "';'", '";"'), ("\t", "tabs", '"\\t"'),
                              (",", "','", '","'), ("|", "'|'", '"|"')):
        if mark != delimiter and mark in line:
            extra = (" (and decimal = \",\" if numbers have decimal commas)" if mark == ";"
                     else " (or name the file .tsv)" if mark == "\t" else "")
            raise InputError(f"the columns are separated by {name}; set delimiter = {write}"
                             f"{extra} {where}", source=source, location=f"row {line_no}")


def require_module(name: str, what: str, source: str) -> Any:
    """Import ``name`` or fail with the one line that says what to install."""
    try:
        return importlib.import_module(name)
    except ImportError:
        raise InputError(f"reading {what} needs the package {name}: {TABLES_EXTRA}",
                         source=source) from None


def _xlsx_grid(path: str, source: str, sheet: str | int | None) -> Grid:
    require_module("openpyxl", ".xlsx tables", source)
    import pandas as pd

    if not Path(path).is_file():
        _read_bytes(path, source)
    try:
        book = pd.ExcelFile(path, engine="openpyxl")
    except Exception as exc:  # openpyxl raises several types for a broken workbook
        raise InputError(f"cannot be read as an .xlsx workbook: {type(exc).__name__}: "
                         f"{' '.join(str(exc).split())[:160]}", source=source) from None
    with book:
        names = list(book.sheet_names)
        name = _sheet_name(names, sheet, source)
        frame = pd.read_excel(book, sheet_name=name, header=None, dtype=object,
                              keep_default_na=False, na_filter=False)
        if sheet is None and len(names) > 1:
            others = [n for n in names[1:] if not pd.read_excel(book, sheet_name=n,
                                                                header=None).empty]
            if others:
                raise InputError(f"the workbook has {len(names)} sheets with data ("
                                 f"{', '.join(repr(n) for n in [name, *others])}); say which "
                                 f"one with sheet = {name!r} in the table's options (table = "
                                 "{path = ..., sheet = ...})", source=source)
    where = source if sheet is None else f"{source} (sheet '{name}')"
    lines = [(int(i) + 1, [cell_text(v) for v in values])
             for i, values in zip(frame.index, frame.itertuples(index=False))]
    lines = [(n, cells) for n, cells in lines if any(cells)]
    if not lines:
        raise InputError(f"sheet '{name}' is empty (no header row)", source=where,
                         location="row 1")
    (header_line, header), rows = lines[0], lines[1:]
    return Grid(where, header_line, header, rows, "xlsx")


def _sheet_name(names: list[str], sheet: str | int | None, source: str) -> str:
    if sheet is None:
        return names[0]
    if isinstance(sheet, int):
        if not 1 <= sheet <= len(names):
            raise InputError(f"sheet {sheet} does not exist: the workbook has {len(names)} "
                             f"sheets ({', '.join(repr(n) for n in names)}; sheet = 1 is the "
                             "first)", source=source)
        return names[sheet - 1]
    if sheet not in names:
        raise InputError(f"no sheet '{sheet}' in the workbook (its sheets: "
                         f"{', '.join(repr(n) for n in names)})", source=source)
    return sheet


def _parquet_grid(path: str, source: str) -> Grid:
    require_module("pyarrow", "Parquet tables", source)
    import pyarrow.parquet as pq

    if not Path(path).is_file():
        _read_bytes(path, source)
    try:
        frame = pq.read_table(path).to_pandas()
    except Exception as exc:  # pyarrow's errors for a file that is not Parquet
        raise InputError(f"cannot be read as Parquet: {' '.join(str(exc).split())[:160]}",
                         source=source) from None
    grid = frame_grid(frame, source)
    return Grid(source, grid.header_line, grid.header, grid.rows, "parquet")


def frame_grid(data: Any, source: str) -> Grid:
    """A DataFrame (columns by name), Series or 1-D numpy array (one
    column ``value``) as cells; the header is row 1."""
    frame = as_frame(data, source)
    header = [str(c).strip() for c in frame.columns]
    rows = [(i + 2, [cell_text(v) for v in values])
            for i, values in enumerate(frame.itertuples(index=False, name=None))]
    return Grid(source, 1, header, rows, "frame")


def as_frame(data: Any, source: str) -> Any:
    """``data`` as a DataFrame: a 1-D array or a Series becomes the
    column ``value`` (measurements)."""
    import numpy as np
    import pandas as pd

    if isinstance(data, pd.DataFrame):
        if isinstance(data.columns, pd.MultiIndex):
            raise InputError("the DataFrame has a column MultiIndex; give one row of column "
                             "names", source=source)
        return data
    if isinstance(data, pd.Series):
        return pd.DataFrame({"value": data.to_numpy()})
    array = np.asarray(data)
    if array.dtype.names:
        return pd.DataFrame.from_records(array)
    if array.ndim != 1:
        raise InputError(f"a numpy array stands for the measured values (one column 'value') "
                         f"and must be 1-D, got shape {array.shape}; give a DataFrame with "
                         "named columns instead", source=source)
    return pd.DataFrame({"value": array})


def cell_text(value: Any) -> str:
    """One cell as text: numbers at full precision, dates as ISO dates
    (with the time when it is not midnight), missing values empty."""
    if value is None:
        return ""
    if isinstance(value, str):
        return value.strip()
    if isinstance(value, bool):
        return "true" if value else "false"
    if hasattr(value, "item") and not hasattr(value, "to_pydatetime"):  # numpy scalars
        value = value.item()
        if isinstance(value, bool):
            return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return "" if math.isnan(value) else repr(value)
    if hasattr(value, "to_pydatetime"):  # a pandas Timestamp (NaT is caught below)
        try:
            value = value.to_pydatetime()
        except ValueError:
            return ""
    if isinstance(value, dt.datetime):
        return value.date().isoformat() if value.time() == dt.time() else value.isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    text = str(value).strip()
    return "" if text in ("NaT", "<NA>", "nan") else text


# -- provenance of a table in memory ------------------------------------------------
def frame_csv(data: Any, source: str = "") -> bytes:
    """A table in memory as the CSV text its cells read as (header, then
    each row's cells as :func:`cell_text` writes them; UTF-8, ``\\n``)."""
    import csv
    import io

    grid = frame_grid(data, source)
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(grid.header)
    for _, cells in grid.rows:
        writer.writerow(cells)
    return out.getvalue().encode("utf-8")


def frame_sha256(data: Any) -> str:
    """Hex SHA-256 (FIPS 180-4, via :mod:`hashlib`) of :func:`frame_csv`:
    tables in memory with the same cells hash equal."""
    return hashlib.sha256(frame_csv(data)).hexdigest()


def in_memory_name(location: str, value: Any) -> str:
    """``<DataFrame for [exposure] table>`` from ``"[exposure] key 'table'"``
    (``<ndarray for ...>`` for a numpy array)."""
    return f"<{type(value).__name__} for {location.replace(' key ', ' ').replace(chr(39), '')}>"
