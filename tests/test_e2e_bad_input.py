"""End to end: bad input from the user's side, through the command line.

For every bad-input case the issues list (issue 2 item 8, issue 3 item 8,
issue 4 item 10, issue 5 item 6), and a few more a user would plausibly
make: ``doseattr run`` exits with status 2, prints exactly one line on
standard error that names the file and the row/column or key, prints no
traceback, and creates neither the ``--out`` folder nor anything beside it.

The expected text fragments are the file's name and the location the
issues ask for ("row N, column 'x'" or "[section] key 'k'"); the wording
of the message itself is the project's and is not pinned here, except for a
nearest-key suggestion where issue 2 asks for one.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest

from doseattr.cli import main

ANALYSIS = """\
    unit = "ug/m3"

    [curve]
    table = "bands.csv"
    model = "log-linear"

    [exposure]
    table = "measurements.csv"
    family = "lognormal"

    [attribution]
    minimum_risk = 1.0

    [[scenario]]
    name = "cap"
    cap = 20
"""

BANDS = """\
    lower,upper,rr,ci_lower,ci_upper,cases,controls
    0,5,1,,,90,400
    5,10,1.20,0.90,1.60,70,260
    10,20,1.45,1.05,2.00,60,180
    20,,1.90,1.25,2.90,30,70
"""

MEASUREMENTS = """\
    value,weight
    3.1,2
    <1.0,1
    6.4,1
    9.8,3
    14.2,1
    2.2,2
    21.5,1
"""


def _edit(text: str, old: str, new: str) -> str:
    text = textwrap.dedent(text)
    assert old in text, f"test setup: {old!r} not in the base file"
    return text.replace(old, new, 1)


def analysis(old: str, new: str) -> dict[str, str]:
    return {"analysis.toml": _edit(ANALYSIS, old, new)}


def bands(old: str, new: str) -> dict[str, str]:
    return {"bands.csv": _edit(BANDS, old, new)}


def measurements(text: str) -> dict[str, str]:
    return {"measurements.csv": textwrap.dedent(text)}


def exposure(body: str, **tables: str) -> dict[str, str]:
    """The base analysis with its [exposure] section replaced by ``body``."""
    base = textwrap.dedent(ANALYSIS)
    head, rest = base.split("[exposure]\n", 1)
    tail = rest.split("\n\n", 1)[1]
    files = {"analysis.toml": head + "[exposure]\n" + textwrap.dedent(body).strip() + "\n\n" + tail}
    files.update({k.replace("_", "."): textwrap.dedent(v) for k, v in tables.items()})
    return files


def curve(body: str, **tables: str) -> dict[str, str]:
    """The base analysis with its [curve] section replaced by ``body``."""
    base = textwrap.dedent(ANALYSIS)
    head, rest = base.split("[curve]\n", 1)
    tail = rest.split("\n\n", 1)[1]
    files = {"analysis.toml": head + "[curve]\n" + textwrap.dedent(body).strip() + "\n\n" + tail}
    files.update({k.replace("_", "."): textwrap.dedent(v) for k, v in tables.items()})
    return files


def extra(section: str, **tables: str) -> dict[str, str]:
    """The base analysis with ``section`` (TOML text) appended."""
    files = {"analysis.toml": textwrap.dedent(ANALYSIS) + "\n" + textwrap.dedent(section)}
    files.update({k.replace("_", "."): textwrap.dedent(v) for k, v in tables.items()})
    return files


HISTORY_EXPOSURE = """\
    histories = "jobs.csv"
    as_of = "2024-01-01"
    family = "lognormal"
"""
GOOD_JOBS = """\
    worker,start,end,intensity
    a,2001-01-01,2005-01-01,0.2
    b,2003-01-01,2010-01-01,0.4
    c,2000-06-01,2012-01-01,0.1
    d,2006-01-01,2009-01-01,0.3
"""
STRATA_OK = "stratum,cases,gm,gsd\nnorth,10,,\nsouth,12,8,2\n"
SPLINE_BANDS = BANDS

# id: (files changed from the base case, fragments stderr must contain, xfail reason or None)
CASES: dict[str, tuple[dict[str, str], tuple[str, ...], str | None]] = {
    # ---- issue 2 item 8 -------------------------------------------------------------
    "missing column in the band table": (
        bands("lower,upper,rr,ci_lower,ci_upper,", "lower,upper,rr,ci_lower,ci_hi,"),
        ("bands.csv", "column 'ci_upper'"), None),
    "missing column in the measurements": (
        measurements("valu,weight\n3.1,2\n6.4,1\n9.8,3\n"),
        ("measurements.csv", "column 'value'"), None),
    "missing key unit": (
        analysis('unit = "ug/m3"\n', ""), ("analysis.toml", "key 'unit'"), None),
    "missing key scenario name": (
        analysis('name = "cap"\n', ""), ("analysis.toml", "[[scenario]] 1 key 'name'"), None),
    "missing key gsd beside gm": (
        exposure('gm = 8.0'), ("analysis.toml", "[exposure] key 'gsd'"), None),
    "unknown key with nearest suggested": (
        analysis('family = "lognormal"', 'famly = "lognormal"'),
        ("analysis.toml", "[exposure] key 'famly'", "did you mean 'family'"), None),
    "unknown top-level key with nearest suggested": (
        analysis('unit = "ug/m3"', 'unit = "ug/m3"\ntitel = "x"'),
        ("analysis.toml", "key 'titel'", "did you mean 'title'"), None),
    "unknown choice with nearest suggested": (
        analysis('family = "lognormal"', 'family = "lognorml"'),
        ("analysis.toml", "[exposure] key 'family'", "did you mean 'lognormal'"), None),
    "rr of zero": (
        bands("10,20,1.45,1.05,2.00", "10,20,0,1.05,2.00"), ("bands.csv", "row 4, column 'rr'"), None),
    "rr below zero": (
        bands("5,10,1.20,0.90,1.60", "5,10,-1.2,0.90,1.60"), ("bands.csv", "row 3, column 'rr'"), None),
    "ci that does not contain its rr": (
        bands("10,20,1.45,1.05,2.00", "10,20,2.45,1.05,2.00"),
        ("bands.csv", "row 4, column 'ci_upper'"), None),
    "ci with lower above upper": (
        bands("10,20,1.45,1.05,2.00", "10,20,1.45,2.00,1.05"), ("bands.csv", "row 4, column 'ci_"),
        None),
    "bands that overlap": (
        bands("10,20,1.45", "8,20,1.45"), ("bands.csv", "row 4, column 'lower'"), None),
    "bands out of order": (
        {"bands.csv": "lower,upper,rr,ci_lower,ci_upper\n0,5,1,,\n10,20,1.45,1.05,2.00\n"
                      "5,10,1.2,0.9,1.6\n"},
        ("bands.csv", "row 4, column 'lower'"), None),
    "open-ended band that is not the top one": (
        bands("5,10,1.20", "5,,1.20"), ("bands.csv", "row 3, column 'upper'"), None),
    "no reference band": (
        bands("0,5,1,,,", "0,5,1.1,1.0,1.2,"), ("bands.csv", "column 'rr'"), None),
    "two reference bands": (
        bands("5,10,1.20,0.90,1.60", "5,10,1,,"), ("bands.csv", "rows 2 and 3, column 'rr'"), None),
    "negative exposure in the measurements": (
        measurements("value\n3.1\n-6.4\n9.8\n4.0\n"), ("measurements.csv", "row 3, column 'value'"),
        None),
    "negative minimum risk": (
        analysis("minimum_risk = 1.0", "minimum_risk = -1.0"),
        ("analysis.toml", "[attribution] key 'minimum_risk'"), None),
    "negative band limit": (
        bands("0,5,1,,,", "-1,5,1,,,"), ("bands.csv", "row 2, column 'lower'"), None),
    "negative cap": (
        analysis("cap = 20", "cap = -20"), ("analysis.toml", "[[scenario]] 1 key 'cap'"), None),
    "gsd of 1": (
        exposure("gm = 8.0\ngsd = 1.0"), ("analysis.toml", "[exposure] key 'gsd'"), None),
    "gsd below 1": (
        exposure("gm = 8.0\ngsd = 0.7"), ("analysis.toml", "[exposure] key 'gsd'"), None),
    "scale of 0": (
        analysis("cap = 20", "scale = 0"), ("analysis.toml", "[[scenario]] 1 key 'scale'"), None),
    "scale above 1": (
        analysis("cap = 20", "scale = 1.2"), ("analysis.toml", "[[scenario]] 1 key 'scale'"), None),
    "text where a number belongs in a table": (
        bands("1.20,0.90,1.60", "one,0.90,1.60"), ("bands.csv", "row 3, column 'rr'"), None),
    "decimal comma in a measurement": (
        measurements('value\n3.1\n"6,4"\n9.8\n4.0\n'), ("measurements.csv", "row 3, column 'value'"),
        None),
    "text where a number belongs in the analysis file": (
        analysis("cap = 20", 'cap = "20"'), ("analysis.toml", "[[scenario]] 1 key 'cap'"), None),
    "unknown section with nearest suggested": (
        analysis("[attribution]", "[atribution]"), ("analysis.toml", "[atribution]",
                                                     "did you mean 'attribution'"), None),
    "band table file not found": (
        analysis('table = "bands.csv"', 'table = "band.csv"'),
        ("analysis.toml", "[curve] key 'table'"), None),
    "power curve with reference dose + offset not positive": (
        curve('model = "power"\nexponent = 0.3'), ("analysis.toml", "[curve] key '", "offset"),
        None),
    "log-linear curve extended over a gamma tail that diverges": (
        {"analysis.toml": _edit(
            curve('model = "log-linear"\nrr = 1.5\nper = 10')["analysis.toml"],
            'table = "measurements.csv"\nfamily = "lognormal"',
            'family = "gamma"\nshape = 2.0\nscale = 40.0')},
        ("analysis.toml", "[curve] key '"), None),
    "dose outside its band": (
        {"bands.csv": "lower,upper,rr,ci_lower,ci_upper,dose\n0,5,1,,,2\n5,10,1.2,0.9,1.6,12\n"
                      "10,20,1.45,1.05,2.0,\n"},
        ("bands.csv", "row 3, column 'dose'"), None),
    "scenario name used twice": (
        extra('[[scenario]]\nname = "cap"\nscale = 0.5\n'),
        ("analysis.toml", "[[scenario]] 2 key 'name'"), None),
    "unknown key in a scenario": (
        analysis("cap = 20", "limit = 20"), ("analysis.toml", "[[scenario]] 1 key 'limit'"), None),
    "semicolon-separated table": (
        {"bands.csv": "lower;upper;rr;ci_lower;ci_upper\n0;5;1;;\n5;10;1,2;0,9;1,6\n"},
        ("bands.csv", "row 1"), None),
    "only two detected values": (
        measurements("value\n3.1\n<1.0\n6.4\n<2\n"), ("measurements.csv", "column 'value'"),
        None),
    "all weights zero": (
        measurements("value,weight\n3.1,0\n6.4,0\n9.8,0\n4.0,0\n"),
        ("measurements.csv", "column 'weight'"), None),
    "histories with a concentration unit": (
        exposure(HISTORY_EXPOSURE), ("analysis.toml", "key 'unit'"), None),
    "analysis date that is not a date": (
        exposure(HISTORY_EXPOSURE.replace("2024-01-01", "31/12/2023")),
        ("analysis.toml", "[exposure] key 'as_of'"), None),
    "empirical family with non-detects": (
        analysis('family = "lognormal"', 'family = "empirical"'),
        ("measurements.csv", "column 'value'"), None),
    # ---- issue 3 item 8 -------------------------------------------------------------
    "knots outside the dose range": (
        curve('table = "bands.csv"\nmodel = "spline"\nknots = [1, 10, 500]'),
        ("analysis.toml", "[curve] key 'knots'"), None),
    "fewer bands than parameters": (
        curve('table = "bands.csv"\nmodel = "spline"\nknot_count = 5'),
        ("analysis.toml", "[curve] key '"), None),
    "points table not increasing in dose": (
        curve('points = "points.csv"', points_csv="dose,rr\n0,1\n10,1.2\n5,1.3\n20,1.5\n"),
        ("points.csv", "row 4, column 'dose'"), None),
    "draws file with ragged rows": (
        curve('draws = "draws.csv"', draws_csv="dose,d1,d2,d3\n0,1,1,1\n10,1.1,1.2\n"
                                               "20,1.3,1.4,1.2\n"),
        ("draws.csv", "row 3"), None),
    "parameters that give an rr below zero": (
        curve('model = "linear"\nerr = -0.5\nper = 10'), ("analysis.toml", "[curve] key 'err'"),
        None),
    "entered linear curve whose rr falls below zero before max_dose": (
        curve('model = "linear"\nerr = -0.5\nper = 10\nmax_dose = 30\nbeyond = "flat"'),
        ("analysis.toml", "[curve] key '"), None),
    "published shape whose parameters give an rr below zero": (
        curve('model = "saturating-exponential"\nalpha = -1.5\ngamma = 0.02\ndelta = 1.0'),
        ("analysis.toml", "[curve] key 'alpha'"), None),
    # ---- issue 4 item 10 ------------------------------------------------------------
    "all values censored": (
        measurements("value\n<1.0\n<1.0\n<0.5\n<2\n"), ("measurements.csv", "column 'value'"), None),
    "detection limit of zero": (
        measurements("value\n3.1\n<0\n9.8\n4.0\n5.5\n"), ("measurements.csv", "row 3, column 'value'"),
        None),
    "detection limit below zero": (
        measurements("value\n3.1\n<-0.5\n9.8\n4.0\n5.5\n"),
        ("measurements.csv", "row 3, column 'value'"), None),
    "detection limit of zero by the detected column": (
        measurements("value,detected\n3.1,true\n0,false\n9.8,true\n4.0,true\n5.5,true\n"),
        ("measurements.csv", "row 3, column 'value'"), None),
    "job dates out of order": (
        exposure(HISTORY_EXPOSURE, jobs_csv=GOOD_JOBS.replace("b,2003-01-01,2010-01-01",
                                                              "b,2010-01-01,2003-01-01")),
        ("jobs.csv", "row 3, column 'end'"), None),
    "overlapping jobs for one worker": (
        exposure(HISTORY_EXPOSURE, jobs_csv=GOOD_JOBS + "    a,2004-06-01,2007-01-01,0.5\n"),
        ("jobs.csv", "row 6, column 'start'"), None),
    "percentile above 100": (
        exposure('family = "lognormal"\npercentiles = {50 = 8.0, 120 = 20.0}'),
        ("analysis.toml", "[exposure] key 'percentiles'"), None),
    "percentile of 0": (
        exposure('family = "lognormal"\npercentiles = {0 = 1.0, 50 = 8.0}'),
        ("analysis.toml", "[exposure] key 'percentiles'"), None),
    "negative weight": (
        measurements("value,weight\n3.1,1\n6.4,-2\n9.8,1\n4.0,1\n"),
        ("measurements.csv", "row 3, column 'weight'"), None),
    "shares that do not sum to 1": (
        exposure('bins = "bins.csv"\nfamily = "lognormal"',
                 bins_csv="lower,upper,share\n0,5,0.3\n5,10,0.4\n10,,0.2\n"),
        ("bins.csv", "column 'share'"), None),
    "ppm exposure with no molecular weight": (
        exposure('family = "lognormal"\ngm = 2.0\ngsd = 2.0\nunit = "ppm"'),
        ("analysis.toml", "[exposure] key 'unit'"), None),
    "unit that cannot be converted": (
        exposure('family = "lognormal"\ngm = 2.0\ngsd = 2.0\nunit = "Bq/m3"'),
        ("analysis.toml", "[exposure] key 'unit'"), None),
    # ---- issue 5 item 6 -------------------------------------------------------------
    "draws below 100": (
        extra("[uncertainty]\ndraws = 50\n"), ("analysis.toml", "[uncertainty] key 'draws'"), None),
    "draws above the maximum without override": (
        extra("[uncertainty]\ndraws = 5000000\n"), ("analysis.toml", "[uncertainty] key 'draws'"),
        None),
    "stratum with negative cases": (
        extra('[burden]\ntable = "strata.csv"\n',
              strata_csv="stratum,cases\nnorth,10\nsouth,-3\n"),
        ("strata.csv", "row 3, column 'cases'"), None),
    "duplicated strata": (
        extra('[burden]\ntable = "strata.csv"\n',
              strata_csv="stratum,cases\nnorth,10\nsouth,3\nnorth,4\n"),
        ("strata.csv", "row 4, column 'stratum'"), None),
    "minimum-risk range with low above high": (
        analysis("minimum_risk = 1.0", "minimum_risk = [3.0, 1.0]"),
        ("analysis.toml", "[attribution] key 'minimum_risk'"), None),
    "stratum whose exposure cell is empty": (
        extra('[burden]\ntable = "strata.csv"\n',
              strata_csv=STRATA_OK.replace("south,12,8,2", "south,12,8,")),
        ("strata.csv", "row 3, column 'gsd'"), None),
    "stratum table with half an exposure pair": (
        extra('[burden]\ntable = "strata.csv"\n', strata_csv="stratum,cases,gm\nnorth,10,5\n"),
        ("strata.csv", "column 'gsd'"), None),
}


def _write_case(folder: Path, files: dict[str, str]) -> Path:
    folder.mkdir()
    base = {"analysis.toml": textwrap.dedent(ANALYSIS), "bands.csv": textwrap.dedent(BANDS),
            "measurements.csv": textwrap.dedent(MEASUREMENTS), "jobs.csv": textwrap.dedent(GOOD_JOBS)}
    base.update(files)
    for name, text in base.items():
        (folder / name).write_text(text)
    return folder / "analysis.toml"


def _params() -> list:
    out = []
    for name, (files, fragments, xfail) in CASES.items():
        marks = [pytest.mark.xfail(strict=True, reason=xfail)] if xfail else []
        out.append(pytest.param(files, fragments, id=name, marks=marks))
    return out


def test_base_case_runs(tmp_path, capsys):
    """The base case is valid, so each bad case fails for its own edit only."""
    path = _write_case(tmp_path / "case", {})
    from doseattr.analysis.config import load_analysis
    from doseattr.analysis.pipeline import run_analysis

    res = run_analysis(load_analysis(path)).to_dict()
    assert 0 < res["paf"]["estimate"] < 1


@pytest.mark.parametrize("files, fragments", _params())
def test_bad_input_exits_2_with_one_line(tmp_path, capsys, files, fragments):
    path = _write_case(tmp_path / "case", files)
    out_dir = tmp_path / "out"
    code = main(["run", str(path), "--out", str(out_dir)])
    out, err = capsys.readouterr()
    assert code == 2, f"exit status {code}; stderr: {err!r}"
    assert err.endswith("\n") and err.count("\n") == 1, f"not one line: {err!r}"
    assert err.startswith("doseattr: error: ")
    assert "Traceback" not in err and out == ""
    print(err)  # shown with -rA, for reading the messages
    for fragment in fragments:
        assert fragment in err, f"{fragment!r} not in {err!r}"
    assert not out_dir.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["case"]  # nothing written beside it


def test_existing_out_folder_left_untouched(tmp_path, capsys):
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    (out_dir / "results.json").write_text("old")
    files, _, _ = CASES["gsd of 1"]
    path = _write_case(tmp_path / "case", files)
    assert main(["run", str(path), "--out", str(out_dir)]) == 2
    assert [p.name for p in out_dir.iterdir()] == ["results.json"]
    assert (out_dir / "results.json").read_text() == "old"
