"""The analysis file's checks: one test per bad input of the foundation issue
(item 8), each asserting that the message names the file, the row or key,
and what is wrong. These test messages, not numbers, so no outside
reference is involved.
"""

from __future__ import annotations

import re

import pytest
from analysis_helpers import ANALYSIS, BANDS, MEASUREMENTS, replace_section, write_case

from doseattr.analysis.config import analysis_from_dict, load_analysis
from doseattr.errors import InputError


def _fails(tmp_path, analysis=ANALYSIS, *, bands=BANDS, measurements=MEASUREMENTS):
    path = write_case(tmp_path, analysis, bands=bands, measurements=measurements)
    with pytest.raises(InputError) as info:
        load_analysis(path)
    return info.value, path


# -- the analysis file --------------------------------------------------------
def test_a_valid_file_loads(tmp_path):
    a = load_analysis(write_case(tmp_path))
    assert a.unit == "ug/m3"
    assert a.curve.model == "log-linear" and a.curve.table.n_bands == 4
    assert a.curve.design == "case-control"  # implied by cases and controls
    assert a.exposure.measurements.n == 8
    assert a.scenarios[0].kind == "cap" and a.scenarios[0].value == 20


def test_unknown_key_suggests_the_nearest(tmp_path):
    text = ANALYSIS.replace('model = "log-linear"', 'modle = "log-linear"')
    err, path = _fails(tmp_path, text)
    assert err.source == str(path)
    assert err.location == "[curve] key 'modle'"
    assert "unknown key 'modle' in [curve]; did you mean 'model'?" in str(err)


def test_unknown_section_suggests_the_nearest(tmp_path):
    err, _ = _fails(tmp_path, ANALYSIS + "\n[atribution]\nminimum_risk = 1\n")
    assert "unknown section [atribution]; did you mean 'attribution'?" in str(err)


def test_missing_key_is_named(tmp_path):
    text = replace_section(ANALYSIS, "exposure", "gm = 10.0")
    err, path = _fails(tmp_path, text, measurements=None)
    assert str(path) in str(err)
    assert err.location == "[exposure] key 'gsd'"
    assert "missing key 'gsd'" in str(err)


def test_missing_unit_is_named(tmp_path):
    err, _ = _fails(tmp_path, ANALYSIS.replace('unit = "ug/m3"', ""))
    assert err.location == "key 'unit'" and "missing key 'unit'" in str(err)


@pytest.mark.parametrize("gsd", [1.0, 0.5])
def test_gsd_of_one_or_less(tmp_path, gsd):
    text = replace_section(ANALYSIS, "exposure", f"gm = 10.0\ngsd = {gsd}")
    err, path = _fails(tmp_path, text, measurements=None)
    assert err.source == str(path) and err.location == "[exposure] key 'gsd'"
    assert "GSD must be greater than 1" in str(err)


@pytest.mark.parametrize("scale", [0, 1.5, -0.2])
def test_scale_outside_zero_one(tmp_path, scale):
    text = ANALYSIS.replace("cap = 20", f"scale = {scale}")
    err, path = _fails(tmp_path, text)
    assert err.source == str(path)
    assert err.location == "[[scenario]] 1 key 'scale'"
    assert "must be in (0, 1]" in str(err)


def test_text_where_a_number_belongs_in_the_file(tmp_path):
    text = ANALYSIS.replace("cap = 20", 'cap = "20"')
    err, _ = _fails(tmp_path, text)
    assert err.location == "[[scenario]] 1 key 'cap'"
    assert "must be a number, got text '20' (remove the quotes)" in str(err)


def test_negative_minimum_risk(tmp_path):
    err, _ = _fails(tmp_path, ANALYSIS + "\n[attribution]\nminimum_risk = -1\n")
    assert err.location == "[attribution] key 'minimum_risk'"
    assert "negative exposure" in str(err)


def test_invalid_toml(tmp_path):
    err, path = _fails(tmp_path, ANALYSIS + "\nthis is not toml\n")
    assert err.source == str(path) and "not valid TOML" in str(err)


def test_scenario_written_with_single_brackets(tmp_path):
    text = ANALYSIS.replace("[[scenario]]", "[scenario]")
    err, _ = _fails(tmp_path, text)
    assert "[[scenario]] (double brackets)" in str(err)


def test_scenario_needs_exactly_one_change(tmp_path):
    err, _ = _fails(tmp_path, ANALYSIS.replace("cap = 20", "cap = 20\nscale = 0.5"))
    assert "exactly one of cap, scale, reduce_by or comply" in str(err)


def test_table_and_published_estimate_together(tmp_path):
    err, _ = _fails(tmp_path, ANALYSIS.replace('model = "log-linear"',
                                               'model = "log-linear"\nrr = 1.1'))
    assert err.location == "[curve] key 'rr'" and "found table and rr" in str(err)


def test_missing_table_file_is_named(tmp_path):
    err, path = _fails(tmp_path, bands=None)
    assert err.source == str(path) and err.location == "[curve] key 'table'"
    assert "file not found" in str(err) and "bands.csv" in str(err)


def test_family_must_be_known(tmp_path):
    err, _ = _fails(tmp_path, ANALYSIS.replace('family = "lognormal"', 'family = "lognormla"'))
    assert err.location == "[exposure] key 'family'" and "did you mean 'lognormal'?" in str(err)


def test_empirical_needs_measured_values(tmp_path):
    """family = "empirical" uses measured values; with a GM and GSD there are none."""
    text = ANALYSIS.replace('table = "measurements.csv"\nfamily = "lognormal"',
                            'family = "empirical"\ngm = 5.0\ngsd = 2.0')
    err, _ = _fails(tmp_path, text)
    assert err.location == "[exposure] key 'family'" and "measured values" in str(err)


def test_entered_curve_ci_must_contain_estimate():
    d = {"unit": "ppm", "curve": {"model": "log-linear", "rr": 1.2, "per": 10, "ci": [1.3, 1.5]},
         "exposure": {"gm": 5.0, "gsd": 2.0}}
    with pytest.raises(InputError, match=re.escape("[curve] key 'ci': the CI [1.3, 1.5] does "
                                                   "not contain its estimate rr = 1.2")):
        analysis_from_dict(d)


def test_flat_entered_curve_needs_max_dose():
    d = {"unit": "ppm", "curve": {"model": "log-linear", "rr": 1.2, "beyond": "flat"},
         "exposure": {"gm": 5.0, "gsd": 2.0}}
    with pytest.raises(InputError, match=r"\[curve\] key 'beyond'.*needs max_dose"):
        analysis_from_dict(d)


def test_from_dict_defaults():
    a = analysis_from_dict({"unit": "ppm",
                            "curve": {"model": "linear", "err": 0.1, "per": 10},
                            "exposure": {"family": "gamma", "shape": 2.0, "scale": 3.0}})
    assert a.curve.beyond == "extend" and a.curve.max_dose is None
    assert a.attribution.minimum_risk == 0.0 and a.scenarios == ()
    assert a.exposure.family == "gamma" and a.exposure.values == {"shape": 2.0, "scale": 3.0}


def test_minimum_risk_range_uses_the_middle():
    a = analysis_from_dict({"unit": "ppm", "curve": {"model": "linear", "err": 0.1},
                            "exposure": {"gm": 5.0, "gsd": 2.0},
                            "attribution": {"minimum_risk": [2.0, 4.0]}})
    assert a.attribution.minimum_risk == 3.0 and a.attribution.minimum_risk_range == (2.0, 4.0)


def test_minimum_risk_range_low_above_high():
    with pytest.raises(InputError, match="low end 4 is above its high end 2"):
        analysis_from_dict({"unit": "ppm", "curve": {"model": "linear", "err": 0.1},
                            "exposure": {"gm": 5.0, "gsd": 2.0},
                            "attribution": {"minimum_risk": [4.0, 2.0]}})


def test_paths_are_relative_to_the_analysis_file(tmp_path, monkeypatch):
    write_case(tmp_path / "sub")
    monkeypatch.chdir(tmp_path)
    a = load_analysis("sub/analysis.toml")
    assert a.curve.table.source == "sub/bands.csv"
