r"""Fixed-node quadrature of expectations over exposure distributions.

Every attributable fraction is built from the expected excess risk
:math:`E[RR(X) - 1] = \int_0^\infty \mathrm{expm1}(L(x)) f(x)\,dx`, with
:math:`L = \ln RR`. Integrating the excess rather than the RR keeps full
relative precision when the fraction is small. The engine integrates in each
family's standardised variable ``w`` (:mod:`.standard`; :math:`\ln x = a + b w`,
for the lognormal :math:`z = (\ln x - \mu)/s`),

.. math:: E[\mathrm{expm1}(L(X))] = \int_{w_0}^{w^*}
          \mathrm{expm1}(L(e^{a + b w}))\, f_W(w)\, dw
          + \mathrm{expm1}(L(x^*))\, S(x^*),

where :math:`w_0` is the image of the dose below which the integrand is zero
(the minimum-risk level, ``zero_below``) and :math:`x^*` the dose beyond
which it is constant (``flat_from``, e.g. ``max_dose``), whose part is exact
from the tail probability. The window :math:`[w_0, w^*]` is cut

* into panels of equal width in the normal score of ``W`` (a small number,
  set by the window's width: one or two for a lognormal), placed by formula;
  the body stops at a normal score of 7.5 (3.2e-14 of probability beyond)
  unless the integrand can matter further out: up to the flat point when
  :math:`|\mathrm{expm1}(L(x^*))|` times the probability beyond the body is
  not negligible beside the result (a steep curve held flat far in the
  tail), or up to the tilted distribution's breakpoints
  (:meth:`Family.tilted_log_breaks`) when ``h`` grows without bound, where a
  divergent expectation is refused;
* exactly at every kink inside the window (spline knots, scenario limits,
  graded breaks below a steep curve's flat point), each kink adding a panel;

and each panel gets a Gauss-Legendre rule (:func:`_legendre`):
16 nodes, or 8 on a panel much narrower than the body's. No node falls where
the integrand is zero or constant. Every draw's panels depend on that draw
alone, so a draw gives the same result in any chunk (to rounding); where draws have
different numbers of panels in a group, each panel is a row of its own
(no empty panels are evaluated), and the rows' sums go to their draws. Windows and panels are placed for blocks of
:data:`BLOCK_DRAWS` draws at once; the nodes are evaluated in chunks of about
:data:`CHUNK_VALUES` values, held node-major so that per-draw coefficients
broadcast along contiguous rows. The doses at a symmetric pair of nodes,
:math:`e^{c \pm d\xi}`, come from one exponential (:func:`_doses`), and a
caller may give :math:`\mathrm{expm1}(L)` in a direct form (``excess``, e.g.
no logarithm and exponential for a linear excess-risk curve), with ``log_rr``
kept for large values. Two checks guard the rule: the nodes must recover
the probability of the window (to :data:`MASS_TOLERANCE`), and for a growing
integrand the expectation of the growth bound over the window (closed forms
in :mod:`.standard`'s families, to :data:`TILT_TOLERANCE` relative). Written
here because no library offers fixed-rule quadrature that is vectorised
over per-draw panel limits.
"""

from __future__ import annotations

from collections.abc import Callable
from functools import lru_cache
from typing import NamedTuple, Protocol, cast

import numpy as np
from numpy.typing import NDArray
from scipy.special import gammaln, ndtr, poch

from doseattr.core.attribution.standard import Z_MAX, ZB, Standard, between, standard_for
from doseattr.core.curves.base import Growth
from doseattr.core.exposure.base import Family
from doseattr.core.exposure.gamma import gamma_between
from doseattr.errors import ConvergenceError, FloatRangeError

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]
#: A window's ends in the normal score and whether each is exact.
Window = tuple[FloatArray, FloatArray, BoolArray, BoolArray]
#: The draws of a callback's rows: a run of them, or one per row.
Rows = slice | NDArray[np.intp]
LogRisk = Callable[[FloatArray, Rows], FloatArray]


class Excess(Protocol):
    """``excess(x, rows, out, inside)``: expm1(L(x)) into ``out``, or ``None``.
    With ``inside`` every dose lies between the zero-below dose and the flat
    point (the engine's nodes), so a function may skip holding its doses
    within them."""

    def __call__(self, x: FloatArray, rows: Rows, out: FloatArray,
                 inside: bool = False) -> FloatArray | None: ...


#: Gauss-Legendre nodes per panel.
NODES = 16
#: Nodes on a panel narrower than :data:`NARROW_SHARE` of the body's panels.
NARROW_NODES = 8
#: A panel at most this share of the body's narrowest panel wide gets the
#: narrow rule (:func:`_groups`).
NARROW_SHARE = 0.25
#: Widest panel on the log-dose scale: curves change shape over about a
#: unit of ln x (saturation, logistic weights), which a panel must resolve.
LOG_DOSE_WIDTH = 4.0
#: Doses whose logarithm lies outside this range are 0 or inf in floats.
_LOG_DOSE_RANGE = (-745.0, 710.0)
#: Most equal-score panels in a window.
MAX_PANELS = 48
#: Draws whose windows and panels are placed at once.
BLOCK_DRAWS = 16_384
#: About this many (draw x node) values are evaluated at once: a block's
#: panels of the full rule in one chunk (2 MiB a buffer, the few buffers
#: within the last-level cache; smaller chunks paid more in numpy calls per
#: value than they gained from the second-level cache, see DEVELOPERS.md).
CHUNK_VALUES = NODES * BLOCK_DRAWS
#: Runs of draws integrated again up to a far flat point when one needs it.
REDO_DRAWS = 512
#: Largest expm1(L) taken directly at the nodes (its product with a
#: weighted density stays finite); larger values go through ``log_rr``.
_DIRECT_LIMIT = 1e250
#: Probability mass the panels must recover before a result is trusted.
MASS_TOLERANCE = 1e-9
#: Relative accuracy the panels must reach on the growth bound's expectation.
TILT_TOLERANCE = 1e-9
#: Beyond the body, a part bounded by this fraction of the result is dropped.
FAR_TOLERANCE = 1e-11


@lru_cache(maxsize=8)
def _legendre(n: int) -> tuple[FloatArray, FloatArray]:
    r"""The ``n``-point Gauss-Legendre rule on [-1, 1]: numpy's ``leggauss``
    nodes polished by Newton steps on :math:`P_n` in extended precision,
    weights :math:`2 / ((1 - x^2) P_n'(x)^2)` (Abramowitz & Stegun 25.4.29,
    from memory), rounded to float64 (about 1e-16 relative where the
    float64 rule of ``scipy.special.roots_legendre`` carries up to 1e-13
    at 16 nodes; and no scipy.linalg at start-up)."""
    x: NDArray[np.floating] = np.polynomial.legendre.leggauss(n)[0].astype(np.longdouble)
    for _ in range(3):
        p, dp = _legendre_p(n, x)
        x = x - p / dp
    p, dp = _legendre_p(n, x)
    w = 2 / ((1 - x * x) * dp * dp)
    return x.astype(np.float64), w.astype(np.float64)


def _legendre_p(n: int, x: NDArray[np.floating]) -> tuple[NDArray[np.floating],
                                                           NDArray[np.floating]]:
    """:math:`P_n(x)` by the three-term recurrence and :math:`P_n'(x) =
    n (x P_n - P_{n-1}) / (x^2 - 1)` (A&S 22.7.10 and 22.8.5, from memory)."""
    prev, cur = np.ones_like(x), x.copy()
    for k in range(2, n + 1):
        prev, cur = cur, ((2 * k - 1) * x * cur - (k - 1) * prev) / k
    return cur, n * (x * cur - prev) / (x * x - 1)


def expected_excess(log_rr: LogRisk, family: Family, params: FloatArray, *,
                    growth: Growth, kinks: FloatArray, flat_from: float | FloatArray | None = None,
                    nodes: int = NODES,
                    zero_below: float | FloatArray | None = None,
                    excess: Excess | None = None) -> FloatArray:
    r"""E[expm1(L(X))] = E[RR(X) - 1] for each draw of an exposure family.

    Parameters
    ----------
    log_rr
        ``log_rr(x, rows)`` returns :math:`L(x) = \ln RR(x)` for doses ``x`` of
        shape ``(r, N)`` belonging to draws ``rows`` (a slice into the draw
        axis, or an index array with a draw per row of ``x``), so per-draw
        coefficients can be indexed alongside.
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
    nodes
        Gauss-Legendre nodes per (body) panel.
    zero_below
        Dose per draw (or shared) below which ``L`` is 0 (the minimum-risk
        level's pre-image), if known: no nodes are placed there.
    excess
        Optionally ``excess(x, rows, out)``: :math:`\mathrm{expm1}(L(x))`
        written to ``out`` (same shape as ``x``, which it must not change),
        or ``None`` where it has no direct form for these draws; the engine
        then (and where the values are too large for the product with the
        density) takes ``log_rr``.

    Returns
    -------
    ndarray, shape ``(D,)``

    Raises
    ------
    DivergenceError
        When the expectation is infinite for some draw.
    ConvergenceError
        When the panels fail to recover the distribution's probability mass
        or the growth bound's expectation (an internal check).
    """
    params = np.atleast_2d(np.asarray(params, dtype=float))
    d = params.shape[0]
    kinks = np.asarray(kinks, dtype=float)
    kinks = np.broadcast_to(kinks, (d, kinks.shape[-1]))
    rate = np.broadcast_to(np.asarray(growth.rate, dtype=float), (d,))
    top = np.broadcast_to(np.inf if flat_from is None else np.asarray(flat_from, float), (d,))
    low = np.broadcast_to(0.0 if zero_below is None else np.asarray(zero_below, float), (d,))
    kinks = _within(kinks, low, top)
    tilt = None
    if growth.kind != "bounded" and np.any(rate > 0):
        # refuses a divergent expectation; its last breakpoint bounds the window
        breaks = np.atleast_2d(family.tilted_log_breaks(params, growth))
        tilt = np.broadcast_to(np.where(rate[:, None] > 0, breaks, -np.inf),
                               (d, breaks.shape[-1]))
    std = standard_for(family)
    rules = (_legendre(nodes), _legendre(min(nodes, NARROW_NODES)))
    out = np.empty(d)
    for start in range(0, d, BLOCK_DRAWS):
        rows = slice(start, min(d, start + BLOCK_DRAWS))
        block = _Block(std, params[rows], kinks[rows], top[rows], low[rows],
                       None if tilt is None else tilt[rows], growth.kind, rate[rows])
        out[rows] = block.integrate(_Integrand(log_rr, excess, rows), rules)
    return out


class _Group(NamedTuple):
    """Panels sharing a Gauss-Legendre rule: midpoints and half-widths in
    ``w`` ``(r, P)`` (empty panels have half-width 0), nodes and weights.
    Row ``i`` belongs to draw ``i`` (``r = d``), or, with ``draw``, to draw
    ``draw[i]``: one panel per row, each draw's in order (``P = 1``)."""

    mid: FloatArray
    half: FloatArray
    xi: FloatArray
    wi: FloatArray
    draw: NDArray[np.intp] | None = None


def _groups(edges: FloatArray, narrowest: FloatArray | None,
            rules: tuple[tuple[FloatArray, FloatArray], ...]) -> list[_Group]:
    """The panels between ``edges``, each given the full rule, or the narrow
    one where it is much narrower than the body's narrowest panel."""
    half = np.subtract(edges[:, 1:], edges[:, :-1])
    half *= 0.5
    mid = edges[:, :-1] + half
    if narrowest is None:
        return [_Group(mid, half, *rules[0])]
    groups = []
    # 2: empty, 1: narrow, 0: the full rule (an empty panel is narrow too)
    kind = (half <= (0.5 * NARROW_SHARE) * narrowest).view(np.int8) + (half <= 0).view(np.int8)
    if bool(np.all(kind == kind[:1])):
        # the same rules in the same columns for every draw: a group per
        # column (the integrand's range per group is narrower, see
        # fractions._excess_m)
        for col, group in enumerate(kind[0]):
            if group < len(rules):
                groups.append(_Group(mid[:, col:col + 1], half[:, col:col + 1], *rules[group]))
        return groups or [_Group(mid[:, :1], np.zeros_like(half[:, :1]), *rules[1])]
    for group, (xi, wi) in enumerate(rules):
        # each draw's panels of this group, one per row: no empty panels
        # where draws have different numbers of them
        # (column-major: panel by panel, each over the draws; a draw's
        # panels still come in order)
        src = np.flatnonzero(kind.T.ravel() == group)
        if src.size:
            groups.append(_Group(mid.T.ravel()[src, None], half.T.ravel()[src, None], xi, wi,
                                 src % kind.shape[0]))
    if not groups:
        groups.append(_Group(mid[:, :1], np.zeros_like(half[:, :1]), *rules[1]))
    return groups


class _PanelSums:
    r"""Weighted row sums of a group's node values ``(d, P n)``:
    :math:`\sum_p h_p \sum_i w_i v_{pi}`, with ``factors`` the panels'
    :math:`h_p` ``(d, P)``."""

    def __init__(self, group: _Group, factors: FloatArray) -> None:
        self.wi, self.factors = group.wi, factors

    def __call__(self, v: FloatArray) -> FloatArray:
        h = self.factors
        # v is node-major in memory: the rule's weights meet it as a matrix
        part = self.wi @ v.T.reshape(h.shape[1], self.wi.size, h.shape[0])
        if h.shape[1] == 1:
            return cast(FloatArray, part[0] * h[:, 0])
        part *= h.T
        return cast(FloatArray, part.sum(axis=0))

    def weights(self) -> FloatArray:
        """The node weights ``(d, P n)``."""
        h = self.factors
        return cast(FloatArray, (h[:, :, None] * self.wi).reshape(h.shape[0], -1))


class _Integrand:
    """``expm1(L)`` at the nodes of a block of draws ``rows``: directly where
    an ``excess`` function is given, else (and where its values are too
    large) from ``log_rr``."""

    def __init__(self, log_rr: LogRisk, excess: Excess | None, rows: slice) -> None:
        self.log_rr, self.excess, self.rows = log_rr, excess, rows

    def direct(self, x: FloatArray, rows: Rows, inside: bool = False,
               out: FloatArray | None = None) -> FloatArray | None:
        """expm1(L(x)) from ``excess``, if given and small enough, into ``out``
        (or a new array; ``inside``: the doses are nodes, see :class:`Excess`)."""
        if self.excess is None:
            return None
        with np.errstate(over="ignore", invalid="ignore"):
            e = self.excess(x, rows, np.empty_like(x) if out is None else out, inside)
        return e if e is not None and e.max(initial=0.0) < _DIRECT_LIMIT else None

    def weighted(self, x: FloatArray, rows: Rows, log_f: FloatArray, dens: FloatArray,
                 sums: _PanelSums, out: FloatArray) -> FloatArray:
        """Weighted row sums of expm1(L(x)) exp(log_f), with dens = exp(log_f)
        (``out``: a buffer shaped like ``x``)."""
        e = self.direct(x, rows, inside=True, out=out)
        if e is not None:
            e *= dens
            return sums(e)
        lr = np.array(self.log_rr(x, rows), dtype=float)
        weight = sums.weights()
        return _weighted_excess(lr, log_f, weight, dens * weight)


class _Block:
    """The window, panels and checks for a block of draws."""

    def __init__(self, std: Standard, params: FloatArray, kinks: FloatArray, top: FloatArray,
                 low: FloatArray, tilt: FloatArray | None, kind: str, rate: FloatArray) -> None:
        self.std, self.params, self.kind, self.rate = std, params, kind, rate
        self._inputs = (std, params, kinks, top, low, tilt, kind, rate)
        self.a, self.b = std.affine(params)
        self.w_low = (_log_dose(low[:, None]) - self.a) / self.b
        self.w_top = (_log_dose(top[:, None]) - self.a) / self.b
        self.w_kinks = (_log_dose(kinks) - self.a) / self.b
        self.finite = np.isfinite(top)[:, None]
        self.top = np.where(self.finite, top[:, None], 1.0)
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            self.z_low = _no_nan(std.zeta_low(self.w_low, params), self.w_low)
            z_top, self.sf_top = std.zeta_top(self.w_top, params)
        self.z_top = _no_nan(z_top, self.w_top)
        self.cap = np.full_like(self.z_top, ZB)
        self.w_tilt = None if tilt is None else (tilt - self.a) / self.b

    def _zeta(self, w: FloatArray) -> FloatArray:
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            return _no_nan(self.std.zeta(w, self.params), w)

    def _beyond_body(self, f: _Integrand, rules: tuple[tuple[FloatArray, FloatArray], ...],
                     body: FloatArray, need: BoolArray) -> FloatArray:
        """The body again, up to the flat point, for the draws that ``need``
        it (in runs of :data:`REDO_DRAWS` draws holding one)."""
        body = body.copy()
        d = body.size
        for lo in range(0, d, REDO_DRAWS):
            hi = min(d, lo + REDO_DRAWS)
            if not need[lo:hi].any():
                continue
            std, params, kinks, top, low, tilt, kind, rate = self._inputs
            part = _Block(std, params[lo:hi], kinks[lo:hi], top[lo:hi], low[lo:hi],
                          None if tilt is None else tilt[lo:hi], kind, rate[lo:hi])
            cap = np.where(need[lo:hi, None], np.minimum(part.z_top, Z_MAX), part.cap)
            rows = slice(f.rows.start + lo, f.rows.start + hi)
            body[lo:hi] = part._window(_Integrand(f.log_rr, f.excess, rows), rules, cap)[0]
        return body

    def integrate(self, f: _Integrand,
                  rules: tuple[tuple[FloatArray, FloatArray], ...]) -> FloatArray:
        body, top_excess = self._window(f, rules, self.cap)
        sf = self._top_sf()
        with np.errstate(invalid="ignore", over="ignore"):
            tail = np.where(self.finite & (sf > 0), top_excess * sf, 0.0)[:, 0]
        bound_top = np.where(self.finite, np.abs(top_excess), 0.0)
        far = self.finite & (self.z_top > self.cap) & (bound_top > 0)
        if np.any(far):
            # beyond the body up to a far flat point: is the part there
            # (at most |expm1 L(x*)| x the probability beyond) negligible?
            beyond = bound_top * np.exp(self.std.log_sf(self._w_of(self.cap), self.params))
            need = far & (beyond > FAR_TOLERANCE * np.abs(body[:, None]))
            if np.any(need):
                body = self._beyond_body(f, rules, body, need[:, 0])
        total = body + tail
        if not np.all(np.isfinite(total)):
            raise FloatRangeError("the expected RR overflows the float range (about 1.8e308): "
                                  "the relative risk is too large over the exposure range; "
                                  "check the curve's coefficients and units")
        return total

    def _w_of(self, zeta: FloatArray) -> FloatArray:
        return self.std.from_zeta(zeta, self.params)

    def _top_sf(self) -> FloatArray:
        """S(x*), the probability of the flat part (1 when it starts at 0)."""
        if not np.any(self.finite):
            return np.zeros_like(self.w_top)
        sf = np.where(self.finite, self.sf_top, 0.0)
        return cast(FloatArray, np.where(self.w_top == -np.inf, 1.0, sf))

    def _zwindow(self, cap: FloatArray) -> tuple[FloatArray, FloatArray, BoolArray, BoolArray]:
        """The window in the normal score ``(z_lo, z_hi)``, finite, and where
        its ends are exact (the zero-below dose, the flat point)."""
        z_hi = np.minimum(self.z_top, cap)
        empty = z_hi <= -ZB
        z_hi = np.where(empty, -ZB, z_hi)
        z_lo = np.minimum(np.maximum(self.z_low, -ZB), z_hi)
        lo_exact = (self.z_low >= -ZB) & ~empty
        hi_exact = (self.z_top <= cap) & ~empty
        return z_lo, z_hi, lo_exact, hi_exact

    def _edges(self, cap: FloatArray) -> tuple[FloatArray, FloatArray | None, Window]:
        """Panel edges in ``w`` ``(d, Q + 1)`` and the narrowest body panel
        (``None`` when no kink cuts the body: its panels are all alike), and
        the window: its ends' normal scores and whether they are exact."""
        z_lo, z_hi, lo_exact, hi_exact = self._zwindow(cap)
        width = self.std.panel_width(self.params)
        # the window's exact ends are known in w: no map from the normal score
        w_lo = self.w_low if lo_exact.all() else np.where(lo_exact, self.w_low, self._w_of(z_lo))
        w_hi = self.w_top if hi_exact.all() else np.where(hi_exact, self.w_top, self._w_of(z_hi))
        # maximum and minimum rather than np.clip: the same values, less overhead
        t_lo, t_hi = (np.minimum(np.maximum(self.a + self.b * w, _LOG_DOSE_RANGE[0]),
                                 _LOG_DOSE_RANGE[1]) for w in (w_lo, w_hi))
        count = np.maximum(np.ceil((z_hi - z_lo) / width - 1e-9),
                           np.ceil((t_hi - t_lo) / LOG_DOSE_WIDTH - 1e-9))
        count = np.minimum(np.maximum(count, 1), MAX_PANELS).astype(int)
        j = np.arange(int(count.max()) + 1)
        if j.size == 2:
            # one panel per draw: from the window's start to its end
            if lo_exact.all() and hi_exact.all():
                # both ends exact: known in w
                first, last = self._first_last(w_lo, w_hi, lo_exact, hi_exact)
            else:
                ends = self._w_of(columns(z_lo, z_lo + (z_hi - z_lo)))
                first, last = self._first_last(ends[:, :1], ends[:, 1:], lo_exact, hi_exact)
            body = columns(first, last)
        else:
            # column-major, as all per-draw columns here (:func:`columns`)
            frac = np.minimum(j[:, None] / count.T, 1.0).T
            body = self._w_of(z_lo + (z_hi - z_lo) * frac)
            first, last = self._first_last(body[:, :1], body[:, -1:], lo_exact, hi_exact)
            for col in range(1, body.shape[1]):
                # a running maximum over the few columns (faster than accumulate)
                np.maximum(body[:, col], body[:, col - 1], out=body[:, col])
            np.maximum(body, first, out=body)
            np.minimum(body, last, out=body)
            body[:, :1] = first
            np.copyto(body, last, where=j[None, :] >= count)
        z_end = z_hi
        if self.w_tilt is not None:
            # the tilted body beyond the equal-score panels: its own breaks
            end = np.minimum(np.where(self.finite, self.w_top, np.inf),
                             self.w_tilt.max(axis=1, keepdims=True))
            grow = ~hi_exact & (end > last)
            last = np.where(grow, end, last)
            extra = np.where(grow, columns(self.w_tilt, end), last)
            body = columns(body, np.clip(extra, body[:, -1:], last))
            body.sort(axis=1)
            z_end = np.where(grow, np.minimum(self._zeta(last), Z_MAX), z_hi)
            # no constant cap beyond the tilted breaks: the integrand grows there
            hi_exact = hi_exact | grow
        cuts = columns(self.w_kinks, self.std.extra_breaks(self.params))
        inside = (cuts > first) & (cuts < last)
        cuts = cuts[:, inside.any(axis=0)] if inside.any() else cuts[:, :0]
        if cuts.shape[1]:
            cuts = np.minimum(np.maximum(cuts, first), last)
        window = (z_lo, z_end, lo_exact, hi_exact)
        if cuts.shape[1] == 0 and self.w_tilt is None:
            return body, None, window
        gaps = np.diff(body, axis=1)
        narrowest = np.where(gaps > 0, gaps, np.inf).min(axis=1, keepdims=True)
        return _merged(body, cuts), narrowest, window

    def _first_last(self, start: FloatArray, end: FloatArray, lo_exact: BoolArray,
                    hi_exact: BoolArray) -> tuple[FloatArray, FloatArray]:
        """The first and last edges: the window's exact ends where they are,
        elsewhere the body's ends held within ``[w_low, w_top]`` (a normal
        score's map to ``w`` may be interpolated), so that every node lies
        between the zero-below dose and the flat point (``excess``'s
        ``inside``)."""
        first = np.where(lo_exact, np.minimum(self.w_low, np.where(hi_exact, self.w_top, np.inf)),
                         np.maximum(start, self.w_low))
        return first, np.maximum(np.where(hi_exact, self.w_top, np.minimum(end, self.w_top)), first)

    def _window(self, f: _Integrand, rules: tuple[tuple[FloatArray, FloatArray], ...],
                cap: FloatArray) -> tuple[FloatArray, FloatArray]:
        """Body integral over the window up to ``cap`` and expm1(L(x*))."""
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            edges, narrowest, window = self._edges(cap)
        groups = _groups(edges, narrowest, rules)
        z_lo, z_hi, lo_exact, hi_exact = window
        body, mass, tilted = self._nodes(f, groups)
        # the window's ends, carrying the probability beyond them where the
        # window was cut at the body (the integrand held at its value there,
        # not dropped), and the flat point x*
        below = ndtr(z_lo)
        # Phi(-z*) is the flat part's probability, known: where the window
        # ends there, and beyond a window cut at the body
        at_top = self.finite & (z_hi == self.z_top)
        above = self.sf_top if np.all(at_top) else np.where(at_top, self.sf_top, ndtr(-z_hi))
        self._check_mass(mass, (1.0 - below[:, 0]) - above[:, 0])
        if tilted is not None:
            self._check_tilt(tilted, edges)
        beyond = np.where(self.finite, np.where(self.z_top > z_hi, above - self.sf_top, 0.0),
                          above)
        caps = columns(np.where(lo_exact, 0.0, below), np.where(hi_exact, 0.0, beyond))
        x = np.empty((caps.shape[0], 3), order="F")
        x[:, -1:] = np.maximum(self.top, 0.0)
        if not caps.any():
            # both ends exact: only the flat point's value is needed
            e = f.direct(x[:, -1:], f.rows)
            if e is not None:
                return body, e
        with np.errstate(over="ignore"):
            np.exp(edges[:, ::edges.shape[1] - 1] * self.b + self.a, out=x[:, :2])
        e = f.direct(x, f.rows)
        if e is not None:
            return body + np.einsum("ij,ij->i", e[:, :2], caps), e[:, -1:]
        lr = np.array(f.log_rr(x, f.rows), dtype=float)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            top_excess = np.expm1(lr[:, -1:])
            ends = _weighted_excess(lr[:, :2], np.log(caps), np.ones_like(caps), caps)
        return body + ends, top_excess

    def _nodes(self, f: _Integrand, groups: list[_Group]
               ) -> tuple[FloatArray, FloatArray, FloatArray | None]:
        """Sums over the nodes per draw: of the integrand times the weighted
        density, of the weighted density (the mass check) and, for a growing
        integrand, of the growth bound times it (the tilt check)."""
        d = self.params.shape[0]
        body, mass = np.zeros(d), np.zeros(d)
        tilted = None if self.kind == "bounded" else np.zeros(d)
        log_norm = self.std.log_norm(self.params)
        # one normaliser for all draws (the lognormal's): one exponential
        shared = log_norm.shape[0] > 1 and log_norm.strides[0] == 0
        scale = (np.broadcast_to(np.exp(log_norm[:1]), log_norm.shape) if shared
                 else np.exp(log_norm))
        fold = self.std.fold(self.params) if tilted is None else None
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            for g in groups:
                part = self._group_sums(f, g, scale, fold)
                for total, p in zip((body, mass, tilted), part):
                    if total is None or p is None:
                        continue
                    if g.draw is None:
                        total += p
                    else:
                        # a draw's panels come in order (bincount adds them so)
                        total += np.bincount(g.draw, weights=p, minlength=d)
        return body, mass, tilted

    def _group_sums(self, f: _Integrand, g: _Group, scale: FloatArray,
                    fold: tuple[FloatArray, FloatArray, FloatArray] | None
                    ) -> tuple[FloatArray, FloatArray, FloatArray | None]:
        """A group's node sums per row: integrand, mass and tilt (``fold``:
        the standard's :meth:`~.Standard.fold` for the block, if any)."""
        g = _Group(np.asfortranarray(g.mid), np.asfortranarray(g.half), g.xi, g.wi, g.draw)
        r = g.mid.shape[0]
        body, mass = np.empty(r), np.empty(r)
        tilted = None if self.kind == "bounded" else np.empty(r)
        # a panel's weights are its half-width (times the density's
        # normaliser) times the rule's: node sums go panel by panel
        factors = g.half * (scale if g.draw is None else scale[g.draw])
        shape = (g.half.shape[1], g.xi.size)
        n = shape[0] * shape[1]
        step = max(1, min(r, CHUNK_VALUES // n))
        # node-major: each node's values over the rows are contiguous,
        # so per-draw coefficients broadcast along whole rows
        buffers = [np.empty((n, step)).T for _ in range(5 if self.std.uses_exp_w else 4)]
        zeros, ones = np.zeros((step, 1)), np.ones((step, 1))
        for lo in range(0, r, step):
            hi = min(r, lo + step)
            sub = slice(lo, hi)
            at: slice | NDArray[np.intp] = sub if g.draw is None else g.draw[sub]
            w, x, dens = (b[:hi - lo] for b in buffers[:3])
            wv = w.reshape(hi - lo, *shape)
            _doses(x.reshape(hi - lo, *shape), g, sub, self.a[at], self.b[at])
            if fold is not None:
                # the kernel's affine map of w taken with the nodes' own
                shift, times, post = (t[at] for t in fold)
                np.multiply((g.half[sub] * times)[:, :, None], g.xi, out=wv)
                wv += ((g.mid[sub] + shift) * times)[:, :, None]
                log_f = self.std.folded_kernel(w, x, post)
            else:
                np.multiply(g.half[sub, :, None], g.xi, out=wv)
                wv += g.mid[sub, :, None]
                if tilted is not None:
                    w_nodes = w.copy()
                exp_w = None
                if self.std.uses_exp_w:
                    exp_w = buffers[4][:hi - lo]
                    _doses(exp_w.reshape(hi - lo, *shape), g, sub, zeros[:hi - lo],
                           ones[:hi - lo])
                log_f = self.std.kernel(w, x, self.params[at], exp_w)
            np.exp(log_f, out=dens)
            sums = _PanelSums(g, factors[sub])
            mass[sub] = sums(dens)
            rows = (slice(f.rows.start + lo, f.rows.start + hi) if g.draw is None
                    else f.rows.start + at)
            if tilted is not None:
                tilted[sub] = self._tilt_sum(w_nodes, log_f, sums, at)
            body[sub] = f.weighted(x, rows, log_f, dens, sums, buffers[3][:hi - lo])
        return body, mass, tilted

    def _tilt_sum(self, w: FloatArray, log_f: FloatArray, sums: _PanelSums,
                  sub: slice | NDArray[np.intp]) -> FloatArray:
        log_g = _tilt_exponent(self.std.family.name, self.kind, self.rate[sub, None],
                               self.params[sub], self.b[sub])
        if log_g is None:
            return np.zeros(w.shape[0])
        t = log_g(w)
        t += log_f
        np.exp(t, out=t)
        return sums(t)

    def _check_mass(self, got: FloatArray, want: FloatArray) -> None:
        gap = np.abs(got - want)
        if np.any(gap > MASS_TOLERANCE):
            raise ConvergenceError(
                f"quadrature recovered the {self.std.family.name} distribution's probability "
                f"only to {float(gap.max()):.1e}; parameters are too extreme for the fixed rule")

    def _check_tilt(self, got: FloatArray, edges: FloatArray) -> None:
        """The growth bound's expectation over the window, nodes against closed form."""
        ref = _tilted_mass(self.std.family.name, self.kind, self.rate[:, None], self.params,
                           self.b, edges[:, :1], edges[:, -1:])
        if ref is None:
            return
        with np.errstate(over="ignore", invalid="ignore"):
            rel = np.abs(got / ref[:, 0] - 1.0)
        rel = np.where(ref[:, 0] > 0, rel, 0.0)
        if np.any(rel > TILT_TOLERANCE) or np.any(np.isnan(rel)):
            raise ConvergenceError(
                f"quadrature recovered the expected growth of the relative risk over the "
                f"{self.std.family.name} distribution only to {float(np.nanmax(rel)):.1e} "
                f"(relative); parameters are too extreme for the fixed rule")


#: Largest |ln x| at a panel's midpoint for which its doses are formed as
#: products (below the exponential's overflow, with room for the half-width).
_PRODUCT_LOG_DOSE = 700.0


def _doses(x: FloatArray, g: _Group, sub: slice, a: FloatArray, b: FloatArray) -> None:
    r"""The doses :math:`x = e^{a + b w}` at a group's nodes into ``x``
    ``(d, P, n)``. The rule's nodes are symmetric, :math:`\xi_{n-1-i} =
    -\xi_i`, so with :math:`c = a + b\,m_p` and :math:`q_i = e^{b h_p \xi_i}`
    the pair is :math:`e^c q_i` and :math:`e^c / q_i`: half the exponentials.
    Where a midpoint's dose is near the float range, directly from ``w``."""
    n = g.xi.size
    c = g.mid[sub] * b
    c += a
    if n % 2 or np.abs(c).max(initial=0.0) > _PRODUCT_LOG_DOSE:
        np.multiply((g.half[sub] * b)[:, :, None], g.xi, out=x)
        x += c[:, :, None]
        np.exp(x, out=x)
        return
    half = n // 2
    q = np.multiply((g.half[sub] * b)[:, :, None], g.xi[half:], out=x[:, :, half:])
    np.exp(q, out=q)
    np.exp(c, out=c)
    np.divide(c[:, :, None], q[:, :, ::-1], out=x[:, :, :half])
    q *= c[:, :, None]


def columns(*parts: FloatArray) -> FloatArray:
    """The ``(d, k_i)`` arrays side by side, ``(d, sum k_i)`` in column-major
    (Fortran) order. Each column is then contiguous, so operations with
    per-draw ``(d, 1)`` values and reductions over the draws or the columns
    run along the draws; over a row-major ``(d, k)`` array with a small
    ``k``, numpy calls its inner loop once per row (up to 40 times slower
    here at ``k`` of 2 to 12)."""
    return cast(FloatArray, np.concatenate([np.asarray(p).T for p in parts], axis=0).T)


def _within(kinks: FloatArray, low: FloatArray, top: FloatArray) -> FloatArray:
    """The columns of ``kinks`` ``(d, K)`` with a dose strictly between some
    draw's zero-below dose and flat point: no other kink can cut a panel (the
    window lies between them), such as the minimum-risk level's pre-image or
    ``max_dose``, the window's own ends."""
    if kinks.shape[1] == 0:
        return kinks
    keep = ((kinks > low[:, None]) & (kinks < top[:, None])).any(axis=0)
    return kinks if keep.all() else kinks[:, keep]


#: Most compare-exchanges of columns :func:`_merged` makes (more: a sort).
_INSERT_STEPS = 8


def _merged(body: FloatArray, cuts: FloatArray) -> FloatArray:
    """The rows of ``body`` ``(d, B)`` (each sorted) and ``cuts`` ``(d, C)``
    together, each row sorted: for a few cuts by inserting each into its
    row with compare-exchanges over whole columns (minimum and maximum of
    two columns; a few of them take less time than sorting row by row
    here), else by ``np.sort``. The same values either way."""
    b, c = body.shape[1], cuts.shape[1]
    if c * (2 * b + c - 1) // 2 > _INSERT_STEPS:
        return np.sort(columns(body, cuts), axis=1)
    cols = columns(body, cuts).T
    for start in range(b, b + c):
        for j in range(start, 0, -1):
            low = np.minimum(cols[j - 1], cols[j])
            np.maximum(cols[j - 1], cols[j], out=cols[j])
            cols[j - 1] = low
    return cast(FloatArray, cols.T)


def _log_dose(x: FloatArray) -> FloatArray:
    """``ln max(x, 0)`` of doses ``(d, K)``, once when all rows are alike
    (a shared level or kink)."""
    if x.shape[0] > 1 and (x.strides[0] == 0 or bool(np.all(x == x[:1]))):
        return np.broadcast_to(_log_dose(x[:1]), x.shape)
    with np.errstate(divide="ignore"):
        return cast(FloatArray, np.log(np.maximum(x, 0.0)))


def _no_nan(z: FloatArray, w: FloatArray) -> FloatArray:
    """A normal score with NaN (from an infinite ``w``) set to +-inf."""
    if not np.isnan(z).any():
        return z
    return cast(FloatArray, np.where(np.isnan(z), np.where(w > 0, np.inf, -np.inf), z))


def _tilt_exponent(name: str, kind: str, r: FloatArray, params: FloatArray,
                   b: FloatArray) -> Callable[[FloatArray], FloatArray] | None:
    """The log growth bound ``g`` in ``w`` (up to a constant) of
    :func:`_tilted_mass`; ``None`` where that has no closed form."""
    if name == "lognormal" and kind == "power":
        rs = r * b
        return lambda w: rs * w
    if name == "gamma":
        if kind == "power":
            return lambda w: r * w
        ct = r * params[:, 1:2]
        return lambda w: ct * np.exp(w)
    if name == "weibull" and kind == "power":
        q = r * b
        return lambda w: q * w
    return None


def _tilted_mass(name: str, kind: str, r: FloatArray, params: FloatArray, b: FloatArray,
                 w_lo: FloatArray, w_hi: FloatArray) -> FloatArray | None:
    r""":math:`\int_{w_{lo}}^{w_{hi}} g\, f_W` in closed form, with ``g`` the
    growth bound of :func:`_tilt_exponent`, by completing the
    square (lognormal, power growth :math:`x^r`: :math:`e^{r^2 s^2/2}
    [\Phi(z_{hi} - rs) - \Phi(z_{lo} - rs)]`), or from the gamma integral
    (gamma, :math:`y^r`: :math:`\Gamma(k+r)/\Gamma(k)\,[P(k+r, y_{hi}) -
    P(k+r, y_{lo})]`; gamma, :math:`e^{cx}`: :math:`(1-c\theta)^{-k}
    [P(k, (1-c\theta) y_{hi}) - P(k, (1-c\theta) y_{lo})]`; Weibull,
    :math:`E^{r/k}`: :math:`\Gamma(1+r/k)\,[P(1+r/k, E_{hi}) - P(1+r/k,
    E_{lo})]`); derived here. ``None`` where there is no closed form
    (exponential growth over a Weibull of shape above 1)."""
    with np.errstate(over="ignore"):
        y_lo, y_hi = np.exp(w_lo), np.exp(w_hi)
    if name == "lognormal" and kind == "power":
        rs = r * b
        return cast(FloatArray, np.exp(0.5 * rs * rs) * between(w_lo - rs, w_hi - rs))
    if name == "gamma":
        k = params[:, :1]
        if kind == "power":
            return cast(FloatArray, poch(k, r) * gamma_between(k + r, y_lo, y_hi))
        ct = r * params[:, 1:2]
        return cast(FloatArray, np.exp(-k * np.log1p(-ct))
                    * gamma_between(k, y_lo * (1 - ct), y_hi * (1 - ct)))
    if name == "weibull" and kind == "power":
        q = r * b
        return cast(FloatArray, np.exp(gammaln(1 + q)) * gamma_between(1 + q, y_lo, y_hi))
    return None


def _weighted_excess(lr: FloatArray, log_f: FloatArray, weight: FloatArray,
                     dens: FloatArray) -> FloatArray:
    """Row sums of expm1(lr) * dens, where dens = exp(log_f) * weight.

    Where lr is large enough to overflow expm1 the density there is
    negligible; those nodes are evaluated as exp(log_f + lr) instead.
    """
    if lr.max(initial=0.0) < 600.0:
        np.expm1(lr, out=lr)
        lr *= dens
        return cast(FloatArray, lr.sum(axis=1))
    with np.errstate(over="ignore", invalid="ignore"):
        big = np.exp(log_f + lr) * -np.expm1(-np.maximum(lr, 0.5)) * weight
    small = np.expm1(np.minimum(lr, 0.5)) * dens
    return cast(FloatArray, np.where(lr > 0.5, big, small).sum(axis=1))
