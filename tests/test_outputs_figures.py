"""Plot functions draw what they claim: checked through the artists' data.

Each figure is found by the ``gid`` its function documents; the plotted
numbers are compared with outside references (closed forms derived here,
scipy.stats densities, the multi-category formula) and with the core
objects they come from.
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt
import numpy as np
import pytest
from matplotlib.axes import Axes
from scipy import integrate, stats
from test_outputs_cases import DOSE, RR, UNIT, make_exposure, make_results

from doseattr.outputs import figures
from doseattr.outputs.gallery import render_figures


@pytest.fixture(scope="module")
def results():
    return make_results()


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def by_gid(ax: Axes, gid: str):
    found = [a for a in ax.get_children() if a.get_gid() == gid]
    found += [a for a in ax.get_lines() if a.get_gid() == gid and a not in found]
    assert found, f"no artist with gid {gid!r}"
    return found[0]


def test_plot_curve_line_is_the_closed_form_curve(results):
    """Log-linear curve held flat beyond M: RR(x) = exp(b (min(x, M) - x_ref))
    (the model's definition); the plotted line must equal it at the plotted x."""
    curve = results.curve
    ax = figures.plot_curve(curve, results.band_table, unit=UNIT)
    assert isinstance(ax, Axes)
    line = by_gid(ax, "fitted-rr")
    x, y = line.get_xdata(), line.get_ydata()
    b, xref, top = float(curve.coef[0]), curve.model.reference_dose, curve.max_dose
    np.testing.assert_allclose(y, np.exp(b * (np.minimum(x, top) - xref)), rtol=1e-12, atol=0)
    np.testing.assert_allclose(y, curve.rr(x), rtol=1e-14, atol=0)
    assert x.max() > top  # the flat part is shown
    assert UNIT in ax.get_xlabel()


def test_plot_curve_band_is_the_wald_interval(results):
    r"""Pointwise band of a one-coefficient log-linear curve, derived:
    log RR(x) = b (x - x_ref) so se(log RR(x)) = |x - x_ref| se(b) below M
    (delta method, exact for a linear function); the band is
    exp(b (x - x_ref) -/+ z se) with z = scipy.stats.norm.ppf(0.975)."""
    curve = results.curve
    ax = figures.plot_curve(curve, results.band_table, unit=UNIT)
    x = by_gid(ax, "fitted-rr").get_xdata()
    poly = by_gid(ax, "rr-band").get_paths()[0].vertices
    b, xref, top = float(curve.coef[0]), curve.model.reference_dose, curve.max_dose
    se_b = float(np.sqrt(curve.cov[0, 0]))
    z = stats.norm.ppf(0.975)
    xc = np.minimum(x, top)
    lo = np.exp(b * (xc - xref) - z * np.abs(xc - xref) * se_b)
    hi = np.exp(b * (xc - xref) + z * np.abs(xc - xref) * se_b)
    # fill_between's polygon runs along one edge and back along the other
    np.testing.assert_allclose(np.interp(x, *_edge(poly, max)), hi, rtol=1e-6, atol=0)
    np.testing.assert_allclose(np.interp(x, *_edge(poly, min)), lo, rtol=1e-6, atol=0)


def _edge(poly: np.ndarray, pick) -> tuple[np.ndarray, np.ndarray]:
    xs = np.unique(poly[:, 0])
    return xs, np.array([pick(poly[poly[:, 0] == v, 1]) for v in xs])


def test_plot_curve_shows_study_bands_at_assigned_doses(results):
    ax = figures.plot_curve(results.curve, results.band_table, unit=UNIT)
    container = [c for c in ax.containers if c.get_label().startswith("study")]
    assert len(container) == 1
    data_line = container[0].lines[0]
    np.testing.assert_array_equal(data_line.get_xdata(), DOSE[1:])
    np.testing.assert_array_equal(data_line.get_ydata(), RR[1:])
    ref = by_gid(ax, "reference-band")
    assert list(ref.get_xdata()) == [DOSE[0]] and list(ref.get_ydata()) == [1.0]
    vline = by_gid(ax, "max-dose")
    assert vline.get_xdata()[0] == results.curve.max_dose
    assert vline.get_linestyle() == ":"


def test_plot_curve_uses_given_axes(results):
    _fig, ax = plt.subplots()
    assert figures.plot_curve(results.curve, ax=ax) is ax
    assert by_gid(ax, "fitted-rr") is not None
    assert not list(ax.containers)  # no band table, no error bars


def test_plot_exposure_density_matches_scipy(results):
    """Fitted density against scipy.stats.lognorm(s=ln GSD, scale=GM).pdf
    (reference library)."""
    ex = results.exposure
    ax = figures.plot_exposure(ex, unit=UNIT)
    line = by_gid(ax, "fitted-density")
    x, y = line.get_xdata(), line.get_ydata()
    ref = stats.lognorm(s=np.log(ex.parameters["gsd"]), scale=ex.parameters["gm"]).pdf(x)
    np.testing.assert_allclose(y, ref, rtol=1e-10, atol=1e-300)


def test_plot_exposure_histogram_areas_and_censored_marks(results):
    r"""Bar areas are weighted shares: sum_j h_j w_j = sum_{detected} w_i / W
    (derivation: h_j = (sum of weights in bin j) / (W width_j)). Non-detects
    are drawn one marker each at their detection limit."""
    ex = results.exposure
    fit = ex.fit
    ax = figures.plot_exposure(ex, unit=UNIT)
    bars = [p for p in ax.patches if p.get_gid() == "data-hist"]
    assert bars
    area = sum(p.get_height() * p.get_width() for p in bars)
    w, det = np.asarray(fit.weights), np.asarray(fit.detected_mask)
    assert area == pytest.approx(w[det].sum() / w.sum(), rel=1e-12)
    marks = by_gid(ax, "censored-marks")
    np.testing.assert_array_equal(np.sort(marks.get_xdata()), np.sort(fit.values[~det]))
    assert len(marks.get_xdata()) == fit.censored


def test_plot_qq_without_censoring_uses_rank_positions():
    """Without non-detects the plotting positions are r/(n+1) (Weibull
    positions, common practice; Helsel 2012), so the x of the i-th smallest
    value is scipy.stats.lognorm(s=ln GSD, scale=GM).ppf(i/(n+1))."""
    ex = make_exposure(censored=False)
    ax = figures.plot_qq(ex, unit=UNIT)
    pts = by_gid(ax, "qq-detected")
    order = np.argsort(pts.get_ydata())
    y = np.asarray(pts.get_ydata())[order]
    x = np.asarray(pts.get_xdata())[order]
    n = ex.fit.n
    f = stats.lognorm(s=np.log(ex.parameters["gsd"]), scale=ex.parameters["gm"])
    np.testing.assert_array_equal(y, np.sort(ex.fit.values))
    np.testing.assert_allclose(x, f.ppf(np.arange(1, n + 1) / (n + 1)), rtol=1e-10)
    assert ax.get_xscale() == "log" and not [a for a in ax.get_lines()
                                              if a.get_gid() == "qq-censored"]


def test_plot_qq_marks_nondetects_at_their_limit(results):
    ex = results.exposure
    ax = figures.plot_qq(ex)
    cen = by_gid(ax, "qq-censored")
    det = np.asarray(ex.fit.detected_mask)
    assert len(cen.get_ydata()) == ex.fit.censored
    np.testing.assert_array_equal(np.sort(cen.get_ydata()), np.sort(ex.fit.values[~det]))
    # a non-detect's position lies below every detect's (single limit under all detects)
    assert max(cen.get_xdata()) < min(by_gid(ax, "qq-detected").get_xdata())


def test_plot_contribution_is_the_burden_density_with_area_paf(results):
    r"""The plotted line is contribution.density; its area is the PAF
    (PAF = \int f(x)(RR_m(x) - 1)/E[RR_m] dx), checked by the trapezoid rule
    on the plotted grid against the PAF itself (the grid stops at the
    99.9th percentile and is coarse, hence rel=2e-2)."""
    con = results.contribution
    ax = figures.plot_contribution(con, unit=UNIT, minimum_risk=results.minimum_risk)
    line = by_gid(ax, "burden-density")
    np.testing.assert_array_equal(line.get_ydata(), con.density)
    area = integrate.trapezoid(line.get_ydata(), line.get_xdata())
    assert area == pytest.approx(results.paf.estimate, rel=2e-2)
    assert by_gid(ax, "burden-median").get_xdata()[0] == con.median


def test_plot_categorical_bars_are_multi_category_pafs(results):
    r"""Bar heights (percent) equal the multi-category formula
    sum p_i(RR_i - 1) / (1 + sum p_i(RR_i - 1)) (Rockhill, Newman & Weinberg
    1998, Am J Public Health 88:15) recomputed here from the shares and RRs;
    the dashed line is the continuous PAF."""
    cat = results.categorical
    ax = figures.plot_categorical(cat)
    bars = [p for p in ax.patches if p.get_gid() == "method-bars"]
    assert len(bars) == len(cat.methods) == 3  # reported, midpoint, band-mean
    for bar, m in zip(bars, cat.methods):
        excess = float(np.sum(cat.shares * (np.asarray(m.rr) - 1)))
        assert bar.get_height() == pytest.approx(100 * excess / (1 + excess), rel=1e-12)
    assert by_gid(ax, "continuous-paf").get_ydata()[0] == pytest.approx(
        100 * results.paf.estimate, rel=1e-12)


def test_plot_convergence_draws_every_band_count(results):
    cat = results.categorical
    ax = figures.plot_convergence(cat)
    line = by_gid(ax, "convergence")
    np.testing.assert_array_equal(line.get_xdata(), np.arange(2, 21))
    np.testing.assert_allclose(line.get_ydata(), [100 * p for _, p in cat.convergence],
                               rtol=1e-14)


def test_plot_draws_and_strata():
    rng = np.random.default_rng(5)
    draws = rng.beta(20, 80, 500)
    lo, hi = np.percentile(draws, [2.5, 97.5])
    ax = figures.plot_draws(draws, estimate=0.2, lower=lo, upper=hi)
    counts = [p.get_height() for p in ax.patches]
    assert sum(counts) == 500
    assert sum(p.get_height() for p in ax.patches if p.get_gid() == "draws-hist") == 500


def test_plot_strata_whiskers():
    """Bars as long as the estimates, whiskers from lower to upper, first
    name at the top; a stratum without limits gets no whisker."""
    from doseattr.outputs.burden_figures import plot_strata

    ax = plot_strata(["north", "south", "east"], [10.0, 4.0, 7.5],
                     lower=[8.0, None, 6.0], upper=[12.0, None, 9.0])
    bars = sorted((p for p in ax.patches if p.get_gid() == "strata-bars"),
                  key=lambda p: -p.get_y())
    assert [p.get_width() for p in bars] == [10.0, 4.0, 7.5]
    seg = next(c for c in ax.collections if c.get_gid() == "strata-whiskers").get_segments()
    assert sorted((s[0][0], s[1][0]) for s in seg) == [(6.0, 9.0), (8.0, 12.0)]
    assert [t.get_text() for t in ax.get_yticklabels()] == ["north", "south", "east"]


def test_render_figures_gives_pngs(results):
    pngs = render_figures(results)
    assert set(pngs) == {"curve", "exposure", "qq", "contribution", "categorical"}
    for data in pngs.values():
        assert data[:8] == b"\x89PNG\r\n\x1a\n"


def test_plot_curve_power_without_offset_leaves_zero_out():
    r"""Power curve RR = (x / x_ref)^b (offset 0) has no finite RR at x = 0
    (the model refuses it); the plot starts just above zero and equals the
    closed form (min(x, M) / x_ref)^b, with no numpy warning."""
    from doseattr.core.curves.published import published_curve

    curve = published_curve("power", exponent=0.3, ci=(0.2, 0.4), reference_dose=2.0,
                            max_dose=50.0)
    ax = figures.plot_curve(curve, unit=UNIT, x_max=60.0)
    line = by_gid(ax, "fitted-rr")
    x, y = line.get_xdata(), line.get_ydata()
    assert 0.0 < x[0] < 0.1 and x[-1] == 60.0
    np.testing.assert_allclose(y, (np.minimum(x, 50.0) / 2.0) ** 0.3, rtol=1e-12)


def test_plot_curve_names_a_fitted_curve_from_its_fit_record(results):
    """The legend says "fitted curve" for a curve carrying the diagnostics
    of its fit to the study's bands (``Curve.fit``), "curve" for one
    entered from a publication (no fit)."""
    from doseattr.core.curves.published import published_curve

    assert results.curve.fit is not None
    ax = figures.plot_curve(results.curve, results.band_table, unit=UNIT)
    assert by_gid(ax, "fitted-rr").get_label() == "fitted curve"
    entered = published_curve("log-linear", rr=1.2, per=10.0, ci=(1.1, 1.3))
    assert entered.fit is None
    assert by_gid(figures.plot_curve(entered, unit=UNIT), "fitted-rr").get_label() == "curve"
