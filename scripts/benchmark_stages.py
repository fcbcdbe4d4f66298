"""Benchmark: the stages of two large analyses, each ``doseattr run --profile``.

Inputs are generated here (not data; every number is invented):

- **empirical**: ``measurements.csv`` with ``--values`` rows (default 1e6) of
  ``value,weight``: values lognormal (GM 8, GSD 2) rounded to 0.01 (as a
  monitor network reports them, so many values repeat; no non-detects,
  which the empirical family refuses), weights whole numbers 1 to 20;
  ``family = "empirical"``, a log-linear curve entered as
  published (RR 1.08 per 10 units, 95% CI 1.05 to 1.11, flat above 80),
  minimum risk 5, one cap scenario, ``[uncertainty] draws`` (default 100).
- **burden**: ``districts.csv`` with ``--strata`` rows (default 3,000) of
  ``stratum,population,rate,gm,gsd`` (population 5,000 to 500,000, rate 300
  to 1,200 per 100,000, GM 4 to 20, GSD 1.3 to 2.2) and the same curve.

Each analysis runs in a child process of its own (``python -m doseattr run
ANALYSIS --out DIR --quiet --profile``), waited for by ``os.wait4`` so that
its CPU seconds (user + system) and peak resident memory (``ru_maxrss``)
are the child's alone. The parent stays small (it writes the tables in
blocks); its own peak is printed as the floor of the child's figure, since
Linux may carry a parent's high-water mark into a child. Printed per
analysis: the wall and CPU seconds, the peak RSS, the size of
``results.json`` and ``report.html``, the stage table the child printed on
standard error, and ``uptime``'s load before and after (the machine may be
shared: compare CPU seconds, repeat with ``--repeat`` and take the best).

Usage:  python scripts/benchmark_stages.py [--values 1000000] [--strata 3000]
        [--draws 1000] [--empirical-draws 100] [--only empirical|burden] [--repeat 1] [--folder DIR] [--keep]
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

SEED = 20261203
#: The invented log-linear curve: RR per PER units, its 95% CI, flat above MAX_DOSE.
RR, RR_CI, PER, MAX_DOSE = 1.08, (1.05, 1.11), 10.0, 80.0
MINIMUM_RISK, CAP = 5.0, 25.0
#: Measured values: lognormal GM and GSD (rounded to 0.01).
GM, GSD = 8.0, 2.0
BLOCK = 200_000
PROFILE_PREFIX = "doseattr: profile:"

# this checkout's doseattr, not whichever one the environment has installed
ROOT = str(Path(__file__).resolve().parents[1])


def curve_section() -> str:
    return (f'[curve]\nmodel = "log-linear"\nrr = {RR}\nper = {PER}\n'
            f"ci = [{RR_CI[0]}, {RR_CI[1]}]\nmax_dose = {MAX_DOSE}\n")


def common_sections(draws: int) -> str:
    return (f"[attribution]\nminimum_risk = {MINIMUM_RISK}\n\n"
            f'[[scenario]]\nname = "Cap at {CAP:g}"\ncap = {CAP}\n\n'
            f"[uncertainty]\ndraws = {draws}\nseed = {SEED}\n")


def write_measurements(folder: Path, n: int, seed: int = SEED) -> Path:
    """``measurements.csv``: ``n`` rows, written :data:`BLOCK` at a time;
    block ``b`` draws its normals, then its weights, from
    ``default_rng([seed, b])``. Values ``round(GM * GSD**Z, 2)``; weights
    integers 1 to 20."""
    path = folder / "measurements.csv"
    with open(path, "w", encoding="utf-8") as f:
        f.write("# EVERY NUMBER IS INVENTED (doseattr stage benchmark)\nvalue,weight\n")
        for b, start in enumerate(range(0, n, BLOCK)):
            size = min(BLOCK, n - start)
            rng = np.random.default_rng([seed, b])
            x = np.round(GM * np.exp(np.log(GSD) * rng.standard_normal(size)), 2)
            w = rng.integers(1, 21, size)
            f.write("".join(f"{v:.2f},{k}\n" for v, k in zip(x.tolist(), w.tolist())))
    return path


def write_districts(folder: Path, strata: int, seed: int = SEED) -> Path:
    """``districts.csv``: ``strata`` rows from ``default_rng([seed, 0])``
    (uniform population, rate, GM and GSD in the ranges of the module)."""
    rng = np.random.default_rng([seed, 0])
    population = np.round(rng.uniform(5_000, 500_000, strata))
    rate = np.round(rng.uniform(300, 1_200, strata), 1)
    gm = np.round(rng.uniform(4, 20, strata), 2)
    gsd = np.round(rng.uniform(1.3, 2.2, strata), 3)
    path = folder / "districts.csv"
    with open(path, "w", encoding="utf-8") as f:
        f.write("# EVERY NUMBER IS INVENTED (doseattr stage benchmark)\n"
                "stratum,population,rate,gm,gsd\n")
        f.writelines(f"District {i + 1:05d},{p:.0f},{r:.1f},{g:.2f},{s:.3f}\n"
                     for i, (p, r, g, s) in enumerate(zip(population, rate, gm, gsd)))
    return path


def write_analysis(folder: Path, title: str, body: str) -> Path:
    """``analysis.toml`` in ``folder``: the invented-numbers header, ``title``
    and ``body``."""
    path = folder / "analysis.toml"
    path.write_text("# doseattr stage benchmark. EVERY NUMBER IS INVENTED.\n"
                    f'title = "{title} (invented numbers)"\nunit = "ug/m3"\n\n' + body,
                    encoding="utf-8")
    return path


def write_empirical(folder: Path, n: int, draws: int) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    write_measurements(folder, n)
    return write_analysis(folder, "Empirical exposure benchmark", curve_section()
                          + '\n[exposure]\ntable = "measurements.csv"\nfamily = "empirical"\n\n'
                          + common_sections(draws))


def write_burden(folder: Path, strata: int, draws: int) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    write_districts(folder, strata)
    return write_analysis(folder, "Burden benchmark", curve_section() + "\n"
                          + common_sections(draws)
                          + '\n[burden]\ntable = "districts.csv"\nrate_per = 100000\n')


@dataclass(frozen=True)
class Measured:
    wall: float
    cpu: float
    peak_mb: float
    status: int
    stages: list[str]
    stderr_tail: list[str]


def run_child(analysis: Path, out: Path) -> Measured:
    """``python -m doseattr run ANALYSIS --out OUT --quiet --profile`` in a
    child of its own, waited for by ``os.wait4`` (its rusage alone)."""
    if out.exists():
        shutil.rmtree(out)
    err_path = out.parent / (out.name + ".stderr")
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    cmd = [sys.executable, "-m", "doseattr", "run", str(analysis), "--out", str(out),
           "--quiet", "--profile"]
    with open(err_path, "w", encoding="utf-8") as err:
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err, env=env, cwd=ROOT)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    lines = err_path.read_text(encoding="utf-8").splitlines()
    stages = [s[len(PROFILE_PREFIX):].rstrip() for s in lines if s.startswith(PROFILE_PREFIX)]
    other = [s for s in lines if not s.startswith(PROFILE_PREFIX)]
    return Measured(wall, usage.ru_utime + usage.ru_stime, usage.ru_maxrss / 1024,
                    proc.returncode, stages, other[-5:])


def load() -> str:
    try:
        return subprocess.run(["uptime"], capture_output=True, text=True,
                              check=False).stdout.strip()
    except OSError:
        one, five, fifteen = os.getloadavg()
        return f"load average: {one:.2f}, {five:.2f}, {fifteen:.2f}"


def size_mb(path: Path) -> str:
    return f"{path.stat().st_size / 1e6:.1f} MB" if path.exists() else "absent"


def report(name: str, analysis: Path, repeat: int) -> Measured:
    best: Measured | None = None
    for i in range(repeat):
        before = load()
        m = run_child(analysis, analysis.parent / "out")
        after = load()
        print(f"\n== {name} (run {i + 1} of {repeat}) ==")
        print(f"load before: {before}\nload after:  {after}")
        print(f"exit {m.status}; wall {m.wall:.2f} s; CPU {m.cpu:.2f} s; "
              f"peak RSS {m.peak_mb:.0f} MB")
        out = analysis.parent / "out"
        print(f"results.json {size_mb(out / 'results.json')}; "
              f"report.html {size_mb(out / 'report.html')}")
        print("stages (doseattr run --profile):")
        for line in m.stages:
            print("  " + line)
        if m.status != 0:
            print("stderr tail:\n  " + "\n  ".join(m.stderr_tail))
        if best is None or m.cpu < best.cpu:
            best = m
    assert best is not None
    return best


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--values", type=int, default=1_000_000)
    p.add_argument("--strata", type=int, default=3_000)
    p.add_argument("--draws", type=int, default=1000, help="draws of the burden analysis")
    p.add_argument("--empirical-draws", type=int, default=100,
                   help="draws of the empirical analysis (its bootstrap holds draws x values)")
    p.add_argument("--only", choices=("empirical", "burden"))
    p.add_argument("--repeat", type=int, default=1)
    p.add_argument("--folder", type=Path, help="work here instead of a temporary folder")
    p.add_argument("--keep", action="store_true", help="keep the temporary folder")
    args = p.parse_args(argv)
    folder = args.folder or Path(tempfile.mkdtemp(prefix="doseattr-stages-"))
    print(f"machine: {platform.platform()}, {os.cpu_count()} CPUs, Python "
          f"{platform.python_version()}; folder {folder}")
    try:
        t0 = time.perf_counter()
        todo = []
        if args.only in (None, "empirical"):
            todo.append((f"empirical, {args.values:,} values",
                         write_empirical(folder / "empirical", args.values,
                                         args.empirical_draws)))
        if args.only in (None, "burden"):
            todo.append((f"burden, {args.strata:,} strata",
                         write_burden(folder / "burden", args.strata, args.draws)))
        print(f"inputs written in {time.perf_counter() - t0:.1f} s; parent peak RSS "
              f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB "
              "(the floor of a child's figure)")
        status = 0
        for name, analysis in todo:
            status |= report(name, analysis, args.repeat).status
        return status
    finally:
        if args.folder is None and not args.keep:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
