r"""Standardised variables of the exposure families, for the integration engine.

Each family is integrated in a variable ``w`` that is an affine function of
the log exposure, :math:`\ln x = a + b\,w`, and whose density does not
depend on the dose parameters:

* lognormal: :math:`w = z = (\ln x - \mu)/s`, density :math:`\varphi(z)`;
* Weibull: :math:`w = u = k(\ln x - \ln\lambda) = \ln E` with
  :math:`E = (x/\lambda)^k` standard exponential, density :math:`e^{u - e^u}`;
* gamma: :math:`w = \ln y`, :math:`y = x/\theta \sim \Gamma(k, 1)`, density
  :math:`e^{k w - e^w}/\Gamma(k)`.

Panels are placed by formula in the normal score of ``W``,
:math:`\zeta(w) = \Phi^{-1}(F_W(w))` (identical to ``z`` for the lognormal;
in closed form for the Weibull, :math:`F_W(u) = 1 - e^{-e^u}`; for the gamma
from a table of quantiles over the shape, interpolated, since only the panel
edges, not the nodes, depend on it). Equal widths in :math:`\zeta` give
panels of comparable probability on both tails, which a fixed Gauss-Legendre
rule resolves (checked against quad in the tests). Everything here is
vectorised over draws: parameters ``(d, k)``, results ``(d, 1)`` or
``(d, n)``. The engine is called once per scenario over the same draws, so
the terms that depend on the draws alone (the gamma normaliser and table
rows) and the lower normal scores are kept for the last inputs, compared by
value (:class:`_LastValues`), and returned read-only.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable
from functools import lru_cache
from typing import Generic, NamedTuple, TypeVar, cast

import numpy as np
from numpy.typing import NDArray
from scipy.special import gammainc, log_ndtr, ndtr, ndtri

from doseattr.core.exposure.base import Family
from doseattr.core.exposure.gamma import stirling_correction
from doseattr.core.exposure.incomplete_gamma import (
    _log_lower_quantile,
    _log_upper_quantile,
    lower_gamma,
    upper_gamma,
)

FloatArray = NDArray[np.float64]

#: Normal score at which the body of every family is cut: less than 3.2e-14
#: of probability lies beyond it on either side.
ZB = 7.5
#: Largest normal score the panels reach (a survival probability of about
#: 1e-307), for tilted or far-flat integrands.
Z_MAX = 37.0
_LOG_SQRT_2PI = 0.5 * np.log(2 * np.pi)
_T = TypeVar("_T")


def between(lo: FloatArray, hi: FloatArray) -> FloatArray:
    """Phi(hi) - Phi(lo) on the side of zero that keeps precision (for
    ``lo > 0`` as ``Phi(-lo) - Phi(-hi)``)."""
    sign = np.where(lo > 0, -1.0, 1.0)
    return cast(FloatArray, sign * (ndtr(sign * hi) - ndtr(sign * lo)))


class _LastValues(Generic[_T]):
    """A function's value for the last inputs it was given, served again for
    inputs equal to them (compared by value, about 1.4 ns a draw and input;
    so a changed array never gets a stale value). The engine is called once
    per scenario over the same draws (:func:`~doseattr.core.attribution.
    fractions.excess_draws`), and needs the shape terms several times per
    block. The values' arrays are made read-only."""

    def __init__(self, compute: Callable[..., _T]) -> None:
        self._compute = compute
        self._last: tuple[tuple[FloatArray, ...], _T] | None = None

    def __call__(self, *inputs: FloatArray) -> _T:
        last = self._last
        if last is not None and all(a.shape == b.shape and np.array_equal(a, b)
                                    for a, b in zip(last[0], inputs, strict=True)):
            return last[1]
        value = self._compute(*inputs)
        parts = cast(tuple[FloatArray, ...], value if isinstance(value, tuple) else (value,))
        for part in parts:
            part.flags.writeable = False
        self._last = (tuple(np.array(v, dtype=float) for v in inputs), value)
        return value


class Standard(ABC):
    """How one family is integrated: its standardised variable and panels."""

    #: Panel width in the normal score (a full body window, -ZB to ZB, holds
    #: 2 ZB / width panels).
    width: float = 3.75

    def __init__(self, family: Family) -> None:
        self.family = family

    @abstractmethod
    def affine(self, params: FloatArray) -> tuple[FloatArray, FloatArray]:
        """``(a, b)``, each ``(d, 1)``, with ``ln x = a + b w``."""

    #: Whether :meth:`kernel` takes ``exp(w)`` (which the engine then forms
    #: at the nodes the way it forms the doses).
    uses_exp_w: bool = False

    @abstractmethod
    def kernel(self, w: FloatArray, x: FloatArray, params: FloatArray,
               exp_w: FloatArray | None = None) -> FloatArray:
        """Log density of ``W`` at ``w`` ``(d, n)`` less :meth:`log_norm`,
        given the doses ``x = exp(a + b w)`` too and, for :attr:`uses_exp_w`,
        ``exp(w)`` (may overwrite ``w``, not ``x``)."""

    def fold(self, params: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray] | None:
        """``(shift, times, post)`` ``(d, 1)`` each, if :meth:`folded_kernel`
        applies: the engine then forms ``u = (w + shift) times`` at the nodes
        (with the nodes' own affine map, two operations fewer a value)."""
        return None

    def folded_kernel(self, u: FloatArray, x: FloatArray, post: FloatArray) -> FloatArray:
        """:meth:`kernel` from ``u`` of :meth:`fold` (may overwrite ``u``)."""
        raise NotImplementedError

    @abstractmethod
    def log_norm(self, params: FloatArray) -> FloatArray:
        """The log density's part that depends on the draw alone ``(d, 1)``."""

    def log_density(self, w: FloatArray, params: FloatArray) -> FloatArray:
        """Log density of ``W`` at ``w`` ``(d, n)``."""
        a, b = self.affine(params)
        with np.errstate(over="ignore"):
            x = np.exp(a + b * w)
        return cast(FloatArray, self.kernel(np.array(w, dtype=float), x, params)
                    + self.log_norm(params))

    @abstractmethod
    def zeta(self, w: FloatArray, params: FloatArray) -> FloatArray:
        """Normal score of ``F_W(w)``, exact to rounding (``(d, 1)``)."""

    @abstractmethod
    def from_zeta(self, zeta: FloatArray, params: FloatArray) -> FloatArray:
        """``w`` with normal score about ``zeta`` (edges; ``(d, n)``)."""

    def log_sf(self, w: FloatArray, params: FloatArray) -> FloatArray:
        """Log survival probability of ``W`` beyond ``w``."""
        return cast(FloatArray, log_ndtr(-self.zeta(w, params)))

    def zeta_low(self, w: FloatArray, params: FloatArray) -> FloatArray:
        """:meth:`zeta` where only its lower tail needs full precision."""
        return self.zeta(w, params)

    def zeta_top(self, w: FloatArray, params: FloatArray) -> tuple[FloatArray, FloatArray]:
        """:meth:`zeta` (its upper tail in full precision) and the survival
        probability beyond ``w``."""
        with np.errstate(over="ignore"):
            return self.zeta(w, params), np.exp(self.log_sf(w, params))

    def panel_width(self, params: FloatArray) -> FloatArray:
        """Panel width in the normal score per draw ``(d, 1)``."""
        return np.full((params.shape[0], 1), self.width)

    def extra_breaks(self, params: FloatArray) -> FloatArray:
        """Breakpoints in ``w`` besides the equal-score panels ``(d, j)``."""
        return np.zeros((params.shape[0], 0))


def _log_columns(params: FloatArray) -> tuple[FloatArray, FloatArray]:
    return np.log(params[:, :1]), np.log(params[:, 1:2])


_lognormal_affine = _LastValues(_log_columns)


class LogNormalStandard(Standard):
    width = 7.5

    def affine(self, params: FloatArray) -> tuple[FloatArray, FloatArray]:
        """``(ln GM, ln GSD)``, kept for the last parameters (read-only)."""
        return _lognormal_affine(params)

    def kernel(self, w: FloatArray, x: FloatArray, params: FloatArray,
               exp_w: FloatArray | None = None) -> FloatArray:
        w *= w
        w *= -0.5
        return w

    def log_norm(self, params: FloatArray) -> FloatArray:
        return np.broadcast_to(-_LOG_SQRT_2PI, (params.shape[0], 1))

    def zeta(self, w: FloatArray, params: FloatArray) -> FloatArray:
        return w

    def from_zeta(self, zeta: FloatArray, params: FloatArray) -> FloatArray:
        return zeta

    def log_sf(self, w: FloatArray, params: FloatArray) -> FloatArray:
        return cast(FloatArray, log_ndtr(-w))

    def zeta_top(self, w: FloatArray, params: FloatArray) -> tuple[FloatArray, FloatArray]:
        return w, cast(FloatArray, ndtr(-w))


def _weibull_columns(params: FloatArray) -> tuple[FloatArray, FloatArray]:
    return np.log(params[:, 1:2]), 1.0 / params[:, :1]


_weibull_affine = _LastValues(_weibull_columns)


class WeibullStandard(Standard):
    def affine(self, params: FloatArray) -> tuple[FloatArray, FloatArray]:
        """``(ln scale, 1 / shape)``, kept for the last parameters (read-only)."""
        return _weibull_affine(params)

    uses_exp_w = True

    def kernel(self, w: FloatArray, x: FloatArray, params: FloatArray,
               exp_w: FloatArray | None = None) -> FloatArray:
        if exp_w is None:
            with np.errstate(over="ignore"):
                exp_w = np.exp(w)
        w -= exp_w
        return w

    def log_norm(self, params: FloatArray) -> FloatArray:
        return np.broadcast_to(0.0, (params.shape[0], 1))

    def zeta(self, w: FloatArray, params: FloatArray) -> FloatArray:
        return _weibull_zeta(w)

    def from_zeta(self, zeta: FloatArray, params: FloatArray) -> FloatArray:
        """``ln(-log1p(-Phi(zeta)))`` below the median, ``ln(-ln Phi(-zeta))``
        above (``zeta`` at most :data:`Z_MAX`, where ``Phi(-zeta)`` is a normal
        float); where ``zeta`` lies on both sides, both are formed and each
        taken where it holds (the same values, fewer masked operations)."""
        low = zeta <= 0
        p = np.abs(zeta)
        np.negative(p, out=p)
        p = ndtr(p, out=p)
        with np.errstate(divide="ignore"):
            if low.all():
                np.negative(p, out=p)
                np.log1p(p, out=p)
            elif not low.any():
                np.log(p, out=p)
            else:
                high = np.log(p)
                np.negative(p, out=p)
                np.log1p(p, out=p)
                np.copyto(p, high, where=~low)
            np.negative(p, out=p)
            return cast(FloatArray, np.log(p, out=p))

    def zeta_low(self, w: FloatArray, params: FloatArray) -> FloatArray:
        """:meth:`zeta`, kept for the last ``w`` (read-only; the current
        exposure and a cap above the minimum-risk level share it)."""
        return _weibull_scores(w)

    def log_sf(self, w: FloatArray, params: FloatArray) -> FloatArray:
        with np.errstate(over="ignore"):
            return cast(FloatArray, -np.exp(w))

    def zeta_top(self, w: FloatArray, params: FloatArray) -> tuple[FloatArray, FloatArray]:
        """:meth:`zeta` and ``S = exp(-e^w)``, from one ``e^w``."""
        with np.errstate(over="ignore"):
            e = np.exp(w)
        sf = np.exp(-e)
        return _weibull_zeta_e(e, sf), sf


def _weibull_zeta(w: FloatArray) -> FloatArray:
    """``ndtri(F)`` below the median (``F = -expm1(-e^w)``),
    ``-ndtri(S)`` above (``S = exp(-e^w)``), each side computed only
    where it is taken (without masks where all of ``w`` is on one side)."""
    with np.errstate(over="ignore"):
        return _weibull_zeta_e(np.exp(w))


def _weibull_zeta_e(e: FloatArray, sf: FloatArray | None = None) -> FloatArray:
    """:func:`_weibull_zeta` from ``e = e^w`` (overwritten) and, if known,
    ``sf = exp(-e)``."""
    low = e < np.log(2.0)
    np.negative(e, out=e)
    if low.all():
        np.expm1(e, out=e)
        np.negative(e, out=e)
        return cast(FloatArray, ndtri(e))
    if not low.any():
        z = ndtri(np.exp(e, out=e) if sf is None else sf)
        return cast(FloatArray, np.negative(z, out=z))
    p = np.expm1(e, where=low, out=np.empty_like(e))
    np.negative(p, out=p, where=low)
    high = ~low
    np.exp(e, out=p, where=high)
    z = ndtri(p)
    return cast(FloatArray, np.negative(z, out=z, where=high))


_weibull_scores = _LastValues(_weibull_zeta)


#: Grid of the gamma quantile table: log shape and normal score.
_LOG_K = np.arange(-21.0, 25.01, 0.25)
_ZETA = np.arange(-ZB, Z_MAX + 0.01, 0.25)


@lru_cache(maxsize=1)
def _gamma_table() -> FloatArray:
    r"""``s(k) (w - ln k)`` (:func:`_scale`) at the grid's shapes and normal scores, with ``w`` the
    log quantile of Gamma(k, 1) (``gammaincinv``/``gammainccinv`` on the side
    that keeps precision, bounded below where the quantile underflows, see
    :mod:`doseattr.core.exposure.incomplete_gamma`). Beyond the grid's
    largest shape the last row stands in (the normal limit,
    ``w = ln k + zeta / sqrt(k)``)."""
    k = np.exp(_LOG_K)[:, None]
    lower = _ZETA <= 0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        lo = _log_lower_quantile(k, ndtr(_ZETA[lower])[None, :])
        hi = _log_upper_quantile(k, ndtr(-_ZETA[~lower])[None, :])
    w = np.concatenate([lo, hi], axis=1)
    w = np.maximum.accumulate(np.nan_to_num(w, nan=-np.inf, neginf=-1e300), axis=1)
    return cast(FloatArray, _scale(k) * (w - np.log(k)))


@lru_cache(maxsize=1)
def _gamma_table_steps() -> tuple[FloatArray, FloatArray]:
    """:func:`_gamma_table` and its steps along the normal score (the last
    column's step, never taken, is 0)."""
    table = _gamma_table()
    steps = np.zeros_like(table)
    steps[:, :-1] = table[:, 1:] - table[:, :-1]
    return table, steps


def _scale(k: FloatArray) -> FloatArray:
    """``k`` below 1, ``sqrt(k)`` above: the table's rows in ``w - ln k``
    times this vary smoothly with ``ln k`` at both ends (the lower tail grows
    like ``1/k`` for a small shape; the body narrows like ``1/sqrt(k)``)."""
    return cast(FloatArray, np.minimum(k, np.sqrt(k)))


#: Largest gamma shape for which the density at the nodes is formed from the
#: doses (``expm1(v)`` as ``x/(theta k) - 1``); the log density's error is
#: then below ``DOSE_SHAPE`` times the rounding of ``x``, about 1e-12.
DOSE_SHAPE = 1000.0
#: Shapes below which the gamma panels get breaks near ``w = 0``.
SMALL_SHAPE = 0.3
#: Those breaks in ``w`` (``-inf`` stands for none: never inside a window).
_SMALL_SHAPE_BREAKS = np.array([-24.0, -12.0, -6.0, -3.0, -1.5, 0.0, 1.5])


def _exp(w: FloatArray) -> FloatArray:
    with np.errstate(over="ignore"):
        return cast(FloatArray, np.exp(w))


class _ShapeTerms(NamedTuple):
    """The gamma standard's terms that depend on the shape ``k`` alone, ``(d, 1)`` each."""

    log_k: FloatArray
    #: :meth:`GammaStandard.log_norm`
    log_norm: FloatArray
    #: flat offset in the quantile table of the row below ``ln k``
    row: NDArray[np.intp]
    #: weight of the row above
    weight: FloatArray
    #: ``1 / s(k)`` (:func:`_scale`)
    inv_scale: FloatArray


def _compute_shape_terms(k: FloatArray) -> _ShapeTerms:
    log_k = np.log(k)
    log_norm = 0.5 * log_k - _LOG_SQRT_2PI - stirling_correction(k, log_k)
    fk = np.clip((log_k - _LOG_K[0]) / 0.25, 0.0, _LOG_K.size - 1.000001)
    ik = fk.astype(np.intp)
    return _ShapeTerms(log_k, log_norm, ik * _ZETA.size, fk - ik, 1.0 / _scale(k))


_shape_terms = _LastValues(_compute_shape_terms)


def _lower_score(k: FloatArray, w: FloatArray) -> FloatArray:
    with np.errstate(over="ignore"):
        return cast(FloatArray, ndtri(lower_gamma(k, np.exp(w))))


_lower_scores = _LastValues(_lower_score)


def _gamma_columns(params: FloatArray) -> tuple[FloatArray, FloatArray]:
    return np.log(params[:, 1:2]), np.ones((params.shape[0], 1))


_gamma_affine = _LastValues(_gamma_columns)


class GammaStandard(Standard):
    def __init__(self, family: Family) -> None:
        super().__init__(family)

    def affine(self, params: FloatArray) -> tuple[FloatArray, FloatArray]:
        """``(ln scale, 1)``, kept for the last parameters (read-only)."""
        return _gamma_affine(params)

    def kernel(self, w: FloatArray, x: FloatArray, params: FloatArray,
               exp_w: FloatArray | None = None) -> FloatArray:
        r""":math:`-k\,(\mathrm{expm1}(v) - v)`, :math:`v = w - \ln k`: the
        gamma log density written about its mode (see
        :meth:`doseattr.core.exposure.gamma.Gamma.log_density_log`)."""
        k = params[:, :1]
        with np.errstate(over="ignore", invalid="ignore"):
            fold = self.fold(params)
            if fold is not None:
                # e^v = x / (theta k): the doses' exponential serves; its
                # rounding (a few units in the last place of 1) counts k-fold
                shift, times, post = fold
                w += shift
                w *= times
                return self.folded_kernel(w, x, post)
            w -= np.log(k)
            e = np.expm1(w)
        e -= w
        e *= -k
        return cast(FloatArray, e)

    def fold(self, params: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray] | None:
        r"""The kernel below :data:`DOSE_SHAPE` as :math:`(\theta k (v + 1) - x)
        / \theta` with :math:`\theta k (v + 1) = (w + 1 - \ln k)\,\theta k`:
        ``(1 - ln k, theta k, 1 / theta)``; ``None`` for larger shapes."""
        k = params[:, :1]
        if k.max(initial=0.0) > DOSE_SHAPE:
            return None
        theta = params[:, 1:2]
        return 1.0 - _shape_terms(k).log_k, theta * k, 1.0 / theta

    def folded_kernel(self, u: FloatArray, x: FloatArray, post: FloatArray) -> FloatArray:
        u -= x
        u *= post
        return u

    def log_norm(self, params: FloatArray) -> FloatArray:
        r""":math:`\tfrac12 \ln k - \tfrac12 \ln 2\pi - c(k)`, ``c`` Stirling's
        correction (read-only)."""
        return _shape_terms(params[:, :1]).log_norm

    def zeta(self, w: FloatArray, params: FloatArray) -> FloatArray:
        """``ndtri(P)`` below the mean, ``-ndtri(Q)`` above (:func:`upper_gamma`),
        each side computed only where it is taken."""
        k, y = np.broadcast_arrays(params[:, :1], _exp(w))
        low = y < k
        z = np.empty(y.shape)
        z[low] = ndtri(gammainc(k[low], y[low]))
        z[~low] = -ndtri(upper_gamma(k[~low], y[~low]))
        return z

    def from_zeta(self, zeta: FloatArray, params: FloatArray) -> FloatArray:
        """Bilinear interpolation in the quantile table (:func:`_gamma_table`)
        in ``ln k`` and ``zeta``, mapped back to ``w``."""
        terms = _shape_terms(params[:, :1])
        fz = np.subtract(zeta, _ZETA[0])
        fz *= 4.0
        # maximum and minimum: faster than np.clip over (d, n)
        np.maximum(fz, 0.0, out=fz)
        np.minimum(fz, _ZETA.size - 1.000001, out=fz)
        iz = fz.astype(np.intp)
        tz = fz
        tz -= iz
        # flat indices: one gather per corner of the grid cell, the right
        # corners as differences from the left (the same roundings as
        # forming them here)
        flat, steps = (t.ravel() for t in _gamma_table_steps())
        i00 = iz + terms.row
        v00, v01 = flat.take(i00), steps.take(i00)
        i00 += _ZETA.size
        v10, v11 = flat.take(i00), steps.take(i00)
        v01 *= tz
        v01 += v00
        v11 *= tz
        v11 += v10
        v11 -= v01
        v11 *= terms.weight
        v11 += v01
        v11 *= terms.inv_scale
        v11 += terms.log_k
        return cast(FloatArray, v11)

    def log_sf(self, w: FloatArray, params: FloatArray) -> FloatArray:
        with np.errstate(divide="ignore"):
            return cast(FloatArray, np.log(upper_gamma(params[:, :1], _exp(w))))

    def zeta_low(self, w: FloatArray, params: FloatArray) -> FloatArray:
        """From ``P`` alone: one incomplete gamma function per draw (the
        upper side loses digits of ``zeta``, not of any probability used;
        read-only)."""
        return _lower_scores(params[:, :1], w)

    def zeta_top(self, w: FloatArray, params: FloatArray) -> tuple[FloatArray, FloatArray]:
        q = upper_gamma(params[:, :1], _exp(w))
        return cast(FloatArray, -ndtri(q)), q

    def panel_width(self, params: FloatArray) -> FloatArray:
        """Narrower panels for a small shape, whose density in ``w`` has a
        long exponential lower tail (rate ``k``) ending at ``w`` near 0."""
        k = params[:, :1]
        return cast(FloatArray, self.width * np.maximum(np.sqrt(np.minimum(1.0, k / 0.35)), 0.05))

    def extra_breaks(self, params: FloatArray) -> FloatArray:
        """For a shape below SMALL_SHAPE the density of ``w`` turns from ``e^{kw}`` to
        ``e^{-e^w}`` within a few units of ``w = 0``; breaks there."""
        small = params[:, :1] < SMALL_SHAPE
        if not small.any():
            return np.zeros((params.shape[0], 0))
        # column-major, as the engine's per-draw columns
        return cast(FloatArray, np.where(small.T, _SMALL_SHAPE_BREAKS[:, None], -np.inf).T)


def standard_for(family: Family) -> Standard:
    """The :class:`Standard` of a family, by name."""
    kinds: dict[str, type[Standard]] = {"lognormal": LogNormalStandard,
                                        "weibull": WeibullStandard, "gamma": GammaStandard}
    if family.name not in kinds:
        raise KeyError(family.name)
    return kinds[family.name](family)
