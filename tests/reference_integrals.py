"""The tests' one reference integrator: scipy.integrate.quad over an exposure.

Tests check the project's fixed-node engine against an expectation computed
independently of it, by adaptive quadrature (scipy.integrate.quad, QUADPACK)
of ``func(x) * dist.pdf(x)``. The integrand a test passes in is its own
expected relative risk RR_m(x), excess RR_m(x) - 1, dose x, ...; how that
becomes a PAF or PIF (the unexposed share, 1 - 1/E or e/(1 + e)) stays in the
test beside its check. The built-in scenarios' transforms and their
pre-images are written out here too, from their definitions, for the
integrands of the steep-curve batteries.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from itertools import pairwise

import numpy as np
from scipy import integrate, stats

from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale


def split_edges(kinks: Iterable[float] = (), lower: float = 0.0,
                upper: float = math.inf) -> list[float]:
    """Edges of the sub-intervals the reference integral is split at.

    Parameters
    ----------
    kinks : iterable of float
        Points where the integrand is not smooth (minimum-risk level, a
        curve's knots or ``max_dose``, a scenario's break points and their
        preimages). Points outside the open interval (lower, upper) and
        repeats are dropped.
    lower, upper : float
        Ends of the range of integration.

    Returns
    -------
    list of float
        ``[lower, k1, ..., kn, upper]``, increasing, no repeats.
    """
    inner = sorted({float(k) for k in kinks if lower < float(k) < upper})
    return [lower, *inner, upper]


def expect_over(func: Callable[[float], float], dist, kinks: Iterable[float] = (), *,
                epsrel: float = 1e-12, limit: int = 400, lower: float = 0.0,
                upper: float = math.inf) -> float:
    r"""Reference integral :math:`\int_{lower}^{upper} func(x) f(x) dx`.

    On the scale of the variable ``dist`` is a density of: mostly the dose x
    (not log x), with f = ``dist.pdf`` the exposure's scipy.stats density;
    some tests integrate over the standardized log dose z instead, with
    ``dist = scipy.stats.norm`` and a finite ``lower``/``upper``. With the
    defaults it is :math:`E[func(X)]` for an exposure X > 0.

    The range is cut at every kink of the integrand (quad's own advice for a
    non-smooth integrand: its adaptive rule converges only slowly across a
    kink), see :func:`split_edges`, and each piece is one
    ``scipy.integrate.quad`` call with ``epsabs=0`` (a purely relative
    tolerance, so small integrals keep their digits), ``epsrel`` and
    ``limit`` sub-intervals; the pieces are summed.

    Parameters
    ----------
    func : callable
        Scalar function of the integration variable, e.g. RR_m(x) or
        RR_m(x) - 1; it does not include the density.
    dist : scipy.stats distribution
        The density (anything with ``pdf``).
    kinks : iterable of float
        Points where ``func`` (or ``f``) is not smooth.
    epsrel : float
        Relative tolerance of each quad call; most checks use 1e-12, a few
        1e-10, 1e-11 or 1e-13 (each caller states its own).
    limit : int
        Maximum number of sub-intervals per quad call; each caller states its
        own (50, quad's default, up to 1000).
    lower, upper : float
        Range of integration; a partial expectation when ``upper`` is finite.

    Returns
    -------
    float
        The sum of the pieces' quad estimates (quad's error estimates are
        not returned).
    """
    edges = split_edges(kinks, lower, upper)
    return sum(integrate.quad(lambda x: func(x) * dist.pdf(x), a, b, epsabs=0,
                              epsrel=epsrel, limit=limit)[0]
               for a, b in pairwise(edges))


def expect_over_log_dose(func: Callable[[float], float], dist, kinks: Iterable[float] = (), *,
                         t_lower: float, t_upper: float, epsrel: float = 1e-12,
                         limit: int = 400) -> float:
    r"""Reference integral on the log-dose scale t = ln x.

    .. math:: \int_{t_{lower}}^{t_{upper}} func(e^t)\, f(e^t)\, e^t \, dt
              = \int_{e^{t_{lower}}}^{e^{t_{upper}}} func(x) f(x) dx,

    f = ``dist.pdf`` on the dose scale, :math:`e^t` the Jacobian. For a
    density spread over many decades (a large GSD) quad's nodes on the log
    scale reach the mass that nodes on the dose scale would step over.
    Split at ``ln k`` for each dose-scale kink k > 0 and, like
    :func:`expect_over`, one quad call per piece with ``epsabs=0``.

    Parameters
    ----------
    func : callable
        Scalar function of the dose x (not of t).
    dist : scipy.stats frozen distribution
        The exposure density on the dose scale.
    kinks : iterable of float
        Dose-scale points where ``func`` is not smooth.
    t_lower, t_upper : float
        Range of integration in t = ln x (a finite lower end stands in
        for 0).
    epsrel, limit : float, int
        As in :func:`expect_over`.

    Returns
    -------
    float
        The sum of the pieces' quad estimates.
    """
    edges = split_edges((math.log(k) for k in kinks if k > 0), t_lower, t_upper)
    return sum(integrate.quad(lambda t: func(math.exp(t)) * dist.pdf(math.exp(t)) * math.exp(t),
                              a, b, epsabs=0, epsrel=epsrel, limit=limit)[0]
               for a, b in pairwise(edges))


def scenario_dose(scenario, x: float, m: float) -> float:
    """A built-in scenario's transform g(x), written out from its definition
    (None: x; Cap: min(x, L); Scale: s x; ReduceBy: max(x - d, m))."""
    if scenario is None:
        return x
    if isinstance(scenario, Cap):
        return min(x, scenario.value)
    if isinstance(scenario, Scale):
        return scenario.value * x
    return max(x - scenario.value, m)


def scenario_preimage(scenario, y: float) -> float:
    """The dose x with g(x) = y of :func:`scenario_dose`, for y above m (and
    below a cap)."""
    if isinstance(scenario, Scale):
        return y / scenario.value
    if isinstance(scenario, ReduceBy):
        return y + scenario.value
    return y


def weibull_w_of_score(z: np.ndarray) -> np.ndarray:
    """``w = ln E`` of a standard exponential ``E`` whose normal score is
    ``z``, from scipy.stats: ``ln(-log1p(-Phi(z)))`` below the median,
    ``ln(-ln Phi(-z))`` above (the tail that keeps precision)."""
    lower = z <= 0
    out = np.empty_like(z)
    out[lower] = np.log(-np.log1p(-stats.norm.cdf(z[lower])))
    out[~lower] = np.log(-stats.norm.logsf(z[~lower]))
    return out
