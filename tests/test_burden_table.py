"""Burden tables with rates, population, groups and life expectancy
(``[burden] table``, ``rate_per``, ``method``).

A row gives its cases N directly or as a population P and a rate r per
``rate_per`` people per year, N = P r / rate_per (the definition of a crude
rate, common practice). The expected cases below are products worked by
hand, written beside each check. Every table here is invented.
"""

from __future__ import annotations

import json
import math
import textwrap
from pathlib import Path

import numpy as np
import pytest

from doseattr.analysis.burden_table import BurdenTable, read_burden
from doseattr.analysis.config import analysis_from_dict, load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.cli import main
from doseattr.errors import InputError


def _read(tmp_path: Path, text: str, **kwargs) -> BurdenTable:
    path = tmp_path / "strata.csv"
    path.write_text(textwrap.dedent(text))
    return read_burden(path, "strata.csv", **kwargs)


# -- reading each column combination ---------------------------------------------------
def test_cases_only_keeps_todays_table(tmp_path):
    t = _read(tmp_path, "stratum,cases\nNorth,120\nSouth,80\n")
    assert t.strata == ("North", "South")
    np.testing.assert_array_equal(t.cases, [120.0, 80.0])
    assert t.population is None and t.rates is None and t.groups is None
    assert t.life_expectancy is None
    assert t.rate_per == 100000.0 and t.lines == (2, 3)
    assert t.label(1) == "South"


def test_population_and_rate_per_100000_by_default(tmp_path):
    # by hand: 250000 x 12.5 / 100000 = 31.25; 40000 x 300 / 100000 = 120
    t = _read(tmp_path, "stratum,population,rate\nNorth,250000,12.5\nSouth,40000,300\n")
    np.testing.assert_allclose(t.cases, [31.25, 120.0], rtol=1e-15)
    np.testing.assert_array_equal(t.rates, [12.5, 300.0])
    np.testing.assert_array_equal(t.population, [250000.0, 40000.0])
    assert t.rate_per == 100000.0


def test_population_and_rate_per_1000(tmp_path):
    # by hand: 8000 x 2.5 / 1000 = 20; 1500 x 14 / 1000 = 21
    t = _read(tmp_path, "stratum,population,rate\nNorth,8000,2.5\nSouth,1500,14\n",
              rate_per=1000.0)
    np.testing.assert_allclose(t.cases, [20.0, 21.0], rtol=1e-15)
    assert t.rate_per == 1000.0


def test_cases_and_rates_mixed_row_by_row(tmp_path):
    # by hand: South 60000 x 50 / 100000 = 30; North keeps its 120 cases
    t = _read(tmp_path, "stratum,cases,population,rate\nNorth,120,90000,\nSouth,,60000,50\n")
    np.testing.assert_allclose(t.cases, [120.0, 30.0], rtol=1e-15)
    assert math.isnan(t.rates[0]) and t.rates[1] == 50.0
    np.testing.assert_array_equal(t.population, [90000.0, 60000.0])


def test_cases_with_an_empty_rate_column_need_no_population(tmp_path):
    t = _read(tmp_path, "stratum,cases,rate\nNorth,12,\nSouth,4,\n")
    np.testing.assert_array_equal(t.cases, [12.0, 4.0])
    assert np.isnan(t.rates).all() and t.population is None


def test_groups_life_expectancy_and_own_exposure(tmp_path):
    # by hand: 20000 x 900 / 100000 = 180; 5000 x 4000 / 100000 = 200
    t = _read(tmp_path, """\
        stratum,group,population,rate,life_expectancy,gm,gsd
        North,65-74,20000,900,15.5,,
        North,75+,5000,4000,8.25,12,2.5
        South,65-74,18000,,17,,
    """.replace("18000,,17", "18000,1000,17"))
    # by hand: 18000 x 1000 / 100000 = 180
    np.testing.assert_allclose(t.cases, [180.0, 200.0, 180.0], rtol=1e-15)
    assert t.strata == ("North", "North", "South")
    assert t.groups == ("65-74", "75+", "65-74")
    np.testing.assert_array_equal(t.life_expectancy, [15.5, 8.25, 17.0])
    assert t.exposure == (None, {"gm": 12.0, "gsd": 2.5}, None)
    assert [t.label(i) for i in range(3)] == ["North, 65-74", "North, 75+", "South, 65-74"]


def test_product_beyond_the_float_range_before_division(tmp_path):
    """P r = 1e350 overflows, P r / rate_per = 1e150 does not: the row is
    kept with N = P (r / rate_per) (by hand: 1e200 x 1e150 / 1e200)."""
    t = _read(tmp_path, "stratum,population,rate\nA,1e200,1e150\nB,10,1\n", rate_per=1e200)
    np.testing.assert_allclose(t.cases[0], 1e150, rtol=1e-14)


# -- subset and label ---------------------------------------------------------------------
def test_subset_slices_every_row_field_in_the_order_asked(tmp_path):
    t = _read(tmp_path, """\
        stratum,group,cases,population,rate,life_expectancy,gm,gsd
        North,young,,1000,20,50,,
        North,old,7,800,,10,9,2
        South,young,3,900,,52,,
    """, rate_per=1000.0)
    s = t.subset([2, 0])
    assert s.strata == ("South", "North") and s.groups == ("young", "young")
    # by hand: North, young 1000 x 20 / 1000 = 20
    np.testing.assert_allclose(s.cases, [3.0, 20.0], rtol=1e-15)
    np.testing.assert_array_equal(s.population, [900.0, 1000.0])
    assert math.isnan(s.rates[0]) and s.rates[1] == 20.0
    np.testing.assert_array_equal(s.life_expectancy, [52.0, 50.0])
    assert s.exposure == (None, None) and s.lines == (4, 2)
    assert s.source == t.source and s.rate_per == 1000.0
    assert s.label(0) == "South, young"
    one = t.subset([1])
    assert one.label(0) == "North, old" and one.exposure == ({"gm": 9.0, "gsd": 2.0},)
    assert t.subset([]).cases.shape == (0,)


def test_subset_of_a_plain_table_keeps_the_missing_fields_missing():
    t = BurdenTable("x.csv", ("A", "B", "C"), np.array([1.0, 2.0, 3.0]), None,
                    (None, None, None))
    s = t.subset([1, 1])
    assert s.strata == ("B", "B") and s.population is None and s.groups is None
    assert s.rates is None and s.life_expectancy is None and s.lines == ()
    np.testing.assert_array_equal(s.cases, [2.0, 2.0])
    assert s.label(0) == "B"


# -- bad input through read_burden -------------------------------------------------------
RATES = "stratum,group,cases,population,rate,life_expectancy\n" \
        "North,young,,1000,20,50\nNorth,old,7,800,,10\nSouth,young,3,900,,52\n"

BAD = {
    "rate below zero": (RATES.replace("1000,20,", "1000,-2,"), {},
                        "row 2, column 'rate'", "rate must be 0 or more"),
    "population of zero with a rate": (RATES.replace("1000,20", "0,20"), {},
                                       "row 2, column 'population'", "above 0 for its rate"),
    "population below zero with a rate": (RATES.replace("1000,20", "-5,20"), {},
                                          "row 2, column 'population'", "above 0"),
    "both cases and rate": (RATES.replace(",,1000,20,", ",4,1000,20,"), {},
                            "row 2, column 'rate'", "fill one of them"),
    "neither cases nor rate": (RATES.replace("7,800,,", ",800,,"), {},
                               "row 3, column 'cases'", "give this row's cases, or its rate"),
    "empty cases without a rate column": ("stratum,cases\nA,4\nB,\n", {},
                                          "row 3, column 'cases'", "give this row's cases"),
    "rate without a population column": ("stratum,rate\nA,4\nB,5\n", {},
                                         "row 2, column 'rate'", "add a population column"),
    "rate without a population value": (RATES.replace("1000,20", ",20"), {},
                                        "row 2, column 'population'", "empty population"),
    "population missing on a cases row": (RATES.replace("7,800", "7,"), {},
                                          "row 3, column 'population'", "empty population"),
    "life expectancy below 0": (RATES.replace(",10\n", ",-1\n"), {},
                                "row 3, column 'life_expectancy'", "between 0 and 120"),
    "life expectancy above 120": (RATES.replace(",52\n", ",121\n"), {},
                                  "row 4, column 'life_expectancy'", "between 0 and 120"),
    "life expectancy missing": (RATES.replace(",52\n", ",\n"), {},
                                "row 4, column 'life_expectancy'", "empty life expectancy"),
    "empty group": (RATES.replace("North,old", "North,"), {},
                    "row 3, column 'group'", "empty group"),
    "duplicate stratum and group": (RATES.replace("South,young", "North,young"), {},
                                    "row 4, column 'group'", "(rows 2 and 4)"),
    "duplicate stratum without groups": ("stratum,cases\nA,1\nB,2\nA,3\n", {},
                                         "row 4, column 'stratum'", "also row 2"),
    "rate not a number": (RATES.replace("1000,20", "1000,high"), {},
                          "row 2, column 'rate'", "text 'high' where a number belongs"),
    "population not a number": (RATES.replace("1000,20", "1 000,20"), {},
                                "row 2, column 'population'", "where a number belongs"),
    "life expectancy not a number": (RATES.replace(",50\n", ",fifty\n"), {},
                                     "row 2, column 'life_expectancy'", "where a number"),
    "cases not a number": (RATES.replace("7,800", "7.5.1,800"), {},
                           "row 3, column 'cases'", "where a number belongs"),
    "rate infinite": (RATES.replace("1000,20", "1000,inf"), {},
                      "row 2, column 'rate'", "not a finite number"),
    "all rates and cases zero": ("stratum,population,rate\nA,100,0\nB,200,0\n", {},
                                 "column 'rate'", "every stratum has 0 cases"),
    "population x rate past the float range": (
        "stratum,population,rate\nA,1e300,1e300\n", {"rate_per": 1e-10},
        "row 2, column 'rate'", "beyond the float range"),
    "population x rate whose square overflows": (
        "stratum,population,rate\nA,1e200,1e100\n", {}, "row 2, column 'rate'", "1.34e+154"),
    "population x rate below the smallest float": (
        "stratum,population,rate\nA,1e-200,1e-200\nB,10,10\n", {}, "row 2, column 'rate'",
        "below the smallest float"),
    "no cases and no rate column": ("stratum,population\nA,100\n", {}, "column 'cases'",
                                    "stratum, population and rate"),
    "cases rate per rate_per overflows": ("stratum,cases,population\nA,1e150,1e-200\n", {},
                                          "row 2, column 'population'", "rate per 100000"),
}


@pytest.mark.parametrize("text, kwargs, where, says", list(BAD.values()), ids=list(BAD))
def test_bad_burden_table(tmp_path, text, kwargs, where, says):
    with pytest.raises(InputError) as info:
        _read(tmp_path, text, **kwargs)
    line = info.value.line()
    assert "\n" not in line
    assert line.startswith(f"strata.csv: {where}: "), line
    assert says in line, line


# -- [burden] keys -------------------------------------------------------------------------
def _analysis(tmp_path, burden: dict, table: str = "stratum,population,rate\nA,1000,5\n",
              outcome: bool = False, exposure: dict | None = None):
    (tmp_path / "strata.csv").write_text(table)
    curve = {"model": "linear", "err": 0.05, "beyond": "extend"}
    d = {"unit": "ug/m3", "exposure": exposure or {"gm": 8.0, "gsd": 2.0}}
    if outcome:
        d["outcome"] = [{"name": "deaths", "curve": curve, "burden": burden}]
    else:
        d.update(curve=curve, burden=burden)
    return analysis_from_dict(d, base_dir=tmp_path)


def test_burden_keys_are_stored_with_their_defaults(tmp_path):
    a = _analysis(tmp_path, {"table": "strata.csv"})
    assert a.burden.method == "paf" and a.burden.rate_per == 100000.0
    np.testing.assert_allclose(a.burden.table.cases, [0.05])  # by hand: 1000 x 5 / 100000
    b = _analysis(tmp_path, {"table": "strata.csv", "rate_per": 1000,
                             "method": "impact-function"})
    assert b.burden.method == "impact-function" and b.burden.rate_per == 1000.0
    assert b.burden.table.rate_per == 1000.0
    np.testing.assert_allclose(b.burden.table.cases, [5.0])  # by hand: 1000 x 5 / 1000


def test_burden_keys_inside_an_outcome(tmp_path):
    a = _analysis(tmp_path, {"table": "strata.csv", "rate_per": 10,
                             "method": "impact-function"}, outcome=True)
    spec = a.outcomes[0].burden
    assert spec.method == "impact-function" and spec.rate_per == 10.0
    np.testing.assert_allclose(spec.table.cases, [500.0])  # by hand: 1000 x 5 / 10


def test_new_fields_survive_the_unit_conversion(tmp_path):
    table = "stratum,group,population,rate,life_expectancy,gm,gsd\nA,old,1000,5,9,0.008,2\n"
    a = _analysis(tmp_path, {"table": "strata.csv"}, table=table,
                  exposure={"gm": 0.008, "gsd": 2.0, "unit": "mg/m3"})
    t = a.burden.table
    assert t.exposure[0]["gm"] == pytest.approx(8.0)  # 0.008 mg/m3 = 8 ug/m3
    assert t.groups == ("old",) and t.rates[0] == 5.0 and t.life_expectancy[0] == 9.0


@pytest.mark.parametrize("key, value, says", [
    ("rate_per", 0, "rate_per must be above 0"),
    ("rate_per", -1000, "rate_per must be above 0"),
    ("rate_per", "1000", "must be a number"),
    ("method", "attributable", "is not one of paf, impact-function"),
    ("method", "PAF", "is not one of paf, impact-function"),
])
@pytest.mark.parametrize("outcome", [False, True])
def test_bad_burden_keys(tmp_path, key, value, says, outcome):
    with pytest.raises(InputError) as info:
        _analysis(tmp_path, {"table": "strata.csv", key: value}, outcome=outcome)
    where = ("[[outcome]] 1 ('deaths') [outcome.burden]" if outcome else "[burden]")
    assert info.value.location == f"{where} key '{key}'"
    assert says in info.value.message and "\n" not in info.value.line()


# -- bad input through the command line -------------------------------------------------
ANALYSIS = """\
unit = "ug/m3"

[curve]
model = "linear"
err = 0.05
beyond = "extend"

[exposure]
gm = 8.0
gsd = 2.0

[burden]
table = "strata.csv"
"""

CLI_CASES = {
    "rate below zero": (ANALYSIS, RATES.replace("1000,20,", "1000,-2,"),
                        "strata.csv: row 2, column 'rate'"),
    "both cases and rate": (ANALYSIS, RATES.replace(",,1000,20,", ",4,1000,20,"),
                            "strata.csv: row 2, column 'rate'"),
    "population of zero with a rate": (ANALYSIS, RATES.replace("1000,20", "0,20"),
                                       "strata.csv: row 2, column 'population'"),
    "life expectancy above 120": (ANALYSIS, RATES.replace(",52\n", ",130\n"),
                                  "strata.csv: row 4, column 'life_expectancy'"),
    "duplicate stratum and group": (ANALYSIS, RATES.replace("South,young", "North,young"),
                                    "strata.csv: row 4, column 'group'"),
    "method not known": (ANALYSIS + 'method = "pif"\n', RATES,
                         "analysis.toml: [burden] key 'method'"),
    "rate_per of zero": (ANALYSIS + "rate_per = 0\n", RATES,
                         "analysis.toml: [burden] key 'rate_per'"),
}


@pytest.mark.parametrize("toml, table, fragment", list(CLI_CASES.values()), ids=list(CLI_CASES))
def test_bad_input_through_the_command_line(tmp_path, capsys, toml, table, fragment):
    case = tmp_path / "case"
    case.mkdir()
    (case / "analysis.toml").write_text(toml)
    (case / "strata.csv").write_text(table)
    out_dir = tmp_path / "out"
    code = main(["run", str(case / "analysis.toml"), "--out", str(out_dir)])
    out, err = capsys.readouterr()
    assert code == 2, err
    assert err.startswith("doseattr: error: ") and err.count("\n") == 1 and err.endswith("\n")
    assert fragment in err and "Traceback" not in err and out == ""
    assert not out_dir.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["case"]


# -- a full run with rates -------------------------------------------------------------------
def _paf(gm: float, gsd: float, b: float = 0.05) -> float:
    """PAF = 1 - 1/E[RR(X)] with RR(x) = 1 + b x and X lognormal (GM, GSD):
    E[X] = GM exp(ln^2 GSD / 2) (lognormal mean, from memory), so
    E[RR] = 1 + b GM exp(ln^2 GSD / 2) (closed form derived here, as in
    tests/test_analysis_burden.py)."""
    return 1 - 1 / (1 + b * gm * math.exp(math.log(gsd) ** 2 / 2))


def test_full_run_with_rates_gives_paf_times_population_times_rate(tmp_path):
    """Attributable = PAF x (P r / rate_per) per row, with rate_per 1000,
    one row giving its cases and one its own exposure; the total is the sum
    of the rows. Expected cases by hand: 12000 x 3.5 / 1000 = 42,
    5000 x 20 / 1000 = 100, and 30 as given."""
    toml = ANALYSIS + "rate_per = 1000\n"
    table = ("# invented strata\nstratum,cases,population,rate,gm,gsd\n"
             "North,,12000,3.5,,\nSouth,,5000,20,14,2.5\nEast,30,7000,,,\n")
    (tmp_path / "analysis.toml").write_text(toml)
    (tmp_path / "strata.csv").write_text(table)
    res = json.loads(json.dumps(run_analysis(load_analysis(tmp_path / "analysis.toml"))
                                .to_dict()))
    expected = {"North": (42.0, _paf(8.0, 2.0)), "South": (100.0, _paf(14.0, 2.5)),
                "East": (30.0, _paf(8.0, 2.0))}
    rows = {r["stratum"]: r for r in res["burden"]["strata"]}
    assert set(rows) == set(expected)
    for name, (cases, paf) in expected.items():
        np.testing.assert_allclose(rows[name]["cases"], cases, rtol=1e-14)
        np.testing.assert_allclose(rows[name]["paf"]["estimate"], paf, rtol=1e-8)
        np.testing.assert_allclose(rows[name]["attributable"]["estimate"], paf * cases,
                                   rtol=1e-8)
    total = sum(c * p for c, p in expected.values())
    np.testing.assert_allclose(res["burden"]["total"]["attributable"]["estimate"], total,
                               rtol=1e-8)
    np.testing.assert_allclose(res["burden"]["total"]["cases"], 172.0, rtol=1e-14)
