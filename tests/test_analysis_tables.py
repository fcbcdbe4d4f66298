"""Row-by-row checks of the CSV tables (foundation issue, item 8). Row
numbers are line numbers in the file: the header is row 1, the first data
row is row 2. These test messages, not numbers.
"""

from __future__ import annotations

import numpy as np
import pytest
from analysis_helpers import BANDS, MEASUREMENTS, write_case

from doseattr.analysis.config import load_analysis
from doseattr.analysis.tables import read_measurements, read_study_table
from doseattr.errors import InputError


def _band_error(tmp_path, text):
    path = tmp_path / "bands.csv"
    path.write_text(text)
    with pytest.raises(InputError) as info:
        read_study_table(path, "bands.csv")
    return info.value


def _measure_error(tmp_path, text):
    path = tmp_path / "m.csv"
    path.write_text(text)
    with pytest.raises(InputError) as info:
        read_measurements(path, "m.csv")
    return info.value


def test_reads_bands(tmp_path):
    path = tmp_path / "bands.csv"
    path.write_text(BANDS)
    t = read_study_table(path)
    assert t.reference == 0 and t.n_bands == 4
    assert np.isinf(t.upper[-1]) and np.isnan(t.ci_lower[0])
    np.testing.assert_array_equal(t.cutpoints, [10, 20, 40])
    assert set(t.counts) == {"cases", "controls"}


def test_missing_column(tmp_path):
    err = _band_error(tmp_path, BANDS.replace(",ci_upper", ",ci_uper"))
    assert err.source == "bands.csv" and err.location == "column 'ci_upper'"
    assert "missing column 'ci_upper'" in str(err) and "the file has a column 'ci_uper'" in str(err)


def test_text_where_a_number_belongs(tmp_path):
    err = _band_error(tmp_path, BANDS.replace("1.42,", "high,"))
    assert str(err).startswith("bands.csv: row 4, column 'rr': text 'high' where a number")


@pytest.mark.parametrize("rr", ["0", "-1.2"])
def test_rr_zero_or_below(tmp_path, rr):
    err = _band_error(tmp_path, BANDS.replace("1.18,", f"{rr},"))
    assert err.location == "row 3, column 'rr'" and "RR must be greater than 0" in str(err)


def test_ci_not_containing_rr(tmp_path):
    err = _band_error(tmp_path, BANDS.replace("1.42,1.01,2.00", "1.42,1.50,2.00"))
    assert err.location == "row 4, column 'ci_lower'"
    assert "does not contain its RR 1.42" in str(err)


def test_bands_overlap(tmp_path):
    err = _band_error(tmp_path, BANDS.replace("20,40,", "15,40,"))
    assert err.location == "row 4, column 'lower'" and "overlaps the band before it" in str(err)


def test_bands_out_of_order(tmp_path):
    lines = BANDS.splitlines()
    lines[2], lines[3] = lines[3], lines[2]
    err = _band_error(tmp_path, "\n".join(lines) + "\n")
    assert err.location == "row 4, column 'lower'" and "out of order" in str(err)


def test_no_reference_band(tmp_path):
    err = _band_error(tmp_path, BANDS.replace("0,10,1,,,", "0,10,1.05,0.9,1.2,"))
    assert err.source == "bands.csv" and "no reference band" in str(err)


def test_two_reference_bands(tmp_path):
    err = _band_error(tmp_path, BANDS.replace("1.18,0.85,1.64", "1,,"))
    assert err.location == "rows 2 and 3, column 'rr'" and "two reference bands" in str(err)


def test_negative_band_limit(tmp_path):
    err = _band_error(tmp_path, BANDS.replace("0,10,1,", "-5,10,1,"))
    assert err.location == "row 2, column 'lower'" and "negative exposure -5" in str(err)


def test_only_top_band_open(tmp_path):
    err = _band_error(tmp_path, BANDS.replace("10,20,", "10,,"))
    assert err.location == "row 3, column 'upper'" and "only the top band" in str(err)


def test_row_numbers_count_comment_lines(tmp_path):
    err = _band_error(tmp_path, "# a comment line\n" + BANDS.replace("1.18,", "x,"))
    assert err.location == "row 4, column 'rr'"


def test_semicolon_separated_file(tmp_path):
    err = _band_error(tmp_path, BANDS.replace(",", ";"))
    assert "separated by ';'" in str(err)


def test_negative_exposure_value(tmp_path):
    err = _measure_error(tmp_path, MEASUREMENTS.replace("3.7,1", "-3.7,1"))
    assert err.location == "row 5, column 'value'" and "negative exposure -3.7" in str(err)


def test_negative_weight(tmp_path):
    err = _measure_error(tmp_path, MEASUREMENTS.replace("3.7,1", "3.7,-1"))
    assert err.location == "row 5, column 'weight'" and "weight must be 0 or more" in str(err)


def test_text_in_measurements(tmp_path):
    err = _measure_error(tmp_path, MEASUREMENTS.replace("9.5,2", "9,5,2"))
    assert err.location == "row 3" and "3 values but the header has 2" in str(err)


def test_non_detects_are_read(tmp_path):
    path = tmp_path / "m.csv"
    path.write_text(MEASUREMENTS.replace("3.7,1", "<2.0,1"))
    m = read_measurements(path)
    assert m.detected.sum() == 7 and m.values[3] == 2.0 and not m.detected[3]


def test_zero_weight_rows_are_left_out(tmp_path):
    path = tmp_path / "m.csv"
    path.write_text(MEASUREMENTS.replace("3.7,1", "3.7,0"))
    m = read_measurements(path)
    assert m.n == 7 and 3.7 not in m.values and any("weight 0" in n for n in m.notes)


def test_table_errors_name_the_table_as_seen_from_the_analysis(tmp_path):
    path = write_case(tmp_path, bands=BANDS.replace("1.85,", "0,"))
    with pytest.raises(InputError) as info:
        load_analysis(path)
    assert info.value.source == str(tmp_path / "bands.csv")
    assert info.value.location == "row 5, column 'rr'"


def test_design_needs_its_count_column(tmp_path):
    path = tmp_path / "bands.csv"
    path.write_text(BANDS.replace(",controls", ",controlz"))
    with pytest.raises(InputError, match=r"column 'controls': missing column 'controls': with "
                                         r"design = \"case-control\".*column 'controlz'"):
        read_study_table(path, "bands.csv", design="case-control")
