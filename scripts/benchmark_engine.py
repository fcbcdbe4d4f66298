"""Benchmark: the vectorised quadrature engine against per-integral scipy quad.

Inputs are generated here (not data). Cases, each ``draws x strata x 4``
integrals E[RR_m(g(X))] - 1 (current exposure and three scenarios: cap at 15,
scale by 0.7, lower by 3; minimum-risk level 2):

* ``general``: a linear excess-risk curve held flat beyond 60 units, slope
  draws from N(0.012, 0.003^2); each stratum its own lognormal exposure (GM 4
  to 40, GSD 1.5 to 4) whose parameters are drawn per draw (a normal on the
  log scale, as for a fitted exposure), so every integral has its own
  exposure and its own kinks;
* ``steep-flat``: the same strata, a steep log-linear curve (slope draws
  from N(0.4, 0.02^2)) held flat beyond 30 (RR about 1.6e5 there);
* ``gamma`` and ``weibull``: the general curve over gamma and Weibull
  exposures with the same means and SDs as the lognormal strata, parameters
  drawn per draw.

Printed per case: CPU time per integral (``time.process_time``, the best of
``--repeats`` runs, since other jobs may share the machine; the first run of
each case in turn, then the others in turns over the cases, so that a slow
phase of the machine falls on one run of several cases rather than on all
runs of one), the values the
engine evaluates per integral (counted in a separate pass), a bare
``np.exp`` over the same number of values (best of the repeats), the
largest relative difference from ``scipy.integrate.quad`` on a sample of
integrals, and for ``general`` the process's peak resident memory
(getrusage, taken right after that case), each beside its goal (``GOALS``,
``MEMORY_GOAL``), and a summary table. The analyst's reference loop runs
``scipy.integrate.quad`` per integral on a sample, split at every kink, in
two styles: "lean" (integrand from the math module) and "scipy.stats" (the
density from scipy.stats, the way a quick script is usually written); its
time per integral is scaled from the sample.

Usage:  python scripts/benchmark_engine.py [--draws 10000] [--strata 100]
        [--other-strata 25] [--repeats 5] [--sample 40] [--stats-sample 3]
        [--seed 1] [--cases general,steep-flat,gamma,weibull]
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import resource
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from scipy import integrate

import doseattr
from doseattr.core.attribution import fractions
from doseattr.core.attribution.fractions import excess_draws
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.registry import FAMILIES

#: The speed goals, CPU microseconds per integral: the general case, and the
#: others within twice that; peak resident memory in MiB.
GOALS = {"general": 0.5, "steep-flat": 1.0, "gamma": 1.0, "weibull": 1.0}
MEMORY_GOAL = 500

MINIMUM_RISK = 2.0
SCENARIOS = (None, Cap(15.0, name="cap"), Scale(0.7, name="scale"), ReduceBy(3.0, name="reduce"))
CASES = ("general", "steep-flat", "gamma", "weibull")


class Case:
    """One benchmark case: curve, coefficient draws, family, per-stratum draws."""

    def __init__(self, name: str, draws: int, strata: int, rng: np.random.Generator) -> None:
        self.name = name
        if name == "steep-flat":
            self.curve = Curve(LogLinear(), np.array([0.4]), np.array([[0.02**2]]), max_dose=30.0)
            self.coef = rng.normal(0.4, 0.02, size=(draws, 1))
        else:
            self.curve = Curve(LinearExcess(), np.array([0.012]), np.array([[0.003**2]]),
                               max_dose=60.0)
            self.coef = rng.normal(0.012, 0.003, size=(draws, 1))
        self.family = FAMILIES["lognormal" if name in ("general", "steep-flat") else name]
        gm = np.exp(rng.uniform(np.log(4), np.log(40), size=strata))
        gsd = rng.uniform(1.5, 4.0, size=strata)
        self.params = []
        ln = FAMILIES["lognormal"]
        for s in range(strata):
            theta = np.column_stack([rng.normal(np.log(gm[s]), 0.05, draws),
                                     rng.normal(np.log(np.log(gsd[s])), 0.05, draws)])
            p = ln.from_internal(theta)
            if self.family.name != "lognormal":
                p = self._matched(p)
            self.params.append(p)

    def _matched(self, ln_params: np.ndarray) -> np.ndarray:
        """Gamma or Weibull parameters with the lognormal draws' mean and SD."""
        s = np.log(ln_params[:, 1])
        mean = ln_params[:, 0] * np.exp(0.5 * s * s)
        sd = mean * np.sqrt(np.expm1(s * s))
        if self.family.name == "gamma":
            return np.column_stack([(mean / sd) ** 2, sd * sd / mean])
        # Weibull: the shape for the stratum's median CV, varied per draw by a
        # lognormal factor of SD 0.05; the scale per draw from its mean.
        k0 = float(self.family.from_moments(float(np.median(mean)), float(np.median(sd)))[0])
        k = k0 * np.median(s) / s
        lgam = np.array([math.lgamma(1 + 1 / v) for v in k])
        return np.column_stack([k, mean / np.exp(lgam)])

    @property
    def integrals(self) -> int:
        return self.coef.shape[0] * len(self.params) * len(SCENARIOS)

    def run(self) -> np.ndarray:
        out = np.empty((len(self.params), len(SCENARIOS), self.coef.shape[0]))
        for s, p in enumerate(self.params):
            for j, scn in enumerate(SCENARIOS):
                out[s, j] = excess_draws(self.curve, self.coef, self.family, p, 0.0,
                                         MINIMUM_RISK, scn)
        return out


def best_cpu(fn: Callable[[], object], repeats: int) -> tuple[float, object]:
    best, result = math.inf, None
    for _ in range(repeats):
        t0 = time.process_time()
        result = fn()
        best = min(best, time.process_time() - t0)
    return best, result


def bare_exp(values: float, repeats: int, chunk: int = 32_768) -> float:
    """CPU seconds of np.exp over ``values`` values, in chunks of ``chunk``
    (best of ``repeats``)."""
    buf = np.linspace(-1.0, 1.0, chunk)
    out = np.empty_like(buf)
    calls = max(1, round(values / chunk))

    def run() -> None:
        for _ in range(calls):
            np.exp(buf, out=out)
    return best_cpu(run, repeats)[0]


def values_per_integral(case: Case, strata: int = 3) -> float:
    """Values of the integrand (log RR, or RR - 1 in the engine's direct
    form) the engine evaluates per integral (separate pass)."""
    count = [0]
    originals = fractions._log_rr_m, fractions._excess_m

    def counting_log_rr(*args, **kwargs):
        inner = originals[0](*args, **kwargs)

        def log_rr(x, rows):
            count[0] += np.size(x)
            return inner(x, rows)
        return log_rr

    def counting_excess(*args, **kwargs):
        inner = originals[1](*args, **kwargs)
        if inner is None:
            return None

        def excess(x, rows, out, inside=False):
            count[0] += np.size(x)
            return inner(x, rows, out, inside)
        return excess

    fractions._log_rr_m, fractions._excess_m = counting_log_rr, counting_excess
    try:
        for p in case.params[:strata]:
            for scn in SCENARIOS:
                excess_draws(case.curve, case.coef, case.family, p, 0.0, MINIMUM_RISK, scn)
    finally:
        fractions._log_rr_m, fractions._excess_m = originals
    return count[0] / (case.coef.shape[0] * min(strata, len(case.params)) * len(SCENARIOS))


def quad_one(case: Case, coef: float, params: np.ndarray, scenario, style: str) -> float:
    """E[RR_m(g(X))] - 1 by adaptive quadrature, split at every kink."""
    frozen = case.family.scipy(params)
    top = float(case.curve.max_dose)
    model = case.curve.model
    base = float(model.log_rr(np.array([MINIMUM_RISK]), np.array([coef]))[0])
    if case.family.name == "lognormal":
        mu, s = math.log(params[0]), math.log(params[1])
        norm = 1.0 / (s * math.sqrt(2 * math.pi))

        def density(x: float) -> float:
            return norm / x * math.exp(-0.5 * ((math.log(x) - mu) / s) ** 2)
    else:
        density = frozen.pdf
    if style != "lean":
        density = frozen.pdf
    kind = None if scenario is None else scenario.kind
    v = 0.0 if scenario is None else scenario.value
    linear = isinstance(model, LinearExcess)

    def g(x: float) -> float:
        if kind == "cap":
            return min(x, v)
        if kind == "scale":
            return v * x
        if kind == "reduce_by":
            return max(x - v, MINIMUM_RISK)
        return x

    def excess(x: float) -> float:
        y = min(max(g(x), MINIMUM_RISK), top)
        lr = math.log1p(coef * y) if linear else coef * y
        return math.expm1(lr - base)

    def f(x: float) -> float:
        return excess(x) * density(x)

    pts = [MINIMUM_RISK, top]
    if scenario is not None:
        pts = list(scenario.preimage(np.array(pts))) + list(scenario.own_kinks())
    edges = [0.0] + sorted(p for p in set(pts) if p > 0) + [math.inf]
    return sum(integrate.quad(f, a, c, epsabs=0, epsrel=1e-10, limit=200)[0]
               for a, c in zip(edges[:-1], edges[1:]) if c > a)


def compare(case: Case, result: np.ndarray, rng: np.random.Generator, sample: int,
            stats_sample: int) -> tuple[dict[str, float], float]:
    draws, strata = case.coef.shape[0], len(case.params)
    picks = [(int(rng.integers(draws)), int(rng.integers(strata)), int(rng.integers(len(SCENARIOS))))
             for _ in range(max(sample, stats_sample))]
    timings, worst = {}, 0.0
    for style, k in (("lean", sample), ("scipy.stats", stats_sample)):
        if k == 0:
            continue
        t0 = time.process_time()
        for d, s, j in picks[:k]:
            ref = quad_one(case, float(case.coef[d, 0]), case.params[s][d], SCENARIOS[j], style)
            worst = max(worst, abs(result[s, j, d] - ref) / abs(ref))
        timings[style] = (time.process_time() - t0) / k
    return timings, worst


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=10_000)
    ap.add_argument("--strata", type=int, default=100, help="strata of the general case")
    ap.add_argument("--other-strata", type=int, default=25, help="strata of the other cases")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--sample", type=int, default=40, help="integrals for the lean quad loop")
    ap.add_argument("--stats-sample", type=int, default=3, help="integrals for the scipy.stats loop")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--cases", default=",".join(CASES))
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    print(f"machine: {platform.machine()}, {platform.processor() or 'cpu'}, "
          f"python {platform.python_version()}, numpy {np.__version__}; CPU time, best of "
          f"{args.repeats}; load average {' '.join(f'{v:.2f}' for v in os.getloadavg())}")
    print(f"doseattr from {Path(doseattr.__file__).parent}")
    measured = []
    for name in args.cases.split(","):
        strata = args.strata if name == "general" else args.other_strata
        case = Case(name, args.draws, strata, rng)
        cpu, result = best_cpu(case.run, 1)
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        nodes = values_per_integral(case)
        exp_cpu = bare_exp(nodes * case.integrals, args.repeats) / case.integrals
        timings, worst = compare(case, np.asarray(result), rng, args.sample if name == "general"
                                 else max(args.sample // 4, 1), args.stats_sample
                                 if name == "general" else 0)
        measured.append([case, strata, cpu, rss, nodes, exp_cpu, timings, worst])
    # the other repeats in turns over the cases: a slow phase of a shared
    # machine (seconds long) then falls on one repeat of several cases, not
    # on all repeats of one
    for _ in range(args.repeats - 1):
        for m in measured:
            m[2] = min(m[2], best_cpu(m[0].run, 1)[0])
    rows = []
    for case, strata, cpu, rss, nodes, exp_cpu, timings, worst in measured:
        name, n_int = case.name, case.integrals
        per = cpu / n_int
        print(f"\n[{name}] {args.draws} draws x {strata} strata x {len(SCENARIOS)} = "
              f"{n_int:,} integrals: {per * 1e6:.3f} us per integral (CPU), "
              f"{nodes:.1f} values per integral")
        print(f"  bare np.exp over the same number of values: {exp_cpu * 1e6:.3f} us per integral")
        for style, t in timings.items():
            print(f"  quad loop ({style} integrand): {t * 1e6:,.0f} us per integral; "
                  f"engine {t / per:,.0f} times faster")
        print(f"  largest relative difference from quad: {worst:.1e}")
        goal = GOALS.get(name)
        if goal is not None:
            print(f"  goal: at most {goal:.2f} us per integral: "
                  f"{'met' if per * 1e6 <= goal else 'not met'}")
        if name == "general":
            print(f"  peak resident memory of the process: {rss / 1024:.0f} MiB (goal: at most "
                  f"{MEMORY_GOAL} MiB: {'met' if rss / 1024 <= MEMORY_GOAL else 'not met'})")
        rows.append((name, per * 1e6, goal, exp_cpu * 1e6, timings.get("lean")))
    print("\nsummary, CPU us per integral:")
    print(f"  {'case':<11} {'engine':>8} {'goal':>6} {'np.exp':>8} {'quad loop':>10}")
    for name, per_us, goal, exp_us, lean in rows:
        goal_s = "-" if goal is None else f"{goal:.2f}"
        lean_s = "-" if lean is None else f"{lean * 1e6:,.0f}"
        print(f"  {name:<11} {per_us:8.3f} {goal_s:>6} {exp_us:8.3f} {lean_s:>10}")
    print(f"load average at the end: {' '.join(f'{v:.2f}' for v in os.getloadavg())}")


if __name__ == "__main__":
    main()
