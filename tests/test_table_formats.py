"""Tables as users have them (issue 16, item 1): one invented table written
as CSV, TSV, .xlsx, Parquet and semicolon-separated with decimal commas
reads to the same values, and each message of the issue's list is one line
naming the file, row and column, with exit status 2 and nothing written.

Expected values come from outside the project: pandas' own readers
(``read_csv``, ``read_excel``, ``read_parquet``) of the same files.
"""

from __future__ import annotations

import textwrap

import numpy as np
import pandas as pd
import pytest

from doseattr.analysis.config import load_analysis
from doseattr.cli import main

#: Invented test inputs (not expected values).
VALUES = [12.0, 9.5, 15.6, 3.7, 17.3, 11.0, 8.2, 26.4]
WEIGHTS = [1, 2, 1, 1, 3, 1, 2, 1]
BANDS = pd.DataFrame({"lower": [0, 10, 20, 40], "upper": [10, 20, 40, np.nan],
                      "rr": [1, 1.18, 1.42, 1.85], "ci_lower": [np.nan, 0.85, 1.01, 1.22],
                      "ci_upper": [np.nan, 1.64, 2.00, 2.80]})

ANALYSIS = """\
unit = "ug/m3"
{top}
[curve]
table = {bands}
model = "log-linear"

[exposure]
table = {samples}
family = "lognormal"
"""


def _case(folder, samples, bands='"bands.csv"', top=""):
    folder.mkdir(parents=True, exist_ok=True)
    if bands == '"bands.csv"':
        BANDS.to_csv(folder / "bands.csv", index=False)
    path = folder / "analysis.toml"
    path.write_text(ANALYSIS.format(top=top, bands=bands, samples=samples))
    return path


def _frame():
    return pd.DataFrame({"value": VALUES, "weight": WEIGHTS})


def _read(path):
    a = load_analysis(path)
    m = a.exposure.measurements
    return m.values, m.weights, a.curve.table


def _check(got, reference):
    values, weights, _ = got
    np.testing.assert_array_equal(values, reference["value"].to_numpy(float))
    np.testing.assert_array_equal(weights, reference["weight"].to_numpy(float))


# -- one test per format: pandas' reading of the same file is the reference ------
def test_csv(tmp_path):
    _frame().to_csv(tmp_path / "s.csv", index=False)
    got = _read(_case(tmp_path, '"s.csv"'))
    _check(got, pd.read_csv(tmp_path / "s.csv"))  # pandas.read_csv


def test_tsv(tmp_path):
    _frame().to_csv(tmp_path / "s.tsv", index=False, sep="\t")
    got = _read(_case(tmp_path, '"s.tsv"'))
    _check(got, pd.read_csv(tmp_path / "s.tsv", sep="\t"))  # pandas.read_csv
    np.testing.assert_array_equal(got[0], _csv_values(tmp_path))


def _csv_values(tmp_path):
    _frame().to_csv(tmp_path / "ref.csv", index=False)
    return _read(_case(tmp_path / "ref", '"../ref.csv"'))[0]


def test_xlsx_with_sheet(tmp_path):
    with pd.ExcelWriter(tmp_path / "s.xlsx", engine="openpyxl") as xl:
        pd.DataFrame({"note": ["other sheet"]}).to_excel(xl, sheet_name="Notes", index=False)
        _frame().to_excel(xl, sheet_name="Samples", index=False)
        BANDS.to_excel(xl, sheet_name="Bands", index=False)
    got = _read(_case(tmp_path, '{path = "s.xlsx", sheet = "Samples"}',
                      bands='{path = "s.xlsx", sheet = 3}'))
    _check(got, pd.read_excel(tmp_path / "s.xlsx", sheet_name="Samples"))  # pandas.read_excel
    bands = got[2]
    ref = pd.read_excel(tmp_path / "s.xlsx", sheet_name="Bands")  # pandas.read_excel
    np.testing.assert_array_equal(bands.rr, ref["rr"].to_numpy(float))
    np.testing.assert_array_equal(bands.upper[:-1], ref["upper"].to_numpy(float)[:-1])
    assert np.isinf(bands.upper[-1])
    np.testing.assert_array_equal(got[0], _csv_values(tmp_path))


def test_parquet(tmp_path):
    _frame().to_parquet(tmp_path / "s.parquet")
    BANDS.to_parquet(tmp_path / "b.parquet")
    got = _read(_case(tmp_path, '"s.parquet"', bands='"b.parquet"'))
    _check(got, pd.read_parquet(tmp_path / "s.parquet"))  # pandas.read_parquet
    ref = pd.read_parquet(tmp_path / "b.parquet")
    np.testing.assert_array_equal(got[2].ci_upper[1:], ref["ci_upper"].to_numpy()[1:])
    np.testing.assert_array_equal(got[0], _csv_values(tmp_path))


@pytest.mark.parametrize("where", ["tables", "inline"])
def test_semicolons_and_decimal_commas(tmp_path, where):
    _frame().to_csv(tmp_path / "s.csv", index=False, sep=";", decimal=",")
    if where == "tables":
        path = _case(tmp_path, '"s.csv"', top='[tables]\ndelimiter = ";"\ndecimal = ","\n')
        BANDS.to_csv(tmp_path / "bands.csv", index=False, sep=";", decimal=",")  # every CSV
    else:
        path = _case(tmp_path, '{path = "s.csv", delimiter = ";", decimal = ","}')
    got = _read(path)
    _check(got, pd.read_csv(tmp_path / "s.csv", sep=";", decimal=","))  # pandas.read_csv
    np.testing.assert_array_equal(got[0], _csv_values(tmp_path))


def test_encoding_option(tmp_path):
    text = "site,value,weight\n" + "".join(f"Mühle {i},{v},{w}\n"
                                           for i, (v, w) in enumerate(zip(VALUES, WEIGHTS)))
    (tmp_path / "s.csv").write_bytes(text.encode("cp1252"))
    got = _read(_case(tmp_path, '{path = "s.csv", encoding = "cp1252"}'))
    _check(got, pd.read_csv(tmp_path / "s.csv", encoding="cp1252"))  # pandas.read_csv


# -- messages of the list, through the command line ---------------------------
def _run_error(path, tmp_path, capsys):
    out = tmp_path / "out"
    code = main(["run", str(path), "--out", str(out)])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert not out.exists()
    assert "\n" not in err
    return err


def _samples(tmp_path, text, name="s.csv"):
    (tmp_path / name).write_text(textwrap.dedent(text))
    return _case(tmp_path, f'"{name}"')


def test_header_with_unit_is_read(tmp_path):
    path = _samples(tmp_path, "site,value (ug/m3),weight [people]\n"
                    + "".join(f"s{i},{v},{w}\n" for i, (v, w) in enumerate(zip(VALUES, WEIGHTS))))
    np.testing.assert_array_equal(_read(path)[0], VALUES)


def test_unit_mismatch(tmp_path, capsys):
    path = _samples(tmp_path, "value [mg/m3]\n" + "".join(f"{v}\n" for v in VALUES))
    err = _run_error(path, tmp_path, capsys)
    assert "s.csv: row 1, column 'value'" in err
    assert "mg/m3" in err and "ug/m3" in err


def test_unit_matches_the_section_unit(tmp_path):
    (tmp_path / "s.csv").write_text("value (mg/m3)\n" + "".join(f"{v}\n" for v in VALUES))
    path = _case(tmp_path, '"s.csv"')
    path.write_text(path.read_text() + 'unit = "mg/m3"\n')
    # converted from mg/m3 to the file's ug/m3: x 1000 (definition of the units)
    np.testing.assert_allclose(_read(path)[0], np.array(VALUES) * 1000, rtol=1e-15)


def test_trailing_empty_rows(tmp_path):
    text = "value,weight,\n" + "".join(f"{v},{w},\n" for v, w in zip(VALUES, WEIGHTS))
    path = _samples(tmp_path, text + ",,\n,,\n\n")
    values, weights, _ = _read(path)
    np.testing.assert_array_equal(values, VALUES)
    np.testing.assert_array_equal(weights, WEIGHTS)


@pytest.mark.parametrize("text", ["ND", "n.d.", "<LOD"])
def test_non_detect_without_lod(tmp_path, capsys, text):
    path = _samples(tmp_path, "value\n" + "".join(f"{v}\n" for v in VALUES) + f"{text}\n")
    err = _run_error(path, tmp_path, capsys)
    assert f"s.csv: row {len(VALUES) + 2}, column 'value'" in err
    assert "write <0.05 (the detection limit) or add a 'lod' column" in err


def test_non_detect_with_lod_column(tmp_path):
    rows = [f"{v},0.5\n" for v in VALUES] + ["<LOD,2.0\n", "ND,1.5\n"]
    path = _samples(tmp_path, "value,lod\n" + "".join(rows))
    m = load_analysis(path).exposure.measurements
    # the two non-detects enter as censored at their rows' limits (the lod column)
    np.testing.assert_array_equal(m.values, [*VALUES, 2.0, 1.5])
    np.testing.assert_array_equal(m.detected, [True] * len(VALUES) + [False, False])


def test_non_detect_with_empty_lod(tmp_path, capsys):
    path = _samples(tmp_path, "value,lod\n" + "".join(f"{v},\n" for v in VALUES) + "ND,\n")
    err = _run_error(path, tmp_path, capsys)
    assert f"row {len(VALUES) + 2}, column 'lod'" in err


def test_thousands_separator(tmp_path, capsys):
    path = _samples(tmp_path, "value\n" + "".join(f"{v}\n" for v in VALUES)
                    + '"12,345.5"\n')
    err = _run_error(path, tmp_path, capsys)
    assert f"s.csv: row {len(VALUES) + 2}, column 'value'" in err
    assert "thousands separator" in err and "write 12345.5" in err


def test_ambiguous_comma_names_the_option(tmp_path, capsys):
    path = _samples(tmp_path, "value\n" + "".join(f"{v}\n" for v in VALUES) + '"1,500"\n')
    err = _run_error(path, tmp_path, capsys)
    assert "write 1500" in err and 'decimal = ","' in err


def test_decimal_comma_without_the_option(tmp_path, capsys):
    path = _samples(tmp_path, "value\n" + "".join(f"{v}\n" for v in VALUES) + '"7,25"\n')
    err = _run_error(path, tmp_path, capsys)
    assert f"s.csv: row {len(VALUES) + 2}, column 'value'" in err
    assert 'set decimal = "," in [tables]' in err


def test_semicolons_without_the_option(tmp_path, capsys):
    path = _samples(tmp_path, "value;weight\n" + "".join(f"{v};{w}\n"
                                                          for v, w in zip(VALUES, WEIGHTS)))
    err = _run_error(path, tmp_path, capsys)
    assert "s.csv: row 1:" in err and 'set delimiter = ";"' in err


def test_xlsx_without_openpyxl(tmp_path, capsys, monkeypatch):
    _frame().to_excel(tmp_path / "s.xlsx", index=False)
    monkeypatch.setitem(__import__("sys").modules, "openpyxl", None)  # import then fails
    err = _run_error(_case(tmp_path, '"s.xlsx"'), tmp_path, capsys)
    assert "s.xlsx" in err and 'pip install "doseattr[tables]"' in err


def test_xlsx_row_numbers_are_the_sheets(tmp_path, capsys):
    frame = _frame().astype(object)
    frame.loc[5, "value"] = "high"
    with pd.ExcelWriter(tmp_path / "s.xlsx", engine="openpyxl") as xl:
        frame.to_excel(xl, sheet_name="S", index=False, startrow=2)  # header on row 3
    err = _run_error(_case(tmp_path, '"s.xlsx"'), tmp_path, capsys)
    # header on sheet row 3, so the sixth data row (index 5) is sheet row 9
    assert "s.xlsx: row 9, column 'value': text 'high'" in err


def test_parquet_row_numbers_count_the_header(tmp_path, capsys):
    frame = _frame()
    frame.loc[2, "weight"] = -1
    frame.to_parquet(tmp_path / "s.parquet")
    err = _run_error(_case(tmp_path, '"s.parquet"'), tmp_path, capsys)
    assert "s.parquet: row 4, column 'weight'" in err


def test_option_for_the_wrong_format(tmp_path, capsys):
    _frame().to_parquet(tmp_path / "s.parquet")
    err = _run_error(_case(tmp_path, '{path = "s.parquet", delimiter = ";"}'), tmp_path, capsys)
    assert "[exposure] key 'table'" in err and "delimiter" in err


def test_several_sheets_need_a_sheet(tmp_path, capsys):
    with pd.ExcelWriter(tmp_path / "s.xlsx", engine="openpyxl") as xl:
        _frame().to_excel(xl, sheet_name="A", index=False)
        _frame().to_excel(xl, sheet_name="B", index=False)
    err = _run_error(_case(tmp_path, '"s.xlsx"'), tmp_path, capsys)
    assert "'A', 'B'" in err and "sheet = 'A'" in err


def test_work_histories_with_date_cells(tmp_path):
    """Dates typed as dates in a workbook read as the ISO dates of the CSV."""
    import datetime as dt

    from doseattr.analysis.exposure_tables import read_histories
    from doseattr.analysis.tablefile import TableRef

    jobs = pd.DataFrame({"worker": ["w1", "w1", "w2"],
                         "start": [dt.datetime(2001, 3, 1), dt.datetime(2005, 1, 1),
                                   dt.datetime(1999, 7, 15)],
                         "end": [dt.datetime(2005, 1, 1), dt.datetime(2010, 6, 30),
                                 dt.datetime(2012, 2, 29)],
                         "intensity (ppm)": [0.5, 1.25, 0.8]})
    jobs.to_excel(tmp_path / "h.xlsx", index=False)
    jobs.to_csv(tmp_path / "h.csv", index=False, date_format="%Y-%m-%d")
    got = read_histories(TableRef(str(tmp_path / "h.xlsx")))
    ref = pd.read_excel(tmp_path / "h.xlsx")  # pandas.read_excel
    np.testing.assert_array_equal(got.start, ref["start"].to_numpy().astype("datetime64[D]"))
    np.testing.assert_array_equal(got.end, ref["end"].to_numpy().astype("datetime64[D]"))
    np.testing.assert_array_equal(got.intensity, ref["intensity (ppm)"].to_numpy())
    from_csv = read_histories(str(tmp_path / "h.csv"))
    np.testing.assert_array_equal(got.start, from_csv.start)
    assert got.lines == (2, 3, 4)


def test_own_options_override_tables(tmp_path):
    _frame().to_csv(tmp_path / "s.csv", index=False, sep=";", decimal=",")
    BANDS.to_csv(tmp_path / "bands.csv", index=False)
    path = _case(tmp_path, '"s.csv"', top='[tables]\ndelimiter = ";"\ndecimal = ","\n',
                 bands='{path = "bands.csv", delimiter = ",", decimal = "."}')
    got = _read(path)
    _check(got, pd.read_csv(tmp_path / "s.csv", sep=";", decimal=","))  # pandas.read_csv
    ref = pd.read_csv(tmp_path / "bands.csv")  # pandas.read_csv
    np.testing.assert_array_equal(got[2].rr, ref["rr"].to_numpy())


def test_tabs_in_a_csv_file(tmp_path, capsys):
    _frame().to_csv(tmp_path / "s.csv", index=False, sep="\t")
    err = _run_error(_case(tmp_path, '"s.csv"'), tmp_path, capsys)
    assert "s.csv: row 1:" in err and "separated by tabs" in err and "delimiter" in err


def test_provenance_of_a_table_with_options(tmp_path):
    from doseattr.analysis.provenance import input_tables, sha256_bytes

    _frame().to_csv(tmp_path / "s.csv", index=False, sep=";")
    a = load_analysis(_case(tmp_path, '{path = "s.csv", delimiter = ";"}'))
    tables = {t.key: t for t in input_tables(a)}
    t = tables["[exposure] key 'table'"]
    assert t.relative == "s.csv"
    assert t.sha256 == sha256_bytes((tmp_path / "s.csv").read_bytes())
