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

Rounding
--------
Sums are accumulated in float64 by ``numpy.bincount`` in cell order; a bin
summing :math:`n_b` cells carries a relative rounding error of at most
about :math:`n_b \epsilon` (:math:`\epsilon = 2.2\times10^{-16}`), far below
the binning error above for any realistic grid.

Memory and cost
---------------
:func:`reduce_block` holds two float64 arrays of ``n_zones * (N_BINS + 1)``
(:func:`dense_bytes`: 442 kB per zone, 44 MB for 100 zones, 442 MB for
1,000) plus O(block) temporaries (a few arrays of the block's length).
Those dense arrays are allocated and zeroed per block, so a block should
hold well over ``n_zones * N_BINS`` cells (2.8e6 for 100 zones) for that
fixed cost to stay small against the per-cell work (about 30 ns per cell
measured on a 2-core machine with 100 zones and 4e6-cell blocks, after the
first call). Many thousands of zones would need a sparse (zone, bin) store
instead; this module does not provide one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import cast

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


@dataclass(frozen=True, eq=False)
class BlockSums:
    """Sums over some cells: ``weight`` and ``moment`` ``(n_zones, N_BINS)``
    (population and population times concentration per zone and bin),
    ``zero (n_zones,)`` (population at concentration 0), ``cells
    (n_zones,)`` (cells counted, any population), ``skipped`` cells
    with their ``skipped_population``, and for each of the sorted ``cuts``
    ``(K,)`` the sums ``cut_weight``/``cut_moment`` ``(n_zones, K)`` over the
    cells of the cut's bin below the cut."""

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
        if self.cut_weight is None:
            empty = np.zeros((self.n_zones, self.cuts.size))
            object.__setattr__(self, "cut_weight", empty)
            object.__setattr__(self, "cut_moment", empty.copy())

    @property
    def n_zones(self) -> int:
        return int(self.zero.size)

    @staticmethod
    def empty(n_zones: int) -> BlockSums:
        """The sums over no cells (the identity of ``+``)."""
        z = _check_zones(n_zones)
        return BlockSums(np.zeros((z, N_BINS)), np.zeros((z, N_BINS)), np.zeros(z),
                         np.zeros(z, np.int64))

    def __add__(self, other: BlockSums) -> BlockSums:
        assert self.n_zones == other.n_zones, (self.n_zones, other.n_zones)
        assert np.array_equal(self.cuts, other.cuts), (self.cuts, other.cuts)
        return BlockSums(self.weight + other.weight, self.moment + other.moment,
                         self.zero + other.zero, self.cells + other.cells,
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
        return BlockSums(weight, moment, zero, cells, int(skipped), float(skipped_population))

    def summary(self) -> GridSummary:
        """The finished reduction."""
        return GridSummary(self.n_zones, self.weight, self.moment, self.zero, self.cells,
                           self.skipped, self.skipped_population, self.cuts,
                           self._cut_weight, self._cut_moment)


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
    integers below ``n_zones`` (ModelError otherwise).
    """
    z = _check_zones(n_zones)
    x, p = np.ravel(np.asarray(conc, dtype=float)), np.ravel(np.asarray(pop, dtype=float))
    zi = np.ravel(np.asarray(zone_index))
    if not (x.size == p.size == zi.size):
        raise ModelError(f"a block needs as many concentrations, populations and zone indices; "
                         f"got {x.size}, {p.size} and {zi.size}")
    if zi.size and not np.issubdtype(zi.dtype, np.integer):
        raise ModelError(f"zone indices must be integers, got {zi.dtype}")
    zi = zi.astype(np.int64, copy=False)
    if zi.size and int(zi.max()) >= z:
        raise ModelError(f"zone index {int(zi.max())} is outside 0..{z - 1} ({z} zones)")
    good_p = np.isfinite(p) & (p >= 0)
    ok = np.isfinite(x) & (x >= 0) & good_p & (zi >= 0)
    skipped = int(ok.size - np.count_nonzero(ok))
    skipped_population = 0.0
    if skipped:
        # a skipped cell becomes zone 0, concentration 0, population 0: it adds nothing
        skipped_population = float(p[~ok & good_p].sum())
        x, p, zi = np.where(ok, x, 0.0), np.where(ok, p, 0.0), np.where(ok, zi, 0)
    width = N_BINS + 1
    slots = _slots(x)
    flat = zi * width + slots
    weight = _sums(flat, p, z * width).reshape(z, width)
    moment = _sums(flat, p * x, z * width).reshape(z, width)
    counted = np.bincount(zi, weights=ok if skipped else None, minlength=z)
    cells = np.rint(counted).astype(np.int64)
    k = check_cuts(cuts)
    below_w, below_m = _below_cuts(x, p, zi, z, slots, k)
    return BlockSums(weight[:, 1:], moment[:, 1:], weight[:, 0].copy(), cells, skipped,
                     skipped_population, k, below_w, below_m)


def check_cuts(cuts: ArrayLike) -> FloatArray:
    """``cuts`` sorted and unique; ModelError unless finite and positive."""
    k = np.unique(np.asarray(cuts, dtype=float).ravel())
    if k.size and not (np.all(np.isfinite(k)) and k[0] > 0):
        raise ModelError(f"cuts must be finite positive concentrations, got {k.tolist()}")
    return cast(FloatArray, k)


def _below_cuts(x: FloatArray, p: FloatArray, zi: IntArray, z: int, slots: IntArray,
                cuts: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Per zone and cut, population and population x concentration of the
    cells in the cut's bin that lie below it (the bins' cells only are
    looked at again)."""
    w = np.zeros((z, cuts.size))
    m = np.zeros((z, cuts.size))
    if not cuts.size:
        return w, m
    cut_slots = _slots(cuts)
    mask = np.zeros(slots.shape, bool)
    for slot in np.unique(cut_slots):  # a few cuts: one comparison each beats np.isin
        mask |= slots == slot
    held = np.flatnonzero(mask)
    xs, ps, zs, ss = x[held], p[held], zi[held], slots[held]
    for j, (c, slot) in enumerate(zip(cuts, cut_slots, strict=True)):
        sel = (ss == slot) & (xs < c)
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


def _sums(index: IntArray, weights: FloatArray, size: int) -> FloatArray:
    """``np.bincount`` of ``weights`` (float64 sums) over ``size`` slots."""
    sums = np.bincount(index, weights=weights, minlength=size)
    return cast(FloatArray, sums.astype(float, copy=False))


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
                      error_seed: int | None = None) -> EmpiricalExposure:
        """Zone ``z`` as census points: the bin means ``M_zb / w_zb`` of its
        non-empty bins (and 0 when it has population at zero), weighted by
        population; ``error_gsd``/``error_seed`` as in
        :class:`~doseattr.core.exposure.empirical.EmpiricalExposure`."""
        if not 0 <= z < self.n_zones:
            raise ModelError(f"zone index {z} is outside 0..{self.n_zones - 1}")
        if not self.zone_population(z) > 0:
            raise ModelError(self._empty(z))
        assert self.cut_weight is not None and self.cut_moment is not None
        w, m = _split(self.weight[z], self.moment[z], self.cuts, self.cut_weight[z],
                      self.cut_moment[z])
        return _census(w, m, float(self.zero[z]), f"grid zone {z}", error_gsd, error_seed)

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
            error_gsd: float | None, error_seed: int | None) -> EmpiricalExposure:
    keep = weight > 0
    values, weights = moment[keep] / weight[keep], weight[keep]
    if zero > 0:
        values, weights = np.append(values, 0.0), np.append(weights, zero)
    note = f"census grid: {values.size} log-spaced bins of width {LOG_STEP:g} in ln(x)"
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
