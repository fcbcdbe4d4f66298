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
    assert code == 2 and err == f"doseattr: error: {tmp_path / 'nope.toml'}: analysis file not found\n"
    assert not (tmp_path / "o").exists()


def test_usage_error_exits_2(capsys):
    with pytest.raises(SystemExit) as info:
        main(["run"])
    assert info.value.code == 2


def test_demo_runs_end_to_end(tmp_path, capsys):
    out_dir = tmp_path / "demo"
    code, out, err = _run(["demo", "--out", out_dir], capsys)
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
