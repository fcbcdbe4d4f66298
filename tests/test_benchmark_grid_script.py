"""scripts/benchmark_grid.py at a tiny size (200 x 300 cells, 9 zones,
64-row bands and tiles, 48-cell windows that split neither evenly): the
rasters read back as its docstrings define them (recomputed here with
numpy), the bare pass's per-zone sums equal numpy's over the whole arrays,
and the fallback analysis's reduction and population PAF agree with numpy
over the cells, as does the full analysis's (``doseattr run``). No timing
is checked."""

from __future__ import annotations

import importlib.util
import math
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest

rasterio = pytest.importorskip("rasterio")

SCRIPT = Path(__file__).resolve().parents[1] / "scripts" / "benchmark_grid.py"
ROWS, COLS, ZONES, TILE, WINDOW = 200, 300, 9, 64, 48


def load_script():
    spec = importlib.util.spec_from_file_location("benchmark_grid", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("benchmark_grid", module)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def grid(tmp_path_factory):
    bg = load_script()
    folder = tmp_path_factory.mktemp("grid")
    layout = bg.Layout(ROWS, COLS, ZONES, tile=TILE)
    bg.write_rasters(layout, folder)
    names = bg.write_tables(layout, folder)
    bg.write_analysis(folder, WINDOW, 100)
    read = {}
    for key, name in bg.FILES.items():
        with rasterio.open(folder / name) as src:
            assert src.block_shapes == [(TILE, TILE)] and src.compression is None
            read[key] = src.read(1)
            read[key + "_nodata"] = src.nodata
    return bg, folder, layout, names, read


def expected_arrays(seed):
    """The generator's definition written out again in float64: zone
    ``1 + 3 (3 row // 200) + 3 col // 300``; concentration ``(12 + 8 sin(3 pi
    u) cos(2 pi v) + 6 v) exp(0.4 Z - 0.08)`` with ``u, v`` the cell centres
    over the width and height; population ``exp(Z' - 0.5)``, 0 where the
    uniform is below 0.15 and -9999 where it is above 0.98; per band of 64
    rows, Z, Z', U from ``default_rng([seed, band])`` in that order."""
    r = np.arange(ROWS)[:, None]
    c = np.arange(COLS)[None, :]
    zone = (3 * r // ROWS) * 3 + 3 * c // COLS + 1 + 0 * (r + c)
    u, v = (c + 0.5) / COLS, (r + 0.5) / ROWS
    field = 12 + 8 * np.sin(3 * np.pi * u) * np.cos(2 * np.pi * v) + 6 * v
    z1, z2, uni = [], [], []
    for b in range(math.ceil(ROWS / TILE)):
        h = min(ROWS, (b + 1) * TILE) - b * TILE
        rng = np.random.default_rng([seed, b])
        z1.append(rng.standard_normal((h, COLS), dtype=np.float32))
        z2.append(rng.standard_normal((h, COLS), dtype=np.float32))
        uni.append(rng.random((h, COLS), dtype=np.float32))
    z1, z2, uni = (np.vstack(a).astype(np.float64) for a in (z1, z2, uni))
    conc = field * np.exp(0.4 * z1 - 0.08)
    pop = np.exp(z2 - 0.5)
    pop[uni < 0.15] = 0.0
    pop[uni > 0.98] = -9999.0
    return conc, pop, zone


def test_rasters_read_back_as_defined(grid):
    """Source: the generator's documented formulas recomputed with numpy
    (float64 against the float32 files, so within float32 rounding)."""
    bg, _, _, _, read = grid
    conc, pop, zone = expected_arrays(bg.SEED)
    np.testing.assert_array_equal(read["zones"], zone)
    assert read["zones"].dtype == np.int32 and read["concentration"].dtype == np.float32
    np.testing.assert_allclose(read["concentration"], conc, rtol=1e-5)
    np.testing.assert_array_equal(read["population"] == -9999.0, pop == -9999.0)
    np.testing.assert_array_equal(read["population"] == 0.0, pop == 0.0)
    np.testing.assert_allclose(read["population"], pop, rtol=1e-5)
    assert read["population_nodata"] == -9999.0
    # the 3 x 3 chessboard: rows 0-66, 67-133, 134-199 and columns of 100 (closed form)
    assert [int((zone == k).sum()) for k in (1, 5, 9)] == [67 * 100, 67 * 100, 66 * 100]


def test_bare_pass_equals_numpy_over_the_whole_arrays(grid):
    """Source: numpy.bincount over the arrays read at once (the pass reads
    48 x 48 windows; sums differ by float64 rounding only)."""
    bg, folder, _, _, read = grid
    dose, people, cells = bg.bare_pass(folder, WINDOW, ZONES)
    pop = np.where(read["population"] == -9999.0, 0.0, read["population"]).astype(np.float32)
    z = read["zones"].ravel()
    want_dose = np.bincount(z, weights=(pop * read["concentration"]).ravel(), minlength=10)
    want_people = np.bincount(z, weights=pop.ravel(), minlength=10)
    np.testing.assert_allclose(dose, want_dose, rtol=1e-12)
    np.testing.assert_allclose(people, want_people, rtol=1e-12)
    assert cells == ROWS * COLS and dose[0] == 0.0


def test_tables_and_analysis_file_read_as_written(grid):
    """Source: the readers of doseattr on the written CSVs; cases =
    population x rate / 100000 (common practice)."""
    from doseattr.analysis.burden_table import read_burden
    from doseattr.analysis.grid_inputs import read_zone_names

    _, folder, _, names, _ = grid
    assert read_zone_names(str(folder / "zone_names.csv")) == dict(enumerate(names, start=1))
    burden = read_burden(folder / "burden.csv")
    assert burden.strata == tuple(names)
    np.testing.assert_allclose(burden.cases, burden.population * burden.rates / 1e5,
                               rtol=1e-12)
    toml = tomllib.loads((folder / "analysis.toml").read_text(encoding="utf-8"))
    assert toml["grid"]["chunk"] == WINDOW and toml["uncertainty"]["draws"] == 100


def test_fallback_reduction_and_paf_against_numpy(grid):
    """Source: numpy over the cells: each zone's population and
    population-weighted mean (exact from the moments), and the population's
    PAF of the log-linear curve, b = ln(1.08)/10, e = sum p expm1(b x) /
    sum p, PAF = e / (1 + e) (closed form derived here), within the 1e-6
    bound of the binned reduction (doseattr/core/exposure/grid.py)."""
    bg, folder, _, names, read = grid
    out = bg.fallback(folder, folder / "analysis.toml", 50)
    assert out["mode"].startswith("FALLBACK") or out["mode"].startswith("full")
    ok = read["population"] != -9999.0
    x = read["concentration"][ok].astype(np.float64)
    p = read["population"][ok].astype(np.float64)
    e = np.sum(p * np.expm1(math.log(1.08) / 10 * x)) / p.sum()
    assert abs(out["check"]["population_paf"] / (e / (1 + e)) - 1) < 1e-6
    assert out["check"]["strata"] == len(names) + 1
    z = read["zones"][ok]
    for k in range(ZONES):
        m = z == k + 1
        np.testing.assert_allclose(out["zones"]["population"][k], p[m].sum(), rtol=1e-12)
        np.testing.assert_allclose(out["zones"]["mean"][k], np.average(x[m], weights=p[m]),
                                   rtol=1e-12)
    assert f"grid: {int((~ok).sum())} cells skipped as nodata, holding a population of 0" \
        in out["notes"]


def test_full_analysis_paf_against_numpy(grid, tmp_path):
    """Source: the closed form of the test above (numpy over the cells), for
    ``doseattr run`` on the benchmark's analysis file (draws = 100); the
    timing wrappers leave the wrapped functions as they were."""
    from doseattr.analysis import pipeline

    bg, folder, _, _, read = grid
    before = pipeline.run_analysis
    out = bg.full_analysis(folder / "analysis.toml", tmp_path / "out")
    if out is None:
        pytest.skip("this version refuses [grid]")
    assert pipeline.run_analysis is before
    ok = read["population"] != -9999.0
    x = read["concentration"][ok].astype(np.float64)
    p = read["population"][ok].astype(np.float64)
    e = np.sum(p * np.expm1(math.log(1.08) / 10 * x)) / p.sum()
    assert abs(out["check"]["paf"]["estimate"] / (e / (1 + e)) - 1) < 1e-6
    assert out["parts"]["reduce_grid (dask pass)"] > 0
