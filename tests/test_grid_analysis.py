"""A ``[grid]`` analysis end to end: rasters (or a cell table) and a burden
table by zone give each zone's attributable cases, checked against the
exact per-cell computation done here in numpy from the cells themselves
(the definition PAF = 1 - sum p / sum p RR_m(x) over the cells; Murray et
al. 2003 for the form, from memory), and the errors a user can make.

The cells are invented: each zone's concentrations are a lognormal sample
of a GM and GSD chosen here, the population uniform.
"""

from __future__ import annotations

import dataclasses
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("rioxarray")
import xarray as xr

from doseattr.analysis.config import analysis_from_dict, load_analysis, with_scheduler
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

sys.path.insert(0, str(Path(__file__).parent))
from schema_check import problems

NY, NX = 24, 30  # 720 cells, 4 zones of 12 x 15
ZONES = {11: ("Harbour", 6.0, 1.6), 12: ("Hills", 9.0, 1.8), 21: ("Mill", 14.0, 1.5),
         22: ("Ridge", 4.0, 2.0)}  # id: (name, GM, GSD), invented
NODATA = -9999.0
BETA = math.log(1.07) / 10.0  # log-linear, RR 1.07 per 10 (invented)
M = 2.5  # minimum-risk level (invented)


def _cells(seed: int = 5):
    rng = np.random.default_rng(seed)
    zone = np.empty((NY, NX), dtype=np.int32)
    ids = list(ZONES)
    for k, z in enumerate(ids):
        zone[(k // 2) * 12:(k // 2 + 1) * 12, (k % 2) * 15:(k % 2 + 1) * 15] = z
    gm = np.vectorize(lambda z: ZONES[z][1])(zone)
    gsd = np.vectorize(lambda z: ZONES[z][2])(zone)
    conc = gm * np.exp(np.log(gsd) * rng.standard_normal((NY, NX)))
    pop = rng.uniform(5.0, 150.0, (NY, NX))
    conc_nd = np.zeros((NY, NX), bool)
    conc_nd[3, 4] = conc_nd[20, 25] = True
    pop_nd = np.zeros((NY, NX), bool)
    pop_nd[0, 0] = True
    return conc, pop, zone, conc_nd, pop_nd


def _raster(values, path, nodata, dtype=None, x0=4.0e6):
    y = 3.0e6 - 100.0 * (np.arange(values.shape[0]) + 0.5)
    x = x0 + 100.0 * (np.arange(values.shape[1]) + 0.5)
    da = xr.DataArray(values if dtype is None else values.astype(dtype), dims=("y", "x"),
                      coords={"y": y, "x": x})
    da.rio.write_crs("EPSG:3035").rio.write_nodata(nodata).rio.to_raster(path)
    return path.name


BURDEN = {11: (21000, 820.0), 12: (26000, 760.0), 21: (24000, 910.0), 22: (19000, 640.0)}


def _write(folder: Path, *, table: bool = False, burden_rows=None, extra: str = "",
           grid_extra: str = "", method: str = "paf") -> Path:
    conc, pop, zone, conc_nd, pop_nd = _cells()
    rows = burden_rows if burden_rows is not None else [
        f"{ZONES[z][0]},{p},{r}" for z, (p, r) in BURDEN.items()]
    (folder / "burden.csv").write_text("stratum,population,rate\n" + "\n".join(rows) + "\n")
    (folder / "names.csv").write_text("zone,name\n" + "\n".join(
        f"{z},{v[0]}" for z, v in ZONES.items()) + "\n")
    if table:
        c = np.where(conc_nd, np.nan, conc).ravel()
        p = np.where(pop_nd, np.nan, pop).ravel()
        text = "value,population,zone\n" + "\n".join(
            f"{'' if np.isnan(a) else repr(float(a))},{'' if np.isnan(b) else repr(float(b))},"
            f"{int(z)}" for a, b, z in zip(c, p, zone.ravel(), strict=True))
        (folder / "cells.csv").write_text(text + "\n")
        grid = 'cells = "cells.csv"\nzone_names = "names.csv"'
    else:
        _raster(np.where(conc_nd, NODATA, conc), folder / "conc.tif", NODATA)
        _raster(np.where(pop_nd, NODATA, pop), folder / "pop.tif", NODATA)
        _raster(zone, folder / "zones.tif", -1, dtype=np.int32)
        grid = ('concentration = "conc.tif"\npopulation = "pop.tif"\nzones = "zones.tif"\n'
                'zone_names = "names.csv"\nchunk = 10')
    path = folder / "a.toml"
    path.write_text(f'''unit = "ug/m3"
title = "Invented grid"

[curve]
model = "log-linear"
rr = 1.07
per = 10
ci = [1.05, 1.09]

[grid]
{grid}
{grid_extra}

[burden]
table = "burden.csv"
method = "{method}"

[attribution]
minimum_risk = {M}

[[scenario]]
name = "Ten percent less"
scale = 0.9

[[scenario]]
name = "Cap at 8"
cap = 8
{extra}''')
    return path


def _exact(conc, pop, zone, conc_nd, pop_nd, z, transform=lambda x: x):
    """Exact per-cell E[RR_m] of zone ``z`` (cells valid in both layers)."""
    keep = (zone == z) & ~conc_nd & ~pop_nd
    x, p = transform(conc[keep]), pop[keep]
    rr = np.exp(BETA * (np.maximum(x, M) - M))
    return float(np.sum(p * rr) / np.sum(p))


@pytest.fixture(scope="module")
def raster_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("grid_run")
    path = _write(folder, extra="\n[uncertainty]\ndraws = 300\nseed = 4\n")
    return path, run_analysis(load_analysis(path))


def test_zone_fractions_equal_the_exact_per_cell_computation(raster_run):
    """Reduced path against the exact per-cell sum: PAF and the PIF of a
    10% reduction within 1e-6 relative (the issue's bound), attributable =
    cases x PAF; the cap's PIF (a kink inside one bin: first-order term,
    stated in DEVELOPERS.md) within 2e-5."""
    _, r = raster_run
    cells = _cells()
    by_name = {s.stratum: s for s in r.burden.strata}
    for z, (name, _, _) in ZONES.items():
        e0 = _exact(*cells, z)
        paf = 1.0 - 1.0 / e0
        row = by_name[name]
        assert row.paf.estimate == pytest.approx(paf, rel=1e-6)
        cases = BURDEN[z][0] * BURDEN[z][1] / 1e5
        assert row.cases == pytest.approx(cases, rel=1e-12)
        assert row.attributable.estimate == pytest.approx(cases * paf, rel=1e-6)
        pifs = {e.name: e.averted.estimate / row.cases for e in row.scenarios}
        scaled = _exact(*cells, z, transform=lambda x: 0.9 * x)
        assert pifs["Ten percent less"] == pytest.approx(1.0 - scaled / e0, rel=1e-6)
        capped = _exact(*cells, z, transform=lambda x: np.minimum(x, 8.0))
        assert pifs["Cap at 8"] == pytest.approx(1.0 - capped / e0, rel=1e-6)


def test_population_paf_pools_every_cell(raster_run):
    """The headline PAF is over every valid cell of the grid (exact sum)."""
    _, r = raster_run
    conc, pop, _zone, conc_nd, pop_nd = _cells()
    keep = ~conc_nd & ~pop_nd
    rr = np.exp(BETA * (np.maximum(conc[keep], M) - M))
    expected = 1.0 - np.sum(pop[keep]) / np.sum(pop[keep] * rr)
    assert r.attribution.paf.estimate == pytest.approx(expected, rel=1e-6)


def test_grid_record_and_nodata(raster_run):
    """Zone populations and means against numpy; the three nodata cells are
    counted (their population only where the population is valid)."""
    _, r = raster_run
    conc, pop, zone, conc_nd, pop_nd = _cells()
    g = r.grid
    assert g.cells == NY * NX and g.skipped_cells == 3
    assert g.skipped_population == pytest.approx(pop[3, 4] + pop[20, 25], rel=1e-12)
    assert g.zone_ids == tuple(ZONES) and g.zone_names == tuple(v[0] for v in ZONES.values())
    for k, z in enumerate(ZONES):
        keep = (zone == z) & ~conc_nd & ~pop_nd
        assert g.zone_population[k] == pytest.approx(pop[keep].sum(), rel=1e-12)
        assert g.zone_mean[k] == pytest.approx(np.average(conc[keep], weights=pop[keep]),
                                               rel=1e-12)
    assert any("3 cells skipped as nodata" in n for n in r.notes)
    assert any("not resampled" in n for n in r.notes)  # no bootstrap of a census


@pytest.mark.parametrize("method", ["paf", "impact-function"])
def test_map_cells_add_up_to_each_zone(tmp_path, method):
    """Every cell is shown (a small grid: step 1), and population x
    attributable per 1,000 / 1,000 summed over a zone's cells is the zone's
    attributable cases (identity derived in doseattr/analysis/grid_maps.py)."""
    r = run_analysis(load_analysis(_write(tmp_path, method=method)))
    maps = r.grid.maps
    assert maps.step == 1 and maps.concentration.shape == (NY, NX)
    _conc, pop, zone, conc_nd, pop_nd = _cells()
    np.testing.assert_array_equal(np.isnan(maps.concentration), conc_nd)
    by_name = {s.stratum: s for s in r.burden.strata}
    for z, (name, _, _) in ZONES.items():
        keep = (zone == z) & ~conc_nd & ~pop_nd
        total = np.sum(pop[keep] * maps.attributable_per_1000[keep]) / 1000.0
        assert total == pytest.approx(by_name[name].attributable.estimate, rel=1e-6)
    assert maps.extent == pytest.approx((4.0e6, 4.0e6 + 100 * NX, 3.0e6 - 100 * NY, 3.0e6))


def test_a_cell_table_equals_the_rasters(tmp_path, raster_run):
    """The same cells as a CSV table: identical point estimates and intervals
    (same seeds), and no maps (a table has no geometry)."""
    _, r = raster_run
    t = run_analysis(load_analysis(_write(tmp_path, table=True,
                                          extra="\n[uncertainty]\ndraws = 300\nseed = 4\n")))
    for a, b in zip(r.burden.strata, t.burden.strata, strict=True):
        assert a.stratum == b.stratum
        for x, y in ((a.attributable, b.attributable), (a.paf, b.paf)):
            assert (y.estimate, y.lower, y.upper) == pytest.approx(
                (x.estimate, x.lower, x.upper), rel=1e-12)
    assert t.grid.maps is None and t.grid.zone_mean == pytest.approx(r.grid.zone_mean)


def test_exposure_model_error_gives_the_closed_form_interval(tmp_path):
    """A linear ERR curve entered without uncertainty and one lognormal
    error factor f per draw: PAF(f) = b f xbar / (1 + b f xbar) is monotone
    in f, so its 2.5th and 97.5th percentiles are PAF at f = exp(ln(g) z),
    z = -/+1.959964 (closed form derived here; 4000 draws, so 2% tolerance)."""
    path = _write(tmp_path, grid_extra="error_gsd = 1.5",
                  extra="\n[uncertainty]\ndraws = 4000\n")
    text = path.read_text().replace(
        'model = "log-linear"\nrr = 1.07\nper = 10\nci = [1.05, 1.09]',
        'model = "linear"\nerr = 0.01').replace(f"minimum_risk = {M}", "minimum_risk = 0")
    path.write_text(text)
    r = run_analysis(load_analysis(path))
    conc, pop, _zone, conc_nd, pop_nd = _cells()
    keep = ~conc_nd & ~pop_nd
    xbar = np.average(conc[keep], weights=pop[keep])
    lo, hi = (0.01 * xbar * math.exp(math.log(1.5) * z) for z in (-1.959964, 1.959964))
    paf = r.attribution.paf
    assert paf.estimate == pytest.approx(0.01 * xbar / (1 + 0.01 * xbar), rel=1e-9)
    assert paf.lower == pytest.approx(lo / (1 + lo), rel=0.02)
    assert paf.upper == pytest.approx(hi / (1 + hi), rel=0.02)
    assert any("exposure-model error with GSD 1.5" in n for n in r.notes)


def test_local_cluster_equals_local_threads(tmp_path, raster_run):
    """The analysis on a dask.distributed LocalCluster (loopback, in-process
    worker), named by its address, gives the local run's numbers."""
    distributed = pytest.importorskip("distributed")
    path, local = raster_run
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  protocol="tcp", host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        remote = run_analysis(with_scheduler(load_analysis(path), cluster.scheduler_address))
    assert remote.grid.scheduler == cluster.scheduler_address
    for a, b in zip(local.burden.strata, remote.burden.strata, strict=True):
        assert (b.attributable.estimate, b.attributable.lower, b.attributable.upper) == \
            pytest.approx((a.attributable.estimate, a.attributable.lower,
                           a.attributable.upper), rel=1e-12)


def _cli(*args: str) -> subprocess.CompletedProcess:
    """The command line in a process of its own (as a user runs it)."""
    return subprocess.run([sys.executable, "-m", "doseattr", *args], capture_output=True,
                          text=True, check=False)


def test_the_command_line_writes_the_grid(tmp_path):
    path = _write(tmp_path)
    out = tmp_path / "out"
    done = _cli("run", str(path), "--out", str(out), "--quiet")
    assert done.returncode == 0, done.stderr
    document = json.loads((out / "results.json").read_text())
    grid = document["grid"]
    assert [z["name"] for z in grid["zones"]] == [v[0] for v in ZONES.values()]
    assert [z["stratum"] for z in grid["zones"]] == [v[0] for v in ZONES.values()]
    assert grid["skipped_cells"] == 3
    schema = json.loads((Path(__file__).parents[1] / "doseattr" / "results" /
                         "results.schema.json").read_text())
    assert problems(document, schema, strict=True) == []


def _refused(tmp_path: Path, path: Path, *args: str) -> str:
    """Run the command line's entry point in this process; it must stop with
    status 2, one line on standard error and nothing written."""
    import contextlib
    import io

    from doseattr.cli import main

    out = tmp_path / "out"
    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        status = main(["run", str(path), "--out", str(out), *args])
    assert status == 2, err.getvalue()
    assert not out.exists()
    lines = err.getvalue().strip().splitlines()
    assert len(lines) == 1, lines
    return lines[0]


def test_a_zone_without_a_burden_row_is_one_line(tmp_path):
    rows = [f"{ZONES[z][0]},{p},{r}" for z, (p, r) in BURDEN.items() if z != 21]
    line = _refused(tmp_path, _write(tmp_path, burden_rows=rows))
    assert "21" in line and "no row in the burden table" in line


def test_a_burden_row_without_cells_is_one_line(tmp_path):
    rows = [f"{ZONES[z][0]},{p},{r}" for z, (p, r) in BURDEN.items()] + ["99,1000,500"]
    line = _refused(tmp_path, _write(tmp_path, burden_rows=rows))
    assert "burden.csv" in line and "row 6" in line and "zone 99" in line
    assert "no cells" in line


def test_a_stratum_that_names_no_zone_is_one_line(tmp_path):
    rows = [f"{ZONES[z][0]},{p},{r}" for z, (p, r) in BURDEN.items()] + ["Lake,1000,500"]
    line = _refused(tmp_path, _write(tmp_path, burden_rows=rows))
    assert "'Lake'" in line and "names.csv" in line and "row 6" in line


def test_mismatched_grids_are_one_line(tmp_path):
    path = _write(tmp_path)
    _raster(_cells()[1], tmp_path / "pop.tif", NODATA, x0=4.0e6 + 50.0)
    line = _refused(tmp_path, path)
    assert "pop.tif" in line and "conc.tif" in line


def test_grid_and_exposure_together_are_refused(tmp_path):
    path = _write(tmp_path, extra='\n[exposure]\ngm = 5.0\ngsd = 2.0\n')
    assert "[grid] and [exposure]" in _refused(tmp_path, path)


def test_exposure_columns_in_a_grid_burden_table_are_refused(tmp_path):
    path = _write(tmp_path)
    (tmp_path / "burden.csv").write_text("stratum,population,rate,gm,gsd\n" + "\n".join(
        f"{ZONES[z][0]},{p},{r},5,2" for z, (p, r) in BURDEN.items()) + "\n")
    line = _refused(tmp_path, path)
    assert "exposure columns" in line and "row 2" in line


def test_zones_without_a_burden_table_are_refused(tmp_path):
    path = _write(tmp_path)
    path.write_text(path.read_text().replace('[burden]\ntable = "burden.csv"\nmethod = "paf"',
                                             ""))
    assert "[burden] table with a row per zone" in _refused(tmp_path, path)


def test_a_bad_scheduler_option_is_one_line(tmp_path):
    line = _refused(tmp_path, _write(tmp_path), "--scheduler", "localhost")
    assert "tcp://host:port" in line


def test_scheduler_needs_a_grid(tmp_path):
    d = {"unit": "ug/m3", "curve": {"model": "linear", "err": 0.01},
         "exposure": {"gm": 10.0, "gsd": 2.0}}
    with pytest.raises(InputError, match="has no \\[grid\\]"):
        with_scheduler(analysis_from_dict(d, base_dir=tmp_path), "tcp://127.0.0.1:8786")
    d["compute"] = {"scheduler": "tcp://127.0.0.1:8786"}
    with pytest.raises(InputError, match="add \\[grid\\] or remove \\[compute\\]"):
        analysis_from_dict(d, base_dir=tmp_path)


def test_without_zones_every_row_uses_the_whole_grid(tmp_path):
    """No zones raster: one exposure, every burden row's PAF is the
    population's."""
    path = _write(tmp_path)
    path.write_text(path.read_text().replace('zones = "zones.tif"\nzone_names = "names.csv"\n',
                                             ""))
    r = run_analysis(load_analysis(path))
    assert r.grid.zone_ids == ()
    for s in r.burden.strata:
        assert s.paf.estimate == pytest.approx(r.attribution.paf.estimate, rel=1e-12)
    assert dataclasses.is_dataclass(r.grid.maps)


def test_zones_with_fewer_points_keep_the_exact_fractions(tmp_path):
    """Exact per-cell sums (numpy) against the zones as a Gauss rule per
    group of bins (BuiltGrid.with_quadrature, for the Monte Carlo): each
    zone's PAF and the scaled PIF within 1e-6 relative, as for every bin
    (the groups split at the minimum-risk level and the scenarios' cuts);
    the population's exposure keeps every bin; unchanged (the same object)
    with a minimum-risk level drawn over a range. The cap's PIF: 1e-6 as
    well, the cap being a cut of the reduction."""
    from doseattr.analysis.grid_exposure import build_grid
    from doseattr.core.attribution.fractions import paf, pif
    from doseattr.core.attribution.scenarios import Cap, Scale
    from doseattr.core.curves.base import Curve
    from doseattr.core.curves.loglinear import LogLinear

    path = _write(tmp_path)
    analysis = load_analysis(path)
    grid = build_grid(analysis.exposure, str(path))
    curve = Curve(LogLinear(), np.array([BETA]), np.eye(1) * 1e-6)
    few = grid.with_quadrature(curve, minimum_risk=(M, M), scenarios=(Scale(0.9), Cap(8.0)))
    assert few.population is grid.population
    cells = _cells()
    for z, (name, _, _) in ZONES.items():
        e0 = _exact(*cells, z)
        exposure = few.by_stratum[name]
        assert exposure.values.size <= grid.by_stratum[name].values.size
        assert paf(curve, exposure, minimum_risk=M) == pytest.approx(1.0 - 1.0 / e0, rel=1e-6)
        scaled = _exact(*cells, z, transform=lambda x: 0.9 * x)
        assert pif(curve, exposure, Scale(0.9), minimum_risk=M) == pytest.approx(
            1.0 - scaled / e0, rel=1e-6)
        capped = _exact(*cells, z, transform=lambda x: np.minimum(x, 8.0))
        assert pif(curve, exposure, Cap(8.0), minimum_risk=M) == pytest.approx(
            1.0 - capped / e0, rel=1e-6)
    assert grid.with_quadrature(curve, minimum_risk=(1.0, 4.0)) is grid
