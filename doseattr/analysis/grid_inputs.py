"""The ``[grid]`` and ``[compute]`` sections and the gridded inputs they
name, read lazily.

A grid is a census of cells, each with a concentration and a population,
optionally in a zone: either rasters on one grid (``concentration`` as a
GeoTIFF or NetCDF, ``population``, optional ``zones``) or a table of cells
(``cells``, Parquet or CSV with columns ``value``, ``population``,
optional ``zone``). Rasters are opened with xarray (rioxarray for GeoTIFF)
as dask arrays of ``chunk`` x ``chunk`` cells, so nothing is read until the
reduction (:mod:`doseattr.analysis.grid_reduce`) asks for a block; tables
are read ``chunk * chunk`` rows at a time.

Nodata (a raster's nodata value or ``_FillValue``, NaN, an empty cell of a
table) is left for the reducer to skip and count: NaN for concentration and
population, zone index -1 for zones (:data:`NODATA_ZONE`). Zone ids are
mapped to indices ``0..Z-1`` in the order the caller lists them; ids not in
the list map to :data:`UNKNOWN_ZONE` and their population is reported.

Example::

    [grid]
    concentration = "pm25_2023.tif"
    population = "population_2023.tif"
    zones = "districts.tif"
    zone_names = "districts.csv"

    [compute]
    scheduler = "tcp://10.0.0.5:8786"
"""

from __future__ import annotations

import importlib
import math
import re
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from doseattr.analysis.csvfile import number, read_raw, require_columns, shown
from doseattr.analysis.schema import Context, only_one
from doseattr.errors import InputError

#: Cells per side of a chunk unless ``[grid] chunk`` says otherwise (2048^2
#: cells, about 34 MB a float64 array).
DEFAULT_CHUNK = 2048
#: The smallest chunk side accepted (smaller ones only multiply the tasks).
MIN_CHUNK = 4
#: Zone index of a cell whose zone is nodata (skipped by the reducer).
NODATA_ZONE = -1
#: Zone index of a cell whose zone id is not among the caller's ids.
UNKNOWN_ZONE = -2
#: How many unknown zone ids a message lists.
SHOWN_IDS = 5
RASTER_SUFFIXES = (".tif", ".tiff", ".nc")
TABLE_SUFFIXES = (".parquet", ".csv")
EXTRA_MODULES = ("xarray", "rioxarray", "dask", "dask.array", "distributed", "pyarrow",
                 "pyarrow.parquet")
MISSING_EXTRA = "[grid] needs the optional extra 'grid': pip install 'doseattr[grid]'"

IntArray = NDArray[np.int64]
FloatArray = NDArray[np.float64]


# -- the sections ---------------------------------------------------------------
@dataclass(frozen=True)
class GridSpec:
    """A checked ``[grid]`` section; paths as :meth:`Context.path` gives them.

    Either ``concentration`` and ``population`` (rasters; ``variable`` for a
    NetCDF concentration; optional ``zones``) or ``cells`` (a table) is set.
    ``error_gsd`` is the GSD of a multiplicative lognormal error per cell,
    ``None`` when the surface is taken as exact.
    """

    concentration: str | None = None
    variable: str | None = None
    population: str | None = None
    zones: str | None = None
    zone_names: str | None = None
    cells: str | None = None
    error_gsd: float | None = None
    chunk: int = DEFAULT_CHUNK

    @property
    def is_table(self) -> bool:
        return self.cells is not None


def parse_grid(section: Mapping[str, Any], ctx: Context) -> GridSpec:
    """Check ``[grid]`` (types already checked by the schema) into a
    :class:`GridSpec`; fails with :data:`MISSING_EXTRA` without the extra."""
    require_grid_extra(ctx.source)
    g = dict(section)
    given = only_one(g, ("concentration", "cells"), ctx, "grid")
    if given is None:
        raise ctx.error("missing key 'concentration' (a GeoTIFF or NetCDF raster, with "
                        "population) or 'cells' (a Parquet or CSV table of cells)",
                        "grid", "concentration")
    if given == "cells":
        for key in ("variable", "population", "zones"):
            if key in g:
                raise ctx.error(f"'{key}' goes with concentration rasters; a cells table has "
                                "its own columns value, population and zone", "grid", key)
        cells = _path(g, "cells", TABLE_SUFFIXES, ctx)
        raster: dict[str, str | None] = {}
    else:
        cells = None
        raster = _rasters(g, ctx)
    zone_names = None
    if "zone_names" in g:
        if given == "concentration" and "zones" not in g:
            raise ctx.error("zone_names names the zones of a zones raster; add zones = "
                            "\"...\" or remove zone_names", "grid", "zone_names")
        zone_names = ctx.table(g["zone_names"], "grid", "zone_names")
    return GridSpec(cells=cells, zone_names=zone_names, error_gsd=_error_gsd(g, ctx),
                    chunk=_chunk(g, ctx), **raster)


def _rasters(g: dict[str, Any], ctx: Context) -> dict[str, str | None]:
    conc = _path(g, "concentration", RASTER_SUFFIXES, ctx)
    if "population" not in g:
        raise ctx.error("missing key 'population' (a population raster on the "
                        "concentration's grid)", "grid", "population")
    netcdf = conc.lower().endswith(".nc")
    if netcdf and "variable" not in g:
        raise ctx.error("missing key 'variable' (the name of the concentration variable in "
                        "the NetCDF file)", "grid", "variable")
    if not netcdf and "variable" in g:
        raise ctx.error("variable names a NetCDF variable; a GeoTIFF has bands, not "
                        "variables: remove it", "grid", "variable")
    return {"concentration": conc, "variable": g["variable"].strip() if netcdf else None,
            "population": _path(g, "population", RASTER_SUFFIXES, ctx),
            "zones": _path(g, "zones", RASTER_SUFFIXES, ctx) if "zones" in g else None}


def _path(g: dict[str, Any], key: str, suffixes: tuple[str, ...], ctx: Context) -> str:
    path = ctx.path(g[key], "grid", key)
    if not path.lower().endswith(suffixes):
        raise ctx.error(f"{path} must end in {', '.join(suffixes)} (the format is told by the "
                        "file name)", "grid", key)
    return path


def _error_gsd(g: dict[str, Any], ctx: Context) -> float | None:
    if "error_gsd" not in g:
        return None
    gsd = float(g["error_gsd"])
    if not gsd > 1:
        raise ctx.error(f"error_gsd is the GSD of a lognormal error per cell and must be "
                        f"above 1 (omit it for no error), got {gsd:g}", "grid", "error_gsd")
    return gsd


def _chunk(g: dict[str, Any], ctx: Context) -> int:
    chunk = int(g.get("chunk", DEFAULT_CHUNK))
    if chunk < MIN_CHUNK:
        raise ctx.error(f"chunk is the cells per side of a block read at once, at least "
                        f"{MIN_CHUNK} (default {DEFAULT_CHUNK}), got {chunk}", "grid", "chunk")
    return chunk


SCHEDULER = re.compile(r"^(tcp|tls)://[^\s/:]+:\d{1,5}$")


def parse_compute(section: Mapping[str, Any], ctx: Context) -> str | None:
    """``[compute] scheduler``: the address of an existing dask.distributed
    scheduler (``tcp://host:port``), or ``None`` for dask's local threads."""
    address = section.get("scheduler")
    if address is None:
        return None
    address = str(address).strip()
    if not SCHEDULER.match(address):
        raise ctx.error(f"'{shown(address)}' is not a scheduler address; give it as "
                        "tcp://host:port (for example tcp://127.0.0.1:8786), or remove the key "
                        "to compute on this machine", "compute", "scheduler")
    return address


def require_grid_extra(source: str | None = None) -> None:
    """Raise :data:`MISSING_EXTRA` unless the extra's modules import."""
    for name in EXTRA_MODULES:
        try:
            importlib.import_module(name)
        except ImportError:
            raise InputError(MISSING_EXTRA, source=source) from None


# -- zones ---------------------------------------------------------------------
def read_zone_names(path: str) -> dict[int, str]:
    """The ``zone_names`` CSV: columns ``zone`` (an integer) and ``name``
    (text), each unique; returns names by zone id."""
    raw = read_raw(path)
    require_columns(raw, ("zone", "name"), "zone_names")
    names: dict[int, str] = {}
    seen: dict[str, int] = {}
    for row in raw.rows:
        zone = _integer(number(raw, row, "zone"), path, f"row {row.line}, column 'zone'")
        name = row.cells["name"]
        if not name:
            raise InputError("empty name; give each zone a name", source=path,
                             location=f"row {row.line}, column 'name'")
        if zone in names:
            raise InputError(f"zone {zone} is listed twice", source=path,
                             location=f"row {row.line}, column 'zone'")
        if name in seen:
            raise InputError(f"name '{shown(name)}' is used twice (also zone {seen[name]})",
                             source=path, location=f"row {row.line}, column 'name'")
        names[zone], seen[name] = name, zone
    return names


def _integer(value: float, source: str, location: str) -> int:
    if value != math.floor(value) or abs(value) > 2.0**53:
        raise InputError(f"zone ids are whole numbers, got {value:g}", source=source,
                         location=location)
    return int(value)


#: Largest span of zone ids looked up through a table (8 MB of indices).
LOOKUP_SPAN = 1 << 20


@dataclass(frozen=True)
class ZoneMap:
    """Zone ids to indices: ``ids[k]`` is index ``k``. ``source`` is the file
    the ids come from (for messages)."""

    ids: tuple[int, ...]
    source: str

    @classmethod
    def of(cls, zone_ids: Sequence[int], source: str) -> ZoneMap:
        ids = tuple(int(z) for z in zone_ids)
        if len(set(ids)) != len(ids):
            raise ValueError("zone ids must be unique")
        return cls(ids, source)

    def indices(self, zone: NDArray[Any], nodata: float | None = None
                ) -> tuple[NDArray[np.integer], IntArray]:
        """Each cell's zone index (int32 or int64), and the raw ids (int64)
        of cells in unknown zones.

        NaN and ``nodata`` become :data:`NODATA_ZONE`; ids not in
        :attr:`ids` become :data:`UNKNOWN_ZONE`. Non-integer ids are an
        input error naming :attr:`source`.
        """
        flat = np.asarray(zone).ravel()
        fast = self._integer_lookup(flat, nodata)
        if fast is not None:
            out, unknown = fast
            return out.reshape(np.shape(zone)), unknown
        valid = ~_missing(flat, nodata)
        values = flat[valid]
        if values.dtype.kind == "f":
            bad = values != np.floor(values)
            if bad.any():
                raise InputError(f"zone ids are whole numbers, found {values[bad][0]:g}",
                                 source=self.source)
        values = values.astype(np.int64)
        out = np.full(flat.shape, NODATA_ZONE, dtype=np.int64)
        index = self._lookup(values)
        out[valid] = index
        return out.reshape(np.shape(zone)), values[index == UNKNOWN_ZONE]

    def _integer_lookup(self, flat: NDArray[Any], nodata: float | None
                        ) -> tuple[NDArray[np.int32], IntArray] | None:
        """:meth:`indices` for integer ids spanning at most :data:`LOOKUP_SPAN`
        (from 0, or from the lowest id when some are negative) together with
        the listed ids: one gather per cell from a table that also holds the
        nodata value, into int32 (half the memory traffic of int64);
        ``None`` for other ids."""
        if flat.dtype.kind not in "iu" or not flat.size or not self.ids:
            return None
        known = np.asarray(self.ids, dtype=np.int64)
        low = min(int(flat.min()), int(known.min()), 0)
        high = max(int(flat.max()), int(known.max()))
        if high - low > LOOKUP_SPAN:
            return None
        table = np.full(high - low + 1, UNKNOWN_ZONE, dtype=np.int32)
        table[known - low] = np.arange(len(known))
        if nodata is not None and nodata == math.floor(nodata) and low <= nodata <= high:
            table[int(nodata) - low] = NODATA_ZONE
        out = np.take(table, flat if low == 0 else flat - low)
        unknown = out == UNKNOWN_ZONE
        return out, (flat[unknown].astype(np.int64) if unknown.any()
                     else np.zeros(0, dtype=np.int64))

    def _lookup(self, values: IntArray) -> IntArray:
        """Index of each id (:data:`UNKNOWN_ZONE` when not listed): a table
        indexed by id when the ids span at most :data:`LOOKUP_SPAN` (one
        gather per cell), else a binary search."""
        known = np.asarray(self.ids, dtype=np.int64)
        if not len(known):
            return np.full(values.shape, UNKNOWN_ZONE, dtype=np.int64)
        low, high = int(known.min()), int(known.max())
        if high - low <= LOOKUP_SPAN:
            table = np.full(high - low + 1, UNKNOWN_ZONE, dtype=np.int64)
            table[known - low] = np.arange(len(known))
            inside = (values >= low) & (values <= high)
            shifted = np.where(inside, values - low, 0)
            return np.where(inside, table[shifted], UNKNOWN_ZONE)
        order = np.argsort(known, kind="stable")
        pos = np.minimum(np.searchsorted(known[order], values), len(known) - 1)
        return np.where(known[order][pos] == values, order[pos], UNKNOWN_ZONE)


def _missing(values: NDArray[Any], nodata: float | None) -> NDArray[np.bool_]:
    miss = np.isnan(values) if values.dtype.kind == "f" else np.zeros(values.shape, bool)
    if nodata is not None and not math.isnan(nodata):
        miss |= values == nodata
    return miss


def unknown_error(unknown: Mapping[int, float], source: str) -> InputError:
    """One line naming up to :data:`SHOWN_IDS` zone ids found in the cells
    but not among the zones asked for, with their population."""
    ids = sorted(unknown, key=lambda z: -unknown[z])
    listed = ", ".join(f"{z} ({unknown[z]:.6g} people)" for z in ids[:SHOWN_IDS])
    more = f" and {len(ids) - SHOWN_IDS} more" if len(ids) > SHOWN_IDS else ""
    return InputError(f"{len(ids)} zone id(s) with cells have no row in the burden table: "
                      f"{listed}{more}; add rows for them or set those cells to nodata",
                      source=source)


# -- rasters ----------------------------------------------------------------------
@dataclass(frozen=True)
class Layer:
    """One raster, lazily opened: a 2-D dask array of ``chunk`` x ``chunk``
    blocks, the nodata value still in it (``None`` when decoded to NaN),
    and what identifies its grid."""

    path: str
    data: Any
    nodata: float | None
    shape: tuple[int, int]
    transform: tuple[float, ...] | None
    coords: tuple[FloatArray | None, FloatArray | None]
    crs: str | None


@dataclass(frozen=True)
class Rasters:
    concentration: Layer
    population: Layer
    zones: Layer | None


def open_rasters(spec: GridSpec) -> Rasters:
    """Open the rasters of ``spec`` lazily and refuse grids that differ
    from the concentration's (shape, transform or coordinates, CRS)."""
    require_grid_extra()
    assert spec.concentration is not None and spec.population is not None
    conc = open_layer(spec.concentration, spec.variable, spec.chunk, decode=True)
    pop = open_layer(spec.population, None, spec.chunk, decode=True)
    check_same_grid(pop, conc)
    zones = None
    if spec.zones is not None:
        zones = open_layer(spec.zones, None, spec.chunk, decode=False)
        check_same_grid(zones, conc)
    return Rasters(conc, pop, zones)


def open_layer(path: str, variable: str | None, chunk: int, *, decode: bool) -> Layer:
    """A GeoTIFF's single band or a NetCDF variable as a lazy 2-D array.

    ``decode=True`` turns nodata into NaN (values become floats);
    ``decode=False`` keeps the stored values and type (zone ids stay exact
    integers) and returns the nodata value to compare with.
    """
    try:
        if path.lower().endswith(".nc"):
            array, nodata = _netcdf(path, variable, decode)
        else:
            array, nodata = _geotiff(path, decode)
    except InputError:
        raise
    except (OSError, ValueError, RuntimeError, KeyError) as exc:
        raise InputError(f"cannot be read as a raster: {_one_line(exc)}", source=path) from None
    ydim, xdim = array.dims
    array = array.chunk({ydim: chunk, xdim: chunk})
    shape = (int(array.shape[0]), int(array.shape[1]))
    data = array.data
    if decode and nodata is not None:  # a GeoTIFF read raw: its nodata value to NaN, per block
        dtype = data.dtype if data.dtype.kind == "f" else np.dtype(np.float64)
        data = data.map_blocks(nodata_to_nan, nodata, dtype, dtype=dtype)
        nodata = None
    return Layer(path, data, nodata, shape, _transform(array, path), _coords(array),
                 _crs(array))


def nodata_to_nan(block: NDArray[Any], nodata: float, dtype: np.dtype[Any]) -> NDArray[Any]:
    """A copy of ``block`` as ``dtype`` (a float type) with NaN where it
    equals ``nodata``."""
    out = np.array(block, dtype=dtype)
    if not math.isnan(nodata):
        np.putmask(out, block == nodata, np.nan)
    return out


def _geotiff(path: str, decode: bool) -> tuple[Any, float | None]:
    """The band and its nodata value. Decoding with rioxarray's ``masked``
    reads through numpy masked arrays, several times the cost of the read
    itself; when the file's mask is only its nodata value (no mask band,
    no alpha), the band is read raw and :func:`open_layer` turns that value
    into NaN block by block, which gives the same values."""
    import rioxarray

    masked = decode and not _nodata_mask_only(path)
    array: Any = rioxarray.open_rasterio(path, masked=masked)
    if "band" in array.dims:
        if array.sizes["band"] != 1:
            raise InputError(f"has {array.sizes['band']} bands; give a single-band raster",
                             source=path)
        array = array.isel(band=0, drop=True)
    nodata = None if masked else array.rio.nodata
    return array, None if nodata is None else float(nodata)


def _nodata_mask_only(path: str) -> bool:
    """Whether the first band's mask is at most its nodata value."""
    import rasterio
    from rasterio.enums import MaskFlags

    with rasterio.open(path) as src:
        flags = set(src.mask_flag_enums[0]) if src.count else set()
    return flags <= {MaskFlags.nodata, MaskFlags.all_valid}


def _netcdf(path: str, variable: str | None, decode: bool) -> tuple[Any, float | None]:
    import rioxarray  # noqa: F401  (registers the .rio accessor used for the CRS)
    import xarray

    # decode_coords="all" keeps the grid-mapping variable (the CRS) as a coordinate
    ds = xarray.open_dataset(path, mask_and_scale=decode, decode_coords="all")
    names = [str(v) for v in ds.data_vars if ds[v].ndim >= 2]
    if variable is None:
        if len(names) != 1:
            found = ", ".join(names) if names else "none"
            raise InputError(f"holds {len(names)} gridded variables ({found}); give a file "
                             "with one variable", source=path)
        variable = names[0]
    if variable not in ds.data_vars:
        raise InputError(f"has no variable '{variable}' (variables: {', '.join(names)})",
                         source=path)
    array = ds[variable].squeeze(drop=True)
    if array.ndim != 2:
        raise InputError(f"variable '{variable}' has dimensions {', '.join(map(str, array.dims))}"
                         "; give a 2-D grid (y, x)", source=path)
    nodata = None
    if not decode:
        fill = array.encoding.get("_FillValue", array.attrs.get("_FillValue",
                                  array.attrs.get("missing_value")))
        nodata = None if fill is None else float(np.asarray(fill).ravel()[0])
    return array, nodata


def _transform(array: Any, path: str) -> tuple[float, ...] | None:
    """The affine transform of a GeoTIFF (a, b, c, d, e, f); ``None`` for
    NetCDF, whose grid is compared by its coordinates."""
    if path.lower().endswith(".nc"):
        return None
    return tuple(float(v) for v in tuple(array.rio.transform())[:6])


def _coords(array: Any) -> tuple[FloatArray | None, FloatArray | None]:
    out: list[FloatArray | None] = []
    for dim in array.dims:
        if dim in array.coords and np.issubdtype(array.coords[dim].dtype, np.number):
            out.append(np.asarray(array.coords[dim].values, dtype=np.float64))
        else:
            out.append(None)
    return out[0], out[1]


def _crs(array: Any) -> str | None:
    try:
        crs = array.rio.crs
    except Exception:  # rioxarray finds no spatial dimensions: no CRS to compare
        return None
    return None if crs is None else str(crs.to_string())


def check_same_grid(layer: Layer, reference: Layer) -> None:
    """Refuse ``layer`` unless its shape, transform (or coordinates) and CRS
    equal the ``reference`` layer's, naming both files and what differs.
    A CRS is compared when both files state one."""
    what = _grid_difference(layer, reference)
    if what is not None:
        raise InputError(f"grid differs from {reference.path}: {what}; give rasters on the "
                         "same grid (same shape, transform and CRS)", source=layer.path)


def _grid_difference(a: Layer, b: Layer) -> str | None:
    if a.shape != b.shape:
        return f"shape {b.shape[0]}x{b.shape[1]} vs {a.shape[0]}x{a.shape[1]}"
    if a.transform is not None and b.transform is not None:
        if not np.allclose(a.transform, b.transform, rtol=1e-9, atol=0.0):
            return f"transform {_affine(b.transform)} vs {_affine(a.transform)}"
    else:
        for axis, ca, cb in zip("yx", a.coords, b.coords):
            if ca is not None and cb is not None and not _same_axis(ca, cb):
                return f"{axis} coordinates {_axis(cb)} vs {_axis(ca)}"
    if a.crs is not None and b.crs is not None and a.crs != b.crs:
        return f"CRS {b.crs} vs {a.crs}"
    return None


def _same_axis(a: FloatArray, b: FloatArray) -> bool:
    """Equal to a millionth of a cell."""
    step = float(np.abs(np.diff(b)).min()) if len(b) > 1 else max(abs(float(b[0])), 1.0)
    return bool(np.all(np.abs(a - b) <= 1e-6 * step))


def _axis(c: FloatArray) -> str:
    step = f", step {c[1] - c[0]:.10g}" if len(c) > 1 else ""
    return f"from {c[0]:.10g}{step}"


def _affine(t: tuple[float, ...]) -> str:
    return "(" + ", ".join(f"{v:.10g}" for v in t) + ")"


def _one_line(exc: BaseException, limit: int = 200) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= limit else text[:limit - 3] + "..."


# -- cell tables --------------------------------------------------------------------
CELL_COLUMNS = ("value", "population")


@dataclass(frozen=True)
class CellChunk:
    """Rows of a cell table: value, population (NaN where empty) and zone
    (NaN where empty; ``None`` when the table has no zone column)."""

    value: FloatArray
    population: FloatArray
    zone: FloatArray | None


def iter_cells(path: str, rows: int) -> Iterator[CellChunk]:
    """Read a cell table ``rows`` rows at a time (pandas for CSV, pyarrow's
    ``iter_batches`` for Parquet). Column names are matched without regard
    to case or surrounding spaces; other columns are ignored."""
    require_grid_extra()
    if path.lower().endswith(".parquet"):
        yield from _parquet(path, rows)
    else:
        yield from _csv(path, rows)


def _columns(names: Sequence[str], path: str) -> dict[str, str]:
    """The file's name of each of value, population and (if present) zone."""
    by_key = {str(n).strip().lower(): str(n) for n in names}
    for key in CELL_COLUMNS:
        if key not in by_key:
            raise InputError(f"missing column '{key}' (a cells table needs columns value and "
                             "population, optionally zone)", source=path,
                             location=f"column '{key}'")
    return {k: by_key[k] for k in (*CELL_COLUMNS, "zone") if k in by_key}


def _csv(path: str, rows: int) -> Iterator[CellChunk]:
    import pandas as pd

    try:
        reader = pd.read_csv(path, chunksize=rows, dtype=str, keep_default_na=False,
                             skip_blank_lines=False, skipinitialspace=True)
        first_line = 2  # the header is row 1
        with reader:
            columns: dict[str, str] | None = None
            for frame in reader:
                columns = columns or _columns(list(frame.columns), path)
                yield _chunk_of(frame, columns, path, first_line)
                first_line += len(frame)
    except (pd.errors.ParserError, UnicodeDecodeError, OSError) as exc:
        raise InputError(f"cannot be read as CSV: {_one_line(exc)}", source=path) from None
    except pd.errors.EmptyDataError:
        raise InputError("the file is empty (no header row)", source=path,
                         location="row 1") from None


def _parquet(path: str, rows: int) -> Iterator[CellChunk]:
    import pyarrow.parquet as pq

    try:
        file = pq.ParquetFile(path)
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot be read as Parquet: {_one_line(exc)}", source=path) from None
    columns = _columns(file.schema_arrow.names, path)
    first_row = 1
    with file:
        for batch in file.iter_batches(batch_size=rows, columns=list(columns.values())):
            frame = batch.to_pandas()
            yield _chunk_of(frame, columns, path, first_row, data_rows=True)
            first_row += len(frame)


def _chunk_of(frame: Any, columns: dict[str, str], path: str, first: int,
              data_rows: bool = False) -> CellChunk:
    values = {key: _numbers(frame[name], key, path, first, data_rows)
              for key, name in columns.items()}
    return CellChunk(values["value"], values["population"], values.get("zone"))


def _numbers(column: Any, key: str, path: str, first: int, data_rows: bool) -> FloatArray:
    """A column as floats, empty cells (and nulls) as NaN; text that is not
    a number is an error naming its row (the file's line for CSV, the data
    row for Parquet)."""
    import pandas as pd

    if column.dtype.kind in "fiub":
        out = column.to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        text = column.astype("string").str.strip()
        out = pd.to_numeric(text.replace("", pd.NA), errors="coerce").to_numpy(
            dtype=np.float64, na_value=np.nan)
        bad = np.isnan(out) & text.notna().to_numpy() & (text != "").to_numpy(dtype=bool,
                                                                                 na_value=False)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            where = f"data row {first + i}" if data_rows else f"row {first + i}"
            raise InputError(f"text '{shown(str(text.iloc[i]))}' where a number belongs",
                             source=path, location=f"{where}, column '{key}'")
    if np.isinf(out).any():
        i = int(np.flatnonzero(np.isinf(out))[0])
        where = f"data row {first + i}" if data_rows else f"row {first + i}"
        raise InputError("not a finite number", source=path, location=f"{where}, column '{key}'")
    return out


def zone_index_of_cells(chunk: CellChunk, zones: ZoneMap | None
                        ) -> tuple[NDArray[np.integer], IntArray]:
    """Zone indices of a table's rows (all 0 without a zone column or a map)
    and the raw ids of rows in unknown zones."""
    if chunk.zone is None or zones is None:
        return np.zeros(len(chunk.value), dtype=np.int64), np.zeros(0, dtype=np.int64)
    return zones.indices(chunk.zone)


def table_has_zones(path: str) -> bool:
    """Whether a cell table has a ``zone`` column (read from its header)."""
    require_grid_extra()
    if path.lower().endswith(".parquet"):
        import pyarrow.parquet as pq

        names = pq.read_schema(path).names
    else:
        import pandas as pd

        names = list(pd.read_csv(path, nrows=0).columns)
    return "zone" in {str(n).strip().lower() for n in names}

