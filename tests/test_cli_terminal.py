"""What the terminal shows (issue 16 item 5): a progress bar that counts
the draws the analysis asked for, with its stage; warnings on standard
error as they arise; curve figures over the exposure range; CSV headers
without a column twice.

The expected bar total is the ``draws`` of the analysis file (the
definition of a draw); the figure's axis is checked against the exposure
distribution's 99th percentile computed with scipy.stats.lognorm.
"""

from __future__ import annotations

import csv
import io
import math
import re
from pathlib import Path
from typing import ClassVar

import numpy as np
import pytest
from scipy import stats

from doseattr.analysis.config import analysis_from_dict, load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.analysis.progress import progress_bar, show_stage
from doseattr.cli import main

ROOT = Path(__file__).resolve().parent.parent


class FakeBar:
    """Stands in for tqdm: records each bar's total, label and updates."""

    bars: ClassVar[list[FakeBar]] = []

    def __init__(self, total, desc, **_kwargs):
        self.total, self.desc, self.done = total, desc, 0
        FakeBar.bars.append(self)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def update(self, k):
        self.done += k


@pytest.fixture
def fake_tqdm(monkeypatch):
    FakeBar.bars = []
    monkeypatch.setattr("tqdm.tqdm", FakeBar)
    return FakeBar.bars


def test_the_bar_counts_draws_not_draws_times_strata(tmp_path, fake_tqdm):
    """The demo: 4 districts, 3 scenarios; the issue saw 2,040,000 "draws"
    for 20,000. With draws = 300 the main bar runs to 300, and each bar ends
    full (total reached exactly)."""
    text = (ROOT / "data_demo" / "analysis.toml").read_text().replace("draws = 1000",
                                                                      "draws = 300")
    for f in (ROOT / "data_demo").glob("*.csv"):
        (tmp_path / f.name).write_bytes(f.read_bytes())
    (tmp_path / "analysis.toml").write_text(text)
    run_analysis(load_analysis(tmp_path / "analysis.toml"), progress=True)
    main_bar = fake_tqdm[0]
    assert main_bar.desc == "draws" and main_bar.total == 300
    for bar in fake_tqdm:
        assert bar.done == bar.total, bar.desc
    widths = [b for b in fake_tqdm if b.desc.startswith("draws, one source")]
    assert widths
    for b in widths:  # "(k x 300)": k sources varied alone, 300 draws each
        k = int(re.search(r"\((\d+) x 300\)", b.desc).group(1))
        assert b.total == k * 300


def test_the_bar_rescales_uneven_ticks(fake_tqdm):
    """5 exposures x 2 fractions of 70 draws each: 700 units shown as 70 draws."""
    with progress_bar(700, True, draws=70) as tick:
        for _ in range(10):
            tick(70)
    (bar,) = fake_tqdm
    assert bar.total == 70 and bar.done == 70


def test_no_bar_without_progress(fake_tqdm):
    with progress_bar(10, False) as tick:
        assert tick is None
    assert fake_tqdm == []


class Tty(io.StringIO):
    def isatty(self):
        return True


@pytest.mark.parametrize("stage", ["fitting", "draws", "figures", "report"])
def test_the_stage_line_on_a_terminal(monkeypatch, stage):
    out = Tty()
    monkeypatch.setattr("sys.stderr", out)
    show_stage(stage, True)
    show_stage("", True)
    assert out.getvalue() == f"\rdoseattr: {stage} ...\x1b[K\r\x1b[K"


def test_no_stage_line_off_a_terminal_or_when_quiet(monkeypatch):
    out = io.StringIO()
    monkeypatch.setattr("sys.stderr", out)
    show_stage("fitting", True)
    monkeypatch.setattr("sys.stderr", Tty())
    show_stage("fitting", False)
    assert out.getvalue() == ""


def test_the_writer_announces_figures_then_report(tmp_path):
    from doseattr.outputs.write import write_outputs

    d = {"unit": "ug/m3", "curve": {"model": "log-linear", "rr": 1.1, "per": 10,
                                    "ci": [1.05, 1.15], "max_dose": 50},
         "exposure": {"gm": 8.0, "gsd": 2.0}}
    stages: list[str] = []
    write_outputs(run_analysis(analysis_from_dict(d)), tmp_path / "o", stage=stages.append)
    assert stages == ["figures", "report"]


SAMPLES = "value\n" + "\n".join(f"{v:.4g}" for v in
                                np.exp(np.random.default_rng(3).normal(-1.0, 0.9, 20)))


def test_warnings_are_printed_as_they_arise(tmp_path, capsys, monkeypatch):
    """Before the outputs are written (not at the end), unless --quiet."""
    import doseattr.outputs.write as write

    (tmp_path / "s.csv").write_text(SAMPLES)
    (tmp_path / "a.toml").write_text('unit = "mg/m3"\n[curve]\nmodel = "linear"\nerr = 0.05\n'
                                     'per = 1\nci = [0.01, 0.09]\n[exposure]\ntable = "s.csv"\n'
                                     "[limit]\nvalue = 0.5\n")
    seen = {}
    real = write.write_outputs

    def spy(*args, **kwargs):
        seen["err"] = capsys.readouterr().err
        return real(*args, **kwargs)

    monkeypatch.setattr(write, "write_outputs", spy)
    assert main(["run", str(tmp_path / "a.toml"), "--out", str(tmp_path / "o")]) == 0
    before = [line for line in seen["err"].splitlines() if line.startswith("doseattr: warning")]
    assert before, "no warning on standard error before the outputs were written"
    after = capsys.readouterr().err
    assert "doseattr: warning" not in after  # each once
    monkeypatch.setattr(write, "write_outputs", spy)
    assert main(["run", str(tmp_path / "a.toml"), "--out", str(tmp_path / "o"), "--quiet"]) == 0
    assert "doseattr: warning" not in seen["err"]  # --quiet: at the end only
    assert capsys.readouterr().err.splitlines() == before


def test_outcome_curves_span_the_exposure_range():
    """Two published curves without max_dose: the dose axis reaches the
    exposure's 99th percentile (scipy.stats.lognorm), not 0 to 1."""
    from doseattr.outputs import gallery

    gm, gsd = 30.0, 1.8
    curve = {"model": "linear", "err": 0.05, "per": 10, "ci": [0.02, 0.08]}
    d = {"unit": "ug/m3", "exposure": {"gm": gm, "gsd": gsd},
         "outcome": [{"name": "a", "curve": curve},
                     {"name": "b", "curve": {**curve, "err": 0.1, "ci": [0.05, 0.15]}}]}
    r = run_analysis(analysis_from_dict(d))
    p99 = stats.lognorm(s=math.log(gsd), scale=gm).ppf(0.99)
    for name in ("outcome_curves", "curve"):
        maker = {"outcome_curves": lambda: gallery._outcome_curves(
                     r.outcomes, r.unit, r.exposure_section.exposure),
                 "curve": lambda: gallery._curve(r.curve_section, r.exposure_section.exposure,
                                                 r.unit)}[name]
        figure = maker()
        assert min(ax.get_xlim()[1] for ax in figure.axes if ax.has_data()) >= p99, name


# -- CSV headers ---------------------------------------------------------------------------
def _headers(out: Path) -> dict[str, list[str]]:
    found = {}
    for path in sorted(out.rglob("*.csv")):
        if "inputs" in path.relative_to(out).parts:
            continue  # the demo's own tables, copied
        with path.open(newline="") as f:
            found[str(path.relative_to(out))] = next(csv.reader(f))
    return found


@pytest.fixture(scope="module")
def csv_runs(tmp_path_factory):
    """The demo (burden table, scenarios, substitution), a grid-free burden
    run (the districts template), a limit run with workers (the workplace
    template) and a model comparison."""
    base = tmp_path_factory.mktemp("csv")
    outs = [base / "demo"]
    assert main(["demo", "--out", str(outs[0]), "--quiet"]) == 0
    for kind in ("districts", "workplace"):
        assert main(["init", kind, str(base / kind)]) == 0
        outs.append(base / f"out-{kind}")
        assert main(["run", str(base / kind / "analysis.toml"), "--out", str(outs[-1]),
                     "--quiet"]) == 0
    text = (ROOT / "data_demo" / "analysis.toml").read_text().replace(
        'model = "log-linear"', 'model = "log-linear"\ncompare_models = ["linear", "spline"]')
    (base / "cmp").mkdir()
    for f in (ROOT / "data_demo").glob("*.csv"):
        (base / "cmp" / f.name).write_bytes(f.read_bytes())
    (base / "cmp" / "analysis.toml").write_text(text)
    outs.append(base / "out-cmp")
    assert main(["run", str(base / "cmp" / "analysis.toml"), "--out", str(outs[-1]),
                 "--quiet"]) == 0
    return outs


def test_no_csv_has_a_column_twice(csv_runs):
    seen = set()
    for out in csv_runs:
        for name, header in _headers(out).items():
            twice = {h for h in header if header.count(h) > 1}
            assert not twice, f"{out.name}/{name}: {sorted(twice)}"
            seen.add(Path(name).name)
    # the runs reach the tables the check is for
    assert {"model_comparison.csv", "burden.csv", "limit.csv", "limit_workers.csv"} <= seen, seen
