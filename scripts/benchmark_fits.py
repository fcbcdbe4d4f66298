"""Benchmark: exposure fits to many measurements, per family.

Data are generated here (seeded; every number is invented):

- ``weighted``: ``n`` values from a lognormal with GM 4 and GSD 2.5, with
  importance-free frequency weights drawn uniformly from 0.5 to 2, nothing
  censored (the fit takes the weighted, uncensored path; the goodness of fit
  is then the probability plot correlation).
- ``censored``: ``n`` values from the same lognormal, each with one of
  ``--limits`` laboratory detection limits (evenly spaced on the log scale
  between the 5th and 40th percentile), drawn at random; a value below its
  limit is reported as that limit, not detected (about 20% of the values).
  Unweighted.
- ``positions`` (with ``--positions``): the ROS plotting positions alone of
  ``n`` censored values whose limits are all distinct (about 16,000 limits at
  1e5 values): the case that was quadratic in the number of limits.

For each case, family and size, :func:`doseattr.core.exposure.fit_measurements`
runs ``--repeat`` times; printed are the best CPU time
(``time.process_time``), the best wall-clock time, and the estimates and
log-likelihood (to compare one version with another). ``uptime`` load is
printed before and after: the machine is shared.

The script uses only the public fitting API, so it runs against any version
of the package: run it from the root of the checkout to measure (the
package imports from the working directory), e.g.::

    cd /work/main && python /path/to/scripts/benchmark_fits.py --json before.json
    python scripts/benchmark_fits.py --json after.json --compare before.json

Usage:  python scripts/benchmark_fits.py [--sizes 100000 1000000]
        [--families lognormal gamma weibull] [--cases weighted censored]
        [--limits 50] [--repeat 2] [--positions] [--json FILE] [--compare FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from typing import Any

import numpy as np

sys.path.insert(0, os.getcwd())

GM, GSD, SEED = 4.0, 2.5, 20261203


def uptime() -> str:
    try:
        return subprocess.run(["uptime"], capture_output=True, text=True, check=False).stdout.strip()
    except OSError:
        return "uptime unavailable"


def weighted_data(n: int) -> dict[str, Any]:
    rng = np.random.default_rng(SEED)
    x = np.exp(np.log(GM) + np.log(GSD) * rng.standard_normal(n))
    return {"values": x, "weights": rng.uniform(0.5, 2.0, n)}


def censored_data(n: int, limits: int) -> dict[str, Any]:
    rng = np.random.default_rng(SEED + 1)
    x = np.exp(np.log(GM) + np.log(GSD) * rng.standard_normal(n))
    z = np.linspace(-1.645, -0.253, limits)  # the 5th to 40th percentile
    dl = np.exp(np.log(GM) + np.log(GSD) * z)[rng.integers(0, limits, n)]
    det = x >= dl
    return {"values": np.where(det, x, dl), "detected": det}


def positions_data(n: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(SEED + 2)
    x = np.exp(rng.standard_normal(n))
    dl = np.exp(rng.standard_normal(n) - 0.8)
    det = x >= dl
    return np.where(det, x, dl), det


def timed(fn: Any, repeat: int) -> tuple[float, float, Any]:
    best_cpu = best_wall = np.inf
    out = None
    for _ in range(repeat):
        c0, w0 = time.process_time(), time.perf_counter()
        out = fn()
        best_cpu = min(best_cpu, time.process_time() - c0)
        best_wall = min(best_wall, time.perf_counter() - w0)
    return best_cpu, best_wall, out


def run_fit(family: str, data: dict[str, Any], repeat: int) -> dict[str, Any]:
    from doseattr.core.exposure import fit_measurements

    cpu, wall, e = timed(lambda: fit_measurements(family, **data), repeat)
    fit = e.fit
    return {"cpu": cpu, "wall": wall, "params": [float(v) for v in e.params],
            "loglik": float(fit.loglik),
            "cov": None if fit.cov_internal is None else np.asarray(fit.cov_internal).tolist(),
            "gof": fit.gof.get("statistic")}


def run_positions(n: int, repeat: int) -> dict[str, Any]:
    from doseattr.core.exposure.nondetects import ros_plotting_positions

    x, det = positions_data(n)
    cpu, wall, pos = timed(lambda: ros_plotting_positions(x, det), repeat)
    return {"cpu": cpu, "wall": wall, "limits": int(np.unique(x[~det]).size),
            "checksum": float(np.sum(pos * np.arange(1, n + 1)) / n)}


def compare(now: dict[str, Any], before: dict[str, Any]) -> None:
    print("\nagainst the earlier run (relative differences; cpu before -> after):")
    for key, new in now.items():
        old = before.get(key)
        if old is None:
            continue
        line = f"{key:32s} cpu {old['cpu']:8.3f} -> {new['cpu']:8.3f} s"
        if "params" in new:
            dp = np.max(np.abs(np.subtract(new["params"], old["params"])) / np.abs(old["params"]))
            dl = abs(new["loglik"] - old["loglik"]) / abs(old["loglik"])
            line += f"  params {dp:.1e}  loglik {dl:.1e}"
            if new["cov"] is not None and old["cov"] is not None:
                dc = np.max(np.abs(np.subtract(new["cov"], old["cov"])) / np.abs(np.diag(old["cov"])).max())
                line += f"  cov {dc:.1e}"
            if new["gof"] is not None and old["gof"] is not None:
                line += f"  gof {abs(new['gof'] - old['gof']) / abs(old['gof']):.1e}"
        else:
            line += f"  checksum {abs(new['checksum'] - old['checksum']) / abs(old['checksum']):.1e}"
        print(line)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[100_000, 1_000_000])
    ap.add_argument("--families", nargs="+", default=["lognormal", "gamma", "weibull"])
    ap.add_argument("--cases", nargs="+", default=["weighted", "censored"])
    ap.add_argument("--limits", type=int, default=50)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--positions", action="store_true")
    ap.add_argument("--positions-sizes", type=int, nargs="+", default=[100_000])
    ap.add_argument("--json")
    ap.add_argument("--compare")
    args = ap.parse_args()

    import doseattr.core.exposure  # imports outside the timings
    print(f"package from {os.path.dirname(doseattr.core.exposure.__file__)}")
    print(f"start: {uptime()}")
    results: dict[str, Any] = {}
    for n in args.sizes:
        for case in args.cases:
            data = weighted_data(n) if case == "weighted" else censored_data(n, args.limits)
            for family in args.families:
                r = run_fit(family, data, args.repeat)
                key = f"{case} {family} n={n}"
                results[key] = r
                print(f"{key:32s} cpu {r['cpu']:8.3f} s  wall {r['wall']:8.3f} s  "
                      f"params {r['params'][0]:.10g} {r['params'][1]:.10g}  loglik {r['loglik']:.12g}",
                      flush=True)
    if args.positions:
        for n in args.positions_sizes:
            r = run_positions(n, args.repeat)
            key = f"positions n={n}"
            results[key] = r
            print(f"{key:32s} cpu {r['cpu']:8.3f} s  wall {r['wall']:8.3f} s  limits {r['limits']}",
                  flush=True)
    print(f"end:   {uptime()}")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(results, fh, indent=1)
    if args.compare:
        with open(args.compare) as fh:
            compare(results, json.load(fh))


if __name__ == "__main__":
    main()
