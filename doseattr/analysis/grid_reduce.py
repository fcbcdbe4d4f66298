"""One pass over a grid's chunks, reduced with Dask to per-zone sums.

Each block of the concentration, population and zone rasters is handed to
the core's reducer (``doseattr.core.exposure.grid.reduce_block`` unless
another is given), which returns the block's partial sums; partial sums add
exactly (``BlockSums + BlockSums``), so a tree of additions over the blocks
gives the grid's sums in any order. Only blocks in flight are in memory:
a few ``chunk`` x ``chunk`` arrays per worker thread, whatever the grid's
size.

The computation runs on dask's local threaded scheduler, or, given the
address of an existing ``dask.distributed`` scheduler, on its cluster
through a :class:`distributed.Client` opened for the computation and closed
after it (the files must then be readable at the same paths on the
workers). Cell tables are read in this process, ``chunk * chunk`` rows at a
time.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from doseattr.analysis.grid_inputs import (
    UNKNOWN_ZONE,
    GridSpec,
    ZoneMap,
    iter_cells,
    open_rasters,
    require_grid_extra,
    unknown_error,
    zone_index_of_cells,
)
from doseattr.errors import InputError

#: ``reduce_block(conc, pop, zone_index, n_zones) -> BlockSums``.
Reducer = Callable[[NDArray[Any], NDArray[Any], NDArray[np.integer], int], Any]
#: Partial results merged per task of the tree sum.
FAN_IN = 8
#: Longest side, in cells, of the sample of the rasters kept for maps.
MAP_SIDE = 500


@dataclass(frozen=True, eq=False)
class GridSample:
    """Every ``step``-th cell of the rasters in each direction, for maps:
    concentration and population (NaN where nodata), each cell's zone
    index (negative: nodata or not a reported zone), the grid's
    ``extent`` (left, right, bottom, top) and ``crs``, when known."""

    concentration: NDArray[np.float64]
    population: NDArray[np.float64]
    zone_index: NDArray[np.int64]
    step: int
    extent: tuple[float, float, float, float] | None = None
    crs: str | None = None


@dataclass(frozen=True)
class UnknownZone:
    """Cells whose zone id is not among those asked for."""

    zone: int
    cells: int
    population: float


@dataclass(frozen=True)
class GridNotes:
    """What the pass read: cells in the grid (or rows of the table), cells
    skipped as nodata and their population (NaN or negative values, nodata
    zones), the chunk side, and the zones not asked for."""

    cells: int
    skipped: int
    skipped_population: float
    chunk: int
    unknown: tuple[UnknownZone, ...] = ()
    scheduler: str | None = None
    table: bool = False
    #: Whether the cells carry zones (a zones raster, a table's zone column).
    zoned: bool = False
    sample: GridSample | None = field(default=None, compare=False)

    def lines(self) -> tuple[str, ...]:
        where = self.scheduler or "local threads"
        read = (f"{self.chunk * self.chunk} rows at a time (in this process)" if self.table
                else f"in chunks of {self.chunk} x {self.chunk} ({where})")
        out = [f"grid: {self.cells} cells read {read}",
               f"grid: {self.skipped} cells skipped as nodata, holding a population of "
               f"{self.skipped_population:.6g}"]
        for u in self.unknown:
            out.append(f"grid: zone {u.zone} is not among the zones reported: {u.cells} cells, "
                       f"population {u.population:.6g}")
        return tuple(out)


#: A block's cells of the map sample: (sample row, sample column, arrays).
Piece = tuple[int, int, tuple[NDArray[Any], ...]]


@dataclass
class _Partial:
    """A block's sums, its cell count, its cells in unknown zones (cells
    and population by zone id) and its cells of the map sample."""

    sums: Any
    cells: int
    unknown: dict[int, tuple[int, float]] = field(default_factory=dict)
    pieces: list[Piece] = field(default_factory=list)


def reduce_grid(spec: GridSpec, zone_ids: Sequence[int], *, scheduler: str | None = None,
                reducer: Reducer | None = None, strict: bool = True) -> tuple[Any, GridNotes]:
    """Reduce the grid of ``spec`` to per-zone sums in one pass.

    Parameters
    ----------
    spec
        The checked ``[grid]`` section.
    zone_ids
        The zones reported, in order: zone id ``zone_ids[k]`` is row ``k``
        of the sums. Ignored when the cells carry no zone (a grid without
        zones raster, a table without zone column): every cell is zone 0
        and the sums have one row.
    scheduler
        ``None`` for dask's local threads, or ``"tcp://host:port"`` of an
        existing dask.distributed scheduler.
    reducer
        ``reduce_block(conc, pop, zone_index, n_zones) -> BlockSums``;
        default the core's.
    strict
        Refuse (one line naming the zones file and up to five ids) cells
        with population in zones not in ``zone_ids``; otherwise they are
        skipped and listed in the notes.

    Returns
    -------
    The grid's ``BlockSums`` (cells in unknown zones skipped, not counted as
    nodata) and :class:`GridNotes`.
    """
    require_grid_extra()
    reduce_block = reducer or _core_reducer()
    sample = None
    if spec.is_table:
        assert spec.cells is not None
        total, zoned = _table(spec.cells, spec.chunk, zone_ids, reduce_block)
        source = spec.cells
    else:
        total, sample = _rasters(spec, zone_ids, reduce_block, scheduler)
        source = spec.zones or str(spec.concentration)
        zoned = spec.zones is not None
    unknown = tuple(UnknownZone(z, c, p) for z, (c, p) in sorted(total.unknown.items()))
    peopled = {u.zone: u.population for u in unknown if u.population > 0}
    if strict and peopled:
        raise unknown_error(peopled, source)
    sums = total.sums
    lost_cells = sum(u.cells for u in unknown)
    lost_people = sum(u.population for u in unknown)
    notes = GridNotes(cells=total.cells, skipped=int(sums.skipped) - lost_cells,
                      skipped_population=max(float(sums.skipped_population) - lost_people, 0.0),
                      chunk=spec.chunk, unknown=unknown,
                      scheduler=None if spec.is_table else scheduler, table=spec.is_table,
                      zoned=zoned, sample=sample)
    return sums, notes


def _core_reducer() -> Reducer:
    from doseattr.core.exposure.grid import (  # type: ignore[import-not-found, unused-ignore]
        reduce_block,
    )

    return reduce_block  # type: ignore[no-any-return, unused-ignore]


def _release_scratch() -> None:
    """Free the core reducer's per-thread work arrays after a pass."""
    from doseattr.core.exposure.grid import release_scratch

    release_scratch()


# -- rasters ------------------------------------------------------------------
def _rasters(spec: GridSpec, zone_ids: Sequence[int], reduce_block: Reducer,
             scheduler: str | None) -> tuple[_Partial, GridSample]:
    import dask

    layers = open_rasters(spec)
    zones = None if layers.zones is None else ZoneMap.of(zone_ids, layers.zones.path)
    n_zones = 1 if zones is None else len(zones.ids)
    conc = layers.concentration.data.to_delayed().ravel()
    pop = layers.population.data.to_delayed().ravel()
    zone = ([None] * len(conc) if layers.zones is None
            else layers.zones.data.to_delayed().ravel())
    nodata = None if layers.zones is None else layers.zones.nodata
    block = dask.delayed(_raster_block, pure=True)
    step = max(1, -(-max(layers.concentration.shape) // MAP_SIDE))
    origins = _block_origins(layers.concentration.data.chunks)
    assert layers.population.data.chunks == layers.concentration.data.chunks
    parts = [block(c, p, z, zones, nodata, n_zones, reduce_block, origin, step)
             for c, p, z, origin in zip(conc, pop, zone, origins, strict=True)]
    root = _tree(parts, dask.delayed(_merge, pure=True))
    try:
        (total,) = _compute(root, scheduler=scheduler)
    finally:
        _release_scratch()
    conc_s, pop_s, zone_s = _assemble(total.pieces, layers.concentration.shape, step)
    if zones is None or zone_s is None:
        index = np.zeros(np.shape(conc_s), dtype=np.int64)
    else:
        index = zones.indices(zone_s, nodata)[0].astype(np.int64)
    sample = GridSample(_floats(conc_s), _floats(pop_s), index, step,
                        _extent(layers.concentration), layers.concentration.crs)
    return total, sample


def _block_origins(chunks: tuple[tuple[int, ...], ...]) -> list[tuple[int, int]]:
    """(first row, first column) of each block, in the order of
    ``to_delayed().ravel()`` (row of blocks by row of blocks)."""
    rows = np.cumsum((0, *chunks[0][:-1]))
    cols = np.cumsum((0, *chunks[1][:-1]))
    return [(int(r), int(c)) for r in rows for c in cols]


def _piece(origin: tuple[int, int], step: int, *blocks: Any) -> Piece:
    """The cells of a block on the sample's lattice (global rows and columns
    divisible by ``step``), taken while the block is in memory, so the
    sample costs no second read of the rasters."""
    r0, c0 = origin
    dr, dc = -r0 % step, -c0 % step
    arrays = tuple(np.array(np.asarray(b)[dr::step, dc::step]) for b in blocks)
    return (r0 + dr) // step, (c0 + dc) // step, arrays


def _assemble(pieces: list[Piece], shape: tuple[int, int], step: int
              ) -> tuple[NDArray[Any], NDArray[Any], NDArray[Any] | None]:
    """The sample (every ``step``-th row and column of the grid) from the
    blocks' pieces: concentration, population and zones (``None`` without)."""
    size = (-(-shape[0] // step), -(-shape[1] // step))
    kinds = len(pieces[0][2])
    out = [np.empty(size, dtype=pieces[0][2][k].dtype) for k in range(kinds)]
    for r, c, arrays in pieces:
        for k, a in enumerate(arrays):
            out[k][r:r + a.shape[0], c:c + a.shape[1]] = a
    return out[0], out[1], out[2] if kinds > 2 else None


def _extent(layer: Any) -> tuple[float, float, float, float] | None:
    """(left, right, bottom, top) of a north-up raster, from its transform
    or its cell-centre coordinates; ``None`` when neither says."""
    rows, cols = layer.shape
    if layer.transform is not None:
        a, b, c, d, e, f = layer.transform
        if b or d:
            return None  # rotated grid: no axis-aligned extent
        xs, ys = (c, c + a * cols), (f, f + e * rows)
        return min(xs), max(xs), min(ys), max(ys)
    y, x = layer.coords
    if x is None or y is None or len(x) < 2 or len(y) < 2:
        return None
    dx, dy = abs(x[1] - x[0]) / 2, abs(y[1] - y[0]) / 2
    return float(x.min() - dx), float(x.max() + dx), float(y.min() - dy), float(y.max() + dy)


def _raster_block(conc: Any, pop: Any, zone: Any, zones: ZoneMap | None, nodata: float | None,
                  n_zones: int, reduce_block: Reducer, origin: tuple[int, int] = (0, 0),
                  step: int = 1) -> _Partial:
    # as read (float32 stays float32): the reducer skips non-finite values itself
    c, p = np.asarray(conc), np.asarray(pop)
    index: NDArray[np.integer]
    if zones is None:
        index = np.zeros(c.shape, dtype=np.int64)
        unknown_ids = np.zeros(0, dtype=np.int64)
    else:
        index, unknown_ids = zones.indices(zone, nodata)
    part = _partial(reduce_block(c, p, index, n_zones), c, p, index, unknown_ids)
    part.pieces.append(_piece(origin, step, c, p) if zone is None
                       else _piece(origin, step, c, p, zone))
    return part


def _floats(block: Any) -> NDArray[np.float64]:
    """A block as float64, infinities as NaN (nodata)."""
    x = np.array(block, dtype=np.float64)
    x[~np.isfinite(x)] = np.nan
    return x


def _partial(sums: Any, conc: NDArray[Any], pop: NDArray[Any], index: NDArray[np.integer],
             unknown_ids: NDArray[np.int64]) -> _Partial:
    """Wrap a block's sums with its cell count and, per unknown zone id, the
    cells and their population (finite, non-negative population only)."""
    unknown: dict[int, tuple[int, float]] = {}
    if unknown_ids.size:
        people = pop.ravel()[index.ravel() == UNKNOWN_ZONE]
        people = np.where(np.isfinite(people) & (people >= 0), people, 0.0)
        ids, inverse = np.unique(unknown_ids, return_inverse=True)
        cells = np.bincount(inverse, minlength=len(ids))
        total = np.bincount(inverse, weights=people, minlength=len(ids))
        unknown = {int(z): (int(n), float(t)) for z, n, t in zip(ids, cells, total)}
    return _Partial(sums, int(conc.size), unknown)


def _merge(*parts: _Partial) -> _Partial:
    sums = parts[0].sums
    unknown = dict(parts[0].unknown)
    for part in parts[1:]:
        sums = sums + part.sums
        for z, (n, t) in part.unknown.items():
            n0, t0 = unknown.get(z, (0, 0.0))
            unknown[z] = (n0 + n, t0 + t)
    return _Partial(sums, sum(p.cells for p in parts), unknown,
                    [piece for p in parts for piece in p.pieces])


def _tree(parts: list[Any], merge: Callable[..., Any]) -> Any:
    """Sum ``parts`` in a tree of fan-in :data:`FAN_IN` (depth log8 of the
    block count), so no task holds more than a few partial sums."""
    while len(parts) > 1:
        parts = [merge(*parts[i:i + FAN_IN]) for i in range(0, len(parts), FAN_IN)]
    return parts[0]


def _compute(*roots: Any, scheduler: str | None) -> tuple[Any, ...]:
    """``dask.compute(*roots)`` in one pass (shared reads are done once)."""
    import dask

    if scheduler is None:
        return tuple(dask.compute(*roots, scheduler="threads"))
    from distributed import Client

    try:
        client = Client(scheduler, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise InputError(f"cannot reach the dask scheduler at {scheduler} ({exc}); start it, "
                         "or remove the key to compute on this machine",
                         location="[compute] key 'scheduler'") from None
    try:
        return tuple(dask.compute(*roots, scheduler=client))
    finally:
        client.close()


# -- cell tables ----------------------------------------------------------------
def _table(path: str, chunk_side: int, zone_ids: Sequence[int],
           reduce_block: Reducer) -> tuple[_Partial, bool]:
    total: _Partial | None = None
    zones: ZoneMap | None = None
    n_zones = 1
    for chunk in iter_cells(path, rows=chunk_side * chunk_side):
        if chunk.zone is not None and zones is None:
            zones = ZoneMap.of(zone_ids, path)
            n_zones = len(zones.ids)
        value, pop = _floats(chunk.value), _floats(chunk.population)
        index, unknown_ids = zone_index_of_cells(chunk, zones)
        part = _partial(reduce_block(value, pop, index, n_zones), value, pop, index,
                        unknown_ids)
        total = part if total is None else _merge(total, part)
    if total is None:
        raise InputError("the table has a header but no data rows", source=path)
    return total, zones is not None

