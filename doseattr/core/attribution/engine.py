r"""Fixed-node quadrature of expectations over exposure distributions.

Every attributable fraction is built from the expected excess risk
:math:`E[RR(X) - 1] = \int_0^\infty \mathrm{expm1}(L(x)) f(x)\,dx`, with
:math:`L = \ln RR`. Integrating the excess rather than the RR keeps full
relative precision when the fraction is small. The engine integrates on the
log-exposure scale :math:`t = \ln x`,

.. math:: E[\mathrm{expm1}(L(X))] = \int_{-\infty}^{\infty}
          \mathrm{expm1}(L(e^t))\, f_T(t)\, dt,

where :math:`f_T` is the density of :math:`T = \ln X`, which is smooth and
decays in both directions for the lognormal, gamma and Weibull families.
The real line is cut into panels at

* the family's breakpoints (:meth:`Family.log_breaks`), which cover the
  body and both tails to about 1e-16 of probability;
* when ``h`` grows without bound, breakpoints of the distribution tilted by
  that growth (:meth:`Family.tilted_log_breaks`), so the panels reach as
  far as ``h f`` has mass; a divergent expectation is refused there;
* the logarithm of every dose where ``h`` has a kink (minimum-risk level,
  the dose beyond which the curve is held flat, spline knots, scenario
  limits), so every panel integrand is smooth;

and each panel gets the same Gauss-Legendre rule
(:func:`scipy.special.roots_legendre`). Panels, nodes and parameters are all
arrays over draws, so one call evaluates thousands of integrals at once,
in chunks of draws to bound memory. Written here because no library offers
fixed-rule quadrature that is vectorised over per-draw panel limits.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import lru_cache
from typing import cast

import numpy as np
from numpy.typing import NDArray
from scipy.special import roots_legendre

from doseattr.core.curves.base import Growth
from doseattr.core.exposure.base import Family
from doseattr.errors import ConvergenceError, FloatRangeError

FloatArray = NDArray[np.float64]
LogRisk = Callable[[FloatArray, slice], FloatArray]

#: Gauss-Legendre nodes per panel.
NODES = 12
#: Largest number of (draw x node) values held in memory at once.
CHUNK_VALUES = 32_768
#: Probability mass the panels must recover before a result is trusted.
MASS_TOLERANCE = 1e-9


@lru_cache(maxsize=8)
def _legendre(n: int) -> tuple[FloatArray, FloatArray]:
    xi, wi = roots_legendre(n)
    return xi, wi


def expected_excess(log_rr: LogRisk, family: Family, params: FloatArray, *,
                    growth: Growth, kinks: FloatArray, flat_from: float | FloatArray | None = None,
                    nodes: int = NODES) -> FloatArray:
    r"""E[expm1(L(X))] = E[RR(X) - 1] for each draw of an exposure family.

    Parameters
    ----------
    log_rr
        ``log_rr(x, rows)`` returns :math:`L(x) = \ln RR(x)` for doses ``x`` of
        shape ``(d, N)`` belonging to draws ``rows`` (a slice into the draw
        axis), so per-draw coefficients can be sliced alongside.
    family, params
        Exposure family and its public parameters, ``(D, k)``.
    growth
        Upper-tail growth of RR (rate per draw or shared).
    kinks
        Doses where ``L`` is not smooth, ``(K,)`` or ``(D, K)``.
    flat_from
        Dose ``x*`` per draw (or shared) beyond which ``L`` is constant, if
        any. The panels then stop at ``x*`` and the rest is exact:
        :math:`\mathrm{expm1}(L(x^*))\,S(x^*)`, however far into the tail
        of the exposure distribution ``x*`` lies.

    Returns
    -------
    ndarray, shape ``(D,)``

    Raises
    ------
    DivergenceError
        When the expectation is infinite for some draw.
    ConvergenceError
        When the panels fail to recover the distribution's probability mass
        (an internal check of the quadrature).
    """
    params = np.atleast_2d(np.asarray(params, dtype=float))
    d = params.shape[0]
    kinks = np.asarray(kinks, dtype=float)
    if kinks.ndim == 1:
        kinks = np.broadcast_to(kinks, (d, kinks.shape[0]))
    rate = np.broadcast_to(np.asarray(growth.rate, dtype=float), (d,))
    top = np.broadcast_to(np.inf if flat_from is None else np.asarray(flat_from, float), (d,))
    xi, wi = _legendre(nodes)
    if d > 1 and _same_rows(params) and _same_rows(kinks) and np.all(top == top[0]):
        # One exposure distribution and one set of kinks for every draw
        # (only the curve varies): build the nodes once and reuse them.
        shared = Growth(growth.kind, rate.max(keepdims=True))
        grid = _grid(family, params[:1], shared, kinks[:1], top[:1], xi, wi)
        step = max(1, CHUNK_VALUES // grid.x.shape[1])
        return np.concatenate([_integrate(log_rr, grid, slice(s, min(d, s + step)))
                               for s in range(0, d, step)])
    n_edges = _edges(family, params[:1], _sub_growth(growth, rate, slice(0, 1)),
                     kinks[:1]).shape[1]
    step = max(1, CHUNK_VALUES // max(1, (n_edges - 1) * nodes))
    out = np.empty(d)
    for start in range(0, d, step):
        rows = slice(start, min(d, start + step))
        grid = _grid(family, params[rows], _sub_growth(growth, rate, rows), kinks[rows],
                     top[rows], xi, wi)
        out[rows] = _integrate(log_rr, grid, rows)
    return out


def _same_rows(a: FloatArray) -> bool:
    return bool(a.shape[1] == 0 or np.all(a == a[:1]))


def _sub_growth(growth: Growth, rate: FloatArray, rows: slice) -> Growth:
    return Growth(growth.kind, rate[rows])


@dataclass(frozen=True)
class Grid:
    """Quadrature nodes for a chunk of draws: doses ``x``, log densities,
    weights and weighted densities ``(d, N)``; the flat tail's start
    ``tail_x (d, 1)`` and its probability ``tail_p (d,)``."""

    x: FloatArray
    log_f: FloatArray
    weight: FloatArray
    dens: FloatArray
    tail_x: FloatArray
    tail_p: FloatArray


def _grid(family: Family, params: FloatArray, growth: Growth, kinks: FloatArray,
          top: FloatArray, xi: FloatArray, wi: FloatArray) -> Grid:
    """Nodes up to ``top`` (the start of a flat tail, or inf); checks that
    the weights and the tail recover the distribution's probability."""
    edges = _edges(family, params, growth, kinks)
    with np.errstate(divide="ignore"):
        # A flat tail from 0 (max_dose = 0) leaves no panels: every panel
        # is squeezed onto the lowest edge and the tail holds all the mass.
        cap = np.where(top > 0, np.log(top), edges.min(axis=1))
        edges = np.minimum(edges, cap[:, None])
    half = 0.5 * np.diff(edges, axis=1)                      # (d, P)
    mid = 0.5 * (edges[:, 1:] + edges[:, :-1])
    d, p = half.shape
    t = (mid[:, :, None] + half[:, :, None] * xi).reshape(d, p * xi.size)
    log_f = family.log_density_log(t, params)
    weight = (half[:, :, None] * wi).reshape(d, p * xi.size)
    dens = np.exp(log_f) * weight
    finite = np.isfinite(top)
    tail_x = np.where(finite, top, 1.0)[:, None]
    tail_p = np.where(finite, family.sf(tail_x, params)[:, 0], 0.0)
    mass = dens.sum(axis=1) + tail_p
    if np.any(np.abs(mass - 1.0) > MASS_TOLERANCE):
        worst = float(np.max(np.abs(mass - 1.0)))
        raise ConvergenceError(
            f"quadrature recovered the {family.name} distribution's probability only to "
            f"{worst:.1e}; parameters are too extreme for the fixed rule")
    return Grid(np.exp(t), log_f, weight, dens, tail_x, tail_p)


def _integrate(log_rr: LogRisk, grid: Grid, rows: slice) -> FloatArray:
    # RR past the float range gives inf (and inf - inf nan) here; both are
    # refused below, so the warnings on the way say nothing new.
    with np.errstate(over="ignore", invalid="ignore"):
        total = _weighted_excess(log_rr(grid.x, rows), grid.log_f, grid.weight, grid.dens)
        if np.any(grid.tail_p > 0):
            total = total + np.expm1(log_rr(grid.tail_x, rows)[:, 0]) * grid.tail_p
    if not np.all(np.isfinite(total)):
        raise FloatRangeError("the expected RR overflows the float range (about 1.8e308): "
                              "the relative risk is too large over the exposure range; check "
                              "the curve's coefficients and units")
    return total


def _edges(family: Family, params: FloatArray, growth: Growth, kinks: FloatArray) -> FloatArray:
    """Panel edges for a chunk of draws: family breaks, tilted breaks, kinks."""
    d = params.shape[0]
    if growth.kind != "bounded" and np.any(growth.rate > 0):
        breaks = family.tilted_log_breaks(params, growth)   # includes the family's own
    else:
        breaks = family.log_breaks(params)
    parts = [np.broadcast_to(breaks, (d, _width(breaks)))]
    allb = np.concatenate(parts, axis=1)
    lo = allb.min(axis=1, keepdims=True)
    hi = allb.max(axis=1, keepdims=True)
    if kinks.shape[1]:
        with np.errstate(divide="ignore"):
            logk = np.log(np.maximum(kinks, 0.0))
        parts.append(np.clip(logk, lo, hi))
    return np.sort(np.concatenate(parts, axis=1), axis=1)


def _width(a: FloatArray) -> int:
    return int(np.shape(a)[-1])


def _weighted_excess(lr: FloatArray, log_f: FloatArray, weight: FloatArray,
                     dens: FloatArray) -> FloatArray:
    """Row sums of expm1(lr) * dens, where dens = exp(log_f) * weight.

    Where lr is large enough to overflow expm1 the density there is
    negligible; those nodes are evaluated as exp(log_f + lr) instead.
    """
    if lr.max(initial=0.0) < 600.0:
        if dens.shape[0] == 1:
            return cast(FloatArray, np.expm1(lr) @ dens[0])
        return cast(FloatArray, np.einsum("ij,ij->i", np.expm1(lr), dens))
    with np.errstate(over="ignore", invalid="ignore"):
        big = np.exp(log_f + lr) * -np.expm1(-np.maximum(lr, 0.5)) * weight
    small = np.expm1(np.minimum(lr, 0.5)) * dens
    return cast(FloatArray, np.where(lr > 0.5, big, small).sum(axis=1))
