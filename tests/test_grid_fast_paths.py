"""The fast paths of the grid pass: the reducer's float32 logarithm with
exact edge placement, its per-thread work arrays, float32 inputs, the zone
table lookup and the raw GeoTIFF read with nodata decoded per block.

References: the bins' definition (edges exp(ln 1e-12 + b 0.002), module
docstring of doseattr.core.exposure.grid) applied with numpy.searchsorted
and numpy.bincount here; a plain Python dict for zone ids; rioxarray's own
masked read for nodata.
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from doseattr.core.exposure.grid import N_BINS, reduce_block

#: The bins' lower edges as the module docstring defines them (closed form).
EDGES = np.exp(math.log(1e-12) + 2e-3 * np.arange(N_BINS + 1))


def reference(conc, pop, zone, n_zones):
    """Population and population x concentration per zone and bin with
    numpy: bin = last edge <= x (clipped to the first and last bins);
    valid cells only (finite, non-negative, zone >= 0), x > 0."""
    x, p, z = (np.ravel(a) for a in (conc, pop, zone))
    x64, p64 = x.astype(float), p.astype(float)
    ok = np.isfinite(x64) & (x64 > 0) & np.isfinite(p64) & (p64 >= 0) & (z >= 0)
    b = np.clip(np.searchsorted(EDGES, x64[ok], side="right") - 1, 0, N_BINS - 1)
    flat = z[ok].astype(np.int64) * N_BINS + b
    size = n_zones * N_BINS
    w = np.bincount(flat, weights=p64[ok], minlength=size).reshape(n_zones, N_BINS)
    m = np.bincount(flat, weights=p64[ok] * x64[ok], minlength=size).reshape(n_zones, N_BINS)
    return w, m


def cells(n, seed, dtype=np.float64):
    """Lognormal concentrations over 1e-14..1e14 plus values at every kind of
    edge (on it, one float step below and above), populations with 5% NaN,
    zones 0..3 with 3% nodata (-1)."""
    rng = np.random.default_rng(seed)
    x = np.exp(rng.uniform(math.log(1e-14), math.log(1e14), n))
    edges = EDGES[rng.integers(0, N_BINS + 1, n // 4)].astype(dtype)
    x = np.concatenate([x.astype(dtype), edges, np.nextafter(edges, dtype(0)),
                        np.nextafter(edges, dtype(np.inf))])
    pop = rng.lognormal(0.0, 1.0, x.size).astype(dtype)
    pop[rng.random(x.size) < 0.05] = np.nan
    zone = rng.integers(0, 4, x.size)
    zone[rng.random(x.size) < 0.03] = -1
    order = rng.permutation(x.size)
    return x[order], pop[order], zone[order]


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_every_cell_in_the_bin_of_its_edges(dtype):
    """Source: the bins' definition with numpy.searchsorted (above). Every
    cell, including values on an edge and one float step either side, is
    in the bin whose float64 edges hold it, so the sums equal numpy's bin
    for bin (float64 rounding of the sums only)."""
    conc, pop, zone = cells(200_000, 3, dtype)
    got = reduce_block(conc, pop, zone, 4)
    w, m = reference(conc, pop, zone, 4)
    np.testing.assert_allclose(got.weight, w, rtol=1e-12, atol=0)
    np.testing.assert_allclose(got.moment, m, rtol=1e-12, atol=0)
    assert np.array_equal(got.weight > 0, w > 0)


def test_float32_inputs_reduce_like_their_float64_values():
    """Source: numpy reference over the same values in float64 (float32
    values are exact in float64, so the same bins and sums)."""
    conc, pop, zone = cells(100_000, 5, np.float32)
    got = reduce_block(conc, pop, zone, 4)
    same = reduce_block(conc.astype(float), pop.astype(float), zone, 4)
    np.testing.assert_allclose(got.weight, same.weight, rtol=1e-13, atol=0)
    np.testing.assert_allclose(got.moment, same.moment, rtol=1e-13, atol=0)
    np.testing.assert_array_equal(got.cells, same.cells)
    assert got.skipped == same.skipped


def test_work_arrays_reused_across_sizes_and_threads():
    """Source: numpy reference (above) for each block: blocks of different
    sizes reduced in turn by two threads at once (each thread reusing its
    own work arrays) give each block's own sums."""
    blocks = [cells(n, seed) for seed, n in enumerate((120_000, 30_000, 200_000, 70_000))]
    with ThreadPoolExecutor(2) as pool:
        got = list(pool.map(lambda b: reduce_block(*b, 4), blocks * 2))
    for k, sums in enumerate(got):
        w, m = reference(*blocks[k % len(blocks)], 4)
        np.testing.assert_allclose(sums.weight, w, rtol=1e-12, atol=0)
        np.testing.assert_allclose(sums.moment, m, rtol=1e-12, atol=0)


def test_sums_cover_only_the_rows_touched():
    """Source: contract: a block whose valid cells lie in zones 5 and 7 of
    10 holds rows 5..7 only, and adds with another block to the dense sums
    of both (numpy reference over the two blocks together)."""
    rng = np.random.default_rng(8)
    x, p = rng.lognormal(2, 1, 5000), rng.uniform(1, 2, 5000)
    z = np.where(rng.random(5000) < 0.5, 5, 7)
    z[:10] = -1
    a = reduce_block(x, p, z, 10)
    assert a.row0 == 5 and a.sums.shape[1] == 3
    y = rng.lognormal(1, 1, 3000)
    b = reduce_block(y, np.ones(3000), np.ones(3000, np.int64), 10)
    both = a + b
    w, m = reference(np.r_[x, y], np.r_[p, np.ones(3000)], np.r_[z, np.ones(3000, int)], 10)
    np.testing.assert_allclose(both.weight, w, rtol=1e-12, atol=0)
    np.testing.assert_allclose(both.moment, m, rtol=1e-12, atol=0)
    assert both.row0 == 1 and both.cells.sum() == 5000 - 10 + 3000


def test_integer_zone_table_matches_a_dict():
    """Source: a plain dict from id to index (what the lookup means): int32
    and uint16 ids with unknown ids, ids below the listed ones, and a nodata
    value inside and outside the listed range."""
    from doseattr.analysis.grid_inputs import NODATA_ZONE, UNKNOWN_ZONE, ZoneMap

    rng = np.random.default_rng(2)
    listed = [40, 3, 17, 25]
    zmap = ZoneMap.of(listed, "zones.tif")
    for dtype, nodata in ((np.int32, 17.0), (np.int32, 999.0), (np.uint16, 0.0),
                          (np.int32, None)):
        raw = rng.choice([40, 3, 17, 25, 0, 2, 41, 999], size=(50, 60)).astype(dtype)
        if dtype == np.int32:
            raw[0, :5] = -7
        index, unknown = zmap.indices(raw, nodata)
        lookup = {z: k for k, z in enumerate(listed)}
        expect = [NODATA_ZONE if nodata is not None and v == nodata else
                  lookup.get(int(v), UNKNOWN_ZONE) for v in raw.ravel()]
        np.testing.assert_array_equal(index.ravel(), expect)
        assert index.shape == raw.shape
        assert sorted(unknown.tolist()) == sorted(int(v) for v, e in
                                                  zip(raw.ravel(), expect) if e == UNKNOWN_ZONE)


@pytest.mark.parametrize("dtype, nodata", [("float32", -9999.0), ("int16", -1.0),
                                           ("float32", None)])
def test_raw_read_with_nodata_equals_rioxarray_masked(tmp_path, dtype, nodata):
    """Source: rioxarray.open_rasterio(masked=True), the decoding the raw
    read replaces: the same values, NaN at the same cells."""
    rasterio = pytest.importorskip("rasterio")
    rioxarray = pytest.importorskip("rioxarray")
    from rasterio.transform import from_origin

    from doseattr.analysis.grid_inputs import open_layer

    rng = np.random.default_rng(4)
    values = (rng.uniform(0, 50, (70, 90))).astype(dtype)
    if nodata is not None:
        values[rng.random(values.shape) < 0.1] = nodata
    path = tmp_path / "pop.tif"
    with rasterio.open(path, "w", driver="GTiff", width=90, height=70, count=1, dtype=dtype,
                       nodata=nodata, crs="EPSG:3035",
                       transform=from_origin(0, 7000, 100, 100)) as dst:
        dst.write(values, 1)
    layer = open_layer(str(path), None, 32, decode=True)
    got = np.asarray(layer.data.compute(scheduler="sync"))
    ref = rioxarray.open_rasterio(path, masked=True).isel(band=0).values
    assert layer.nodata is None
    np.testing.assert_array_equal(np.isnan(got), np.isnan(ref))
    np.testing.assert_array_equal(got[~np.isnan(got)], ref[~np.isnan(ref)])


def test_map_sample_taken_from_the_blocks_equals_the_strided_rasters(tmp_path, monkeypatch):
    """Source: the rasters read back with rasterio and strided with numpy
    (``[::step, ::step]``), population nodata as NaN, zone indices from a
    dict: the sample the pass assembles from its blocks (uneven 16-cell
    chunks of a 45 x 70 grid, step 3, so block origins are not multiples of
    the step) is the same."""
    rasterio = pytest.importorskip("rasterio")
    from rasterio.transform import from_origin

    from doseattr.analysis import grid_reduce
    from doseattr.analysis.grid_inputs import NODATA_ZONE, GridSpec

    rng = np.random.default_rng(12)
    shape = (45, 70)
    layers = {"conc.tif": (rng.lognormal(2, 0.5, shape).astype("float32"), None),
              "pop.tif": (rng.uniform(0, 9, shape).astype("float32"), -1.0),
              "zones.tif": (rng.choice([10, 20, 30, 0], size=shape).astype("int32"), 0.0)}
    layers["pop.tif"][0][rng.random(shape) < 0.1] = -1.0
    for name, (values, nodata) in layers.items():
        with rasterio.open(tmp_path / name, "w", driver="GTiff", width=shape[1],
                           height=shape[0], count=1, dtype=values.dtype, nodata=nodata,
                           crs="EPSG:3035", transform=from_origin(0, 4500, 100, 100)) as dst:
            dst.write(values, 1)
    monkeypatch.setattr(grid_reduce, "MAP_SIDE", 24)  # step = ceil(70 / 24) = 3
    spec = GridSpec(concentration=str(tmp_path / "conc.tif"), population=str(tmp_path / "pop.tif"),
                    zones=str(tmp_path / "zones.tif"), chunk=16)
    _, notes = grid_reduce.reduce_grid(spec, [10, 20, 30])
    sample = notes.sample
    assert sample is not None and sample.step == 3
    conc, pop, zone = (layers[n][0][::3, ::3] for n in ("conc.tif", "pop.tif", "zones.tif"))
    np.testing.assert_array_equal(sample.concentration, conc.astype(float))
    np.testing.assert_array_equal(sample.population, np.where(pop == -1.0, np.nan, pop))
    lookup = {10: 0, 20: 1, 30: 2, 0: NODATA_ZONE}
    np.testing.assert_array_equal(sample.zone_index,
                                  np.vectorize(lookup.get)(zone).astype(np.int64))
