"""Benchmark: the Monte Carlo of an empirical exposure (weighted bootstrap)
and the width-by-source table, CPU time and peak memory.

Inputs are generated here (not data; every number is invented):

- values: ``N`` lognormal exposures ``exp(2 + Z)`` (all distinct), or the
  same rounded to 0.1 (``rounded``: a few hundred distinct values), with
  importance weights ``0.5 + U(0, 1)``, from ``numpy.random.default_rng(1)``;
- curve: log-linear, RR 1.08 per 10 units, 95% CI 1.05 to 1.11;
- minimum-risk level: uniform on 2 to 4 units.

Cases (each in a child process of its own, so that its peak memory is its
own; ``VmHWM`` from /proc/self/status, which an exec does not inherit):

``core``
    core ``propagate`` of one stratum over the empirical exposure, curve,
    exposure and minimum-risk level varying, the PAF only: the empirical
    path's Monte Carlo alone.
``width``
    ``run_analysis`` of an analysis with the values as a table
    (``family = "empirical"``) and ``[uncertainty]``: the joint draws
    (stage ``draws``) and the width-by-source table (the stage whose name
    starts ``draws, one source``) timed apart through
    ``doseattr.analysis.progress.stage_listener``.
``curve-only``
    ``run_analysis`` of a burden table of ``--zones`` strata (zones, as in
    a grid run), zone ``z`` with ``50 + z`` cases and its own lognormal
    exposure entered as numbers, GM ``6 + 0.02 z``, GSD ``1.5 + 0.004 z``
    (no sampling error), the minimum-risk level fixed at 3 units and a
    linear excess risk, ERR 0.01 per unit (95% CI 0.005 to 0.015; a
    log-linear curve extended over a lognormal tail has no finite mean):
    only the curve varies, so the width table is the joint interval (the
    Monte Carlo ran twice before).

``--repo`` runs a case against another checkout (``/work/main`` for the
figures before a change). ``--memory-cap-gb`` sets ``RLIMIT_AS`` in each
child, so that a run needing more memory stops with ``MemoryError``
(reported as such) instead of pressing a shared machine. Times are CPU
seconds (``time.process_time``, all threads of the child), the best of
``--repeat`` runs; the load average (``os.getloadavg``) is printed beside
each, as CPU time on a shared 2-core machine still moves with the load.

Usage:  python scripts/benchmark_draws.py [--repo DIR] [--values 100000,1000000]
        [--draws 1000] [--cases core,width,curve-only] [--width-values 100000] [--zones 200]
        [--memory-cap-gb 8] [--repeat 1] [--json FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

SCRIPT = Path(__file__).resolve()
REPO = SCRIPT.parents[1]
CURVE = {"model": "log-linear", "rr": 1.08, "per": 10.0, "ci": [1.05, 1.11], "beyond": "extend"}
LINEAR = {"model": "linear", "err": 0.01, "per": 1.0, "ci": [0.005, 0.015], "beyond": "extend"}
MINIMUM_RISK = (2.0, 4.0)


def make_values(n: int, rounded: bool) -> tuple[Any, Any]:
    """``n`` lognormal values (rounded to 0.1 when ``rounded``) and weights."""
    import numpy as np

    rng = np.random.default_rng(1)
    x = np.exp(2.0 + rng.standard_normal(n))
    w = 0.5 + rng.random(n)
    return (np.round(x, 1) if rounded else x), w


def peak_mb() -> float:
    """This process's peak resident memory (VmHWM), MB."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def child_core(n: int, draws: int, rounded: bool) -> dict[str, Any]:
    import numpy as np

    from doseattr.core.curves.published import published_curve
    from doseattr.core.exposure.empirical import empirical
    from doseattr.core.uncertainty.propagate import Stratum, propagate

    x, w = make_values(n, rounded)
    exposure = empirical(x, w, weight_meaning="importance")
    curve = published_curve("log-linear", rr=1.08, per=10.0, ci=(1.05, 1.11))
    t0 = time.process_time()
    prop = propagate(curve, [Stratum("population", 1.0, exposure)], [], draws=draws,
                     rng=np.random.default_rng(7), minimum_risk=MINIMUM_RISK,
                     sources=("curve", "exposure", "minimum_risk"))
    cpu = time.process_time() - t0
    q = np.quantile(prop.paf[0], [0.025, 0.5, 0.975])
    return {"cpu_s": cpu, "paf_quantiles": [float(v) for v in q]}


def child_analysis(n: int, draws: int, curve_only: bool) -> dict[str, Any]:
    from doseattr.analysis.config import analysis_from_dict
    from doseattr.analysis.pipeline import run_analysis
    from doseattr.analysis.progress import stage_listener

    with tempfile.TemporaryDirectory() as folder:
        curve = CURVE
        extra: dict[str, Any] = {}
        if curve_only:
            exposure: dict[str, Any] = {"gm": 8.0, "gsd": 2.0}
            curve = LINEAR
            rows = "".join(f"Zone {z:03d},{50 + z},{6.0 + 0.02 * z:.2f},{1.5 + 0.004 * z:.3f}\n"
                           for z in range(n))
            (Path(folder) / "zones.csv").write_text("stratum,cases,gm,gsd\n" + rows)
            extra = {"burden": {"table": "zones.csv"}}
        else:
            x, w = make_values(n, False)
            lines = "".join(f"{a!r},{b!r}\n" for a, b in zip(x.tolist(), w.tolist()))
            (Path(folder) / "values.csv").write_text("value,weight\n" + lines)
            exposure = {"table": "values.csv", "family": "empirical", "weights": "importance"}
        d = {"unit": "ug/m3", "curve": curve, "exposure": exposure,
             "attribution": {"minimum_risk": 3.0 if curve_only else list(MINIMUM_RISK)},
             "uncertainty": {"draws": draws, "seed": 5}, **extra}
        analysis = analysis_from_dict(d, base_dir=Path(folder))
        stages: dict[str, float] = {}
        current: list[tuple[str, float]] = []

        def listen(stage: str) -> None:
            now = time.process_time()
            if current:
                name, start = current.pop()
                key = "width" if name.startswith("draws, one source") else name
                stages[key] = stages.get(key, 0.0) + now - start
            if stage:
                current.append((stage, now))

        t0 = time.process_time()
        with stage_listener(listen):
            results = run_analysis(analysis)
        cpu = time.process_time() - t0
        widths = {w.source: [w.lower, w.upper] for w in results.width_by_source}
        return {"cpu_s": cpu, "joint_draws_s": stages.get("draws"),
                "width_s": stages.get("width", 0.0), "widths": widths}


def run_child(args: argparse.Namespace, case: str, n: int) -> dict[str, Any]:
    """One case in a child process, ``--repeat`` times; the best CPU time."""
    best: dict[str, Any] | None = None
    for _ in range(args.repeat):
        cmd = [sys.executable, str(SCRIPT), "--child", case, "--n", str(n),
               "--draws", str(args.draws), "--repo", args.repo,
               "--memory-cap-gb", str(args.memory_cap_gb)]
        before = os.getloadavg()[0]
        t0 = time.perf_counter()
        done = subprocess.run(cmd, capture_output=True, text=True, check=False)
        wall = time.perf_counter() - t0
        if done.returncode != 0:
            tail = (done.stderr.strip().splitlines() or ["?"])[-1]
            return {"case": case, "n": n, "draws": args.draws, "error": tail[:200],
                    "wall_s": wall, "load": [before, os.getloadavg()[0]]}
        out = json.loads(done.stdout.strip().splitlines()[-1])
        out.update(case=case, n=n, draws=args.draws, wall_s=wall,
                   load=[before, os.getloadavg()[0]])
        if best is None or out["cpu_s"] < best["cpu_s"]:
            best = out
    assert best is not None
    return best


def child_main(args: argparse.Namespace) -> None:
    sys.path.insert(0, str(Path(args.repo).resolve()))
    if args.memory_cap_gb > 0:
        cap = int(args.memory_cap_gb * 2**30)
        resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
    case, n, draws = args.child, args.n, args.draws
    if case in ("core", "core-rounded"):
        out = child_core(n, draws, case == "core-rounded")
    else:
        out = child_analysis(n, draws, case == "curve-only")
    out["peak_mb"] = peak_mb()
    import doseattr

    out["doseattr"] = str(Path(doseattr.__file__).parent)
    print(json.dumps(out))


def describe(r: dict[str, Any]) -> str:
    head = f"{r['case']:<12} n={r['n']:<8g} draws={r['draws']:<5}"
    load = f"load {r['load'][0]:.2f}->{r['load'][1]:.2f}"
    if "error" in r:
        return f"{head} FAILED ({r['error']}); wall {r['wall_s']:.1f} s, {load}"
    parts = [f"cpu {r['cpu_s']:.1f} s", f"peak {r['peak_mb']:.0f} MB"]
    if r.get("joint_draws_s") is not None:
        parts.append(f"joint draws {r['joint_draws_s']:.1f} s, width table {r['width_s']:.1f} s")
    parts.append(f"wall {r['wall_s']:.1f} s")
    return f"{head} " + ", ".join(parts) + f"; {load}"


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--repo", default=str(REPO), help="checkout whose doseattr is measured")
    p.add_argument("--values", default="100000,1000000", help="sizes for the core case")
    p.add_argument("--width-values", type=int, default=100_000, help="size for 'width'")
    p.add_argument("--zones", type=int, default=200, help="strata for 'curve-only'")
    p.add_argument("--draws", type=int, default=1000)
    p.add_argument("--cases", default="core,width,curve-only")
    p.add_argument("--memory-cap-gb", type=float, default=8.0, help="RLIMIT_AS per child (0: none)")
    p.add_argument("--repeat", type=int, default=1)
    p.add_argument("--json", help="write the figures here")
    p.add_argument("--child", help=argparse.SUPPRESS)
    p.add_argument("--n", type=int, default=0, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        child_main(args)
        return 0
    print(f"{platform.node()} {platform.processor() or platform.machine()}, "
          f"{os.cpu_count()} cores; repo {args.repo}")
    print("uptime:", subprocess.run(["uptime"], capture_output=True, text=True).stdout.strip())
    results = []
    for case in args.cases.split(","):
        sizes = ([int(float(v)) for v in args.values.split(",")] if case.startswith("core")
                 else [args.zones] if case == "curve-only" else [args.width_values])
        for n in sizes:
            r = run_child(args, case, n)
            print(describe(r), flush=True)
            results.append(r)
    print("uptime:", subprocess.run(["uptime"], capture_output=True, text=True).stdout.strip())
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
