"""The Python API for notebooks (issue 16, item 2): pandas DataFrames and
numpy arrays where a table path goes, named and hashed in provenance, and
results as DataFrames and as HTML.

The references are outside the code under test: the same analysis read
from CSV files written by pandas, and ``pandas.read_csv`` of the CSV files
the run writes.
"""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pandas as pd
import pytest

import doseattr
from doseattr.errors import InputError

#: Invented test inputs (not expected values).
SAMPLES = pd.DataFrame({"value": [12.0, 9.5, 15.6, 3.7, 17.3, 11.0, 8.2, 26.4],
                        "weight": [1, 2, 1, 1, 3, 1, 2, 1]})
BANDS = pd.DataFrame({"lower": [0, 10, 20, 40], "upper": [10, 20, 40, np.nan],
                      "rr": [1, 1.18, 1.42, 1.85], "ci_lower": [np.nan, 0.85, 1.01, 1.22],
                      "ci_upper": [np.nan, 1.64, 2.00, 2.80],
                      "cases": [120, 95, 88, 54], "controls": [480, 310, 220, 105]})
DISTRICTS = pd.DataFrame({"stratum": ["North", "South"], "cases": [40, 25]})


def _settings(bands, samples, districts):
    return {"unit": "ug/m3",
            "curve": {"table": bands, "model": "log-linear"},
            "exposure": {"table": samples, "family": "lognormal"},
            "burden": {"table": districts},
            "scenario": [{"name": "cap", "cap": 20}],
            "uncertainty": {"draws": 200, "seed": 7}}


def _from_files(tmp_path):
    BANDS.to_csv(tmp_path / "bands.csv", index=False)
    SAMPLES.to_csv(tmp_path / "samples.csv", index=False)
    DISTRICTS.to_csv(tmp_path / "districts.csv", index=False)
    a = doseattr.analysis_from_dict(_settings("bands.csv", "samples.csv", "districts.csv"),
                                    base_dir=tmp_path)
    return doseattr.run_analysis(a)


def _numbers(node, path=""):
    """Every number of results.json by its path (provenance left out)."""
    if isinstance(node, dict):
        return {k: v for key, item in node.items() if key != "provenance"
                for k, v in _numbers(item, f"{path}/{key}").items()}
    if isinstance(node, list):
        return {k: v for i, item in enumerate(node) for k, v in _numbers(item, f"{path}/{i}").items()}
    if isinstance(node, (int, float)) and not isinstance(node, bool):
        return {path: node}
    return {}


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("api")
    files = _from_files(tmp)
    frames = doseattr.run_analysis(doseattr.analysis_from_dict(
        _settings(BANDS, SAMPLES, DISTRICTS)))
    frames.write(tmp / "out", figures=False)
    return files, frames, tmp


def test_dataframes_give_the_numbers_of_csv_files(runs):
    files, frames, _ = runs
    a, b = _numbers(files.to_dict()), _numbers(frames.to_dict())
    assert a.keys() == b.keys() and len(a) > 50
    assert a == b  # same inputs and seed: the same numbers, exactly


def test_numpy_array_of_values(tmp_path):
    values = SAMPLES["value"].to_numpy()
    pd.DataFrame({"value": values}).to_csv(tmp_path / "v.csv", index=False)
    settings = {"unit": "ug/m3", "curve": {"model": "log-linear", "rr": 1.08, "per": 10,
                                           "ci": [1.02, 1.15], "max_dose": 40},
                "exposure": {"table": "v.csv", "family": "lognormal"}}
    from_file = doseattr.run_analysis(doseattr.analysis_from_dict(settings, base_dir=tmp_path))
    settings["exposure"]["table"] = values
    from_array = doseattr.run_analysis(doseattr.analysis_from_dict(settings))
    assert _numbers(from_file.to_dict()) == _numbers(from_array.to_dict())
    table = from_array.provenance["input_tables"][0]
    assert table["path"] == "<ndarray for [exposure] table>"


def test_provenance_names_and_hashes_frames(runs):
    _, frames, _ = runs
    tables = {t["key"]: t for t in frames.provenance["input_tables"]}
    exposure = tables["[exposure] key 'table'"]
    assert exposure["path"] == "<DataFrame for [exposure] table>"
    # the SHA-256 (hashlib) of the table as pandas writes it to CSV
    text = SAMPLES.to_csv(index=False, lineterminator="\n").encode("utf-8")
    assert exposure["sha256"] == hashlib.sha256(text).hexdigest()
    changed = SAMPLES.copy()
    changed.loc[0, "value"] = 12.5
    other = doseattr.run_analysis(doseattr.analysis_from_dict(
        _settings(BANDS, changed, DISTRICTS)))
    again = doseattr.run_analysis(doseattr.analysis_from_dict(
        _settings(BANDS.copy(), SAMPLES.copy(), DISTRICTS.copy())))
    key = "[exposure] key 'table'"
    hashes = [{t["key"]: t["sha256"] for t in r.provenance["input_tables"]}[key]
              for r in (other, again)]
    assert hashes[0] != exposure["sha256"] and hashes[1] == exposure["sha256"]


def test_messages_name_the_frame(tmp_path):
    bad = SAMPLES.copy().astype(object)
    bad.loc[3, "value"] = "ND"
    with pytest.raises(InputError) as info:
        doseattr.analysis_from_dict(_settings(BANDS, bad, DISTRICTS))
    assert str(info.value).startswith("<DataFrame for [exposure] table>: row 5, column 'value'")


def test_two_dimensional_array_is_refused():
    with pytest.raises(InputError, match="must be 1-D"):
        doseattr.analysis_from_dict(_settings(BANDS, np.ones((4, 2)), DISTRICTS))


def test_to_frames_equals_the_written_csv_files(runs):
    _, frames, tmp = runs
    csvs = {p.stem: p for p in (tmp / "out").glob("*.csv")}
    got = frames.to_frames()
    assert set(got) == set(csvs) and "burden" in got
    for name, path in csvs.items():
        pd.testing.assert_frame_equal(got[name], pd.read_csv(path))  # pandas.read_csv


def test_analysis_copy_holds_no_frame_text(runs):
    tmp = runs[2]
    copy = json.loads((tmp / "out" / "analysis.json").read_text())
    table = copy["exposure"]["table"]
    assert table["table"] == "<DataFrame>" and len(table["sha256"]) == 64


def test_repr_html_is_the_key_numbers_table(runs):
    _, frames, _ = runs
    html = frames._repr_html_()
    # the report's tables come in a box that scrolls sideways on narrow screens
    assert html.startswith('<div class="scroll"><table') and "PAF" in html
    report = (runs[2] / "out" / "report.html").read_text()
    assert html in report  # the same table as the report's
