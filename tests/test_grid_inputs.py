"""Gridded inputs (``[grid]``): lazy rasters (GeoTIFF, NetCDF) and cell
tables (CSV, Parquet) reduced with Dask, checked against a direct numpy
computation over the whole arrays held in memory.

The reducer here is the stand-in of tests/grid_standin.py (the core's own
is written separately); the check of the sums is independent of both the
stand-in and the reading: per zone, boolean masks over the full arrays and
``np.histogram`` on the stand-in's bin edges (common practice).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("rioxarray")
import xarray as xr

from doseattr.analysis import schema
from doseattr.analysis.grid_inputs import (
    MISSING_EXTRA,
    GridSpec,
    parse_compute,
    parse_grid,
    read_zone_names,
)
from doseattr.analysis.grid_reduce import reduce_grid
from doseattr.analysis.schema import Context
from doseattr.errors import InputError

sys.path.insert(0, str(Path(__file__).parent))
import grid_standin

# rioxarray (0.19) multiplies affine transforms with `*`, which affine 3 deprecates.
pytestmark = pytest.mark.filterwarnings("ignore:Use `@` matmul:PendingDeprecationWarning")

NY, NX, CHUNK = 20, 25, 8  # 500 cells in 3 x 4 ragged blocks
ZONE_IDS = (3, 17, 101, 250000)
NODATA, ZONE_NODATA = -9999.0, -9999
X0, Y0, STEP = 4_000_000.0, 3_000_000.0, 100.0


def _arrays(seed: int = 7):
    """Invented cells: lognormal concentrations (GM 8, GSD 2), uniform
    population, zones drawn from ZONE_IDS; some cells are nodata in each
    layer, a few have concentration exactly 0 and one is negative."""
    rng = np.random.default_rng(seed)
    conc = np.exp(np.log(8.0) + np.log(2.0) * rng.standard_normal((NY, NX)))
    conc[rng.random((NY, NX)) < 0.03] = 0.0
    conc[0, 1] = -1.0
    pop = rng.uniform(0.0, 300.0, (NY, NX))
    zone = rng.choice(np.array(ZONE_IDS), (NY, NX)).astype(np.int32)
    conc_nd = rng.random((NY, NX)) < 0.05
    pop_nd = rng.random((NY, NX)) < 0.05
    zone_nd = rng.random((NY, NX)) < 0.05
    return conc, pop, zone, conc_nd, pop_nd, zone_nd


def _coords():
    x = X0 + STEP * (np.arange(NX) + 0.5)
    y = Y0 - STEP * (np.arange(NY) + 0.5)
    return y, x


def _raster(values, path, nodata, crs="EPSG:3035", x0=X0, dtype=None):
    y, x = _coords()
    x = x + (x0 - X0)
    if values.shape[1] != len(x):
        x = x0 + STEP * (np.arange(values.shape[1]) + 0.5)
    da = xr.DataArray(values if dtype is None else values.astype(dtype), dims=("y", "x"),
                      coords={"y": y, "x": x})
    da = da.rio.write_crs(crs).rio.write_nodata(nodata)
    da.rio.to_raster(path)
    return str(path)


@pytest.fixture(scope="module")
def grid(tmp_path_factory):
    """The same cells as GeoTIFFs, a NetCDF3 concentration, a CSV and a
    Parquet table; returns the paths and the arrays with NaN for nodata."""
    d = tmp_path_factory.mktemp("grid")
    conc, pop, zone, conc_nd, pop_nd, zone_nd = _arrays()
    paths = {
        "conc": _raster(np.where(conc_nd, NODATA, conc), d / "conc.tif", NODATA),
        "pop": _raster(np.where(pop_nd, NODATA, pop), d / "pop.tif", NODATA),
        "zones": _raster(np.where(zone_nd, ZONE_NODATA, zone), d / "zones.tif", ZONE_NODATA,
                         dtype=np.int32),
    }
    y, x = _coords()
    nc = xr.DataArray(np.where(conc_nd, np.nan, conc), dims=("y", "x"),
                      coords={"y": y, "x": x}).rio.write_crs("EPSG:3035")
    xr.Dataset({"pm25": nc}).to_netcdf(d / "conc.nc", engine="scipy")
    paths["nc"] = str(d / "conc.nc")
    table = pd.DataFrame({
        "value": np.where(conc_nd, np.nan, conc).ravel(),
        "population": np.where(pop_nd, np.nan, pop).ravel(),
        "zone": pd.array(np.where(zone_nd, -1, zone).ravel(), dtype="Int64"),
    })
    table.loc[zone_nd.ravel(), "zone"] = pd.NA
    table.to_csv(d / "cells.csv", index=False)
    table.to_parquet(d / "cells.parquet", index=False)
    paths["csv"], paths["parquet"] = str(d / "cells.csv"), str(d / "cells.parquet")
    arrays = (np.where(conc_nd, np.nan, conc), np.where(pop_nd, np.nan, pop),
              np.where(zone_nd, -1, zone))
    return paths, arrays


def _expected(conc, pop, zone, zone_ids):
    """Direct per-zone sums over the whole arrays (masks and np.histogram):
    a cell counts when concentration and population are finite and >= 0
    and its zone is one of ``zone_ids``."""
    good_pop = np.isfinite(pop) & (pop >= 0)
    ok = np.isfinite(conc) & (conc >= 0) & good_pop & np.isin(zone, zone_ids)
    edges = np.concatenate([[0.0], grid_standin.EDGES, [np.inf]])
    weight, moment, zero, cells = [], [], [], []
    for z in zone_ids:
        m = ok & (zone == z)
        pos = m & (conc > 0)
        weight.append(np.histogram(conc[pos], edges, weights=pop[pos])[0])
        moment.append(np.histogram(conc[pos], edges, weights=pop[pos] * conc[pos])[0])
        zero.append(pop[m & (conc == 0)].sum())
        cells.append(m.sum())
    return dict(weight=np.array(weight), moment=np.array(moment), zero=np.array(zero),
                cells=np.array(cells), skipped=int((~ok).sum()),
                skipped_population=float(pop[~ok & good_pop].sum()))


def _check(sums, expected):
    for name in ("weight", "moment", "zero"):
        np.testing.assert_allclose(getattr(sums, name), expected[name], rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(sums.cells, expected["cells"])
    assert sums.skipped == expected["skipped"]


def _specs(paths):
    return {
        "geotiff": GridSpec(concentration=paths["conc"], population=paths["pop"],
                            zones=paths["zones"], chunk=CHUNK),
        "netcdf": GridSpec(concentration=paths["nc"], variable="pm25",
                           population=paths["pop"], zones=paths["zones"], chunk=CHUNK),
        "csv": GridSpec(cells=paths["csv"], chunk=CHUNK),
        "parquet": GridSpec(cells=paths["parquet"], chunk=CHUNK),
    }


@pytest.mark.parametrize("kind", ["geotiff", "netcdf", "csv", "parquet"])
def test_every_input_gives_the_direct_sums(grid, kind):
    """Each of the four inputs, reduced block by block and summed by dask,
    equals the direct computation (common practice: masks over the whole
    arrays); nodata cells are counted in the notes with their population."""
    paths, (conc, pop, zone) = grid
    sums, notes = reduce_grid(_specs(paths)[kind], ZONE_IDS, reducer=grid_standin.reduce_block)
    expected = _expected(conc, pop, zone, ZONE_IDS)
    _check(sums, expected)
    assert notes.cells == NY * NX
    assert notes.skipped == expected["skipped"] > 0
    assert notes.skipped_population == pytest.approx(expected["skipped_population"], rel=1e-12)
    assert notes.unknown == () and notes.chunk == CHUNK


def test_the_four_inputs_agree(grid):
    paths, _ = grid
    results = {k: reduce_grid(s, ZONE_IDS, reducer=grid_standin.reduce_block)[0]
               for k, s in _specs(paths).items()}
    ref = results["geotiff"]
    for sums in results.values():
        np.testing.assert_allclose(sums.weight, ref.weight, rtol=1e-12)
        np.testing.assert_array_equal(sums.cells, ref.cells)
        assert sums.skipped == ref.skipped


def test_zone_order_follows_the_callers_ids(grid):
    """Row k of the sums is zone_ids[k], in the caller's order."""
    paths, (conc, pop, zone) = grid
    ids = (250000, 3, 101, 17)
    sums, _ = reduce_grid(_specs(paths)["geotiff"], ids, reducer=grid_standin.reduce_block)
    _check(sums, _expected(conc, pop, zone, ids))


def test_without_zones_every_cell_is_zone_0(grid):
    paths, (conc, pop, _) = grid
    spec = GridSpec(concentration=paths["conc"], population=paths["pop"], chunk=CHUNK)
    sums, _ = reduce_grid(spec, (), reducer=grid_standin.reduce_block)
    everywhere = np.zeros(conc.shape, dtype=int)
    _check(sums, _expected(conc, pop, everywhere, (0,)))


def test_unknown_zones_are_refused_with_their_population(grid):
    """Cells in a zone the caller does not list: one line naming the zones
    file, the id and its population (the direct sum over its cells)."""
    paths, (_, pop, zone) = grid
    with pytest.raises(InputError) as err:
        reduce_grid(_specs(paths)["geotiff"], (3, 17, 101), reducer=grid_standin.reduce_block)
    line = str(err.value)
    people = pop[(zone == 250000) & np.isfinite(pop)].sum()
    assert "\n" not in line and "zones.tif" in line and "250000" in line
    assert f"{people:.6g}" in line
    _, notes = reduce_grid(_specs(paths)["csv"], (3, 17, 101), strict=False,
                              reducer=grid_standin.reduce_block)
    (unknown,) = notes.unknown
    assert unknown.zone == 250000 and unknown.cells == (zone == 250000).sum()
    assert unknown.population == pytest.approx(people, rel=1e-12)


def test_at_most_five_unknown_ids_are_named(tmp_path):
    path = tmp_path / "cells.csv"
    pd.DataFrame({"value": [1.0] * 8, "population": [10.0] * 8,
                  "zone": range(1, 9)}).to_csv(path, index=False)
    with pytest.raises(InputError) as err:
        reduce_grid(GridSpec(cells=str(path), chunk=4), (1,),
                    reducer=grid_standin.reduce_block)
    assert "7 zone id(s)" in str(err.value) and "and 2 more" in str(err.value)


@pytest.mark.parametrize("change, what", [
    ("shape", "shape 20x25 vs 20x26"),
    ("transform", "transform"),
    ("crs", "CRS EPSG:3035 vs EPSG:32633"),
])
def test_mismatched_grids_are_refused(grid, tmp_path, change, what):
    paths, _ = grid
    if change == "shape":
        bad = _raster(np.ones((NY, NX + 1)), tmp_path / "pop.tif", NODATA)
    elif change == "transform":
        bad = _raster(np.ones((NY, NX)), tmp_path / "pop.tif", NODATA, x0=X0 + 50.0)
    else:
        bad = _raster(np.ones((NY, NX)), tmp_path / "pop.tif", NODATA, crs="EPSG:32633")
    spec = GridSpec(concentration=paths["conc"], population=bad, chunk=CHUNK)
    with pytest.raises(InputError) as err:
        reduce_grid(spec, (), reducer=grid_standin.reduce_block)
    line = str(err.value)
    assert "\n" not in line and what in line
    assert line.startswith(f"{bad}: grid differs from {paths['conc']}")


def test_netcdf_coordinates_are_compared(grid, tmp_path):
    """A NetCDF concentration against a GeoTIFF population shifted by half
    a cell: refused on its x coordinates."""
    paths, _ = grid
    bad = _raster(np.ones((NY, NX)), tmp_path / "pop.tif", NODATA, x0=X0 + 50.0)
    spec = GridSpec(concentration=paths["nc"], variable="pm25", population=bad, chunk=CHUNK)
    with pytest.raises(InputError, match="x coordinates from 4000050, step 100 vs from 4000100, step 100"):
        reduce_grid(spec, (), reducer=grid_standin.reduce_block)


def test_a_missing_netcdf_variable_is_named(grid):
    paths, _ = grid
    spec = GridSpec(concentration=paths["nc"], variable="no2", population=paths["pop"])
    with pytest.raises(InputError, match="has no variable 'no2' \\(variables: pm25\\)"):
        reduce_grid(spec, (), reducer=grid_standin.reduce_block)


def test_local_cluster_equals_local_threads(grid):
    """The same reduction on a dask.distributed LocalCluster (loopback,
    one in-process worker) named by its address."""
    distributed = pytest.importorskip("distributed")
    paths, _ = grid
    spec = _specs(paths)["geotiff"]
    local, _ = reduce_grid(spec, ZONE_IDS, reducer=grid_standin.reduce_block)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, protocol="tcp",
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        remote, notes = reduce_grid(spec, ZONE_IDS, scheduler=cluster.scheduler_address,
                                    reducer=grid_standin.reduce_block)
    np.testing.assert_allclose(remote.weight, local.weight, rtol=1e-12)
    np.testing.assert_array_equal(remote.cells, local.cells)
    assert remote.skipped == local.skipped
    assert notes.scheduler.startswith("tcp://127.0.0.1:")


# -- tables ---------------------------------------------------------------------
def test_text_in_a_cell_table_names_its_row(tmp_path):
    path = tmp_path / "cells.csv"
    path.write_text("value,population\n1.5,10\n2.5,abc\n")
    with pytest.raises(InputError) as err:
        reduce_grid(GridSpec(cells=str(path), chunk=4), (), reducer=grid_standin.reduce_block)
    assert str(err.value) == (f"{path}: row 3, column 'population': text 'abc' where a number "
                              "belongs")


def test_text_in_a_parquet_table_names_its_data_row(tmp_path):
    path = tmp_path / "cells.parquet"
    pd.DataFrame({"value": ["1", "2", "x"], "population": [1.0, 2.0, 3.0]}).to_parquet(path)
    with pytest.raises(InputError, match="data row 3, column 'value': text 'x'"):
        reduce_grid(GridSpec(cells=str(path), chunk=4), (), reducer=grid_standin.reduce_block)


def test_a_table_without_population_is_refused(tmp_path):
    path = tmp_path / "cells.csv"
    path.write_text("value,people\n1.5,10\n")
    with pytest.raises(InputError, match="missing column 'population'"):
        reduce_grid(GridSpec(cells=str(path), chunk=4), (), reducer=grid_standin.reduce_block)


# -- zone names -------------------------------------------------------------------
@pytest.mark.parametrize("text, where, what", [
    ("zone,name\n1,North\n1,South\n", "row 3, column 'zone'", "zone 1 is listed twice"),
    ("zone,name\n1,North\n2,North\n", "row 3, column 'name'", "name 'North' is used twice"),
    ("zone,name\n1.5,North\n", "row 2, column 'zone'", "whole numbers"),
    ("zone,name\nx,North\n", "row 2, column 'zone'", "text 'x' where a number belongs"),
    ("zone,label\n1,North\n", "column 'name'", "missing column 'name'"),
])
def test_zone_names_errors(tmp_path, text, where, what):
    path = tmp_path / "names.csv"
    path.write_text(text)
    with pytest.raises(InputError) as err:
        read_zone_names(str(path))
    line = str(err.value)
    assert "\n" not in line and line.startswith(f"{path}: {where}") and what in line


def test_zone_names_are_read(tmp_path):
    path = tmp_path / "names.csv"
    path.write_text("zone,name\n3,North\n-2,South\n")
    assert read_zone_names(str(path)) == {3: "North", -2: "South"}


# -- the sections -------------------------------------------------------------------
def _ctx(tmp_path):
    return Context(str(tmp_path / "analysis.toml"), str(tmp_path))


def test_parse_grid_rasters(grid, tmp_path):
    paths, _ = grid
    section = {"concentration": paths["nc"], "variable": "pm25", "population": paths["pop"],
               "zones": paths["zones"], "error_gsd": 1.3, "chunk": 512}
    schema.check_section(section, "grid", source=None)
    spec = parse_grid(section, _ctx(tmp_path))
    assert spec == GridSpec(concentration=paths["nc"], variable="pm25",
                            population=paths["pop"], zones=paths["zones"], error_gsd=1.3,
                            chunk=512)


@pytest.mark.parametrize("section, key, what", [
    ({"population": "pop.tif"}, "concentration", "missing key 'concentration'"),
    ({"concentration": "c.nc", "population": "pop.tif"}, "variable", "missing key 'variable'"),
    ({"concentration": "c.tif"}, "population", "missing key 'population'"),
    ({"concentration": "c.tif", "cells": "t.csv"}, "cells", "give only one of"),
    ({"cells": "t.csv", "population": "pop.tif"}, "population", "goes with concentration"),
    ({"cells": "t.csv", "error_gsd": 1.0}, "error_gsd", "must be above 1"),
    ({"cells": "t.csv", "chunk": 2}, "chunk", "at least 4"),
    ({"cells": "c.tif"}, "cells", "must end in .parquet, .csv"),
    ({"concentration": "c.tif", "population": "pop.tif", "zone_names": "t.csv"},
     "zone_names", "add zones"),
    ({"cells": "none.csv"}, "cells", "file not found"),
])
def test_parse_grid_errors(tmp_path, section, key, what):
    for name in ("pop.tif", "c.nc", "c.tif", "t.csv"):
        (tmp_path / name).write_bytes(b"")
    with pytest.raises(InputError) as err:
        parse_grid(section, _ctx(tmp_path))
    assert err.value.location == f"[grid] key '{key}'" and what in err.value.message


def test_parse_compute(tmp_path):
    ctx = _ctx(tmp_path)
    schema.check_section({"scheduler": "tcp://10.0.0.5:8786"}, "compute", source=None)
    assert parse_compute({"scheduler": "tcp://10.0.0.5:8786"}, ctx) == "tcp://10.0.0.5:8786"
    assert parse_compute({}, ctx) is None
    with pytest.raises(InputError, match="tcp://host:port"):
        parse_compute({"scheduler": "10.0.0.5"}, ctx)


def test_an_unreachable_scheduler_is_one_line(grid):
    paths, _ = grid
    spec = _specs(paths)["geotiff"]
    import dask

    with dask.config.set({"distributed.comm.timeouts.connect": "1s"}), \
            pytest.raises(InputError) as err:
        reduce_grid(spec, ZONE_IDS, scheduler="tcp://127.0.0.1:9",
                    reducer=grid_standin.reduce_block)
    assert "\n" not in str(err.value) and "cannot reach the dask scheduler" in str(err.value)


@pytest.mark.parametrize("module", ["pyarrow", "rioxarray", "distributed"])
def test_the_missing_extra_is_named(grid, tmp_path, monkeypatch, module):
    paths, _ = grid
    monkeypatch.setitem(sys.modules, module, None)  # import now raises ImportError
    with pytest.raises(InputError) as err:
        parse_grid({"cells": paths["csv"]}, _ctx(tmp_path))
    assert err.value.message == MISSING_EXTRA
    with pytest.raises(InputError, match="pip install 'doseattr\\[grid\\]'"):
        reduce_grid(_specs(paths)["csv"], (), reducer=grid_standin.reduce_block)


def test_a_netcdf_crs_is_compared(grid, tmp_path):
    """The NetCDF's CRS (its grid-mapping variable, written by rioxarray)
    is read and compared with the GeoTIFF's."""
    paths, (conc, _, _) = grid
    y, x = _coords()
    nc = xr.DataArray(conc, dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs("EPSG:32633")
    xr.Dataset({"pm25": nc}).to_netcdf(tmp_path / "utm.nc", engine="scipy")
    spec = GridSpec(concentration=str(tmp_path / "utm.nc"), variable="pm25",
                    population=paths["pop"], chunk=CHUNK)
    with pytest.raises(InputError, match="CRS EPSG:32633 vs EPSG:3035"):
        reduce_grid(spec, (), reducer=grid_standin.reduce_block)


def test_fractional_zone_ids_are_refused(grid, tmp_path):
    paths, _ = grid
    zones = _raster(np.full((NY, NX), 2.5), tmp_path / "zones.tif", NODATA)
    spec = GridSpec(concentration=paths["conc"], population=paths["pop"], zones=zones,
                    chunk=CHUNK)
    with pytest.raises(InputError) as err:
        reduce_grid(spec, (2,), reducer=grid_standin.reduce_block)
    assert str(err.value) == f"{zones}: zone ids are whole numbers, found 2.5"


def test_notes_say_what_was_read(grid):
    paths, (conc, pop, zone) = grid
    expected = _expected(conc, pop, zone, ZONE_IDS)
    _, notes = reduce_grid(_specs(paths)["geotiff"], ZONE_IDS, reducer=grid_standin.reduce_block)
    assert notes.lines()[:2] == (
        f"grid: {NY * NX} cells read in chunks of {CHUNK} x {CHUNK} (local threads)",
        f"grid: {expected['skipped']} cells skipped as nodata, holding a population of "
        f"{expected['skipped_population']:.6g}")
    _, notes = reduce_grid(_specs(paths)["csv"], ZONE_IDS, reducer=grid_standin.reduce_block)
    assert notes.lines()[0] == f"grid: {NY * NX} cells read {CHUNK * CHUNK} rows at a time " \
                               "(in this process)"
