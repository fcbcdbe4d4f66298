"""scripts/benchmark_stages.py at a tiny size: the tables read back as its
docstrings define them (recomputed here with numpy from the same seeds),
and both analyses load and check as ``doseattr check`` would. No timing
is checked and no benchmark is run."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np

from doseattr.analysis.check import check_analysis
from doseattr.analysis.config import load_analysis

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "benchmark_stages.py"


def load_script():
    spec = importlib.util.spec_from_file_location("benchmark_stages", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("benchmark_stages", module)
    spec.loader.exec_module(module)
    return module


def _rows(path: Path) -> list[list[str]]:
    lines = [s for s in path.read_text().splitlines() if s and not s.startswith("#")]
    return [s.split(",") for s in lines[1:]]


def test_measurements_are_the_documented_draws(tmp_path):
    bs = load_script()
    n = bs.BLOCK + 1_000  # two blocks
    bs.write_measurements(tmp_path, n)
    rows = _rows(tmp_path / "measurements.csv")
    assert len(rows) == n
    values = np.array([float(r[0]) for r in rows])
    weights = np.array([int(r[1]) for r in rows])
    expected_v, expected_w = [], []
    for b, start in enumerate(range(0, n, bs.BLOCK)):  # the docstring's definition
        rng = np.random.default_rng([bs.SEED, b])
        size = min(bs.BLOCK, n - start)
        expected_v.append(np.round(bs.GM * np.exp(np.log(bs.GSD) * rng.standard_normal(size)), 2))
        expected_w.append(rng.integers(1, 21, size))
    np.testing.assert_allclose(values, np.concatenate(expected_v), atol=5e-3)
    np.testing.assert_array_equal(weights, np.concatenate(expected_w))
    assert np.unique(values).size < n / 2  # repeated values, as the benchmark intends


def test_both_analyses_check(tmp_path):
    bs = load_script()
    emp = bs.write_empirical(tmp_path / "e", 500, 100)
    lines = check_analysis(load_analysis(emp))
    assert any(s.startswith("exposure: empirical, the 500 measurements") for s in lines)
    bur = bs.write_burden(tmp_path / "b", 12, 100)
    lines = check_analysis(load_analysis(bur))
    assert any(s.startswith("burden: 12 strata") and "(12 with their own exposure)" in s
               for s in lines)
    rows = _rows(tmp_path / "b" / "districts.csv")
    gsd = np.array([float(r[4]) for r in rows])
    assert len(rows) == 12 and np.all((gsd >= 1.3) & (gsd <= 2.2))
