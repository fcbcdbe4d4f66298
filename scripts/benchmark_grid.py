"""Benchmark: a gridded-exposure analysis against a bare numpy pass over the
same rasters.

Inputs are generated here (not data; every number is invented):

- ``concentration.tif`` (float32): a smooth field of 4 to 26 units (sines of
  the cell's position, :func:`smooth_field`) times mean-one lognormal noise,
  ``exp(0.4 Z - 0.08)``, ``Z`` standard normal per cell. No nodata.
- ``population.tif`` (float32): people per cell, lognormal
  ``exp(-0.5 + Z')`` (mean 1), with about 15% of the cells set to 0 and
  about 2% to the nodata value :data:`POP_NODATA`.
- ``zones.tif`` (int32): ``--zones`` zone ids 1..Z laid out as a
  ``sqrt(Z)`` x ``sqrt(Z)`` chessboard of equal blocks (Z a perfect square).
- ``burden.csv``: one row per zone (stratum = zone name), an invented
  population (50,000 to 500,000) and rate (30 to 90 cases per 100,000 a year).
- ``zone_names.csv``: zone id to name ("Zone 001", ...).

The rasters are written band by band (:data:`TILE` rows at a time, never the
whole array in memory) with rasterio windowed writes, tiled 512 x 512 and
**uncompressed**: decompression would cost both passes the same and hide the
difference this benchmark is after (the reduction's cost over a plain read),
and 1e8 cells take only about 1.2 GB of disk. ``--compress deflate`` writes
compressed files instead. The files are freshly written, so both passes
read them mostly from the page cache; this measures computing, not a disk.

The generation and the two measured passes each run in a child process of
their own (``subprocess`` running this script with ``--child``), with
``GDAL_CACHEMAX`` set (default 64 MB) in the children's environment, so that
each peak resident memory (``resource.getrusage(RUSAGE_SELF).ru_maxrss``) is
its own. Linux carries a parent's high-water mark into its children, so the
parent generates nothing itself and its size at each start is printed as
the floor of the child's figure; ``VmHWM`` (/proc/self/status, not
inherited) is printed beside it. Measured:

1. the bare pass: every ``chunk`` x ``chunk`` window of the three rasters read
   with rasterio and ``sum(pop * conc)`` and ``sum(pop)`` per zone by
   ``np.bincount`` (one thread): the baseline "read + multiply-add";
2. the analysis: ``doseattr run`` on an analysis file with ``[grid]``,
   ``[burden]``, a log-linear curve entered directly (RR 1.08 per 10 units,
   95% CI 1.05 to 1.11, invented) and ``[uncertainty] draws``, run in the
   child by ``doseattr.cli.main``; its parts (the dask pass, the census
   exposures, the rest of the analysis, writing the outputs) are timed by
   wrapping those functions in the child (:data:`TIMED`). While a version
   refuses ``[grid]`` ("not supported by this version yet"), the
   child measures the fallback instead, in parts: ``reduce_grid`` (the dask
   pass, local threads), the per-zone and pooled census exposures of the
   ``GridSummary``, and the point values plus a ``--draws`` propagation with
   the core (``doseattr.core.uncertainty.propagate``) over the pooled
   population and every zone. The output says which one was measured.

Times exclude the children's start-up and imports (matplotlib's pyplot,
which the figures import on first use, included). Printed: the machine,
cells, the wall and CPU times (``time.process_time``: every thread of the
child, so the analysis's can exceed its wall time on two cores), ns per
cell, the ratio analysis / bare pass (wall, and CPU as the steadier figure
on a shared machine), the load average and each peak.

Usage:  python scripts/benchmark_grid.py [--side 10000] [--zones 100]
        [--draws 1000] [--chunk 2048] [--folder DIR] [--keep] [--reuse DIR] [--smoke]
        [--compress none|deflate] [--gdal-cachemax 64]
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import io
import json
import math
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

#: Rows written at once and the GeoTIFF tile side.
TILE = 512
#: Population nodata value (written in the GeoTIFF's nodata tag).
POP_NODATA = -9999.0
#: Share of population cells set to 0, and to nodata (from one uniform draw).
ZERO_SHARE, NODATA_SHARE = 0.15, 0.02
#: Log SD of the concentration noise (mean-one lognormal: exp(s Z - s^2/2)).
NOISE_LOG_SD = 0.4
SEED = 20261202
#: The invented log-linear curve: RR per PER units and its 95% CI.
RR, RR_CI, PER = 1.08, (1.05, 1.11), 10.0
CELL_SIZE = 100.0  # metres, on an invented origin in EPSG:3035
ORIGIN = (4_000_000.0, 3_000_000.0)
SMOKE_SIDE = 2000
REFUSED = "not supported by this version yet"
FILES = {"concentration": "concentration.tif", "population": "population.tif",
         "zones": "zones.tif"}

FloatArray = NDArray[np.float64]

# this checkout's doseattr, not whichever one the environment has installed
ROOT = str(Path(__file__).resolve().parents[1])
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)


# -- the synthetic grid ---------------------------------------------------------
@dataclass(frozen=True)
class Layout:
    """A ``rows`` x ``cols`` grid with ``zones`` zones (a perfect square) in
    a chessboard of ``sqrt(zones)`` blocks a side; ``tile`` rows a band."""

    rows: int
    cols: int
    zones: int
    seed: int = SEED
    tile: int = TILE

    @property
    def per_side(self) -> int:
        k = math.isqrt(self.zones)
        if k * k != self.zones:
            raise ValueError(f"--zones must be a perfect square (a k x k chessboard), got "
                             f"{self.zones}")
        return k

    @property
    def bands(self) -> int:
        return -(-self.rows // self.tile)

    @property
    def cells(self) -> int:
        return self.rows * self.cols


def zone_ids(layout: Layout, rows: NDArray[Any], cols: NDArray[Any]) -> NDArray[np.int32]:
    """Zone id ``1 + k * (row k / rows) + (col k / cols)`` (integer division)."""
    k = layout.per_side
    out = (rows * k // layout.rows) * k + cols * k // layout.cols + 1
    return out.astype(np.int32)


def smooth_field(layout: Layout, rows: NDArray[Any], cols: NDArray[Any]) -> NDArray[np.float32]:
    """``12 + 8 sin(3 pi u) cos(2 pi v) + 6 v`` at cell centres ``u`` (column)
    and ``v`` (row) scaled to [0, 1]: between 4 and 26 (invented)."""
    u = ((cols + 0.5) / layout.cols).astype(np.float32)
    v = ((rows + 0.5) / layout.rows).astype(np.float32)
    return (12 + 8 * np.sin(3 * np.pi * u) * np.cos(2 * np.pi * v) + 6 * v).astype(np.float32)


def band(layout: Layout, b: int) -> tuple[NDArray[np.float32], NDArray[np.float32],
                                           NDArray[np.int32]]:
    """Concentration, population and zones of band ``b`` (rows
    ``b * tile`` to ``(b + 1) * tile``). Its random numbers come from
    ``numpy.random.default_rng([seed, b])`` in this order: the
    concentration's normals, the population's normals, the uniforms that
    pick zero (below :data:`ZERO_SHARE`) and nodata (above
    ``1 - NODATA_SHARE``) cells; all float32, shape (band rows, cols)."""
    r0, r1 = b * layout.tile, min(layout.rows, (b + 1) * layout.tile)
    rows = np.arange(r0, r1)[:, None]
    cols = np.arange(layout.cols)[None, :]
    shape = (r1 - r0, layout.cols)
    rng = np.random.default_rng([layout.seed, b])
    s = np.float32(NOISE_LOG_SD)
    conc = rng.standard_normal(shape, dtype=np.float32)
    conc *= s
    conc -= s * s / 2
    np.exp(conc, out=conc)
    conc *= smooth_field(layout, rows, cols)
    pop = rng.standard_normal(shape, dtype=np.float32)
    pop -= np.float32(0.5)
    np.exp(pop, out=pop)
    pick = rng.random(shape, dtype=np.float32)
    pop[pick < ZERO_SHARE] = 0.0
    pop[pick > 1 - NODATA_SHARE] = POP_NODATA
    zones = np.broadcast_to(zone_ids(layout, rows, cols), shape)
    return conc, pop, np.ascontiguousarray(zones)


def write_rasters(layout: Layout, folder: Path, compress: str | None = None) -> None:
    """The three GeoTIFFs of :func:`band`, one band of rows at a time."""
    import rasterio
    from rasterio.transform import Affine
    from rasterio.windows import Window

    transform = Affine(CELL_SIZE, 0.0, ORIGIN[0], 0.0, -CELL_SIZE, ORIGIN[1])
    profile = dict(driver="GTiff", width=layout.cols, height=layout.rows, count=1,
                   crs="EPSG:3035", transform=transform,
                   tiled=True, blockxsize=layout.tile, blockysize=layout.tile, BIGTIFF="IF_SAFER")
    if compress:
        profile["compress"] = compress
    kinds = {"concentration": ("float32", None), "population": ("float32", POP_NODATA),
             "zones": ("int32", None)}
    with contextlib.ExitStack() as stack:
        out = [stack.enter_context(rasterio.open(folder / FILES[k], "w", dtype=dtype,
                                                 nodata=nodata, **profile))
               for k, (dtype, nodata) in kinds.items()]
        for b in range(layout.bands):
            arrays = band(layout, b)
            window = Window(0, b * layout.tile, layout.cols, arrays[0].shape[0])
            for dst, array in zip(out, arrays, strict=True):
                dst.write(array, 1, window=window)


def write_tables(layout: Layout, folder: Path) -> list[str]:
    """``zone_names.csv`` and ``burden.csv`` (invented numbers); returns the names."""
    rng = np.random.default_rng([layout.seed, 999_999])
    names = [f"Zone {z:03d}" for z in range(1, layout.zones + 1)]
    with open(folder / "zone_names.csv", "w", encoding="utf-8") as f:
        f.write("# Invented zone names for the doseattr grid benchmark.\nzone,name\n")
        f.writelines(f"{z},{n}\n" for z, n in enumerate(names, start=1))
    population = np.round(rng.uniform(50_000, 500_000, layout.zones))
    rate = np.round(rng.uniform(30, 90, layout.zones), 1)
    with open(folder / "burden.csv", "w", encoding="utf-8") as f:
        f.write("# EVERY NUMBER IS INVENTED (doseattr grid benchmark): population and yearly "
                "cases per 100,000 by zone.\nstratum,population,rate\n")
        f.writelines(f"{n},{p:.0f},{r:.1f}\n" for n, p, r in zip(names, population, rate))
    return names


def grid_section(chunk: int) -> dict[str, Any]:
    return {"concentration": FILES["concentration"], "population": FILES["population"],
            "zones": FILES["zones"], "zone_names": "zone_names.csv", "chunk": chunk}


def write_analysis(folder: Path, chunk: int, draws: int) -> Path:
    """The analysis file (invented curve) next to the rasters and tables."""
    grid = "\n".join(f"{k} = {json.dumps(v)}" for k, v in grid_section(chunk).items())
    text = f"""# doseattr grid benchmark. EVERY NUMBER IS INVENTED (a synthetic grid).
title = "Grid benchmark (synthetic grid, invented numbers)"
unit = "ug/m3"

[grid]
{grid}

[curve]
model = "log-linear"
rr = {RR}
per = {PER}
ci = [{RR_CI[0]}, {RR_CI[1]}]

[uncertainty]
draws = {draws}
seed = {SEED}

[burden]
table = "burden.csv"
"""
    path = folder / "analysis.toml"
    path.write_text(text, encoding="utf-8")
    return path


# -- the bare pass ----------------------------------------------------------------
def windows(rows: int, cols: int, chunk: int) -> Iterator[Any]:
    from rasterio.windows import Window

    for r in range(0, rows, chunk):
        for c in range(0, cols, chunk):
            yield Window(c, r, min(chunk, cols - c), min(chunk, rows - r))


def bare_pass(folder: Path, chunk: int, zones: int) -> tuple[FloatArray, FloatArray, int]:
    """Read every window of the three rasters; per zone id (index 0..Z),
    ``sum(pop * conc)`` and ``sum(pop)`` over cells whose population is
    not nodata, by ``np.bincount``; and the cells read."""
    import rasterio

    dose = np.zeros(zones + 1)
    people = np.zeros(zones + 1)
    cells = 0
    with contextlib.ExitStack() as stack:
        src = [stack.enter_context(rasterio.open(folder / FILES[k]))
               for k in ("concentration", "population", "zones")]
        nodata = src[1].nodata
        for w in windows(src[0].height, src[0].width, chunk):
            conc, pop, zone = (s.read(1, window=w) for s in src)
            pop[pop == nodata] = 0.0
            z = zone.ravel()
            dose += np.bincount(z, weights=(pop * conc).ravel(), minlength=zones + 1)
            people += np.bincount(z, weights=pop.ravel(), minlength=zones + 1)
            cells += conc.size
    return dose, people, cells


# -- the analysis -----------------------------------------------------------------
#: Functions timed inside ``doseattr run`` (module, name, label), outermost first;
#: each is looked up at call time by its caller, so wrapping the attribute
#: times every call. A missing one is skipped (the code may move).
TIMED = (("doseattr.analysis.config", "load_analysis", "load_analysis (read, check)"),
         ("doseattr.analysis.pipeline", "run_analysis", "run_analysis"),
         ("doseattr.analysis.grid_exposure", "build_grid", "build_grid"),
         ("doseattr.analysis.grid_exposure", "reduce_grid", "reduce_grid (dask pass)"),
         ("doseattr.outputs.write", "write_outputs", "write_outputs (files, report)"))


@contextlib.contextmanager
def timing(spent: dict[str, float]) -> Iterator[None]:
    """Wrap the :data:`TIMED` functions to add their wall time to ``spent``
    (behaviour unchanged); restore them afterwards."""
    saved = []
    for module_name, name, label in TIMED:
        with contextlib.suppress(ImportError):
            module = importlib.import_module(module_name)
            if hasattr(module, name):
                saved.append((module, name, getattr(module, name)))
                setattr(module, name, _timed(getattr(module, name), label, spent))
    try:
        yield
    finally:
        for module, name, original in saved:
            setattr(module, name, original)


def _timed(fn: Any, label: str, spent: dict[str, float]) -> Any:
    """``fn`` adding its wall time to ``spent[label]`` and its CPU time
    (every thread of the process, ``time.process_time``) to
    ``spent[CPU + label]``."""
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        t0, c0 = time.perf_counter(), time.process_time()
        try:
            return fn(*args, **kwargs)
        finally:
            spent[label] = spent.get(label, 0.0) + time.perf_counter() - t0
            spent[CPU + label] = spent.get(CPU + label, 0.0) + time.process_time() - c0
    return wrapper


#: Prefix of the CPU times in ``spent``.
CPU = "cpu: "


def analysis_parts(spent: dict[str, float], total: float, prefix: str = "") -> dict[str, float]:
    """Exclusive times: each timed function without the ones inside it
    (``prefix`` :data:`CPU`: the CPU times)."""
    def get(label: str, default: float) -> float:
        return spent.get(prefix + label, default)
    parts = {"load_analysis (read, check)": get("load_analysis (read, check)", 0.0),
             "reduce_grid (dask pass)": get("reduce_grid (dask pass)", 0.0),
             "build_grid without its pass (census exposures)":
                 get("build_grid", 0.0) - get("reduce_grid (dask pass)", 0.0),
             "run_analysis without build_grid (curve, Monte Carlo, results)":
                 get("run_analysis", 0.0) - get("build_grid", 0.0),
             "write_outputs (files, report)": get("write_outputs (files, report)", 0.0)}
    parts["the rest of doseattr run"] = total - sum(parts.values())
    return parts


def full_analysis(toml: Path, out: Path) -> dict[str, Any] | None:
    """``doseattr run``; ``None`` when this version refuses ``[grid]``."""
    from doseattr.cli import main

    err = io.StringIO()
    spent: dict[str, float] = {}
    t0, c0 = time.perf_counter(), time.process_time()
    with contextlib.redirect_stderr(err), timing(spent):
        status = main(["run", str(toml), "--out", str(out), "--quiet"])
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    if status == 2 and REFUSED in err.getvalue():
        return None
    if status != 0:
        raise RuntimeError(f"doseattr run failed ({status}): {err.getvalue().strip()}")
    results = json.loads((out / "results.json").read_text(encoding="utf-8"))
    return {"mode": "full analysis (doseattr run)", "seconds": seconds, "cpu_seconds": cpu,
            "parts": analysis_parts(spent, seconds),
            "cpu_parts": analysis_parts(spent, cpu, CPU), "notes": err.getvalue().splitlines(),
            "check": _paf_of(results)}


def _paf_of(results: dict[str, Any]) -> dict[str, Any]:
    """The population PAF from results.json, when found where expected."""
    found: dict[str, Any] = {}
    for key in ("paf", "population_paf"):
        if isinstance(results.get(key), dict | float):
            found[key] = results[key]
    return found


def fallback(folder: Path, toml: Path, draws: int) -> dict[str, Any]:
    """What the analysis would do, from the modules that exist: the grid's
    reduction, the census exposures and the Monte Carlo, timed apart."""
    from doseattr.analysis.burden_table import read_burden
    from doseattr.analysis.grid_inputs import parse_grid, read_zone_names
    from doseattr.analysis.grid_reduce import reduce_grid
    from doseattr.analysis.schema import Context
    from doseattr.core.curves.published import published_curve
    from doseattr.core.uncertainty.propagate import Stratum, point_values, propagate

    parts: dict[str, float] = {}
    t0 = time.perf_counter()
    spec = parse_grid(grid_section(int(_toml_chunk(toml))), Context(str(toml), str(folder)))
    assert spec.zone_names is not None
    id_of = {name: z for z, name in read_zone_names(spec.zone_names).items()}
    burden = read_burden(folder / "burden.csv")
    ids = [id_of[s] for s in burden.strata]
    t1 = time.perf_counter()
    sums, notes = reduce_grid(spec, ids)
    t2 = time.perf_counter()
    summary = sums.summary()
    strata = [Stratum("(population)", 0.0, summary.population_exposure())]
    strata += [Stratum(s, float(c), summary.zone_exposure(k))
               for k, (s, c) in enumerate(zip(burden.strata, burden.cases, strict=True))]
    t3 = time.perf_counter()
    curve = published_curve("log-linear", rr=RR, per=PER, ci=RR_CI)
    point = point_values(curve, strata, [], 0.0)
    prop = propagate(curve, strata, [], draws=draws, rng=np.random.default_rng(SEED),
                     minimum_risk=(0.0, 0.0))
    t4 = time.perf_counter()
    parts = {"read tables": t1 - t0, "reduce_grid (dask pass)": t2 - t1,
             "census exposures": t3 - t2, f"point values + {draws}-draw propagation": t4 - t3}
    points = sum(s.exposure.values.size for s in strata)
    return {"mode": f"FALLBACK (this version refuses [grid] with '{REFUSED}'): reduce_grid + "
                    f"GridSummary exposures + core propagate", "seconds": t4 - t0,
            "parts": parts, "notes": list(notes.lines()),
            "zones": {"population": [summary.zone_population(k) for k in range(len(ids))],
                      "mean": [summary.zone_mean(k) for k in range(len(ids))]},
            "check": {"population_paf": float(point.paf[0, 0]),
                      "population_paf_draw_median": float(np.median(prop.paf[0])),
                      "census_points": int(points), "strata": len(strata)}}


def _toml_chunk(toml: Path) -> int:
    import tomllib

    return int(tomllib.loads(toml.read_text(encoding="utf-8"))["grid"]["chunk"])


# -- children -----------------------------------------------------------------------
def peak_mb() -> float:
    """Peak resident memory of this process, ``ru_maxrss`` (kB on Linux).

    Linux carries the parent's high-water mark into a child over fork and
    exec, so a child's ``ru_maxrss`` is at least its parent's resident size
    when it was started: the parent here stays small (it generates nothing
    itself) and that floor is printed.
    """
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def high_water_mb() -> float | None:
    """``VmHWM`` of /proc/self/status: the peak of this process's own
    memory only (not inherited), as a cross-check; ``None`` elsewhere."""
    with contextlib.suppress(OSError, StopIteration), open("/proc/self/status",
                                                           encoding="utf-8") as f:
        return int(next(line for line in f if line.startswith("VmHWM")).split()[1]) / 1024
    return None


def warm_imports() -> None:
    """Import what the measured code imports, so that no timing holds imports."""
    import rasterio  # noqa: F401

    from doseattr.analysis.grid_inputs import require_grid_extra

    require_grid_extra()
    # scipy.stats and scipy.optimize are imported inside the functions that
    # use them (start-up, issue 15), so they are named here
    for name in ("doseattr.analysis.config", "doseattr.analysis.pipeline",
                 "doseattr.analysis.grid_reduce", "doseattr.core.exposure.grid",
                 "doseattr.core.uncertainty.propagate", "doseattr.outputs.write",
                 "scipy.stats", "scipy.optimize", "scipy.linalg"):
        importlib.import_module(name)
    from doseattr.outputs.style import pyplot

    pyplot()  # the figures import matplotlib.pyplot on first use


def child(args: argparse.Namespace) -> None:
    folder = Path(args.folder)
    warm_imports()
    before = peak_mb()
    t0, c0 = time.perf_counter(), time.process_time()
    if args.child == "generate":
        layout = Layout(args.side, args.side, args.zones)
        write_rasters(layout, folder, None if args.compress == "none" else args.compress)
        write_tables(layout, folder)
        write_analysis(folder, args.chunk, args.draws)
        report: dict[str, Any] = {"mode": "generation", "seconds": time.perf_counter() - t0}
    elif args.child == "bare":
        dose, people, cells = bare_pass(folder, args.chunk, args.zones)
        report = {"mode": "bare pass", "seconds": time.perf_counter() - t0,
                  "cpu_seconds": time.process_time() - c0, "cells": cells,
                  "mean": float(dose.sum() / people.sum())}
    else:
        toml = folder / "analysis.toml"
        report = (full_analysis(toml, folder / "out")
                  or fallback(folder, toml, args.draws))
    report.update(peak_mb=peak_mb(), peak_mb_before=before, vm_hwm_mb=high_water_mb())
    print(json.dumps(report))


def generated(folder: Path) -> bool:
    """Whether ``folder`` holds every file the generation writes."""
    names = [*FILES.values(), "burden.csv", "zone_names.csv", "analysis.toml"]
    return all((folder / name).exists() for name in names)


def reused() -> dict[str, Any]:
    """A stand-in for the generation's report when its files are reused."""
    return {"mode": "generation (files reused, not timed)", "seconds": 0.0, "peak_mb": 0.0,
            "peak_mb_before": 0.0, "vm_hwm_mb": None, "floor_mb": peak_mb()}


def run_child(kind: str, args: argparse.Namespace, folder: Path) -> dict[str, Any]:
    """Run this script as ``--child kind`` with ``GDAL_CACHEMAX`` set; its
    last line of output is its report (JSON)."""
    env = dict(os.environ, GDAL_CACHEMAX=str(args.gdal_cachemax))
    cmd = [sys.executable, os.path.abspath(__file__), "--child", kind, "--folder", str(folder),
           "--side", str(args.side), "--zones", str(args.zones), "--draws", str(args.draws),
           "--chunk", str(args.chunk), "--compress", args.compress]
    floor = peak_mb()
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise SystemExit(f"the {kind} child failed ({done.returncode}):\n{done.stderr}")
    result: dict[str, Any] = json.loads(done.stdout.strip().splitlines()[-1])
    result["floor_mb"] = floor
    return result


# -- the report -----------------------------------------------------------------------
def machine() -> list[str]:
    import dask
    import rasterio

    cpu = "unknown"
    with contextlib.suppress(OSError), open("/proc/cpuinfo", encoding="utf-8") as f:
        cpu = next((line.split(":", 1)[1].strip() for line in f
                    if line.startswith("model name")), cpu)
    ram = "unknown"
    with contextlib.suppress(OSError), open("/proc/meminfo", encoding="utf-8") as f:
        kb = next((int(line.split()[1]) for line in f if line.startswith("MemTotal")), 0)
        ram = f"{kb / 1024**2:.1f} GB"
    return [f"cpu: {cpu}, {os.cpu_count()} cores, RAM {ram}",
            f"python {platform.python_version()}, numpy {np.__version__}, dask "
            f"{dask.__version__}, rasterio {rasterio.__version__} (GDAL "
            f"{rasterio.__gdal_version__})"]


def step(name: str, r: dict[str, Any], ns: float) -> str:
    """One measured child: time, ns per cell and its peaks."""
    hwm = "" if r.get("vm_hwm_mb") is None else f", VmHWM {r['vm_hwm_mb']:.0f} MB"
    cpu = "" if r.get("cpu_seconds") is None else f", CPU {r['cpu_seconds']:.2f} s"
    return (f"{name}: {r['seconds']:.2f} s{cpu} ({r['seconds'] * ns:.1f} ns/cell); peak "
            f"ru_maxrss {r['peak_mb']:.0f} MB{hwm} (after its imports "
            f"{r['peak_mb_before']:.0f} MB; inherited floor {r['floor_mb']:.0f} MB)")


def report(layout: Layout, args: argparse.Namespace, generation: dict[str, Any],
           bare: dict[str, Any], analysis: dict[str, Any]) -> str:
    ns = 1e9 / layout.cells
    lines = [*machine(),
             f"cells: {layout.cells:,} ({layout.rows} x {layout.cols}), {layout.zones} zones, "
             f"chunk {args.chunk}, tiles {TILE}, compression {args.compress}, draws "
             f"{args.draws}",
             f"GDAL_CACHEMAX={args.gdal_cachemax} (MB) in each child's environment; each step "
             "below ran in a child process of its own (subprocess), times without imports",
             step("generation", generation, ns),
             step("bare pass (read + multiply-add, one thread)", bare, ns),
             f"analysis measured: {analysis['mode']}",
             step("analysis", analysis, ns)]
    cpu_parts = analysis.get("cpu_parts", {})
    lines += [f"  {name}: {s:.2f} s ({s * ns:.1f} ns/cell)"
              + (f", CPU {cpu_parts[name]:.2f} s" if name in cpu_parts else "")
              for name, s in analysis["parts"].items()]
    lines += [f"  {line}" for line in analysis.get("notes", [])]
    if "check" in analysis:
        lines.append(f"  check: {analysis['check']}")
    ratio = analysis["seconds"] / bare["seconds"]
    if bare.get("cpu_seconds") and analysis.get("cpu_seconds"):
        lines.append(f"CPU ratio analysis / bare pass: "
                     f"{analysis['cpu_seconds'] / bare['cpu_seconds']:.2f} (the analysis uses "
                     "every core, the bare pass one; on a loaded machine the CPU times are the "
                     "steadier figures)")
    lines.append(f"load average (1, 5, 15 min): {' '.join(f'{v:.2f}' for v in os.getloadavg())}")
    lines.append(f"ratio analysis / bare pass: {ratio:.2f} (goal <= 3); peak ru_maxrss bare "
                 f"{bare['peak_mb']:.0f} MB, analysis {analysis['peak_mb']:.0f} MB (goal < 2048)")
    return "\n".join(lines)


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    from doseattr.analysis.grid_inputs import DEFAULT_CHUNK

    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0] if __doc__ else None)
    p.add_argument("--side", type=int, default=10_000, help="cells per side (default 10000)")
    p.add_argument("--smoke", action="store_true", help=f"a quick run: --side {SMOKE_SIDE}")
    p.add_argument("--zones", type=int, default=100, help="zones, a perfect square")
    p.add_argument("--draws", type=int, default=1000)
    p.add_argument("--chunk", type=int, default=DEFAULT_CHUNK, help="[grid] chunk and the bare "
                   "pass's window side")
    p.add_argument("--folder", help="where the temporary folder goes (default: the system's)")
    p.add_argument("--keep", action="store_true", help="keep the generated files")
    p.add_argument("--reuse", metavar="DIR", help="use the files in DIR (generated there, and "
                   "kept, when DIR holds none yet): repeated runs skip the generation; the "
                   "files must have been made with the same --side, --zones, --chunk, --draws")
    p.add_argument("--compress", choices=("none", "deflate"), default="none")
    p.add_argument("--gdal-cachemax", type=int, default=64, help="MB, for the children")
    p.add_argument("--child", choices=("generate", "bare", "analysis"), help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.smoke:
        args.side = SMOKE_SIDE
    return args


def main(argv: list[str] | None = None) -> None:
    args = parse_args(argv)
    if args.child:
        child(args)
        return
    layout = Layout(args.side, args.side, args.zones)
    layout.per_side  # noqa: B018  (refuses a zone count that is not a square, early)
    if args.reuse:
        folder = Path(args.reuse)
        folder.mkdir(parents=True, exist_ok=True)
        args.keep = True
    else:
        folder = Path(tempfile.mkdtemp(prefix="doseattr-grid-bench-", dir=args.folder))
    try:
        generation = (reused() if args.reuse and generated(folder)
                      else run_child("generate", args, folder))
        bare = run_child("bare", args, folder)
        analysis = run_child("analysis", args, folder)
        print(report(layout, args, generation, bare, analysis))
    finally:
        if args.keep:
            print(f"files kept in {folder}")
        else:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
