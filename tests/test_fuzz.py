"""Fuzzing the command line (issue 8, item 6): a small valid analysis and its
tables, mutated by hypothesis (keys deleted, renamed and duplicated, values
of the wrong type or at the extremes of the float range, damaged TOML and
CSV bytes, very long cells), run with ``doseattr run`` in-process.

Every run must end in one of two ways: exit 0 with only finite numbers in
results.json, or exit 2 with exactly one line on standard error naming a
file and a key, row, column or line, and nothing written (no output folder,
no hidden partial folder). Never exit 1, never an exception. The search is
seeded (derandomized) and bounded in examples so the file runs in well
under a minute. The base analysis's numbers are invented.
"""

from __future__ import annotations

import json
import math
import re
import shutil
import tempfile
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from doseattr.cli import main

# -- the base analysis (invented numbers) ------------------------------------------------
BASE: dict[str, Any] = {
    "unit": "mg/m3",
    "title": "fuzz base (invented numbers)",
    "curve": {"table": "bands.csv", "model": "log-linear", "beyond": "flat"},
    "exposure": {"table": "meas.csv", "family": "lognormal"},
    "attribution": {"minimum_risk": 1.0},
    "scenario": [{"name": "cap 8", "cap": 8.0}],
    "burden": {"table": "burden.csv"},
}
TABLES = {
    "bands.csv": "# invented bands\nlower,upper,rr,ci_lower,ci_upper\n0,2,1,,\n2,5,1.3,1.1,1.6\n"
                 "5,,1.9,1.4,2.6\n",
    "meas.csv": "# invented measurements\nsite,value,weight\nA,1.2,3\nB,2.5,1\nC,<0.5,2\n"
                "D,4.1,1\nE,7.7,2\nF,3.3,1\n",
    "burden.csv": "# invented cases\nstratum,cases,population\nNorth,40,9000\nSouth,25,6000\n",
}
#: Other valid starting points: an entered curve over summary statistics
#: (with a few uncertainty draws), and work histories.
ENTERED: dict[str, Any] = {
    "unit": "mg/m3",
    "curve": {"model": "linear", "err": 0.05, "per": 1.0, "ci": [0.01, 0.09]},
    "exposure": {"family": "gamma", "mean": 4.0, "sd": 3.0},
    "attribution": {"minimum_risk": 0.5},
    "scenario": [{"name": "minus 20%", "scale": 0.8}],
    "uncertainty": {"draws": 100, "seed": 7},
}
HISTORIES: dict[str, Any] = {
    "unit": "mg/m3-years",
    "curve": {"model": "log-linear", "rr": 1.1, "per": 1.0, "max_dose": 30.0, "beyond": "flat"},
    "exposure": {"histories": "jobs.csv", "as_of": "2024-01-01", "lag_years": 2.0,
                 "family": "empirical"},
}
TABLES["jobs.csv"] = ("# invented jobs\nworker,start,end,intensity\nw1,2010-01-01,2015-07-01,0.2\n"
                      "w2,2005-03-15,2012-03-15,0.5\nw3,2019-01-01,2023-06-30,0.1\n")
PERCENTILES: dict[str, Any] = {
    "unit": "mg/m3",
    "curve": {"model": "log-linear", "rr": 1.3, "per": 10.0, "max_dose": 40.0, "beyond": "flat"},
    "exposure": {"percentiles": {"50": 3.0, "95": 12.0}, "family": "weibull", "unexposed": 0.1},
    "attribution": {"minimum_risk": [0.5, 1.5], "cutpoints": [2.0, 6.0]},
    "scenario": [{"name": "minus 1", "reduce_by": 1.0}],
    "burden": {"table": "strata.csv"},
}
TABLES["strata.csv"] = ("# invented strata\nstratum,cases,gm,gsd\nEast,12,,\nWest,30,4.0,2.2\n")
BASES = (BASE, ENTERED, HISTORIES, PERCENTILES)
NUMERIC = {"lognormal": ("gm", "gsd"), "gamma": ("shape", "scale"), "weibull": ("shape", "scale")}
FILES = ("analysis.toml",) + tuple(TABLES)

EXTREMES = [0, -0.0, 1e-308, 5e-324, 1e308, -1e308, 10**30, -(10**19), 2**63, 1.0000000001,
            -1, 0.5, 1e50, float("inf"), float("nan")]
WRONG_TYPES = ["text", "", True, [1, 2], [], {"a": 1}, "1.5"]
KEYS = ["table", "model", "family", "gm", "gsd", "shape", "scale", "mean", "sd", "max_dose",
        "minimum_risk", "cap", "unexposed", "rr", "per", "err", "name", "unit", "beyond",
        "cutpoints", "design", "dose", "lag_years", "draws", "seed", "tabel", "x"]


# -- writing TOML -------------------------------------------------------------------------
def toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf") if math.isinf(v) else repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    return "{" + ", ".join(f"{k} = {toml_value(x)}" for k, x in v.items()) + "}"


def to_toml(d: dict[str, Any]) -> str:
    lines = [f"{k} = {toml_value(v)}" for k, v in d.items()
             if not isinstance(v, dict) and not (isinstance(v, list) and v
                                                 and all(isinstance(x, dict) for x in v))]
    for k, v in d.items():
        if isinstance(v, dict):
            lines.append(f"[{k}]")
            lines += [f"{kk} = {toml_value(vv)}" for kk, vv in v.items()]
        elif isinstance(v, list) and v and all(isinstance(x, dict) for x in v):
            for block in v:
                lines.append(f"[[{k}]]")
                lines += [f"{kk} = {toml_value(vv)}" for kk, vv in block.items()]
    return "\n".join(lines) + "\n"


# -- mutations ---------------------------------------------------------------------------
def places(d: dict[str, Any]) -> list[tuple[dict[str, Any], str]]:
    """Every (mapping, key) in the analysis, sections and blocks included."""
    out = [(d, k) for k in d]
    for v in d.values():
        blocks = v if isinstance(v, list) else [v]
        for b in blocks:
            if isinstance(b, dict):
                out += [(b, k) for k in b]
    return out


@st.composite
def toml_mutation(draw, d: dict[str, Any]):
    spots = places(d)
    table, key = draw(st.sampled_from(spots))
    kind = draw(st.sampled_from(["delete", "rename", "extreme", "extreme", "wrong-type",
                                 "add", "number"]))
    if kind == "number":  # a number anywhere in float range, where a number was
        numeric = [(t, k) for t, k in spots if isinstance(t[k], (int, float))
                   and not isinstance(t[k], bool)]
        if numeric:
            table, key = draw(st.sampled_from(numeric))
            table[key] = draw(st.floats(allow_nan=False, allow_infinity=False, width=64))
            return
    if kind == "delete":
        del table[key]
    elif kind == "rename":
        table[draw(st.sampled_from(KEYS))] = table.pop(key)
    elif kind == "extreme":
        table[key] = draw(st.sampled_from(EXTREMES))
    elif kind == "wrong-type":
        table[key] = draw(st.sampled_from(WRONG_TYPES))
    else:
        table[draw(st.sampled_from(KEYS))] = draw(st.sampled_from(EXTREMES + WRONG_TYPES))


@st.composite
def text_damage(draw, data: bytes):
    kind = draw(st.sampled_from(["truncate", "stray", "bom", "duplicate-line", "non-utf8"]))
    if not data:
        return data
    at = draw(st.integers(0, len(data)))
    if kind == "truncate":
        return data[:at]
    if kind == "stray":
        return data[:at] + draw(st.sampled_from([b"\x00", b"\"", b"[", b",", b"=", b"\r"])) + data[at:]
    if kind == "bom":
        return b"\xef\xbb\xbf" + data
    if kind == "non-utf8":
        return data[:at] + b"\xff\xfe" + data[at:]
    lines = data.splitlines(keepends=True)
    i = draw(st.integers(0, len(lines) - 1))
    return b"".join(lines[:i + 1] + [lines[i]] + lines[i + 1:])


@st.composite
def csv_damage(draw, text: str):
    lines = text.splitlines()
    kind = draw(st.sampled_from(["short-row", "extra-column", "empty", "long-cell", "cell",
                                 "header-only"]))
    data = [i for i, line in enumerate(lines) if not line.startswith("#")][1:]
    i = draw(st.sampled_from(data))
    cells = lines[i].split(",")
    if kind == "short-row":
        lines[i] = ",".join(cells[:-1])
    elif kind == "extra-column":
        lines[i] += ",9"
    elif kind == "empty":
        return ""
    elif kind == "header-only":
        return "\n".join(line for j, line in enumerate(lines) if j not in data) + "\n"
    else:
        j = draw(st.integers(0, len(cells) - 1))
        cells[j] = ("7" * 140_000 if kind == "long-cell"
                    else draw(st.sampled_from(["0", "-0", "1e-308", "5e-324", "1e308", "-1e308",
                                               "1" + "0" * 30, "nan", "inf", "x", "", "<0",
                                               "1e50", "1e19"])))
        lines[i] = ",".join(cells)
    return "\n".join(lines) + "\n"


@st.composite
def cases(draw):
    d = json.loads(json.dumps(draw(st.sampled_from(BASES))))
    if "mean" in d["exposure"] and draw(st.booleans()):  # another summary description
        family = draw(st.sampled_from(sorted(NUMERIC)))
        a, b = NUMERIC[family]
        d["exposure"] = {"family": family, a: 3.0, b: 1.5 if family != "gamma" else 2.0}
    if d["exposure"].get("table") and draw(st.booleans()):
        d["exposure"]["family"] = draw(st.sampled_from(["gamma", "weibull", "best"]))
    tables = {k: v.encode() for k, v in TABLES.items()}
    for _ in range(draw(st.integers(0, 2))):
        draw(toml_mutation(d))
    toml = to_toml(d).encode()
    if draw(st.booleans()):
        toml = draw(text_damage(toml))
    if draw(st.booleans()):
        name = draw(st.sampled_from(sorted(TABLES)))
        damaged = draw(csv_damage(TABLES[name])).encode()
        if draw(st.integers(0, 4)) == 0:
            damaged = draw(text_damage(damaged))
        tables[name] = damaged
    return toml, tables


# -- the property ------------------------------------------------------------------------
LOCATION = re.compile(r"key '|row \d|column|line \d|\[\w+\]|\[\[\w+\]\]")


def walk_finite(obj: Any, where: str = "results") -> None:
    if isinstance(obj, float):
        assert math.isfinite(obj), where
    elif isinstance(obj, dict):
        for k, v in obj.items():
            walk_finite(v, f"{where}.{k}")
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            walk_finite(v, f"{where}[{i}]")


def check_one(folder: Path, toml: bytes, tables: dict[str, bytes], capsys) -> None:
    (folder / "analysis.toml").write_bytes(toml)
    for name, data in tables.items():
        (folder / name).write_bytes(data)
    out = folder / "out"
    code = main(["run", str(folder / "analysis.toml"), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code in (0, 2), err
    hidden = [p.name for p in folder.iterdir() if p.name.startswith(".") and "partial" in p.name]
    assert not hidden, hidden
    if code == 0:
        walk_finite(json.loads((out / "results.json").read_text()))
        return
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    line = lines[0]
    assert any(name in line for name in FILES), line
    assert LOCATION.search(line), line
    assert not out.exists(), "a refused run wrote its output folder"


@settings(derandomize=True, max_examples=60, deadline=None, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow,
                                 HealthCheck.data_too_large])
@given(case=cases())
def test_mutated_analyses_end_in_results_or_one_line(case, capsys):
    toml, tables = case
    folder = Path(tempfile.mkdtemp(prefix="doseattr-fuzz-"))
    try:
        check_one(folder, toml, tables, capsys)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


@pytest.mark.parametrize("base", BASES, ids=["tables", "entered", "histories", "percentiles"])
def test_the_base_analysis_runs(capsys, tmp_path, base):
    """Each unmutated base must run, or the fuzzing above tests refusals only."""
    check_one(tmp_path, to_toml(base).encode(), {k: v.encode() for k, v in TABLES.items()},
              capsys)
    assert (tmp_path / "out" / "results.json").is_file()
