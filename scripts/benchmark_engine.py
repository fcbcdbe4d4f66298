"""Benchmark: the vectorised quadrature engine against per-draw scipy quad.

Inputs are generated here (not data): a linear excess-risk curve held flat
beyond 60 units, with slope draws from N(0.012, 0.003^2); ``--strata``
strata, each with its own lognormal exposure (GM 4 to 40, GSD 1.5 to 4)
whose parameters are drawn per draw from a normal on the log scale (as
for a fitted exposure; ``--fixed-exposure`` keeps them fixed, so only the
curve varies and the engine builds each stratum's nodes once); a minimum-risk level of 2; three scenarios (cap at
15, scale by 0.7, lower by 3). Every (draw, stratum, scenario) is one
integral E[RR_m(g(X))] - 1.

The engine runs on every integral. The reference loop runs
``scipy.integrate.quad`` per integral on a sample of draws, split at every
kink, in two styles: "lean" (integrand from the math module) and
"scipy.stats" (the density from scipy.stats inside the integrand, the way a
quick script is usually written); the time per integral is scaled from the
sample. Printed: time per integral, speed ratios, the largest relative
difference between engine and quad on the sampled integrals, and the
process's peak resident memory (getrusage) before and after the engine ran.

Usage:  python scripts/benchmark_engine.py [--draws 10000] [--strata 100]
        [--sample 40] [--stats-sample 3] [--seed 1] [--fixed-exposure]
"""

from __future__ import annotations

import argparse
import math
import platform
import resource
import time

import numpy as np
from scipy import integrate, stats

from doseattr.core.attribution.fractions import excess_draws
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.exposure.registry import FAMILIES

MAX_DOSE = 60.0
MINIMUM_RISK = 2.0
SCENARIOS = (None, Cap(15.0, name="cap"), Scale(0.7, name="scale"), ReduceBy(3.0, name="reduce"))


def inputs(draws: int, strata: int, rng: np.random.Generator, fixed: bool = False):
    curve = Curve(LinearExcess(), np.array([0.012]), np.array([[0.003**2]]), max_dose=MAX_DOSE)
    slope = rng.normal(0.012, 0.003, size=(draws, 1))
    gm = np.exp(rng.uniform(np.log(4), np.log(40), size=strata))
    gsd = rng.uniform(1.5, 4.0, size=strata)
    params = []
    for s in range(strata):
        sd = 0.0 if fixed else 0.05
        theta = np.column_stack([rng.normal(np.log(gm[s]), sd, draws),
                                 rng.normal(np.log(np.log(gsd[s])), sd, draws)])
        params.append(FAMILIES["lognormal"].from_internal(theta))
    return curve, slope, params


def run_engine(curve, slope, params):
    out = np.empty((len(params), len(SCENARIOS), slope.shape[0]))
    for s, p in enumerate(params):
        for j, scn in enumerate(SCENARIOS):
            out[s, j] = excess_draws(curve, slope, FAMILIES["lognormal"], p, 0.0, MINIMUM_RISK, scn)
    return out


def quad_one(b: float, gm: float, gsd: float, scenario, style: str) -> float:
    """E[RR_m(g(X))] - 1 by adaptive quadrature, split at every kink."""
    mu, s = math.log(gm), math.log(gsd)
    norm = 1.0 / (s * math.sqrt(2 * math.pi))
    frozen = stats.lognorm(s, scale=gm)

    kind = None if scenario is None else scenario.kind
    v = 0.0 if scenario is None else scenario.value

    def g(x: float) -> float:
        if kind == "cap":
            return min(x, v)
        if kind == "scale":
            return v * x
        if kind == "reduce_by":
            return max(x - v, MINIMUM_RISK)
        return x

    def excess(x: float) -> float:
        y = min(max(g(x), MINIMUM_RISK), MAX_DOSE)
        return (1 + b * y) / (1 + b * MINIMUM_RISK) - 1

    if style == "lean":
        def f(x: float) -> float:
            return excess(x) * norm / x * math.exp(-0.5 * ((math.log(x) - mu) / s) ** 2)
    else:
        def f(x: float) -> float:
            return excess(x) * frozen.pdf(x)

    pts = [MINIMUM_RISK, MAX_DOSE]
    if scenario is not None:
        pts = list(scenario.preimage(np.array(pts))) + list(scenario.own_kinks())
    edges = [0.0] + sorted(p for p in set(pts) if p > 0) + [math.inf]
    return sum(integrate.quad(f, a, c, epsabs=0, epsrel=1e-10, limit=200)[0]
               for a, c in zip(edges[:-1], edges[1:]) if c > a)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=10_000)
    ap.add_argument("--strata", type=int, default=100)
    ap.add_argument("--sample", type=int, default=40, help="integrals for the lean quad loop")
    ap.add_argument("--stats-sample", type=int, default=3, help="integrals for the scipy.stats loop")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--fixed-exposure", action="store_true",
                    help="each stratum's exposure known exactly (only the curve varies)")
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    curve, slope, params = inputs(args.draws, args.strata, rng, args.fixed_exposure)
    n_int = args.draws * args.strata * len(SCENARIOS)

    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    result = run_engine(curve, slope, params)
    engine_s = time.perf_counter() - t0
    rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    per_engine = engine_s / n_int

    picks = [(int(rng.integers(args.draws)), int(rng.integers(args.strata)),
              int(rng.integers(len(SCENARIOS)))) for _ in range(max(args.sample, args.stats_sample))]
    timings, worst = {}, 0.0
    for style, k in (("lean", args.sample), ("scipy.stats", args.stats_sample)):
        t0 = time.perf_counter()
        for d, s, j in picks[:k]:
            gm, gsd = params[s][d]
            ref = quad_one(float(slope[d, 0]), float(gm), float(gsd), SCENARIOS[j], style)
            worst = max(worst, abs(result[s, j, d] - ref) / abs(ref))
        timings[style] = (time.perf_counter() - t0) / k

    print(f"machine: {platform.machine()}, {platform.processor() or 'cpu'}, "
          f"python {platform.python_version()}, numpy {np.__version__}")
    print(f"engine: {args.draws} draws x {args.strata} strata x {len(SCENARIOS)} "
          f"(current + 3 scenarios) = {n_int:,} integrals in {engine_s:.1f} s "
          f"= {per_engine * 1e6:.2f} us per integral")
    print(f"peak resident memory of the process: {rss_after / 1024:.0f} MiB "
          f"({rss_before / 1024:.0f} MiB before the engine ran: inputs, numpy, scipy)")
    for style, per in timings.items():
        print(f"quad loop ({style} integrand): {per * 1e6:,.0f} us per integral; "
              f"engine is {per / per_engine:,.0f} times faster")
    print(f"largest relative difference engine vs quad (excess risk, "
          f"{max(args.sample, args.stats_sample)} integrals): {worst:.1e}")


if __name__ == "__main__":
    main()
