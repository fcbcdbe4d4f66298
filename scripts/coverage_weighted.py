"""Coverage of the 95% PAF interval for weighted measurements, frequency
against importance weights (simulation with known truth; no files).

Each simulated population: ``--monitors`` values drawn from a known
lognormal (GM 10, GSD 2.2), each monitor weighted by residents drawn
lognormal(0, sigma) independently of its value, with sigma chosen so that
the expected Kish effective sample size n exp(-sigma^2) (Kish 1965, Survey
Sampling, from memory; the lognormal moments E[w^2] / E[w]^2 = exp(sigma^2))
is ``--neff``. The relative-risk curve is known: log-linear, RR 1.2 per 10
units, held flat beyond 60 (no coefficient uncertainty, so the interval is
the exposure's alone). The true PAF is 1 - 1 / E[RR(X)] with E[RR(X)] from
``scipy.integrate.quad`` over the true lognormal density.

Per population the core fits the lognormal (weighted ML) and propagates the
exposure uncertainty (``--draws`` Monte Carlo draws, percentile interval)
with the weights read as "frequency" and as "importance"; the same is done
for the empirical distribution (weighted bootstrap) and, as a reference,
for an unweighted fit to equally weighted monitors. Printed: coverage of
the true PAF by each interval with its binomial standard error
sqrt(p (1 - p) / R), the mean interval width and the mean Kish n_eff.

Usage:  python scripts/coverage_weighted.py [--populations 200] [--monitors 50]
        [--neff 29] [--draws 1000] [--seed 2026]
"""

from __future__ import annotations

import argparse
import math
import time
from collections.abc import Callable

import numpy as np
from scipy import integrate, stats

from doseattr.core.attribution.fractions import paf
from doseattr.core.curves.base import Curve
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.empirical import EmpiricalExposure, empirical
from doseattr.core.exposure.fit import fit_measurements
from doseattr.core.exposure.sandwich import kish_effective_n
from doseattr.core.uncertainty.propagate import Stratum, propagate
from doseattr.core.uncertainty.summary import summarise

GM, GSD = 10.0, 2.2
SLOPE, MAX_DOSE = math.log(1.2) / 10.0, 60.0

Method = Callable[[np.ndarray, np.ndarray], object]


def true_paf() -> float:
    """1 - 1 / E[RR(X)] by quadrature over the true lognormal, split at the
    flat point."""
    dist = stats.lognorm(s=math.log(GSD), scale=GM)
    below, _ = integrate.quad(lambda x: math.exp(SLOPE * x) * dist.pdf(x), 0.0, MAX_DOSE,
                              epsabs=1e-13, epsrel=1e-12, limit=200)
    err = below + math.exp(SLOPE * MAX_DOSE) * float(dist.sf(MAX_DOSE))
    return 1.0 - 1.0 / err


def methods() -> dict[str, Method]:
    """How each interval's exposure is built from values ``x`` and weights ``w``."""
    return {
        "lognormal, frequency": lambda x, w: fit_measurements("lognormal", x, weights=w,
                                                             weight_meaning="frequency"),
        "lognormal, importance": lambda x, w: fit_measurements("lognormal", x, weights=w,
                                                              weight_meaning="importance"),
        "empirical, frequency": lambda x, w: empirical(x, w, weight_meaning="frequency"),
        "empirical, importance": lambda x, w: empirical(x, w, weight_meaning="importance"),
        "lognormal, equal weights (reference)": lambda x, w: fit_measurements("lognormal", x),
    }


def interval(curve: Curve, exposure: object, draws: int,
             rng: np.random.Generator) -> tuple[float, float]:
    assert isinstance(exposure, EmpiricalExposure) or hasattr(exposure, "family")
    point = paf(curve, exposure, minimum_risk=0.0)  # type: ignore[arg-type]
    prop = propagate(curve, [Stratum("population", 1.0, exposure)], [],  # type: ignore[arg-type]
                     draws=draws, rng=rng, minimum_risk=(0.0, 0.0), sources=("exposure",))
    s = summarise(point, prop.paf[0])
    return s.lower, s.upper


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--populations", type=int, default=200)
    ap.add_argument("--monitors", type=int, default=50)
    ap.add_argument("--neff", type=float, default=29.0)
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=2026)
    a = ap.parse_args()
    sigma = math.sqrt(math.log(a.monitors / a.neff))
    truth = true_paf()
    curve = Curve(LogLinear(), np.array([SLOPE]), np.zeros((1, 1)), max_dose=MAX_DOSE,
                  data_max=MAX_DOSE)
    rng = np.random.default_rng(a.seed)
    found = {name: [] for name in methods()}
    widths = {name: [] for name in methods()}
    kish = []
    start = time.perf_counter()
    for _ in range(a.populations):
        x = rng.lognormal(math.log(GM), math.log(GSD), a.monitors)
        w = rng.lognormal(0.0, sigma, a.monitors)
        kish.append(kish_effective_n(w))
        for name, build in methods().items():
            lo, hi = interval(curve, build(x, w), a.draws, rng)
            found[name].append(lo <= truth <= hi)
            widths[name].append(hi - lo)
    took = time.perf_counter() - start
    print(f"true PAF {truth:.5f}; {a.populations} populations of {a.monitors} monitors, "
          f"weights lognormal(0, {sigma:.3f}), mean Kish n_eff {np.mean(kish):.1f}; "
          f"{a.draws} draws each; seed {a.seed}; {took:.0f} s")
    print(f"{'interval':40s} {'coverage':>9s} {'SE':>7s} {'mean width':>11s}")
    for name, hits in found.items():
        p = float(np.mean(hits))
        se = math.sqrt(p * (1 - p) / len(hits))
        print(f"{name:40s} {100 * p:8.1f}% {100 * se:6.1f}% {np.mean(widths[name]):11.5f}")


if __name__ == "__main__":
    main()
