"""``doseattr run/demo --profile``: stage timings on standard error, the
outputs unchanged; and the command line's start-up imports nothing heavy."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from doseattr import cli
from doseattr.analysis.progress import progress_bar, stage_listener
from doseattr.cli import StageClock, main

ROOT = Path(__file__).resolve().parent.parent
STAGES = ("start-up (imports)", "reading and checks", "fitting and other computing",
          "Monte Carlo draws", "report and files", "figures", "total")


def test_cli_import_loads_no_heavy_library():
    # a fresh interpreter: what `doseattr --help` pays before parsing
    code = ("import doseattr.cli, sys; print(sorted(m for m in "
            "('numpy','scipy','matplotlib','statsmodels','pandas','dask') if m in sys.modules))")
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                          text=True, check=True)
    assert done.stdout.strip() == "[]"


def test_clock_adds_up_stages_entered_twice(monkeypatch):
    # a fake clock: wall ticks 1 s, CPU 0.5 s per reading, so each stage
    # gets (closed form) 1 s wall and 0.5 s CPU per time it is open
    ticks = iter(range(100))
    readings: list[float] = []

    def wall() -> float:
        readings.append(float(next(ticks)))
        return readings[-1]

    monkeypatch.setattr(cli.time, "perf_counter", wall)
    monkeypatch.setattr(cli.time, "process_time", lambda: readings[-1] / 2)
    clock = StageClock()
    for stage in ("a", "b", "a"):
        clock.enter(stage)
    clock.stop()
    assert clock.wall == {"a": 2.0, "b": 1.0}
    assert clock.cpu == {"a": 1.0, "b": 0.5}
    lines = clock.lines()
    assert [line.split()[2] for line in lines] == ["a", "b", "total"]
    assert "3.000 s wall" in lines[-1] and "1.500 s CPU" in lines[-1]


def test_progress_bar_tells_listeners_even_when_hidden():
    heard: list[str] = []
    with stage_listener(heard.append), progress_bar(10, False, stage="draws") as tick:
        assert tick is None
    with progress_bar(10, False):  # the listener is gone
        pass
    assert heard == ["draws", ""]


@pytest.mark.slow  # two demo runs with figures
def test_profile_prints_stages_and_changes_no_output(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "plain"), "--quiet"]) == 0
    assert "profile" not in capsys.readouterr().err
    assert main(["demo", "--out", str(tmp_path / "timed"), "--quiet", "--profile"]) == 0
    err = capsys.readouterr().err
    shown = [line.removeprefix("doseattr: profile: ").split("  ")[0]
             for line in err.splitlines() if line.startswith("doseattr: profile: ")]
    assert shown == list(STAGES)
    plain, timed = (json.loads((tmp_path / d / "results.json").read_text())
                    for d in ("plain", "timed"))
    # provenance records the command line, --profile and --out included
    assert timed["provenance"].pop("command")[-1] == "--profile"
    plain["provenance"].pop("command")
    assert timed == plain
    for name in ("summary.txt", "report.html"):
        text = (tmp_path / "timed" / name).read_text()
        text = text.replace(str(tmp_path / "timed"), str(tmp_path / "plain"))
        assert text.replace(" --profile", "") == (tmp_path / "plain" / name).read_text()
