"""The command line: exit codes, one-line errors on standard error, nothing
written on error, and the bundled demo end to end.

These check behaviour, not numbers; the numbers behind them are checked in
test_analysis_pipeline.py against outside references.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from analysis_helpers import ANALYSIS, BANDS, write_case

from doseattr.cli import main

ROOT = Path(__file__).resolve().parent.parent


def _run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_run_writes_results(tmp_path, capsys):
    path = write_case(tmp_path / "case")
    out_dir = tmp_path / "out"
    code, out, err = _run(["run", path, "--out", out_dir], capsys)
    assert code == 0, err
    data = json.loads((out_dir / "results.json").read_text())
    assert 0 < data["paf"]["estimate"] < 1
    assert (out_dir / "report.html").is_file()
    assert "PAF" in out and str(out_dir) in out


def test_quiet_prints_nothing(tmp_path, capsys):
    code, out, err = _run(["run", write_case(tmp_path / "c"), "--out", tmp_path / "o",
                           "--quiet"], capsys)
    assert code == 0 and out == "" and err == ""


BAD_INPUTS = {
    "table row": (ANALYSIS, BANDS.replace("1.42,", "0,"), "bands.csv: row 4, column 'rr': "),
    "unknown key": (ANALYSIS.replace("model =", "modle ="), BANDS,
                    "analysis.toml: [curve] key 'modle': unknown key 'modle'"),
    "scale": (ANALYSIS.replace("cap = 20", "scale = 1.5"), BANDS,
              "analysis.toml: [[scenario]] 1 key 'scale': "),
    "diverges": (ANALYSIS.replace('model = "log-linear"',
                                  'model = "log-linear"\nbeyond = "extend"'), BANDS,
                 "analysis.toml: [curve] key 'beyond': "),
}


@pytest.mark.parametrize("case", sorted(BAD_INPUTS))
def test_bad_input_exits_2_with_one_line_and_writes_nothing(tmp_path, capsys, case):
    analysis, bands, expected = BAD_INPUTS[case]
    path = write_case(tmp_path / "case", analysis, bands=bands)
    out_dir = tmp_path / "out"
    code, out, err = _run(["run", path, "--out", out_dir], capsys)
    assert code == 2
    assert err.startswith("doseattr: error: ") and err.count("\n") == 1
    assert expected in err
    assert "Traceback" not in err and out == ""
    assert not out_dir.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["case"]  # no temporary folder left


def test_bad_input_leaves_an_existing_folder_untouched(tmp_path, capsys):
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    (out_dir / "keep.txt").write_text("mine")
    path = write_case(tmp_path / "case", bands=BANDS.replace("1.18,", "-1,"))
    code, _, err = _run(["run", path, "--out", out_dir], capsys)
    assert code == 2 and "RR must be greater than 0" in err
    assert [p.name for p in out_dir.iterdir()] == ["keep.txt"]


def test_missing_analysis_file(tmp_path, capsys):
    code, _, err = _run(["run", tmp_path / "nope.toml", "--out", tmp_path / "o"], capsys)
    expected = f"doseattr: error: {tmp_path / 'nope.toml'}: analysis file not found\n"
    assert code == 2 and err == expected
    assert not (tmp_path / "o").exists()


def test_usage_error_exits_2(capsys):
    with pytest.raises(SystemExit) as info:
        main(["run"])
    assert info.value.code == 2


def test_demo_runs_end_to_end(tmp_path, capsys):
    out_dir = tmp_path / "demo"
    code, _out, err = _run(["demo", "--out", out_dir], capsys)
    assert code == 0, err
    data = json.loads((out_dir / "results.json").read_text())
    assert 0 < data["paf"]["estimate"] < 1
    assert len(data["scenarios"]) == 3
    assert data["curve"]["covariance_method"] == "counts"
    assert data["exposure"]["censored"] == 3
    assert "invented" in data["title"]
    assert (out_dir / "report.html").stat().st_size > 0


def test_module_entry_point_has_no_traceback(tmp_path):
    """``python -m doseattr`` in a real process: exit status 2, one line."""
    path = write_case(tmp_path / "case", bands=BANDS.replace("0,10,1,,,", "0,10,1.1,1.0,1.2,"))
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(
        [str(ROOT)] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p])}
    proc = subprocess.run([sys.executable, "-m", "doseattr", "run", str(path), "--out",
                           str(tmp_path / "out")], capture_output=True, text=True, env=env,
                          check=False)
    assert proc.returncode == 2
    assert proc.stderr.startswith("doseattr: error: ") and "no reference band" in proc.stderr
    assert "Traceback" not in proc.stderr and not (tmp_path / "out").exists()


# -- issue 5 item 6 and the newer keys: one line, exit 2, nothing written --------
STRATA = "stratum,cases,gm,gsd\nNorth,120,,\nSouth,80,14,2.5\nEast,45,,\n"
WITH_BURDEN = ANALYSIS + '\n[burden]\ntable = "strata.csv"\n\n[uncertainty]\ndraws = 200\n'

BAD_RUNS = {
    "draws below 100": (WITH_BURDEN.replace("draws = 200", "draws = 99"), STRATA,
                        "analysis.toml: [uncertainty] key 'draws': draws must be at least 100"),
    "draws above the maximum": (WITH_BURDEN.replace("draws = 200", "draws = 100001"), STRATA,
                                "analysis.toml: [uncertainty] key 'draws': 100001 draws is "
                                "above 100000; add allow_many_draws = true"),
    "negative cases": (WITH_BURDEN, STRATA.replace("East,45", "East,-3"),
                       "strata.csv: row 4, column 'cases': cases must be 0 or more"),
    "duplicated strata": (WITH_BURDEN, STRATA.replace("East,45", "North,45"),
                          "strata.csv: row 4, column 'stratum': stratum 'North' appears twice"),
    "range low above high": (WITH_BURDEN + "\n[attribution]\nminimum_risk = [6, 2]\n", STRATA,
                             "analysis.toml: [attribution] key 'minimum_risk': the range's low "
                             "end 6 is above its high end 2"),
    "incomplete stratum exposure": (WITH_BURDEN, STRATA.replace("South,80,14,2.5", "South,80,14,"),
                                    "strata.csv: row 3, column 'gsd': incomplete exposure"),
    "no cases at all": (WITH_BURDEN, "stratum,cases\nA,0\nB,0\n",
                        "strata.csv: column 'cases': every stratum has 0 cases"),
    "unit without molecular weight": (
        ANALYSIS.replace('model = "log-linear"', 'model = "log-linear"\nunit = "ppm"'), STRATA,
        "analysis.toml: [curve] key 'unit': converting 'ppm' to 'ug/m3' needs the molecular "
        "weight"),
    "substitution without non-detects": (
        ANALYSIS.replace('family = "lognormal"', 'family = "lognormal"\nsubstitution = [0.5]'),
        STRATA, "analysis.toml: [exposure] key 'substitution': "),
    "shape with a negative gamma": (
        ANALYSIS.replace('table = "bands.csv"\nmodel = "log-linear"',
                         'model = "saturating-exponential"\nalpha = 1\ngamma = -0.1\n'
                         'delta = 1'), STRATA,
        "analysis.toml: [curve] key 'gamma': gamma must be above 0"),
}


@pytest.mark.parametrize("case", sorted(BAD_RUNS))
def test_more_bad_input_exits_2_and_writes_nothing(tmp_path, capsys, case):
    analysis, strata, expected = BAD_RUNS[case]
    path = write_case(tmp_path / "case", analysis)
    (tmp_path / "case" / "strata.csv").write_text(strata)
    out_dir = tmp_path / "out"
    code, out, err = _run(["run", path, "--out", out_dir], capsys)
    assert code == 2 and out == ""
    assert err.startswith("doseattr: error: ") and err.count("\n") == 1 and expected in err
    assert not out_dir.exists()


def test_many_draws_accepted_with_the_override():
    """allow_many_draws = true lifts the maximum (checked when the file is
    read; the run itself is not made here)."""
    from doseattr.analysis.config import analysis_from_dict

    a = analysis_from_dict({"unit": "ppm", "curve": {"model": "linear", "err": 0.1},
                            "exposure": {"gm": 5.0, "gsd": 2.0},
                            "uncertainty": {"draws": 200_000, "allow_many_draws": True}})
    assert a.uncertainty.draws == 200_000


def test_analysis_file_changed_during_the_run_is_refused(tmp_path, capsys, monkeypatch):
    """The analysis file rewritten while the run computes (its bytes' hash
    and its stat signature change; a table edited is in
    test_outputs_folder.py) stops the run before writing: exit 2, one
    line, no folder."""
    from doseattr.analysis import pipeline

    path = write_case(tmp_path / "case")
    real = pipeline.run_analysis

    def run_and_edit(analysis, **kw):
        results = real(analysis, **kw)
        path.write_text(path.read_text() + "\n# edited\n")
        return results

    monkeypatch.setattr(pipeline, "run_analysis", run_and_edit)
    out_dir = tmp_path / "out"
    code, _, err = _run(["run", path, "--out", out_dir, "--quiet"], capsys)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "changed while the run was computing" in lines[0]
    assert not out_dir.exists()
