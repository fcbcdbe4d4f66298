"""Large text tables read column by column (issue 15, item 3): the values
are those of Python's own ``csv`` module and ``float()`` reading the same
file, and every message (file, row, column, what to change) is the one the
line-by-line reading gives, whose wording tests/test_analysis_tables.py and
tests/test_table_formats.py check.

The columnar reading starts at ``COLUMNAR_MIN_BYTES``; the tests lower that
limit to read small invented tables both ways.
"""

from __future__ import annotations

import csv
import io

import numpy as np
import pytest

from doseattr.analysis import tablefile
from doseattr.analysis.csvfile import read_raw
from doseattr.analysis.exposure_tables import read_bins, read_histories
from doseattr.analysis.tablefile import TableOptions, TableRef
from doseattr.analysis.tables import read_measurements, read_study_table
from doseattr.errors import InputError

#: Invented inputs (not expected values).
MEASURED = """\
# invented samples
site,worker,value (ug/m3),detected,weight
S1,W1,12.5,true,3
S1,W2,<0.5,false,1
S2,W1,9.25,TRUE,2
S2,W3,17,true,0
S3,W2,<1.5e1,False,4
S3,W4,3.75,true,1
"""


def _read(monkeypatch, path, reader=read_measurements, columnar=True, **kw):
    """``reader``'s result, or the InputError's text, and whether the
    table was read column by column."""
    monkeypatch.setattr(tablefile, "COLUMNAR_MIN_BYTES", 0 if columnar else 10**12)
    by_columns = False
    try:
        by_columns = read_raw(path).cells is not None
        return reader(path, **kw), by_columns
    except InputError as exc:
        return str(exc), by_columns


def _both(monkeypatch, path, reader=read_measurements, **kw):
    columns, by_columns = _read(monkeypatch, path, reader, True, **kw)
    lines, line_by_line = _read(monkeypatch, path, reader, False, **kw)
    assert not line_by_line
    return columns, lines, by_columns


def _write(tmp_path, text, name="m.csv", encoding="utf-8"):
    path = tmp_path / name
    path.write_bytes(text.encode(encoding))
    return path


def _expected(path, delimiter=","):
    """The rows as Python's csv module splits the file's data lines."""
    text = path.read_bytes().decode("utf-8-sig")
    lines = [(i, line) for i, line in enumerate(text.splitlines(), start=1)
             if line.strip() and not line.lstrip().startswith("#")]
    rows = [(i, [c.strip() for c in next(csv.reader([line], delimiter=delimiter))])
            for i, line in lines[1:]]
    return [(i, cells) for i, cells in rows if any(cells)]


def _same_measurements(a, b):
    for name in ("values", "detected", "weights", "lines", "notes"):
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None) == (y is None), name
        if x is not None:
            np.testing.assert_array_equal(np.asarray(x), np.asarray(y), err_msg=name)
    assert (a.worker is None) == (b.worker is None)
    if a.worker is not None:
        assert a.worker.dtype == b.worker.dtype
        np.testing.assert_array_equal(a.worker, b.worker)


# -- values: Python's csv module and float() of the same file are the reference ------
def test_measurements_with_non_detects(tmp_path, monkeypatch):
    path = _write(tmp_path, MEASURED)
    got, by_columns = _read(monkeypatch, path)
    assert by_columns
    rows = [(i, c) for i, c in _expected(path) if float(c[4]) > 0]  # csv module, float()
    values = [float(c[2].lstrip("<")) for _, c in rows]
    np.testing.assert_array_equal(got.values, values)
    np.testing.assert_array_equal(got.detected, [not c[2].startswith("<") for _, c in rows])
    np.testing.assert_array_equal(got.weights, [float(c[4]) for _, c in rows])
    np.testing.assert_array_equal(got.worker, [c[1] for _, c in rows])
    assert tuple(got.lines) == tuple(i for i, _ in rows)
    _same_measurements(got, _read(monkeypatch, path, columnar=False)[0])


@pytest.mark.parametrize("variant", ["crlf", "bom-and-unit", "trailing-blank", "spaces",
                                     "tabs", "empty-rows", "unnamed-column", "minus",
                                     "numeric-ids", "nd-with-lod", "plain-numbers",
                                     "lt-inside-id", "lt-starting-id"])
def test_variants_read_as_line_by_line(tmp_path, monkeypatch, variant):
    text, name, options = MEASURED, "m.csv", TableOptions()
    if variant == "crlf":
        text = text.replace("\n", "\r\n")
    elif variant == "bom-and-unit":
        text = "\ufeff" + text.replace("(ug/m3)", "(µg/m³)")
    elif variant == "trailing-blank":
        text += "\n  \n\n"
    elif variant == "spaces":
        text = text.replace(",", " , ").replace("W1", "W 1")
    elif variant == "tabs":
        text, name = text.replace(",", "\t"), "m.tsv"
    elif variant == "empty-rows":
        text = text.replace("S2,W1", ",,,,\nS2,W1") + ",,,,\n , ,,,\n"
    elif variant == "unnamed-column":
        text = text.replace("weight\n", "weight,\n")
        text = "\n".join(line + "," if line.count(",") == 4 else line
                         for line in text.splitlines()) + "\n"
    elif variant == "minus":
        text = text.replace("9.25", "2.5e-01")
    elif variant == "numeric-ids":
        text = text.replace("W", "00")
    elif variant == "nd-with-lod":
        text = text.replace("weight\n", "weight,lod\n").replace("<0.5,false,1", "ND,false,1,0.5")
        text = "\n".join(line if line.startswith("#") or line.count(",") == 5 else line + ","
                         for line in text.splitlines()) + "\n"
    elif variant == "lt-inside-id":
        text = text.replace(",W2,", ",W<2,")
    elif variant == "lt-starting-id":
        text = text.replace(",W2,", ",<W2,")
    elif variant == "plain-numbers":
        text = "value,weight\n" + "".join(f"{1 + i / 7!r},{i % 5 + 1}\n" for i in range(50))
    path = _write(tmp_path, text, name)
    ref = TableRef(str(path), options)
    columns, lines, by_columns = _both(monkeypatch, ref)
    assert by_columns
    assert not isinstance(lines, str), lines
    _same_measurements(columns, lines)
    if variant == "numeric-ids":
        assert columns.worker[0] == "001"  # the text as written, leading zeros kept
    if variant.startswith("lt-"):
        assert {"W<2", "<W2"} & set(columns.worker.tolist())  # the text as written


QUOTED = {
    # whole cells in quotes: read column by column
    "text": ('S1,W1,12.5', '"S1","W 1",12.5'),
    "numbers": ('S2,W1,9.25,TRUE,2', 'S2,W1,"9.25","TRUE","2"'),
    "empty and spaced": ('S3,W4,3.75', '"S3",""" W4""",3.75'.replace('"""', '"')),
    "crlf": ('S1,W2', '"S1","W2"'),
    "quoted non-detect": ('S1,W2,<0.5', 'S1,"W2","<0.5"'),
    "non-detect beside quotes": ('S1,W2,<0.5', '"S1","W2",<0.5'),
    "header": ('site,worker', '"site","worker"'),
}
#: Quotes that take the line-by-line reading (csv module rules the cells).
QUOTED_BY_ROWS = {
    "delimiter inside": ('S3,W4,3.75', '"S3,x",W4,3.75'),
    "doubled quote": ('S3,W4', '"S""3",W4'),
    "text after quote": ('S3,W4', '"S3"x,W4'),
    "quote inside cell": ('S3,W4', 'S"3",W4'),
    "space before quote": ('S3,W4', ' "S3",W4'),
    "lone quote": ('S3,W4', '"S3,W4'),
}


@pytest.mark.parametrize("case", sorted(QUOTED))
def test_quoted_cells_read_by_columns(tmp_path, monkeypatch, case):
    """Quotes around whole cells: the values of Python's csv module reading
    the same file (reference library), by columns."""
    old, new = QUOTED[case]
    text = MEASURED.replace(old, new)
    if case == "crlf":
        text = text.replace("\n", "\r\n")
    assert text != MEASURED
    path = _write(tmp_path, text)
    columns, lines, by_columns = _both(monkeypatch, path)
    assert by_columns
    assert not isinstance(lines, str), lines
    _same_measurements(columns, lines)
    rows = [(i, c) for i, c in _expected(path) if float(c[4]) > 0]  # csv module, float()
    np.testing.assert_array_equal(columns.worker, [c[1] for _, c in rows])
    np.testing.assert_array_equal(columns.values, [float(c[2].lstrip("<")) for _, c in rows])


@pytest.mark.parametrize("case", sorted(QUOTED_BY_ROWS))
def test_other_quotes_read_line_by_line(tmp_path, monkeypatch, case):
    old, new = QUOTED_BY_ROWS[case]
    text = MEASURED.replace(old, new)
    assert text != MEASURED
    path = _write(tmp_path, text)
    columns, lines, by_columns = _both(monkeypatch, path)
    assert not by_columns
    assert columns == lines if isinstance(lines, str) else not isinstance(columns, str)
    if not isinstance(lines, str):
        _same_measurements(columns, lines)


def test_numbers_round_as_python_float(tmp_path, monkeypatch):
    """Decimal texts of 15 to 20 digits read as Python's float() reads them
    (correctly rounded); simulation, seeded."""
    rng = np.random.default_rng(20261203)
    digits = rng.integers(15, 21, 3000)
    texts = [f"{rng.integers(1, 10)}.{''.join(map(str, rng.integers(0, 10, d - 1)))}"
             f"e{rng.integers(-20, 20)}" for d in digits]
    path = _write(tmp_path, "value\n" + "\n".join(texts) + "\n")
    got, by_columns = _read(monkeypatch, path)
    assert by_columns
    np.testing.assert_array_equal(got.values, [float(t) for t in texts])  # float()


def test_other_tables_read_by_rows(tmp_path, monkeypatch):
    """Tables whose readers go row by row get the same rows."""
    bands = ("lower,upper,rr,ci_lower,ci_upper\n0,10,1,,\n10,20,1.18,0.85,1.64\n"
             "20,40,1.42,1.01,2.00\n40,,1.85,1.22,2.80\n")
    path = _write(tmp_path, bands, "bands.csv")
    a, b, by_columns = _both(monkeypatch, path, read_study_table)
    assert by_columns
    for name in ("lower", "upper", "rr", "ci_lower", "ci_upper", "lines"):
        np.testing.assert_array_equal(np.asarray(getattr(a, name)),
                                      np.asarray(getattr(b, name)))
    jobs = ("worker,start,end,intensity\nw1,2001-03-01,2005-01-01,0.5\n"
            "w1,2005-01-01,2010-06-30,1.25\nw2,1999-07-15,2012-02-29,0.8\n")
    path = _write(tmp_path, jobs, "h.csv")
    a, b, by_columns = _both(monkeypatch, path, read_histories)
    assert by_columns
    np.testing.assert_array_equal(a.start, b.start)
    np.testing.assert_array_equal(a.intensity, [0.5, 1.25, 0.8])  # the file's cells
    assert a.lines == b.lines == (2, 3, 4)
    bins = "lower,upper,count\n0,0,5\n0,10,20\n10,20,<3\n20,,7\n"
    a, b, _ = _both(monkeypatch, _write(tmp_path, bins, "b.csv"), read_bins)
    assert a == b and "row 4, column 'count': text '<3' where a number belongs" in a


# -- messages: those of the line-by-line reading ---------------------------------------
ERRORS = {
    "negative": ("9.25,TRUE", "-9.25,TRUE", "row 5, column 'value': negative exposure"),
    "text": ("9.25,TRUE", "high,TRUE", "row 5, column 'value': text 'high'"),
    "below zero": ("<0.5,", "<0,", "row 4, column 'value'"),
    "below detected": ("<0.5,false", "<0.5,true", "row 4, column 'detected'"),
    "zero limit": ("17,true,0", "0,false,2", "row 6, column 'value'"),
    "flag": ("12.5,true", "12.5,maybe", "row 3, column 'detected'"),
    "weight": ("3.75,true,1", "3.75,true,-1", "row 8, column 'weight'"),
    "empty weight": ("3.75,true,1", "3.75,true,", "row 8, column 'weight': empty cell"),
    "huge": ("3.75,true,1", "1e200,true,1", "row 8, column 'value'"),
    "inf": ("3.75,true,1", "1e500,true,1", "row 8, column 'value'"),
    "worker": ("S3,W4", "S3,", "row 8, column 'worker'"),
    "width": ("S3,W4,3.75", "S3,W4,3,75", "row 8: has 6 values"),
    "quotes": ("S3,W4,3.75", 'S3,W4,"3,75"', "row 8, column 'value'"),
    "comment": ("S2,W3", "# a note\nS2,W3", "row 7, column 'weight'"),
    "nd": ("<0.5,false", "ND,false", "row 4, column 'value'"),
    "minus and below": ("9.25,TRUE", "-1,TRUE", "row 5, column 'value': negative exposure"),
}


@pytest.mark.parametrize("case", sorted(ERRORS))
def test_messages_as_line_by_line(tmp_path, monkeypatch, case):
    old, new, expected = ERRORS[case]
    text = MEASURED.replace(old, new)
    if case == "comment":
        text = text.replace("17,true,0", "17,true,-2")
    path = _write(tmp_path, text)
    columns, lines, _ = _both(monkeypatch, path)
    assert isinstance(columns, str) and columns == lines
    assert f"m.csv: {expected}" in columns and "\n" not in columns


def test_all_weights_zero(tmp_path, monkeypatch):
    text = "\n".join(line.rsplit(",", 1)[0] + ",0" if line[:1] == "S" else line
                     for line in MEASURED.splitlines())
    columns, lines, by_columns = _both(monkeypatch, _write(tmp_path, text))
    assert by_columns and columns == lines and "all weights are 0" in columns


def test_decimal_comma(tmp_path, monkeypatch):
    text = MEASURED.replace(",", ";").replace(".", ",")
    ref = TableRef(str(_write(tmp_path, text)), TableOptions(delimiter=";", decimal=","))
    columns, lines, by_columns = _both(monkeypatch, ref)
    assert by_columns
    _same_measurements(columns, lines)
    np.testing.assert_array_equal(columns.values[:2], [12.5, 0.5])  # the file's cells
    bad = TableRef(str(_write(tmp_path, text.replace("9,25", "9.25"), "b.csv")),
                   TableOptions(delimiter=";", decimal=","))
    columns, lines, _ = _both(monkeypatch, bad)
    assert columns == lines and "row 5, column 'value'" in columns


def test_encoding_error_keeps_its_row(tmp_path, monkeypatch):
    path = tmp_path / "m.csv"
    path.write_bytes(MEASURED.encode() + "S4,Wé,1.5,true,1\n".encode("cp1252"))
    columns, lines, _ = _both(monkeypatch, path)
    assert columns == lines and "row 9" in columns and "UTF-8" in columns


def test_small_tables_are_read_line_by_line(tmp_path):
    path = _write(tmp_path, MEASURED)
    assert read_raw(path).cells is None  # below COLUMNAR_MIN_BYTES
    big = io.StringIO()
    big.write("value\n")
    while big.tell() < tablefile.COLUMNAR_MIN_BYTES:
        big.write("12.5\n")
    assert read_raw(_write(tmp_path, big.getvalue(), "big.csv")).cells is not None


def test_problems_keep_their_order(tmp_path, monkeypatch):
    """A header separated by ';' and a later line that is not UTF-8: the
    line-by-line reading reports the encoding first, and so does this one."""
    path = tmp_path / "m.csv"
    path.write_bytes(MEASURED.replace(",", ";").encode() + "S4;Wé;1;true;1\n".encode("cp1252"))
    columns, lines, _ = _both(monkeypatch, path)
    assert columns == lines and "UTF-8" in columns


def test_worker_ids_as_wide_as_those_kept(tmp_path, monkeypatch):
    path = _write(tmp_path, MEASURED.replace("S2,W3", "S2,W3-long-id"))
    columns, lines, by_columns = _both(monkeypatch, path)
    assert by_columns
    _same_measurements(columns, lines)
    # the only long id is on the weight-0 row, which is left out (np.array of the ids kept)
    assert columns.worker.dtype == np.array(["W1", "W2"]).dtype


@pytest.mark.parametrize("late", ["x", "<2.5", "maybe"])
def test_text_after_many_numbers(tmp_path, late):
    """A column of numbers (or flags) that turns to text far down the file,
    beyond the first chunk of rows pandas reads (2**17 rows of a table
    five columns wide): the row numbers are the lines' (header on line 1,
    so data row i is line i + 2)."""
    n = 200_000
    rows = ["1.50,true,1,2,3"] * n
    rows[n - 3] = (f"{late},true" if late != "maybe" else "1.5,maybe") + ",1,2,3"
    path = _write(tmp_path, "value,detected,a,b,c\n" + "\n".join(rows) + "\n")
    assert read_raw(path).cells is not None
    if late == "<2.5":
        with pytest.raises(InputError, match=rf"row {n - 1}, column 'detected'"):
            read_measurements(path)  # '<' but marked detected
        return
    with pytest.raises(InputError) as info:
        read_measurements(path)
    column = "value" if late == "x" else "detected"
    assert info.value.location == f"row {n - 1}, column '{column}'"


@pytest.mark.parametrize("wide,window", [(0, 1 << 20), (4096, 64), (4096, 1 << 20)])
def test_non_detect_columns_whatever_the_window(tmp_path, monkeypatch, wide, window):
    """Where each ``<`` sits is found from a window of bytes before it, in
    parts, or from the delimiters' offsets when its rows are too wide; all
    three read as the line-by-line reading does (csv module, float())."""
    text = MEASURED.replace(",W2,", ",<W2,")
    text += "".join(f"S{i},{'<' if i % 3 else ''}W{i},<{i + 0.5},false,{i}\n"
                    for i in range(40))
    monkeypatch.setattr(tablefile, "_WINDOW_WIDE", wide)
    monkeypatch.setattr(tablefile, "_WINDOW_BYTES", window)
    path = _write(tmp_path, text)
    columns, lines, by_columns = _both(monkeypatch, path)
    assert by_columns
    _same_measurements(columns, lines)
