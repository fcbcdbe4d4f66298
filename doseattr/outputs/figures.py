"""Plot functions for the report.

Each function reads core result objects (never files), takes ``ax=None``,
draws on the given axes or a new figure, and returns the axes. Artists that
tests and callers may want to find carry a ``gid`` (see the docstrings).
matplotlib is imported inside the functions, on the Agg backend.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike, NDArray

from doseattr.core.attribution.categorical import CategoricalComparison
from doseattr.core.attribution.contribution import Contribution
from doseattr.core.curves.base import Curve
from doseattr.core.exposure.base import Exposure, ExposureFit, Family
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.errors import ModelError
from doseattr.outputs.style import (
    COLORS,
    CYCLE,
    axis_label,
    new_axes,
    outside_legend,
    styled,
)
from doseattr.results.numbers import share_text
from doseattr.results.records import BandTable

if TYPE_CHECKING:
    from matplotlib.axes import Axes

#: A fitted exposure distribution or the weighted values themselves.
AnyExposure = Exposure | EmpiricalExposure
FloatArray = NDArray[np.float64]

#: Number of points on plotted curves.
GRID_POINTS = 400
#: At most this many markers of each kind (detected, censored) in a Q-Q
#: plot: beyond it the points at evenly spaced ranks are drawn (a PNG does
#: not resolve more, and a million markers take seconds to draw).
MAX_QQ_POINTS = 2000


def curve_extent(curve: Curve, band_table: BandTable | None = None,
                 exposure: AnyExposure | None = None) -> float:
    """Upper end of a dose axis that shows the curve's data and its flat part.

    The largest of: 1.25 x ``max_dose``, 1.25 x ``data_max``, 1.1 x the
    highest assigned band dose or finite band limit, and the 99th
    percentile of ``exposure`` when given.
    """
    candidates = [float(curve.model.reference_dose)]
    for value, factor in ((curve.max_dose, 1.25), (curve.data_max, 1.25)):
        if value is not None and np.isfinite(value):
            candidates.append(factor * value)
    if band_table is not None:
        dose, upper = _floats(band_table.dose), _upper(band_table)
        finite = np.concatenate([dose, upper[np.isfinite(upper)]])
        if finite.size:
            candidates.append(1.1 * float(np.nanmax(finite)))
    if exposure is not None:
        candidates.append(float(exposure_quantile(exposure, 0.99)))
    top = max(candidates)
    return top if top > 0 else 1.0


def _floats(values: ArrayLike) -> FloatArray:
    return np.asarray(values, dtype=float)


def _upper(bands: BandTable) -> FloatArray:
    """Upper band limits, ``inf`` for an open-ended band."""
    upper = _floats(bands.upper)
    return np.where(np.isnan(upper), np.inf, upper)


def exposure_quantile(exposure: AnyExposure, q: float) -> float:
    """Quantile ``q`` of the population exposure (point mass included)."""
    u = exposure.unexposed
    if q <= u:
        return 0.0
    if isinstance(exposure, EmpiricalExposure):
        return weighted_quantile(exposure.values, exposure.weights, (q - u) / (1 - u))
    return _scalar(exposure.family.ppf(np.array([(q - u) / (1 - u)]), exposure.params))


def weighted_quantile(values: ArrayLike, weights: ArrayLike, q: float) -> float:
    """Smallest value whose weighted cumulative share reaches ``q``."""
    order = np.argsort(values)
    v = np.asarray(values, float)[order]
    cum = np.cumsum(np.asarray(weights, float)[order])
    return float(v[min(int(np.searchsorted(cum / cum[-1], q)), v.size - 1)])


def _scalar(value: ArrayLike) -> float:
    return float(np.asarray(value, dtype=float).reshape(-1)[0])


def plot_curve(curve: Curve, band_table: BandTable | None = None, ax: Axes | None = None,
               unit: str | None = None, *, x_max: float | None = None, level: float = 0.95,
               label: str | None = None, title: str = "Relative risk by exposure",
               legend: bool = True) -> Axes:
    """Fitted RR curve with its pointwise band and the study's band estimates.

    Draws RR(x) (``gid="fitted-rr"``), the pointwise ``level`` interval from
    :meth:`Curve.rr_interval` (``gid="rr-band"``), the band estimates at
    their assigned doses with their CIs (``gid="study-bands"``), and dotted
    vertical lines at ``max_dose`` (``gid="max-dose"``) and, when different,
    at ``data_max`` (``gid="data-max"``). ``legend=False`` leaves the
    legend out (small panels). The line is called "fitted curve" when the
    curve carries the diagnostics of a fit to the study's bands.
    """
    with styled():
        ax = new_axes(ax)
        top = x_max if x_max is not None else curve_extent(curve, band_table)
        x = dose_grid(curve, top)
        rr, lo, hi = _curve_values(curve, x, level)
        ax.fill_between(x, lo, hi, color=COLORS["band"], alpha=0.35, linewidth=0,
                        label=f"pointwise {level:.0%} interval", gid="rr-band")
        default = "fitted curve" if curve.fit is not None else "curve"
        ax.plot(x, rr, color=COLORS["curve"], linewidth=2, label=label or default,
                gid="fitted-rr")
        _draw_bands(ax, band_table, level)
        _draw_dose_limits(ax, curve, unit)
        ax.axhline(1.0, color="#777777", linewidth=0.8)
        _xlim_from_zero(ax, top)
        ax.set_xlabel(axis_label("Exposure", unit))
        ax.set_ylabel("Relative risk (RR)")
        ax.set_title(title)
        if legend:
            outside_legend(ax)
    return ax


def dose_grid(curve: Curve, top: float) -> FloatArray:
    """Doses from 0 to ``top``; from just above 0 when the model has no
    finite RR at zero dose (a power curve without offset refuses it)."""
    try:
        with np.errstate(divide="ignore", invalid="ignore"):
            ok = bool(np.all(np.isfinite(curve.log_rr(np.zeros(1)))))
    except ModelError:
        ok = False
    start = 0.0 if ok else top / (10 * GRID_POINTS)
    return np.linspace(start, top, GRID_POINTS)


def _curve_values(curve: Curve, x: FloatArray,
                  level: float) -> tuple[FloatArray, FloatArray, FloatArray]:
    """RR and its pointwise interval at ``x``; NaN (a gap in the line) where
    the model has no finite value, e.g. a power curve without offset at
    zero dose, whose log RR is minus infinity there."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        rr, lo, hi = curve.rr_interval(x, level=level)
    return _finite_rr(rr), _finite_rr(lo), _finite_rr(hi)


def _finite_rr(v: FloatArray) -> FloatArray:
    return np.where(np.isfinite(v) & (v > 0), v, np.nan)


def add_curve(ax: Axes, curve: Curve, *, color: str, label: str,
              x_max: float | None = None) -> Axes:
    """Add another curve's RR line to an existing curve plot (model comparison)."""
    x = dose_grid(curve, x_max if x_max is not None else ax.get_xlim()[1])
    ax.plot(x, _curve_values(curve, x, 0.95)[0], color=color, linewidth=1.6, linestyle="--",
            label=label, gid=f"model-{label}")
    outside_legend(ax)
    return ax


def _draw_bands(ax: Axes, bands: BandTable | None, level: float) -> None:
    if bands is None:
        return
    ref = np.asarray(bands.reference, bool)
    all_dose, all_rr = _floats(bands.dose), _floats(bands.rr)
    dose, rr = all_dose[~ref], all_rr[~ref]
    lo, hi = _floats(bands.ci_lower)[~ref], _floats(bands.ci_upper)[~ref]
    has_ci = np.isfinite(lo) & np.isfinite(hi)
    yerr = np.where(has_ci, np.vstack([rr - lo, hi - rr]), 0.0)
    ax.errorbar(dose, rr, yerr=yerr, fmt="o", color=COLORS["study"], markersize=5, capsize=3,
                linewidth=1.2, label="study estimates (reported CI)", gid="study-bands", zorder=4)
    if ref.any():
        ax.plot(all_dose[ref], np.ones(int(ref.sum())), "o", markerfacecolor="white",
                markeredgecolor=COLORS["study"], markersize=5, label="reference band",
                gid="reference-band", zorder=4)


def _draw_dose_limits(ax: Axes, curve: Curve, unit: str | None) -> None:
    u = f" {unit}" if unit else ""
    if curve.max_dose is not None:
        ax.axvline(curve.max_dose, color=COLORS["limit"], linestyle=":", linewidth=1.2,
                   label=f"RR held flat beyond {curve.max_dose:g}{u}", gid="max-dose")
    if curve.data_max is not None and curve.data_max != curve.max_dose:
        ax.axvline(curve.data_max, color=COLORS["limit"], linestyle="-.", linewidth=1.0,
                   label=f"end of the study's data, {curve.data_max:g}{u}", gid="data-max")


def is_empirical(exposure: AnyExposure) -> bool:
    """True for an exposure given as weighted values, with no fitted family."""
    return isinstance(exposure, EmpiricalExposure)


def plot_exposure(exposure: AnyExposure, ax: Axes | None = None, unit: str | None = None, *,
                  x_max: float | None = None, bins: int = 30, alternatives: bool = True,
                  compare: Sequence[Exposure] = (),
                  data_label: str = "measurements",
                  long_term: Exposure | None = None) -> Axes:
    """Exposure data (weighted histogram) against the fitted density.

    The histogram (``gid="data-hist"``) covers the detected values; bar
    areas are weighted shares of all measurements, so they sum to the
    detected share and sit on the same scale as the density. Values below a
    detection limit are drawn as markers at their limit
    (``gid="censored-marks"``). The line (``gid="fitted-density"``) is the
    family's density for the exposed part of the population; with
    ``alternatives`` the other families fitted are drawn dashed
    (``gid="density-<family>"``). An empirical exposure has no density:
    only its weighted histogram is drawn, with a legend line saying that
    the PAF is a weighted mean over the values; the parametric fits in
    ``compare`` (fitted to the same values for comparison only) are drawn
    dotted (``gid="compare-<family>"``). ``data_label`` names the data in
    the legend (workers' cumulative exposures rather than measurements).
    With ``long_term`` (samples that name their workers), ``exposure`` is
    the single samples' fit and ``long_term`` the distribution of workers'
    long-term means the PAF uses, drawn beside it (``gid="long-term-density"``).
    """
    with styled():
        ax = new_axes(ax)
        data = exposure_data(exposure.fit)
        top = x_max if x_max is not None else _exposure_extent(exposure, data)
        if data is not None and data.upper is not None:
            _draw_banded(ax, data.values, data.upper, data.weights)
        elif data is not None:
            _draw_data(ax, data, top, bins, data_label)
        x = np.linspace(top / (4 * GRID_POINTS), top, GRID_POINTS)
        if isinstance(exposure, Exposure) and long_term is not None:
            ax.plot(x, np.exp(exposure.family.logpdf(x, exposure.params)),
                    color=COLORS["density"], linewidth=1.4, linestyle="--",
                    label=f"fitted {exposure.family.name} density of single samples",
                    gid="fitted-density")
            ax.plot(x, np.exp(long_term.family.logpdf(x, long_term.params)), color=CYCLE[0],
                    linewidth=2, label="workers' long-term means (used)",
                    gid="long-term-density")
        elif isinstance(exposure, Exposure):
            _draw_densities(ax, exposure, x, alternatives)
        else:
            if data is not None:
                ax.plot([], [], " ", label="no fitted density: the PAF is a weighted\n"
                                           "mean over these values")
            for i, other in enumerate(compare):
                aic = _aic_text(other.fit, ", AIC {:.1f}")
                ax.plot(x, np.exp(other.family.logpdf(x, other.params)), color=CYCLE[i % 3],
                        linestyle=":", linewidth=1.6,
                        label=f"{other.family.name} fit (comparison only{aic})",
                        gid=f"compare-{other.family.name}")
        if exposure.unexposed > 0:
            ax.plot([], [], " ", label=f"plus {share_text(exposure.unexposed)} unexposed (not drawn)")
        _xlim_from_zero(ax, top)
        ax.set_ylim(bottom=0.0)
        ax.set_xlabel(axis_label("Exposure", unit))
        ax.set_ylabel(axis_label("Density", f"per {unit}" if unit else None))
        ax.set_title("Exposure in the population")
        outside_legend(ax)
    return ax


def _draw_densities(ax: Axes, exposure: Exposure, x: FloatArray, alternatives: bool) -> None:
    """The density used (``gid="fitted-density"``) and, with
    ``alternatives``, every other family tried (``gid="density-<family>"``)."""
    others = exposure.alternatives if alternatives else ()
    density = np.exp(exposure.family.logpdf(x, exposure.params))
    used = f"fitted {exposure.family.name} density (used"
    used += (_aic_text(exposure.fit, ", AIC {:.1f}") if others else "") + ")"
    ax.plot(x, density, color=COLORS["density"], linewidth=2, label=used, gid="fitted-density")
    for i, (family, params, fit) in enumerate(others):
        aic = _aic_text(fit, " (AIC {:.1f})")
        ax.plot(x, np.exp(family.logpdf(x, params)), color=CYCLE[i % 3], linestyle="--",
                linewidth=1.4, label=f"{family.name} density{aic}", gid=f"density-{family.name}")


def plot_qq(exposure: AnyExposure, ax: Axes | None = None, unit: str | None = None, *,
            family: Family | None = None, params: FloatArray | None = None,
            legend: bool = True) -> Axes:
    """Quantile-quantile plot of the measurements against the fitted family.

    Plotting positions are those of regression on order statistics for
    left-censored data (Helsel, Statistics for Censored Environmental Data,
    2nd ed., 2012), from :func:`doseattr.core.exposure.nondetects.ros_plotting_positions`;
    they ignore weights. Detected values (``gid="qq-detected"``) are drawn
    at their value; a non-detect (``gid="qq-censored"``) at its detection
    limit with a downward marker, since its true value lies below. The line
    ``y = x`` (``gid="qq-line"``) is where points fall when the family fits.
    Both axes are logarithmic. With more than :data:`MAX_QQ_POINTS`
    points of a kind, those at evenly spaced ranks are drawn
    (:func:`qq_points`). ``family`` and ``params`` draw the same
    measurements against another family fitted to them (the alternatives
    tried when the analysis picks the family by AIC).
    """
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    from doseattr.core.exposure.nondetects import ros_plotting_positions

    data = exposure_data(exposure.fit)
    if data is None or not isinstance(exposure, Exposure) or data.upper is not None:
        raise ValueError("a Q-Q plot needs measurements (not bands) fitted by a family")
    with styled():
        ax = new_axes(ax, size=(5.2, 4.4))
        pos = ros_plotting_positions(data.values, data.detected)
        keep = qq_points(pos, data.detected)
        values, det, pos = data.values[keep], data.detected[keep], pos[keep]
        family = exposure.family if family is None else family
        params = exposure.params if params is None else params
        theory = np.asarray(family.ppf(pos, params), float).reshape(-1)
        ax.plot(theory[det], values[det], "o", color=COLORS["curve"], markersize=4,
                alpha=0.8, label="measured", gid="qq-detected")
        if (~det).any():
            ax.plot(theory[~det], values[~det], "v", color=COLORS["censored"], markersize=6,
                    label="below detection limit (drawn at the limit)", gid="qq-censored")
        lo = float(min(theory.min(), data.values.min())) / 1.2
        hi = float(max(theory.max(), data.values.max())) * 1.2
        ax.plot([lo, hi], [lo, hi], color=COLORS["limit"], linewidth=1, gid="qq-line",
                label="perfect agreement")
        ax.set_xscale("log")
        ax.set_yscale("log")
        for axis in (ax.xaxis, ax.yaxis):
            axis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
            axis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
            axis.set_minor_formatter(NullFormatter())
        ax.set_xlim(lo, hi)
        ax.set_ylim(lo, hi)
        ax.set_xlabel(axis_label(f"Fitted {family.name} quantile", unit))
        ax.set_ylabel(axis_label("Measured value", unit))
        ax.set_title("Measurements against the fitted distribution" if legend
                     else f"{family.name}")
        if legend:
            ax.legend(loc="upper left")
    return ax


def qq_points(positions: FloatArray, detected: NDArray[np.bool_],
              cap: int = MAX_QQ_POINTS) -> NDArray[np.intp]:
    """Indices of the points a Q-Q plot draws, in the data's order: every
    point when the detected and the censored points each number at most
    ``cap``; otherwise, within each kind, the points at ``cap`` evenly
    spaced ranks of their plotting position (``round(linspace(0, k - 1,
    cap))``, the lowest and highest included), so the plot is the same
    curve drawn from fewer points and the same data give the same figure."""
    keep = []
    for kind in (np.flatnonzero(detected), np.flatnonzero(~detected)):
        if kind.size > cap:
            ranked = kind[np.argsort(positions[kind], kind="stable")]
            kind = ranked[np.unique(np.round(np.linspace(0, kind.size - 1, cap)).astype(np.intp))]
        keep.append(kind)
    return np.sort(np.concatenate(keep))


def _aic_text(fit: ExposureFit | None, template: str) -> str:
    """``template`` filled with the fit's AIC; empty without one."""
    return "" if fit is None or fit.aic is None else template.format(fit.aic)


@dataclass(frozen=True, eq=False)
class ExposureData:
    """The data an exposure was fitted to, as plotted: the values (lower
    band limits for counts in bands), which were detected, their weights
    (counts for bands) and, for counts in bands, the upper limits."""

    values: FloatArray
    detected: NDArray[np.bool_]
    weights: FloatArray
    upper: FloatArray | None = None


def exposure_data(fit: ExposureFit | None) -> ExposureData | None:
    """The fitted data of ``fit``, or ``None`` when it kept none."""
    if fit is None or fit.values is None:
        return None
    values = np.asarray(fit.values, dtype=float)
    if values.size == 0:
        return None
    mask = fit.detected_mask
    detected = np.ones(values.shape, bool) if mask is None else np.asarray(mask, bool)
    weights = np.ones(values.shape) if fit.weights is None else np.asarray(fit.weights, float)
    # banded data: (values, upper] per count
    upper = None if fit.upper is None else np.asarray(fit.upper, dtype=float)
    return ExposureData(values, detected, weights, upper)


def is_banded(fit: ExposureFit | None) -> bool:
    """True when the exposure was fitted to counts in bands (grouped data)."""
    return fit is not None and fit.upper is not None


def _exposure_extent(exposure: AnyExposure, data: ExposureData | None) -> float:
    if isinstance(exposure, EmpiricalExposure):
        return float(np.max(exposure.values)) * 1.02 or 1.0
    top = _scalar(exposure.family.ppf(np.array([0.995]), exposure.params))
    if data is not None:
        top = max(top, float(np.max(data.values)) * 1.02)
    if data is not None and data.upper is not None:
        finite = data.upper[np.isfinite(data.upper)]
        top = max(top, float(finite.max()) * 1.02 if finite.size else top)
    return top


def banded_heights(lower: FloatArray, upper: FloatArray, counts: FloatArray) -> FloatArray:
    """Bar heights of counts in bands on the density scale (NaN for an
    open-ended band, which has no width).

    .. math:: h_i = \\frac{n_i}{N (u_i - l_i)}
    """
    width = upper - lower
    with np.errstate(invalid="ignore"):
        return np.where(np.isfinite(width), counts / (counts.sum() * width), np.nan)


def _draw_banded(ax: Axes, lo: FloatArray, hi: FloatArray, n: FloatArray) -> None:
    """Counts ``n`` in bands ``(lo, hi]`` as bars over each band
    (``gid="band-bars"``); an open-ended top band is named in the legend
    with its share."""
    h = banded_heights(lo, hi, n)
    closed = np.isfinite(h)
    ax.bar(lo[closed], h[closed], width=(hi - lo)[closed], align="edge", color=COLORS["data"],
           alpha=0.6, edgecolor="white", linewidth=0.5, gid="band-bars",
           label=f"counts in bands (N = {n.sum():g}), as density")
    for a, share in zip(lo[~closed], n[~closed] / n.sum()):
        ax.plot([], [], " ", label=f"open band above {a:g}: {share_text(share)} (not drawn)")


def _draw_data(ax: Axes, data: ExposureData, top: float, bins: int,
               what: str = "measurements") -> None:
    values, det, w = data.values, data.detected, data.weights
    edges = np.linspace(0.0, top, bins + 1)
    heights = data_histogram(values[det], w[det], edges, total_weight=float(w.sum()))
    ax.bar(edges[:-1], heights, width=np.diff(edges), align="edge", color=COLORS["data"],
           alpha=0.6, edgecolor="white", linewidth=0.5,
           label=f"{what}, detected (n = {int(det.sum())})" if (~det).any()
           else f"{what} (n = {int(det.sum())})", gid="data-hist")
    if (~det).any():
        ax.plot(values[~det], np.zeros(int((~det).sum())), linestyle="none", marker="v",
                markersize=7, color=COLORS["censored"], clip_on=False, zorder=5,
                label=f"below detection limit, at the limit (n = {int((~det).sum())})",
                gid="censored-marks")


def data_histogram(values: FloatArray, weights: FloatArray, edges: FloatArray,
                   total_weight: float) -> FloatArray:
    """Bar heights whose areas are weighted shares of ``total_weight``.

    .. math:: h_j = \\frac{\\sum_{i \\in j} w_i}{W (e_{j+1} - e_j)}
    """
    sums, _ = np.histogram(values, bins=edges, weights=weights)
    return sums / (total_weight * np.diff(edges))


def plot_contribution(contribution: Contribution, ax: Axes | None = None,
                      unit: str | None = None, *, minimum_risk: float | None = None,
                      cumulative: bool = False) -> Axes:
    """Where the attributable burden comes from along the exposure axis.

    Draws the density ``f(x) (RR_m(x) - 1) / E[RR_m(X)]`` held in
    ``contribution.density`` (``gid="burden-density"``); its area is the PAF.
    With ``cumulative=True`` (the empirical path, where the burden sits on
    the individual values) it draws instead the cumulative share of the
    attributable cases as a step line (``gid="burden-cumulative"``). A
    dashed line marks the median (``gid="burden-median"``): half the
    attributable cases come from exposures below it.
    """
    with styled():
        ax = new_axes(ax)
        x = np.asarray(contribution.x, float)
        u = f" {unit}" if unit else ""
        if cumulative:
            share = 100 * np.asarray(contribution.cumulative, float)
            ax.step(x, share, where="post", color=COLORS["burden"], linewidth=2,
                    label="share of attributable cases below x", gid="burden-cumulative")
            ax.set_ylim(0.0, 102.0)
            ax.set_ylabel("Cumulative share (%)")
        else:
            d = np.asarray(contribution.density, float)
            ax.fill_between(x, 0.0, d, color=COLORS["burden"], alpha=0.25, linewidth=0)
            ax.plot(x, d, color=COLORS["burden"], linewidth=2,
                    label="attributable share per unit exposure", gid="burden-density")
            ax.set_ylabel(axis_label("Attributable share", f"per {unit}" if unit else None))
        median = contribution.median
        if median is not None and np.isfinite(median):
            ax.axvline(median, color=COLORS["limit"], linestyle="--", linewidth=1.1,
                       label=f"half the attributable cases below {median:.3g}{u}",
                       gid="burden-median")
        if minimum_risk:
            ax.axvline(minimum_risk, color=COLORS["accent"], linestyle=":", linewidth=1.2,
                       label=f"minimum-risk level, {minimum_risk:g}{u}", gid="minimum-risk")
        _xlim_from_zero(ax, float(x.max()))
        if not cumulative:
            ax.set_ylim(bottom=min(0.0, ax.get_ylim()[0]))
        ax.set_xlabel(axis_label("Exposure", unit))
        ax.set_title("Where the attributable cases come from")
        outside_legend(ax)
    return ax


def plot_categorical(categorical: CategoricalComparison, ax: Axes | None = None) -> Axes:
    """PAF by the multi-category formula, one bar per method, against the
    continuous PAF drawn as a horizontal line.

    Bars (``gid="method-bars"``) and line (``gid="continuous-paf"``) are in
    percent.
    """
    with styled():
        ax = new_axes(ax, size=(4.2, 3.4))
        names = [m.method for m in categorical.methods]
        pafs = 100 * np.array([m.paf for m in categorical.methods], float)
        pos = np.arange(len(names))
        colors = [CYCLE[i % len(CYCLE)] for i in range(len(names))]
        ax.bar(pos, pafs, color=colors, width=0.6, gid="method-bars")
        ax.axhline(100 * categorical.continuous_paf, color=COLORS["limit"], linewidth=1.6,
                   linestyle="--", label="continuous PAF", gid="continuous-paf")
        ax.set_xticks(pos, [METHOD_LABELS.get(n, n) for n in names])
        ax.set_ylabel("PAF (%)")
        ax.set_ylim(bottom=0.0, top=1.15 * max([*pafs, 100 * categorical.continuous_paf, 1e-9]))
        ax.set_title("Categorical against continuous")
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.28))
    return ax


#: Short axis labels for the categorical methods.
METHOD_LABELS = {
    "reported": "study RRs",
    "midpoint": "curve at\nmidpoints",
    "band-mean": "curve at\nband means",
}


def plot_convergence(categorical: CategoricalComparison, ax: Axes | None = None) -> Axes:
    """Categorical PAF with k equal-probability bands against k
    (``gid="convergence"``), with the continuous PAF as a line, in percent."""
    from matplotlib.ticker import MaxNLocator

    with styled():
        ax = new_axes(ax, size=(4.2, 3.4))
        k = np.array([b for b, _ in categorical.convergence], float)
        paf = 100 * np.array([p for _, p in categorical.convergence], float)
        ax.plot(k, paf, "o-", color=CYCLE[3], markersize=3.5, linewidth=1.4,
                label="k bands of equal population share",
                gid="convergence")
        ax.axhline(100 * categorical.continuous_paf, color=COLORS["limit"], linewidth=1.6,
                   linestyle="--", label="continuous PAF", gid="continuous-paf")
        ax.set_xlabel("Number of bands")
        ax.set_ylabel("PAF (%)")
        ax.set_title("Categorical PAF with more bands")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.2), ncols=2)
    return ax


def plot_draws(draws: Sequence[float] | FloatArray, ax: Axes | None = None, *,
               estimate: float | None = None, lower: float | None = None,
               upper: float | None = None, what: str = "PAF") -> Axes:
    """Histogram of Monte Carlo draws of a fraction, in percent
    (``gid="draws-hist"``), with the estimate and interval limits marked."""
    with styled():
        ax = new_axes(ax, size=(5.0, 3.0))
        d = 100 * np.asarray(draws, float)
        # draws equal but for rounding cannot be cut into 40 finite bins
        spread = float(np.ptp(d)) if d.size else 0.0
        bins = 40 if spread > 1e-9 * max(1.0, float(np.max(np.abs(d), initial=0.0))) else 1
        ax.hist(d, bins=bins, color=COLORS["band"], edgecolor="white", linewidth=0.4,
                gid="draws-hist", label=f"{d.size} draws")
        if estimate is not None:
            ax.axvline(100 * estimate, color=COLORS["curve"], linewidth=2, label="estimate")
        for v, lab in ((lower, "2.5th and 97.5th percentiles"), (upper, None)):
            if v is not None:
                ax.axvline(100 * v, color=COLORS["limit"], linestyle="--", linewidth=1.1,
                           label=lab)
        ax.set_xlabel(f"{what} (%)")
        ax.set_ylabel("Number of draws")
        ax.set_title(f"Uncertainty in the {what}")
        outside_legend(ax)
    return ax


def plot_cumulative(values: Sequence[float], ax: Axes | None = None,
                    unit: str | None = None) -> Axes:
    """Histogram of workers' cumulative exposures (``gid="cumulative-hist"``)."""
    with styled():
        ax = new_axes(ax, size=(6.0, 3.2))
        v = np.asarray(values, float)
        ax.hist(v, bins=min(30, max(5, v.size // 3)), color=COLORS["data"], edgecolor="white",
                linewidth=0.5, gid="cumulative-hist")
        ax.set_xlabel(axis_label("Cumulative exposure", unit))
        ax.set_ylabel("Number of workers")
        ax.set_title(f"Cumulative exposure of {v.size} workers")
    return ax


def _xlim_from_zero(ax: Axes, top: float) -> None:
    """Start the exposure axis at zero; leave matplotlib's limits when the
    top is not a positive finite number (a distribution concentrated at
    zero), where a zero-width axis would be singular."""
    if np.isfinite(top) and top > 0.0:
        ax.set_xlim(0.0, top)
