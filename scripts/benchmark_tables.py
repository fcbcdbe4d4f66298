"""Benchmark: doseattr's measurement-table reader against ``pandas.read_csv``.

Inputs are generated here (not data), seeded, under a temporary folder. Three
shapes of CSV file, ``--rows`` data rows each, after two comment lines:

* ``measurements``: what users give for personal or site samples:
  ``site,worker,value (ug/m3),detected,weight`` with 60 sites, 2,000
  workers, lognormal values written with 4 significant digits, 5 % of
  them non-detects written ``<L`` (``detected`` false), the rest
  ``detected`` true, and integer weights 1 to 50;
* ``numeric``: the plain numeric table ``value,weight``;
* ``quoted``: ``measurements`` with its site and worker cells in quotes, as
  spreadsheet programs export text cells.

Each reader runs in its own Python process (so that each peak is its own):
CPU time (``time.process_time``) of one call, the best of ``--repeats``;
then the peak of memory traced by :mod:`tracemalloc` during one more call
(numpy's and Python's allocations; pandas' parser and pyarrow's string
buffers are not traced), and the process's peak resident memory during the
timed calls above what it held before them (Linux ``VmHWM`` after resetting
it through ``/proc/self/clear_refs``; elsewhere ``ru_maxrss``, which may
keep an earlier peak). doseattr's reader
is timed twice: ``read_measurements`` (the checked read an analysis makes)
and ``read_raw`` (the table's text cells and row numbers only);
``pandas.read_csv`` is called with ``comment="#"`` (the comment lines) and
otherwise its defaults. The ratio is doseattr's CPU time over pandas'.

Usage:  python scripts/benchmark_tables.py [--rows 1000000] [--repeats 3]
        [--shapes measurements,numeric,quoted] [--seed 1] [--keep FOLDER]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

SHAPES = ("measurements", "numeric", "quoted")
READERS = ("doseattr", "doseattr-raw", "pandas")
# this checkout's doseattr, not whichever one the environment has installed
ROOT = str(Path(__file__).resolve().parents[1])
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)

COMMENT = "# invented measurements for a benchmark (seeded); no real place or person\n"


def write_table(path: Path, shape: str, rows: int, seed: int) -> None:
    """Write ``rows`` data rows of ``shape`` to ``path`` (seeded)."""
    rng = np.random.default_rng(seed)
    values = np.exp(rng.normal(np.log(12.0), 0.9, rows))
    weights = rng.integers(1, 51, rows)
    text = np.char.mod("%.4g", values)
    if shape == "numeric":
        body = np.char.add(np.char.add(text, ","), weights.astype(str))
        header = "value,weight"
    else:
        below = rng.random(rows) < 0.05
        text = np.where(below, np.char.add("<", np.char.mod("%.3g", values)), text)
        detected = np.where(below, "false", "true")
        site = np.char.add("S", rng.integers(1, 61, rows).astype(str))
        worker = np.char.add("W", rng.integers(1, 2001, rows).astype(str))
        if shape == "quoted":
            site, worker = (np.char.add(np.char.add('"', c), '"') for c in (site, worker))
        body = site
        for column in (worker, text, detected, weights.astype(str)):
            body = np.char.add(np.char.add(body, ","), column)
        header = "site,worker,value (ug/m3),detected,weight"
    with path.open("w", encoding="utf-8", newline="\n") as out:
        out.write(COMMENT + f"# {rows} rows, shape {shape}\n{header}\n")
        out.write("\n".join(body.tolist()))
        out.write("\n")


def _reader(name: str):
    if name == "pandas":
        import pandas as pd

        return lambda path: pd.read_csv(path, comment="#")
    if name == "doseattr-raw":
        from doseattr.analysis.csvfile import read_raw

        return read_raw
    from doseattr.analysis.tables import read_measurements

    return read_measurements


def measure(name: str, path: str, repeats: int) -> dict[str, float]:
    """Run in the child process: best CPU time, traced peak, RSS rise."""
    import resource
    import time
    import tracemalloc

    read = _reader(name)
    import doseattr

    assert Path(doseattr.__file__).resolve().parents[1] == Path(ROOT), doseattr.__file__
    before = _rss_kb("VmRSS", reset=True)
    if before is None:
        before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    times = []
    for _ in range(repeats):
        start = time.process_time()
        read(path)
        times.append(time.process_time() - start)
    rss = _rss_kb("VmHWM")
    if rss is None:
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    tracemalloc.start()
    read(path)
    traced = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return {"cpu": min(times), "traced_mb": traced / 2**20, "rss_mb": (rss - before) / 1024}


def _rss_kb(field: str, reset: bool = False) -> int | None:
    """``VmRSS`` or ``VmHWM`` of this process in kB (Linux), after resetting
    the peak to the current size when ``reset``; ``None`` elsewhere."""
    try:
        if reset:
            Path("/proc/self/clear_refs").write_text("5")
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(field + ":"):
                return int(line.split()[1])
    except OSError:
        return None
    return None


def run_child(name: str, path: Path, repeats: int) -> dict[str, float]:
    script = Path(__file__).resolve()
    out = subprocess.run([sys.executable, str(script), "--child", name, str(path),
                          "--repeats", str(repeats)], capture_output=True, text=True,
                         check=False, cwd=Path.cwd())
    if out.returncode != 0:
        raise SystemExit(f"{name} failed on {path}:\n{out.stderr}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def uptime() -> str:
    try:
        return subprocess.run(["uptime"], capture_output=True, text=True,
                              check=False).stdout.strip()
    except OSError:
        return "load: " + " ".join(f"{x:.2f}" for x in os.getloadavg())


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--shapes", default=",".join(SHAPES))
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--keep", help="write the tables to this folder and keep them")
    parser.add_argument("--child", nargs=2, metavar=("READER", "PATH"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(measure(args.child[0], args.child[1], args.repeats)))
        return 0
    print(f"python {platform.python_version()}, numpy {np.__version__}; "
          f"{args.rows:,} rows, best of {args.repeats}")
    print(f"before: {uptime()}")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(args.keep or tmp)
        folder.mkdir(parents=True, exist_ok=True)
        for shape in args.shapes.split(","):
            path = folder / f"{shape}.csv"
            write_table(path, shape, args.rows, args.seed)
            size = path.stat().st_size / 2**20
            got = {name: run_child(name, path, args.repeats) for name in READERS}
            print(f"\n{shape}: {size:.1f} MB file")
            print(f"  {'reader':<22}{'CPU s':>8}{'s/1e6 rows':>12}{'traced MB':>11}"
                  f"{'RSS rise MB':>13}{'x pandas':>10}")
            for name in READERS:
                g = got[name]
                label = {"doseattr": "read_measurements", "doseattr-raw": "read_raw",
                         "pandas": "pandas.read_csv"}[name]
                print(f"  {label:<22}{g['cpu']:>8.3f}{g['cpu'] * 1e6 / args.rows:>12.3f}"
                      f"{g['traced_mb']:>11.0f}{g['rss_mb']:>13.0f}"
                      f"{g['cpu'] / got['pandas']['cpu']:>10.2f}")
    print(f"\nafter: {uptime()}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
