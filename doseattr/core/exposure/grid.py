r"""Gridded exposure (cells with a concentration, a population and a zone)
reduced to per-zone population-weighted histograms on a fixed log grid.

The grid
--------
Positive concentrations fall in bins of natural-log width
:data:`LOG_STEP` :math:`= \delta = 2\times10^{-3}`, bin :math:`b` covering
:math:`[a_b, a_b e^\delta)` with :math:`a_b = e^{L_0 + b\delta}`,
:math:`L_0 = \ln 10^{-12}`, for :math:`b = 0, \dots, N-1`,
:math:`N =` :data:`N_BINS` :math:`= \lceil \ln(10^{24})/\delta \rceil = 27632`,
so the bins cover :math:`[10^{-12}, 10^{12}]` in the analysis unit. Values
below :math:`10^{-12}` go to the first bin and values above the top edge to
the last one; their bin's mean still holds them exactly to first order (the
second-order term below then uses the bin's actual spread). Zero is its own
bin, exact. Per zone :math:`z` and bin :math:`b` a pass over the cells keeps
the population :math:`w_{zb} = \sum_{i \in (z,b)} p_i` and the
population-weighted sum :math:`M_{zb} = \sum_{i \in (z,b)} p_i x_i`; both add
over chunks of cells, so partial sums combine in any order (a tree
reduction), up to float64 rounding.

The bound
---------
The reduced distribution puts weight :math:`w_b` at the bin mean
:math:`\bar x_b = M_b / w_b`. For :math:`h` (e.g. :math:`RR_m - 1`) twice
differentiable inside bin :math:`b`, Taylor's theorem with the Lagrange
remainder about :math:`\bar x_b` gives, for each cell,
:math:`h(x_i) = h(\bar x_b) + h'(\bar x_b)(x_i - \bar x_b) + \tfrac12
h''(\xi_i)(x_i - \bar x_b)^2`. Summed with weights :math:`p_i` over the bin,
the linear term vanishes because :math:`\bar x_b` is the weighted mean, and
every :math:`x_i` and :math:`\bar x_b` lie in :math:`[a_b, a_b e^\delta)`, so
:math:`|x_i - \bar x_b| < a_b (e^\delta - 1) \le \bar x_b (e^\delta - 1)`.
With :math:`w_b` normalised to sum to 1,

.. math::

    \bigl|E_{exact}[h] - E_{reduced}[h]\bigr| \le \tfrac12 \sum_b w_b
    \sup_{bin\ b} |h''| \,\bigl(\bar x_b (e^\delta - 1)\bigr)^2 .

(Popoviciu's inequality, variance :math:`\le` width²/4 for values in an
interval, lowers the constant from 1/2 to 1/8.) Linear :math:`h` is
therefore exact. For smooth :math:`h` the relative error is about
:math:`\tfrac12 (e^\delta - 1)^2 \, x^2 |h''| / h = 2.004\times10^{-6}\,
x^2|h''|/h` (:math:`5.01\times10^{-7}` with Popoviciu's constant); for the
excess of a log-linear curve, :math:`h = e^{\beta x} - 1`,
:math:`x^2 h''/h \approx \beta x` when :math:`\beta x` is small. A scenario
or a draw's factor that multiplies every concentration keeps the bins'
log widths, so the bound holds for it too.

A kink inside a bin (the minimum-risk level, ``max_dose``, a cap) breaks the
second-order argument: writing :math:`h = g + \Delta s\,(x - k)_+` with
:math:`g` smooth and :math:`\Delta s` the slope jump at :math:`k`,
:math:`E_b[(X-k)_+] - (\bar x_b - k)_+ = \tfrac12(E_b|X-k| - |\bar x_b - k|)`
lies in :math:`[0, \tfrac12 E_b|X - \bar x_b|]` by the triangle inequality,
so that bin adds at most :math:`\tfrac12 |\Delta s|\, \bar x_b (e^\delta - 1)\, w_b`:
first order in :math:`\delta` but weighted by the population of one bin.
Known kinks are therefore given to the reducer as ``cuts``: the bin that
holds a cut :math:`k` is split at it (the sums of its cells below
:math:`k`), so each piece is smooth and the second-order bound holds
again (a draw's factor that moves a kink, as the exposure-model error
does, leaves the first-order term for that draw).

Fewer points: a Gauss rule per group of bins
-------------------------------------------
A zone's census can be given with fewer points (``quadrature`` of
:meth:`GridSummary.zone_exposure`, a natural-log width :math:`\Delta`, e.g.
:data:`QUADRATURE_WIDTH` = 0.05, 25 bins): the bin means are grouped on a
lattice of log width :math:`\Delta` (a group never straddles a cut, nor
zero), and each group of two or more points is replaced by the two-point
Gauss rule of its points' distribution (:func:`gauss_groups`): nodes
:math:`\mu + t_{1,2}`, :math:`t` the roots of the monic quadratic
orthogonal to 1 and :math:`t`,
:math:`\pi_2(t) = t^2 - (m_3/m_2)\, t - m_2` (central moments of the
group), with the weights that match its population, mean, variance and
third moment. The nodes lie inside the group and the weights are positive.
For :math:`h` four times differentiable on the group (hull
:math:`[l_g, u_g]`, length :math:`L_g`), the Gauss rule's error is
(Gautschi 2004, *Orthogonal Polynomials*, Oxford, Cor. to Thm 1.48; from
memory)

.. math::

    E_g[h] - Q_g[h] = \frac{h^{(4)}(\xi)}{4!}\, E_g[\pi_2(X)^2], \qquad
    E_g[\pi_2^2] = m_4 - m_3^2/m_2 - m_2^2 \le L_g^4/64,

the last because :math:`\pi_2` minimises :math:`E[q(X)^2]` over monic
quadratics and :math:`q(t) = (t - c)^2 - L_g^2/8` (:math:`c` the middle of
the hull) is at most :math:`L_g^2/8` in size there. With
:math:`L_g \le x (e^\Delta - 1)`, the census with fewer points differs from
the one of every bin by at most :math:`\sum_g W_g \sup_g |h^{(4)}|\,
(x_g (e^\Delta - 1))^4 / 1536`: relative to :math:`h`, about
:math:`(e^\Delta - 1)^4/1536\; x^4|h^{(4)}|/h` = 4.5e-9 of
:math:`x^4|h^{(4)}|/h` for :math:`\Delta = 0.05` (for the excess of a
log-linear curve, :math:`x^4 h^{(4)}/h \approx (\beta x)^3` when
:math:`\beta x` is small), far below the bins' own second-order term above;
cubic :math:`h` is exact. For :math:`h` only twice differentiable (a cubic
spline's knot inside a group), matching the first three moments gives
:math:`|E_g[h] - Q_g[h]| \le \mathrm{osc}_g(h'')\, m_2 \le
L_g \sup|h'''|\, L_g^2/4` per unit of the group's population. A kink
inside a group (a level not given as a cut: a curve given as points, a
draw's minimum-risk level drawn over a range, a draw's exposure-model
factor that moves the cuts) adds a first-order term of at most
:math:`\tfrac12 |\Delta s|\, L_g W_g`, a group's share of the population
instead of a bin's: so fewer points are for curves smooth between the cuts
(the caller decides).

Rounding
--------
Sums are accumulated in float64 by ``numpy.bincount`` in cell order; a bin
summing :math:`n_b` cells carries a relative rounding error of at most
about :math:`n_b \epsilon` (:math:`\epsilon = 2.2\times10^{-16}`), far below
the binning error above for any realistic grid.

Memory and cost
---------------
A block's sums cover only the zone rows its valid cells touch
(:class:`BlockSums` ``sums``, ``2 * rows * (N_BINS + 1)`` float64, 442 kB a
row): one ``np.bincount`` index per cell, ``zone * (N_BINS + 1) + slot``,
over the range of indices the block uses. Adding two sums allocates the
union of their rows, so the tree of additions ends at the zones present
(:func:`dense_bytes`: 442 kB per zone, 44 MB for 100 zones, 442 MB for
1,000, the size of the dense arrays of :class:`GridSummary` too). Each
thread keeps its work arrays (about 40 bytes per cell of its largest
block) from block to block, since fresh arrays of a few tens of MB are
mapped and zeroed page by page by the C library on every call
(:func:`release_scratch` frees them). The bin of a cell comes from a
float32 logarithm, corrected at the edges (:func:`_bins`): measured about
25 ns per cell on one core of a 2-core machine (100 zones, float32 rasters,
4e6-cell blocks). Many thousands of zones in one block would need a sparse
(zone, bin) store instead; this module does not provide one.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass, field, replace
from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.exposure.base import FloatArray
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.errors import ModelError

IntArray = NDArray[np.int64]

#: Natural-log width of a concentration bin.
LOG_STEP = 2e-3
#: Natural log of the lower edge of the first bin (1e-12 in the analysis unit).
LOG_MIN = math.log(1e-12)
#: Natural log of the upper end of the covered range (1e12).
LOG_MAX = math.log(1e12)
#: Number of positive bins (27632); the top edge is LOG_MIN + N_BINS * LOG_STEP >= LOG_MAX.
N_BINS = math.ceil((LOG_MAX - LOG_MIN) / LOG_STEP)


def dense_bytes(n_zones: int) -> int:
    """Bytes of the two ``(n_zones, N_BINS)`` float64 arrays of a reduction."""
    return 2 * 8 * int(n_zones) * N_BINS


def bin_index(x: ArrayLike) -> IntArray:
    """Bin of each positive concentration, ``floor((ln x - LOG_MIN) / LOG_STEP)``
    (up to rounding at the edges) clipped to ``[0, N_BINS - 1]``."""
    return _slots(np.asarray(x, dtype=float)) - 1


def bin_lower(b: ArrayLike) -> FloatArray:
    """Lower edge ``exp(LOG_MIN + b LOG_STEP)`` of bins ``b``."""
    return np.exp(LOG_MIN + LOG_STEP * np.asarray(b, dtype=float))


#: Natural-log width of the groups of bins given one Gauss rule each
#: (:meth:`GridSummary.zone_exposure` ``quadrature``; 25 bins).
QUADRATURE_WIDTH = 0.05
#: A group whose variance is below (this x its mean)^2 is one point (the
#: second-order term of that is below 1e-20 of x^2|h''|).
SINGLE_POINT_SPREAD = 1e-10

#: Slots per zone row of a block's sums: slot 0 holds concentration 0, slot
#: ``1 + b`` bin ``b``.
WIDTH = N_BINS + 1
#: Lower edges ``exp(LOG_MIN + b LOG_STEP)`` of bins ``b = 0..N_BINS`` (float64).
EDGES = np.exp(LOG_MIN + LOG_STEP * np.arange(N_BINS + 1, dtype=float))
#: Cells whose float32 bin coordinate lies within this many bins of an edge
#: are placed by comparing their value with the float64 edge instead.
NEAR_EDGE = 0.02


@dataclass(frozen=True, eq=False)
class BlockSums:
    """Sums over some cells, per zone and bin: population and population
    times concentration, held for the zone rows ``row0 .. row0 + r - 1``
    touched so far as ``sums (2, r, WIDTH)`` (other rows are 0; column 0 is
    concentration 0, column ``1 + b`` bin ``b``); ``cells (n_zones,)``
    (cells counted, any population), ``skipped`` cells with their
    ``skipped_population``, and for each of the sorted ``cuts`` ``(K,)`` the
    sums ``cut_weight``/``cut_moment`` ``(n_zones, K)`` over the cells of
    the cut's bin below the cut. :attr:`weight`, :attr:`moment` ``(n_zones,
    N_BINS)`` and :attr:`zero` ``(n_zones,)`` give them dense."""

    n_zones: int
    row0: int
    sums: FloatArray
    cells: IntArray
    skipped: int = 0
    skipped_population: float = 0.0
    cuts: FloatArray = field(default_factory=lambda: np.zeros(0))
    cut_weight: FloatArray | None = None
    cut_moment: FloatArray | None = None

    def __post_init__(self) -> None:
        assert self.sums.ndim == 3 and self.sums.shape[0] == 2 and self.sums.shape[2] == WIDTH
        assert self.row0 >= 0 and self.row0 + self.sums.shape[1] <= self.n_zones
        if self.cut_weight is None:
            empty = np.zeros((self.n_zones, self.cuts.size))
            object.__setattr__(self, "cut_weight", empty)
            object.__setattr__(self, "cut_moment", empty.copy())

    @property
    def weight(self) -> FloatArray:
        """Population per zone and bin, ``(n_zones, N_BINS)``."""
        return self._dense(0)[:, 1:]

    @property
    def moment(self) -> FloatArray:
        """Population times concentration per zone and bin, ``(n_zones, N_BINS)``."""
        return self._dense(1)[:, 1:]

    @property
    def zero(self) -> FloatArray:
        """Population at concentration 0 per zone, ``(n_zones,)``."""
        return self._dense(0)[:, 0].copy()

    def _dense(self, k: int) -> FloatArray:
        out = np.zeros((self.n_zones, WIDTH))
        out[self.row0:self.row0 + self.sums.shape[1]] = self.sums[k]
        return out

    @staticmethod
    def dense(weight: FloatArray, moment: FloatArray, zero: FloatArray, cells: IntArray,
              skipped: int = 0, skipped_population: float = 0.0,
              cuts: FloatArray | None = None, cut_weight: FloatArray | None = None,
              cut_moment: FloatArray | None = None) -> BlockSums:
        """From dense ``weight``, ``moment`` ``(n_zones, N_BINS)`` and ``zero``."""
        z = int(np.size(zero))
        sums = np.empty((2, z, WIDTH))
        sums[0, :, 0], sums[1, :, 0] = zero, 0.0
        sums[0, :, 1:], sums[1, :, 1:] = weight, moment
        return BlockSums(z, 0, sums, np.asarray(cells, dtype=np.int64), int(skipped),
                         float(skipped_population),
                         np.zeros(0) if cuts is None else cuts, cut_weight, cut_moment)

    @staticmethod
    def empty(n_zones: int, cuts: FloatArray | None = None) -> BlockSums:
        """The sums over no cells (the identity of ``+``)."""
        z = _check_zones(n_zones)
        return BlockSums(z, 0, np.zeros((2, 0, WIDTH)), np.zeros(z, np.int64),
                         cuts=np.zeros(0) if cuts is None else cuts)

    def __add__(self, other: BlockSums) -> BlockSums:
        assert self.n_zones == other.n_zones, (self.n_zones, other.n_zones)
        assert np.array_equal(self.cuts, other.cuts), (self.cuts, other.cuts)
        return BlockSums(self.n_zones, *_add_rows(self, other), self.cells + other.cells,
                         self.skipped + other.skipped,
                         self.skipped_population + other.skipped_population, self.cuts,
                         self._cut_weight + other._cut_weight,
                         self._cut_moment + other._cut_moment)

    @property
    def _cut_weight(self) -> FloatArray:
        assert self.cut_weight is not None
        return self.cut_weight

    @property
    def _cut_moment(self) -> FloatArray:
        assert self.cut_moment is not None
        return self.cut_moment

    def as_tuple(self) -> tuple[FloatArray, FloatArray, FloatArray, IntArray, int, float]:
        """Plain arrays and numbers (picklable), for :meth:`from_tuple`."""
        return (self.weight, self.moment, self.zero, self.cells, self.skipped,
                self.skipped_population)

    @staticmethod
    def from_tuple(parts: tuple[FloatArray, FloatArray, FloatArray, IntArray, int, float]
                   ) -> BlockSums:
        weight, moment, zero, cells, skipped, skipped_population = parts
        return BlockSums.dense(weight, moment, zero, cells, int(skipped),
                               float(skipped_population))

    def summary(self) -> GridSummary:
        """The finished reduction."""
        weight, moment = self._dense(0), self._dense(1)
        return GridSummary(self.n_zones, weight[:, 1:], moment[:, 1:], weight[:, 0].copy(),
                           self.cells, self.skipped, self.skipped_population, self.cuts,
                           self._cut_weight, self._cut_moment)


def _add_rows(a: BlockSums, b: BlockSums) -> tuple[int, FloatArray]:
    """The row range covering both and the sums over it."""
    if not b.sums.shape[1]:
        return a.row0, a.sums
    if not a.sums.shape[1]:
        return b.row0, b.sums
    lo = min(a.row0, b.row0)
    hi = max(a.row0 + a.sums.shape[1], b.row0 + b.sums.shape[1])
    out = np.zeros((2, hi - lo, WIDTH))
    for part in (a, b):
        out[:, part.row0 - lo:part.row0 - lo + part.sums.shape[1]] += part.sums
    return lo, out


def combine(a: BlockSums, b: BlockSums) -> BlockSums:
    """``a + b``: the sums over the cells of both."""
    return a + b


def reduce_block(conc: ArrayLike, pop: ArrayLike, zone_index: ArrayLike,
                 n_zones: int, cuts: ArrayLike = ()) -> BlockSums:
    """Reduce one chunk of cells (arrays of any shape, flattened alike).

    ``cuts`` are concentrations where the integrands have kinks (positive;
    sorted and made unique here): the bin of each is split at it.

    A cell is skipped (and counted in ``skipped``) when its concentration or
    population is not finite or negative, or its zone index is -1 (outside
    every zone) or any other negative number; ``skipped_population`` sums the
    finite, non-negative populations of skipped cells. Zone indices must be
    integers below ``n_zones`` (ModelError otherwise). float32 and float64
    inputs are used as they are (other types as float64); the sums are
    float64 either way.
    """
    z = _check_zones(n_zones)
    x, p = _values(conc), _values(pop)
    zi = np.ravel(np.asarray(zone_index))
    if not (x.size == p.size == zi.size):
        raise ModelError(f"a block needs as many concentrations, populations and zone indices; "
                         f"got {x.size}, {p.size} and {zi.size}")
    if zi.size and not np.issubdtype(zi.dtype, np.integer):
        raise ModelError(f"zone indices must be integers, got {zi.dtype}")
    k = check_cuts(cuts)
    if not zi.size:
        return BlockSums.empty(z, k)
    low, high = int(zi.min()), int(zi.max())
    if high >= z:
        raise ModelError(f"zone index {high} is outside 0..{z - 1} ({z} zones)")
    s = _scratch(x.size)
    ok, skipped, skipped_population = _valid(x, p, zi, low < 0, s)
    if skipped == x.size:
        return replace(BlockSums.empty(z, k), skipped=skipped,
                       skipped_population=skipped_population)
    bins = _bins(x, s)
    sums, row0, cells = _block_sums(x, p, zi, bins, ok, skipped, z, s)
    below_w, below_m = _below_cuts(x, p, zi, z, bins, ok, k)
    return BlockSums(z, row0, sums, cells, skipped, skipped_population, k, below_w, below_m)


def _values(a: ArrayLike) -> NDArray[np.floating]:
    """``a`` flattened, float32 or float64 as given (other types as float64)."""
    v = np.ravel(np.asarray(a))
    return v if v.dtype in (np.float32, np.float64) else v.astype(np.float64)


class _Scratch:
    """Work arrays of one thread, reused from block to block (fresh arrays
    of a block's size would each be mapped and zeroed page by page)."""

    def __init__(self) -> None:
        self.arrays: dict[str, NDArray[np.generic]] = {}

    def get(self, name: str, n: int, dtype: type) -> NDArray[Any]:
        a = self.arrays.get(name)
        if a is None or a.size < n or a.dtype != dtype:
            a = self.arrays[name] = np.empty(n, dtype=dtype)
        return a[:n]


#: Each thread's work arrays, by thread id (see :func:`release_scratch`).
_SCRATCH: dict[int, _Scratch] = {}
#: Blocks below this many cells use fresh arrays (nothing worth keeping).
SCRATCH_MIN = 1 << 16


def _scratch(n: int) -> _Scratch:
    if n < SCRATCH_MIN:
        return _Scratch()
    return _SCRATCH.setdefault(threading.get_ident(), _Scratch())


def release_scratch() -> None:
    """Drop every thread's work arrays (after a pass over a grid)."""
    _SCRATCH.clear()


def _valid(x: NDArray[np.floating], p: NDArray[np.floating], zi: NDArray[np.integer],
           negative_zones: bool, s: _Scratch) -> tuple[NDArray[np.bool_], int, float]:
    """Cells with finite non-negative concentration and population and a
    zone index >= 0; how many are not, and their finite non-negative
    population."""
    n = x.size
    ok, good_p, tmp = (s.get(name, n, np.bool_) for name in ("ok", "good_p", "tmp"))
    np.greater_equal(p, 0, out=good_p)
    np.less(p, np.inf, out=tmp)
    good_p &= tmp
    np.greater_equal(x, 0, out=ok)
    np.less(x, np.inf, out=tmp)
    ok &= tmp
    ok &= good_p
    if negative_zones:
        np.greater_equal(zi, 0, out=tmp)
        ok &= tmp
    skipped = n - int(np.count_nonzero(ok))
    if not skipped:
        return ok, 0, 0.0
    np.logical_not(ok, out=tmp)
    tmp &= good_p
    return ok, skipped, float(np.sum(p, where=tmp, dtype=np.float64))


def _bins(x: NDArray[np.floating], s: _Scratch) -> NDArray[np.int32]:
    """Bin ``floor((ln x - LOG_MIN) / LOG_STEP)`` of each cell, clipped to
    ``[0, N_BINS - 1]``, and -1 at x = 0 (garbage where x is not finite and
    non-negative).

    The logarithm is taken in float32 (a fraction of the cost of float64),
    whose error in the bin coordinate is below 0.005 bin; a cell whose
    coordinate lies within :data:`NEAR_EDGE` of an integer is placed by
    comparing its value with the float64 edge :data:`EDGES`, so every cell
    of bin ``b`` lies in ``[EDGES[b], EDGES[b + 1])`` (but for the clipped
    ends) as with a float64 logarithm.
    """
    n = x.size
    t, r = s.get("t", n, np.float32), s.get("r", n, np.float32)
    bins = s.get("bins", n, np.int32)
    near = s.get("near", n, np.bool_)
    with np.errstate(all="ignore"):
        np.log(x, out=t, dtype=np.float32, casting="same_kind")
        t *= np.float32(1.0 / LOG_STEP)
        t -= np.float32(LOG_MIN / LOG_STEP)
        np.clip(t, 0.0, N_BINS - 1, out=t)  # also sends log(0) = -inf to 0
        np.copyto(bins, t, casting="unsafe")  # truncation is floor on t >= 0
        np.rint(t, out=r)
        t -= r
        np.abs(t, out=t)
        np.less(t, NEAR_EDGE, out=near)
    held = np.flatnonzero(near)  # concentration 0 among them (t clipped to 0)
    edge = r[held].astype(np.int64)
    xs = x[held]
    bins[held] = np.where(xs == 0, -1, np.clip(edge - (xs < EDGES[edge]), 0, N_BINS - 1))
    return bins


def _block_sums(x: NDArray[np.floating], p: NDArray[np.floating], zi: NDArray[np.integer],
                bins: NDArray[np.int32], ok: NDArray[np.bool_], skipped: int, z: int,
                s: _Scratch) -> tuple[FloatArray, int, IntArray]:
    """Population and population x concentration per zone row and slot over
    the rows the valid cells touch, the first such row, and cells per zone.

    Each cell's slot ``zone * WIDTH + 1 + bin`` (``zone * WIDTH`` at
    concentration 0, where the bin is -1) is one ``np.bincount`` index;
    skipped cells are sent to a valid cell's slot with weight 0 (and taken
    off its count).
    """
    n = x.size
    flat = s.get("flat", n, np.int64)
    tmp = s.get("tmp", n, np.bool_)
    np.multiply(zi, WIDTH, out=flat, dtype=np.int64, casting="unsafe")
    flat += bins  # the slot less 1 (bin -1 at concentration 0)
    w, m = s.get("w", n, np.float64), s.get("m", n, np.float64)
    np.copyto(w, p)
    np.multiply(w, x, out=m)
    ref = 0
    if skipped:
        first = int(np.argmax(ok))
        ref = int(flat[first])
        np.logical_not(ok, out=tmp)
        np.putmask(flat, tmp, ref)
        np.putmask(w, tmp, 0.0)
        np.putmask(m, tmp, 0.0)
    lo, hi = int(flat.min()), int(flat.max())
    flat -= lo
    size = hi - lo + 1
    counts = np.bincount(flat, minlength=size)
    if skipped:
        counts[ref - lo] -= skipped
    lo, hi = lo + 1, hi + 1  # as slots
    row0, rows = lo // WIDTH, hi // WIDTH - lo // WIDTH + 1
    at = lo - row0 * WIDTH
    sums = np.zeros((2, rows * WIDTH))
    sums[0, at:at + size] = np.bincount(flat, weights=w, minlength=size)
    sums[1, at:at + size] = np.bincount(flat, weights=m, minlength=size)
    per_row = np.zeros(rows * WIDTH, np.int64)
    per_row[at:at + size] = counts
    cells = np.zeros(z, np.int64)
    cells[row0:row0 + rows] = per_row.reshape(rows, WIDTH).sum(axis=1)
    return sums.reshape(2, rows, WIDTH), row0, cells


def check_cuts(cuts: ArrayLike) -> FloatArray:
    """``cuts`` sorted and unique; ModelError unless finite and positive."""
    k = np.unique(np.asarray(cuts, dtype=float).ravel())
    if k.size and not (np.all(np.isfinite(k)) and k[0] > 0):
        raise ModelError(f"cuts must be finite positive concentrations, got {k.tolist()}")
    return cast(FloatArray, k)


def _below_cuts(x: NDArray[np.floating], p: NDArray[np.floating], zi: NDArray[np.integer],
                z: int, bins: NDArray[np.int32], ok: NDArray[np.bool_],
                cuts: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Per zone and cut, population and population x concentration of the
    valid cells in the cut's bin that lie below it (the bins' cells only are
    looked at again)."""
    w = np.zeros((z, cuts.size))
    m = np.zeros((z, cuts.size))
    if not cuts.size:
        return w, m
    cut_bins = bin_index(cuts)
    mask = np.zeros(bins.shape, bool)
    for b in np.unique(cut_bins):  # a few cuts: one comparison each beats np.isin
        mask |= bins == b
    mask &= ok
    mask &= x > 0
    held = np.flatnonzero(mask)
    xs, ps, zs, bs = x[held].astype(float), p[held].astype(float), zi[held], bins[held]
    for j, (c, b) in enumerate(zip(cuts, cut_bins, strict=True)):
        sel = (bs == b) & (xs < c)
        w[:, j] = np.bincount(zs[sel], weights=ps[sel], minlength=z)
        m[:, j] = np.bincount(zs[sel], weights=ps[sel] * xs[sel], minlength=z)
    return w, m


def _slots(x: FloatArray) -> IntArray:
    """0 for x == 0, ``1 + bin_index(x)`` for x > 0 (x >= 0 and finite)."""
    with np.errstate(divide="ignore"):
        t = np.log(x)
    t -= LOG_MIN
    t *= 1.0 / LOG_STEP
    np.clip(t, 0.0, N_BINS - 1, out=t)  # also sends log(0) = -inf to 0
    out = t.astype(np.int64)  # truncation is floor on t >= 0
    out += 1
    out *= x > 0
    return cast(IntArray, out)


def _check_zones(n_zones: int) -> int:
    z = int(n_zones)
    if z < 1:
        raise ModelError(f"a grid needs at least one zone, got {n_zones}")
    return z


@dataclass(frozen=True, eq=False)
class GridSummary:
    """A finished reduction (arrays as in :class:`BlockSums`); gives each
    zone's and the pooled population's exposure as census points."""

    n_zones: int
    weight: FloatArray
    moment: FloatArray
    zero: FloatArray
    cells: IntArray
    skipped: int = 0
    skipped_population: float = 0.0
    cuts: FloatArray = field(default_factory=lambda: np.zeros(0))
    cut_weight: FloatArray | None = None
    cut_moment: FloatArray | None = None

    def __post_init__(self) -> None:
        assert self.weight.shape == self.moment.shape == (self.n_zones, N_BINS)
        assert self.zero.shape == self.cells.shape == (self.n_zones,)
        if self.cut_weight is None:
            empty = np.zeros((self.n_zones, self.cuts.size))
            object.__setattr__(self, "cut_weight", empty)
            object.__setattr__(self, "cut_moment", empty.copy())

    def zone_population(self, z: int) -> float:
        """Population of zone ``z`` (cells at zero included)."""
        return float(self.zero[z] + self.weight[z].sum())

    def zone_mean(self, z: int) -> float:
        """Population-weighted mean concentration of zone ``z``, exact from
        the moments: ``sum M_zb / (zero_z + sum w_zb)``."""
        total = self.zone_population(z)
        if not total > 0:
            raise ModelError(self._empty(z))
        return float(self.moment[z].sum()) / total

    def zone_exposure(self, z: int, *, error_gsd: float | None = None,
                      error_seed: int | None = None, quadrature: float | None = None,
                      splits: ArrayLike = ()) -> EmpiricalExposure:
        """Zone ``z`` as census points: the bin means ``M_zb / w_zb`` of its
        non-empty bins (and 0 when it has population at zero), weighted by
        population; ``error_gsd``/``error_seed`` as in
        :class:`~doseattr.core.exposure.empirical.EmpiricalExposure`.
        ``quadrature`` (a log width, e.g. :data:`QUADRATURE_WIDTH`): fewer
        points, a two-point Gauss rule per group of bins of that width
        (:func:`gauss_groups`; bound in the module docstring), the groups
        split at the cuts and at ``splits`` (the curve's kinks, say)."""
        if not 0 <= z < self.n_zones:
            raise ModelError(f"zone index {z} is outside 0..{self.n_zones - 1}")
        if not self.zone_population(z) > 0:
            raise ModelError(self._empty(z))
        assert self.cut_weight is not None and self.cut_moment is not None
        w, m = _split(self.weight[z], self.moment[z], self.cuts, self.cut_weight[z],
                      self.cut_moment[z])
        return _census(w, m, float(self.zero[z]), f"grid zone {z}", error_gsd, error_seed,
                       None if quadrature is None else
                       (np.concatenate([self.cuts, _positive(splits)]), quadrature))

    def population_exposure(self, *, error_gsd: float | None = None,
                            error_seed: int | None = None) -> EmpiricalExposure:
        """Every zone pooled (bin by bin), as census points."""
        weight, zero = self.weight.sum(axis=0), float(self.zero.sum())
        if not zero + float(weight.sum()) > 0:
            raise ModelError("the grid has no population in any zone: every cell is empty, "
                             "skipped or outside the zones")
        assert self.cut_weight is not None and self.cut_moment is not None
        w, m = _split(weight, self.moment.sum(axis=0), self.cuts, self.cut_weight.sum(axis=0),
                      self.cut_moment.sum(axis=0))
        return _census(w, m, zero, "grid population", error_gsd, error_seed)

    def _empty(self, z: int) -> str:
        return (f"zone index {z} has no population ({int(self.cells[z])} cells counted): "
                f"its exposure is undefined; drop the zone or check its cells")


def _positive(levels: ArrayLike) -> FloatArray:
    """The finite positive ``levels`` (a kink at or below zero splits no
    group of positive values)."""
    k = np.asarray(levels, dtype=float).ravel()
    return cast(FloatArray, k[np.isfinite(k) & (k > 0)])


def _split(weight: FloatArray, moment: FloatArray, cuts: FloatArray, below_w: FloatArray,
           below_m: FloatArray) -> tuple[FloatArray, FloatArray]:
    """One zone's bins with each bin that holds cuts split at them: the
    pieces between successive cuts of a bin are differences of the sums
    below each cut (pieces without population are dropped)."""
    if not cuts.size:
        return weight, moment
    slots = bin_index(cuts)
    keep = np.ones(weight.size, bool)
    keep[slots] = False
    w_out, m_out = [weight[keep]], [moment[keep]]
    for b in np.unique(slots):
        j = np.flatnonzero(slots == b)  # cuts are sorted, so these are in order
        cw = np.concatenate([[0.0], below_w[j], [weight[b]]])
        cm = np.concatenate([[0.0], below_m[j], [moment[b]]])
        dw, dm = np.diff(cw), np.diff(cm)
        ok = dw > 1e-12 * max(weight[b], 1e-300)
        w_out.append(dw[ok])
        m_out.append(dm[ok])
    return np.concatenate(w_out), np.concatenate(m_out)


def _census(weight: FloatArray, moment: FloatArray, zero: float, source: str,
            error_gsd: float | None, error_seed: int | None,
            quadrature: tuple[FloatArray, float] | None = None) -> EmpiricalExposure:
    keep = weight > 0
    values, weights = moment[keep] / weight[keep], weight[keep]
    note = f"census grid: {values.size} log-spaced bins of width {LOG_STEP:g} in ln(x)"
    if quadrature is not None:
        cuts, width = quadrature
        bins = values.size
        values, weights = gauss_groups(values, weights, cuts, width)
        note = (f"census grid: {bins} log-spaced bins of width {LOG_STEP:g} in ln(x), as "
                f"{values.size} points (a two-point Gauss rule per {width:g} of ln(x))")
    if zero > 0:
        values, weights = np.append(values, 0.0), np.append(weights, zero)
    return model_error(EmpiricalExposure(values, weights / weights.sum(), 0.0, source,
                                         notes=(note,), census=True), error_gsd, error_seed)


def model_error(exposure: EmpiricalExposure, error_gsd: float | None,
                error_seed: int | None) -> EmpiricalExposure:
    """``exposure`` with a multiplicative exposure-model error of geometric
    standard deviation ``error_gsd`` (``None``: none), drawn from the stream
    ``error_seed``; ModelError unless the exposure is a census, the GSD is a
    finite number >= 1 and a seed is given."""
    if error_gsd is None:
        return exposure
    if not (math.isfinite(error_gsd) and error_gsd >= 1.0):
        raise ModelError(f"the exposure-model error GSD must be a number >= 1, got {error_gsd}")
    if error_seed is None:
        raise ModelError("an exposure-model error needs a seed shared by every zone "
                         "(error_seed), so that all zones draw the same factors")
    if not exposure.census:
        raise ModelError("an exposure-model error applies to a census exposure (a grid)")
    return replace(exposure, error_gsd=float(error_gsd), error_seed=int(error_seed))


def gauss_groups(values: ArrayLike, weights: ArrayLike, cuts: ArrayLike = (),
                 width: float = QUADRATURE_WIDTH) -> tuple[FloatArray, FloatArray]:
    """Positive weighted points grouped on a lattice of natural-log
    ``width`` (groups split at each of ``cuts``), each group of two or more
    points replaced by its two-point Gauss rule: ``(values, weights)``
    sorted by value, the weights summing as before, every group's
    population, mean, variance and third central moment kept (formulas
    and error bound in the module docstring). A group with one point, or
    with a variance below ``(SINGLE_POINT_SPREAD x mean)^2``, is its mean."""
    x = np.asarray(values, dtype=float)
    w = np.asarray(weights, dtype=float)
    if not (x.shape == w.shape and x.ndim == 1):
        raise ModelError(f"gauss_groups needs values and weights of one shape, got {x.shape} "
                         f"and {w.shape}")
    if x.size and not (np.all(np.isfinite(x)) and x.min() > 0 and np.all(w > 0)):
        raise ModelError("gauss_groups needs finite positive values and positive weights")
    if not (math.isfinite(width) and width > 0):
        raise ModelError(f"the quadrature width must be a positive log width, got {width}")
    if x.size == 0:
        return x.copy(), w.copy()
    k = check_cuts(cuts)
    order = np.argsort(x, kind="stable")
    x, w = x[order], w[order]
    lattice = np.floor((np.log(x) - LOG_MIN) / width).astype(np.int64)
    key = lattice * (k.size + 1) + np.searchsorted(k, x, side="right")
    starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    sizes = np.diff(np.r_[starts, x.size])
    total = np.add.reduceat(w, starts)
    mu = np.add.reduceat(w * x, starts) / total
    d = x - np.repeat(mu, sizes)
    m2 = np.add.reduceat(w * d * d, starts) / total
    m3 = np.add.reduceat(w * d * d * d, starts) / total
    two = (sizes > 1) & (m2 > (SINGLE_POINT_SPREAD * mu) ** 2)
    gamma = np.divide(m3, m2, out=np.zeros_like(m2), where=two)
    root = np.sqrt(gamma * gamma + 4.0 * m2)
    t1, t2 = 0.5 * (gamma - root), 0.5 * (gamma + root)  # t1 < 0 < t2 where two
    span = np.where(two, t2 - t1, 1.0)
    w1 = np.where(two, total * t2 / span, total)
    w2 = np.where(two, -total * t1 / span, 0.0)
    nodes = np.column_stack([np.where(two, mu + t1, mu), mu + t2]).ravel()
    masses = np.column_stack([w1, w2]).ravel()
    keep = np.column_stack([np.ones_like(two), two]).ravel()
    return nodes[keep], masses[keep]
