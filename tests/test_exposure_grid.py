"""Gridded exposure reduced to per-zone log-binned sums
(doseattr.core.exposure.grid) and the shared exposure-model error.

References: the exact per-cell computation (an EmpiricalExposure with one
point per cell, through the same fractions), weighted averages written out
with numpy, closed forms derived in each docstring, and the error bound
derived in the module docstring of doseattr.core.exposure.grid (Taylor's
theorem with the Lagrange remainder).
"""

from __future__ import annotations

import functools
import math
import operator
import pickle

import numpy as np
import pytest

from doseattr.core.attribution import fractions
from doseattr.core.attribution.fractions import empirical_excess_draws, paf, pif
from doseattr.core.attribution.impact import impact_fraction
from doseattr.core.attribution.scenarios import Cap, Scale
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.curves.power import Power
from doseattr.core.curves.spline import RestrictedCubicSpline
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.core.exposure.grid import (
    LOG_STEP,
    N_BINS,
    BlockSums,
    bin_lower,
    combine,
    dense_bytes,
    reduce_block,
)
from doseattr.core.uncertainty.propagate import Stratum, propagate
from doseattr.core.uncertainty.sampling import exposure_draws, fixed_exposure
from doseattr.errors import ModelError

ZONES = 5
GM = np.array([2.0, 5.0, 10.0, 20.0, 40.0])
GSD = 2.2


def curve(model, coef, max_dose=None):
    coef = np.atleast_1d(np.asarray(coef, dtype=float))
    return Curve(model, coef, np.eye(coef.size) * 1e-6, max_dose=max_dose)


@pytest.fixture(scope="module")
def cells():
    """1e5 lognormal cells in 5 zones (GM 2..40, GSD 2.2), lognormal populations."""
    rng = np.random.default_rng(20261202)
    n = 100_000
    zone = rng.integers(0, ZONES, n)
    conc = GM[zone] * np.exp(math.log(GSD) * rng.standard_normal(n))
    pop = rng.lognormal(3.0, 1.0, n)
    return conc, pop, zone


@pytest.fixture(scope="module")
def summary(cells):
    conc, pop, zone = cells
    return reduce_block(conc, pop, zone, ZONES).summary()


def exact(conc, pop):
    """Every cell its own point (the computation the reduction replaces)."""
    return EmpiricalExposure(conc, pop / pop.sum(), census=True)


def rel(a, b):
    return abs(a - b) / abs(b)


CURVES = {
    "linear": curve(LinearExcess(), 0.01),
    "log-linear": curve(LogLinear(), 0.008),
    "power": curve(Power(offset=1.0), 0.25),
    "spline": curve(RestrictedCubicSpline(knots=[5.0, 20.0, 60.0]), [0.012, -0.004]),
}


@pytest.mark.parametrize("name", list(CURVES))
def test_reduced_equals_per_cell_at_point_estimates(cells, summary, name):
    """Source: exact per-cell computation (one EmpiricalExposure point per
    cell, fractions.paf and impact.impact_fraction). Asked: 1e-6 relative
    (the module bound gives about 2e-6 x^2|h''|/h; these curves have
    x^2|h''|/h below about 1 over these cells); the PAF of linear ERR is
    linear in x and so exact up to rounding (1e-12)."""
    crv = CURVES[name]
    conc, pop, zone = cells
    tol_paf = 1e-12 if name == "linear" else 1e-6
    for z in range(ZONES):
        sel = zone == z
        ref, red = exact(conc[sel], pop[sel]), summary.zone_exposure(z)
        assert rel(paf(crv, red, minimum_risk=0.0), paf(crv, ref, minimum_risk=0.0)) < tol_paf
        assert rel(impact_fraction(crv, red, minimum_risk=0.0),
                   impact_fraction(crv, ref, minimum_risk=0.0)) < 1e-6
    pooled, ref = summary.population_exposure(), exact(conc, pop)
    assert rel(paf(crv, pooled, minimum_risk=0.0), paf(crv, ref, minimum_risk=0.0)) < tol_paf
    assert rel(impact_fraction(crv, pooled, minimum_risk=0.0),
               impact_fraction(crv, ref, minimum_risk=0.0)) < 1e-6


@pytest.mark.parametrize("name", list(CURVES))
def test_reduced_with_kinks(cells, summary, name):
    """Source: exact per-cell computation, with a minimum-risk level (8)
    and max_dose (60) inside the exposure range, and PIFs of a scale (0.8,
    which moves the kinks to 10 and 75) and a cap (15, a kink of its own).
    A kink inside a bin gives a first-order error bounded by half the slope
    jump x xbar (e^delta - 1) x that bin's weight (module docstring), not
    the 1e-6 of smooth curves. Measured maxima over the 5 zones and the
    pooled population (1e5 cells): PAF and impact fraction 5.5e-7, PIF of
    the scale 1.2e-6, PIF of the cap 8.9e-6 (a small PIF, 2.5e-4 in zone 0,
    from the few people above the cap); asked: 1e-6, 2e-6 and 2e-5."""
    base = CURVES[name]
    crv = Curve(base.model, base.coef, base.cov, max_dose=60.0)
    conc, pop, zone = cells
    pairs = [(exact(conc[zone == z], pop[zone == z]), summary.zone_exposure(z))
             for z in range(ZONES)] + [(exact(conc, pop), summary.population_exposure())]
    for ref, red in pairs:
        assert rel(paf(crv, red, minimum_risk=8.0), paf(crv, ref, minimum_risk=8.0)) < 1e-6
        assert rel(impact_fraction(crv, red, minimum_risk=8.0),
                   impact_fraction(crv, ref, minimum_risk=8.0)) < 1e-6
        assert rel(pif(crv, red, Scale(0.8), minimum_risk=8.0),
                   pif(crv, ref, Scale(0.8), minimum_risk=8.0)) < 2e-6
        assert rel(pif(crv, red, Cap(15.0), minimum_risk=8.0),
                   pif(crv, ref, Cap(15.0), minimum_risk=8.0)) < 2e-5


@pytest.mark.parametrize("name", list(CURVES))
def test_cuts_at_the_kinks_restore_the_second_order_bound(cells, name):
    """Source: exact per-cell computation. The same kinks as above, given to
    the reducer as cuts (8, 60, where Scale(0.8) moves them: 10 and 75, and
    the cap 15): every piece of a bin is smooth again, so PAF, impact
    fraction and both PIFs are within 1e-6 of the exact values, where the
    cap's PIF without cuts was 8.9e-6 away (test above); the pieces keep the
    population and the first moment exactly (sums)."""
    base = CURVES[name]
    crv = Curve(base.model, base.coef, base.cov, max_dose=60.0)
    conc, pop, zone = cells
    cuts = (8.0, 10.0, 15.0, 60.0, 75.0)
    parts = [reduce_block(c, p, zz, ZONES, cuts=cuts) for c, p, zz in
             zip(np.array_split(conc, 3), np.array_split(pop, 3), np.array_split(zone, 3),
                 strict=True)]
    summary = (parts[0] + parts[1] + parts[2]).summary()
    pairs = [(exact(conc[zone == z], pop[zone == z]), summary.zone_exposure(z))
             for z in range(ZONES)] + [(exact(conc, pop), summary.population_exposure())]
    for (ref, red), z in zip(pairs, [*range(ZONES), None], strict=True):
        sel = zone == z if z is not None else np.ones(conc.size, bool)
        assert np.average(red.values, weights=red.weights) == pytest.approx(
            np.average(conc[sel], weights=pop[sel]), rel=1e-12)
        for scenario, limit in ((None, 1e-6), (Scale(0.8), 1e-6), (Cap(15.0), 1e-6)):
            if scenario is None:
                assert rel(paf(crv, red, minimum_risk=8.0),
                           paf(crv, ref, minimum_risk=8.0)) < limit
                assert rel(impact_fraction(crv, red, minimum_risk=8.0),
                           impact_fraction(crv, ref, minimum_risk=8.0)) < limit
            else:
                assert rel(pif(crv, red, scenario, minimum_risk=8.0),
                           pif(crv, ref, scenario, minimum_risk=8.0)) < limit


def test_cuts_must_be_positive_and_finite():
    """Source: contract."""
    with pytest.raises(ModelError, match="cuts"):
        reduce_block(np.ones(3), np.ones(3), np.zeros(3, np.int64), 1, cuts=(0.0, 2.0))


def test_error_within_the_stated_bounds(cells, summary):
    """Source: the bounds derived in the grid module docstring, evaluated
    on the summary's bins, against the exact per-cell expectation (numpy).

    Smooth: h = e^(bx) - 1, h'' = b^2 e^(bx) increasing, so its sup over bin
    [a, a e^d) is b^2 e^(b a e^d); bound 1/2 sum_b w_b sup|h''| (xbar_b (e^d - 1))^2.
    Kink: linear ERR against m, RR_m = (1 + b max(x, m))/(1 + b m), linear
    except a slope jump b/(1 + b m) at m; bound 1/2 (b/(1+bm)) xbar_b (e^d - 1) w_b
    for the bin holding m. A rounding allowance of 1e-14 E[h] is added."""
    conc, pop, zone = cells
    b, m, step = 0.008, 8.0, math.expm1(LOG_STEP)
    for z in range(ZONES):
        sel = zone == z
        w_cells = pop[sel] / pop[sel].sum()
        total = summary.zone_population(z)
        keep = summary.weight[z] > 0
        w = summary.weight[z][keep] / total
        xbar = summary.moment[z][keep] / summary.weight[z][keep]
        top = bin_lower(np.flatnonzero(keep)) * math.exp(LOG_STEP)
        e_exact = np.dot(w_cells, np.expm1(b * conc[sel]))
        e_reduced = np.dot(w, np.expm1(b * xbar))
        bound = 0.5 * np.sum(w * b * b * np.exp(b * top) * (xbar * step) ** 2)
        assert 0 < abs(e_exact - e_reduced) <= bound + 1e-14 * e_exact

        rr_m = lambda x: (1 + b * np.maximum(x, m)) / (1 + b * m)  # noqa: E731
        k_exact = np.dot(w_cells, rr_m(conc[sel]) - 1)
        k_reduced = np.dot(w, rr_m(xbar) - 1)
        lower = bin_lower(np.flatnonzero(keep))
        holds = (lower <= m) & (m < top)
        kink_bound = 0.5 * b / (1 + b * m) * np.sum(xbar[holds] * step * w[holds])
        assert abs(k_exact - k_reduced) <= kink_bound + 1e-14 * k_exact


def test_lognormal_sample_against_closed_form(summary, cells):
    """Source: closed form derived here. For linear ERR with m = 0,
    RR = 1 + bX, so E_w[RR] = 1 + b xbar_w with xbar_w the population-
    weighted mean of the exact cell values, and PAF = b xbar_w / (1 + b xbar_w)
    (numpy.average for xbar_w), compared with the exact sample, not the
    lognormal population. The same xbar_w is zone_mean."""
    conc, pop, zone = cells
    b = 0.01
    for z in range(ZONES):
        sel = zone == z
        xbar = np.average(conc[sel], weights=pop[sel])
        assert rel(summary.zone_mean(z), xbar) < 1e-12
        np.testing.assert_allclose(summary.zone_population(z), pop[sel].sum(), rtol=1e-12)
        expected = b * xbar / (1 + b * xbar)
        got = paf(CURVES["linear"], summary.zone_exposure(z), minimum_risk=0.0)
        assert rel(got, expected) < 1e-12


def test_equal_population_sample_mean_near_lognormal_mean():
    """Source: lognormal mean GM exp(ln^2 GSD / 2) (closed form); with equal
    populations the zone mean is the sample mean, within 5 standard errors
    sd/sqrt(n), sd = mean sqrt(e^(ln^2 GSD) - 1)."""
    rng = np.random.default_rng(5)
    n, gm, s = 200_000, 7.0, math.log(2.0)
    conc = gm * np.exp(s * rng.standard_normal(n))
    out = reduce_block(conc, np.ones(n), np.zeros(n, np.int64), 1).summary()
    mean = gm * math.exp(s * s / 2)
    se = mean * math.sqrt(math.expm1(s * s)) / math.sqrt(n)
    assert abs(out.zone_mean(0) - mean) < 5 * se
    assert rel(out.zone_mean(0), conc.mean()) < 1e-12


def test_blocks_add_up(cells):
    """Source: additivity of sums (contract of a tree reduction): 7 uneven
    chunks (one empty, 2-D shapes) added in two orders equal one pass to
    1e-12 relative; cell counts exactly; pickling through as_tuple."""
    conc, pop, zone = cells
    cuts = [0, 13, 13, 20_000, 20_777, 61_000, 99_999, conc.size]
    parts = []
    for lo, hi in zip(cuts[:-1], cuts[1:], strict=True):
        c, p, zz = conc[lo:hi], pop[lo:hi], zone[lo:hi]
        if (hi - lo) % 2 == 0 and hi > lo:
            c, p, zz = c.reshape(2, -1), p.reshape(2, -1), zz.reshape(2, -1)
        parts.append(reduce_block(c, p, zz, ZONES))
    whole = reduce_block(conc, pop, zone, ZONES)
    left = functools.reduce(operator.add, parts, BlockSums.empty(ZONES))
    tree = combine(combine(parts[0] + parts[1], parts[2] + parts[3]),
                   combine(parts[4], parts[5] + parts[6]))
    for got in (left, tree):
        np.testing.assert_allclose(got.weight, whole.weight, rtol=1e-12, atol=0)
        np.testing.assert_allclose(got.moment, whole.moment, rtol=1e-12, atol=0)
        np.testing.assert_allclose(got.zero, whole.zero, rtol=1e-12, atol=0)
        np.testing.assert_array_equal(got.cells, whole.cells)
    back = BlockSums.from_tuple(pickle.loads(pickle.dumps(tree.as_tuple())))
    np.testing.assert_array_equal(back.weight, tree.weight)
    assert back.n_zones == ZONES and back.weight.shape == (ZONES, N_BINS)
    assert dense_bytes(100) == 2 * 8 * 100 * N_BINS


def test_skipped_cells_are_counted_and_excluded():
    """Source: contract (counting by hand): NaN or infinite concentration,
    NaN population, negative concentration or population, and zone -1 are
    skipped; skipped_population sums their finite non-negative populations;
    the rest reduces exactly as the valid cells alone."""
    rng = np.random.default_rng(3)
    conc = rng.lognormal(1.0, 0.5, 1000)
    pop = rng.uniform(1, 10, 1000)
    zone = rng.integers(0, 3, 1000)
    bad_c = np.array([np.nan, np.inf, -1.0, 2.0, 2.0, 3.0, 4.0])
    bad_p = np.array([5.0, 6.0, 7.0, np.nan, -2.0, 8.0, np.inf])
    bad_z = np.array([0, 1, 2, 0, 1, -1, 2])
    c, p, zz = np.r_[conc, bad_c], np.r_[pop, bad_p], np.r_[zone, bad_z]
    order = rng.permutation(c.size)
    got = reduce_block(c[order], p[order], zz[order], 3)
    assert got.skipped == 7
    assert got.skipped_population == pytest.approx(5 + 6 + 7 + 8, rel=1e-15)
    ref = reduce_block(conc, pop, zone, 3)
    np.testing.assert_allclose(got.weight, ref.weight, rtol=1e-13, atol=0)
    np.testing.assert_allclose(got.moment, ref.moment, rtol=1e-13, atol=0)
    np.testing.assert_array_equal(got.cells, ref.cells)
    with pytest.raises(ModelError, match=r"outside 0\.\.2"):
        reduce_block([1.0], [1.0], [3], 3)
    with pytest.raises(ModelError, match="integers"):
        reduce_block([1.0], [1.0], [0.0], 3)
    with pytest.raises(ModelError, match="as many"):
        reduce_block([1.0, 2.0], [1.0], [0], 3)


def test_zero_concentration_cells():
    """Source: exact per-cell computation; zero is its own exact point.
    A zone whose cells are all at 0 has RR_m(0) = 1 for any m >= 0, so its
    PAF and impact fraction are 0 and its mean 0 (closed form); the share at
    0 equals the population share of zero cells (numpy)."""
    rng = np.random.default_rng(11)
    n = 5000
    conc = rng.lognormal(2.0, 0.8, n)
    conc[rng.random(n) < 0.3] = 0.0
    pop = rng.uniform(0.5, 3.0, n)
    zone = np.zeros(n, np.int64)
    zone[:500] = 1
    conc[:500] = 0.0
    out = reduce_block(conc, pop, zone, 2).summary()
    crv = CURVES["log-linear"]
    sel = zone == 0
    red, ref = out.zone_exposure(0), exact(conc[sel], pop[sel])
    share = pop[sel][conc[sel] == 0].sum() / pop[sel].sum()
    assert rel(red.zero_share, share) < 1e-12
    for m in (0.0, 4.0):
        assert rel(paf(crv, red, minimum_risk=m), paf(crv, ref, minimum_risk=m)) < 1e-6
    only_zero = out.zone_exposure(1)
    assert paf(crv, only_zero, minimum_risk=2.0) == 0.0
    assert impact_fraction(crv, only_zero, minimum_risk=0.0) == 0.0
    assert out.zone_mean(1) == 0.0 and out.cells[1] == 500


def test_zone_without_population_is_named():
    """Source: contract: a zone with no population (no cells, or only cells
    of population 0) has no exposure; the error names the zone."""
    out = reduce_block([1.0, 2.0, 3.0], [1.0, 2.0, 0.0], [0, 0, 2], 3).summary()
    for z in (1, 2):
        with pytest.raises(ModelError, match=f"zone index {z} has no population"):
            out.zone_exposure(z)
        with pytest.raises(ModelError, match="no population"):
            out.zone_mean(z)
    with pytest.raises(ModelError, match="no population in any zone"):
        reduce_block([1.0], [0.0], [0], 1).summary().population_exposure()


def test_values_outside_the_range_keep_their_mean():
    """Source: closed form: the bin mean is the population-weighted mean of
    the bin's values, so values below 1e-12 and above 1e12, clipped to the
    first and last bins, keep the zone mean exactly (numpy.average)."""
    conc = np.array([1e-15, 3e-13, 5e13, 2e14])
    pop = np.array([1.0, 2.0, 3.0, 4.0])
    out = reduce_block(conc, pop, np.zeros(4, np.int64), 1).summary()
    assert rel(out.zone_mean(0), np.average(conc, weights=pop)) < 1e-14
    assert out.weight[0, 0] == 3.0 and out.weight[0, -1] == 7.0


def error_setup(gsd=1.6, seed=7):
    rng = np.random.default_rng(21)
    n = 2000
    zone = rng.integers(0, 2, n)
    conc = rng.lognormal(np.log(10.0) + 0.5 * zone, 0.7)
    pop = rng.uniform(1, 20, n)
    out = reduce_block(conc, pop, zone, 2).summary()
    exps = [out.zone_exposure(z, error_gsd=gsd, error_seed=seed) for z in (0, 1)]
    return conc, pop, zone, exps + [out.population_exposure(error_gsd=gsd, error_seed=seed)]


def test_error_gsd_draws_equal_direct_scaled_cells():
    """Source: the definition f_d = exp(ln(GSD) Z_d), Z_d the standard
    normals of numpy.random.default_rng(seed), recomputed here; for each
    draw the PAF of a log-linear curve over every cell's concentration times
    f_d, written out in numpy: e_d = sum p (exp(b f_d x) - 1) / sum p,
    PAF_d = e_d / (1 + e_d); within the 1e-6 of the reduction."""
    gsd, seed, draws, b = 1.6, 7, 40, 0.02
    conc, pop, zone, exps = error_setup(gsd, seed)
    crv = curve(LogLinear(), b)
    strata = [Stratum(n, 100.0, e) for n, e in zip(("z0", "z1", "all"), exps, strict=True)]
    prop = propagate(crv, strata, [], draws=draws, rng=np.random.default_rng(0),
                     minimum_risk=(0.0, 0.0), sources=("exposure",))
    f = np.exp(np.log(gsd) * np.random.default_rng(seed).standard_normal(draws))
    for s, sel in enumerate((zone == 0, zone == 1, np.ones(zone.size, bool))):
        x, p = conc[sel], pop[sel]
        for d in range(draws):
            e = np.sum(p * np.expm1(b * f[d] * x)) / p.sum()
            assert rel(prop.paf[s, d], e / (1 + e)) < 1e-6


def test_error_gsd_factors_are_shared_and_have_the_lognormal_mean():
    """Source: lognormal mean exp(ln^2 GSD / 2) and variance
    (e^(s^2) - 1) e^(s^2) (closed form): the mean of 200,000 factors lies
    within 5 standard errors; every zone and the population get the same
    factors whatever generator the run passes; without error_gsd nothing
    changes (the fixed census points, no factors)."""
    gsd = 1.6
    _, _, _, exps = error_setup(gsd, 99)
    n = 200_000
    scales = [exposure_draws(e, n, np.random.default_rng(k)).scale for k, e in enumerate(exps)]
    assert all(s is not None for s in scales)
    np.testing.assert_array_equal(scales[0], scales[1])
    np.testing.assert_array_equal(scales[0], scales[2])
    s2 = math.log(gsd) ** 2
    mean = math.exp(s2 / 2)
    se = math.sqrt(math.expm1(s2) * math.exp(s2) / n)
    assert abs(scales[0].mean() - mean) < 5 * se
    draws = exposure_draws(exps[0], 10, np.random.default_rng(0))
    assert draws.varies and draws.values.shape == (1, exps[0].values.size)
    plain = EmpiricalExposure(exps[0].values, exps[0].weights, census=True)
    no_error = exposure_draws(plain, 10, np.random.default_rng(0))
    assert no_error.scale is None and not no_error.varies
    assert fixed_exposure(exps[0], 10).scale is None
    with pytest.raises(ModelError, match="seed"):
        reduce_block([1.0], [1.0], [0], 1).summary().zone_exposure(0, error_gsd=1.5)


def test_chunked_draws_equal_one_pass(monkeypatch):
    """Source: contract: chunking over draws leaves each draw's weighted sum
    unchanged (bootstrap values (D, n), shared values with factors)."""
    rng = np.random.default_rng(4)
    crv = curve(LogLinear(), 0.03)
    values, weights = rng.lognormal(1, 1, (30, 50)), rng.uniform(1, 2, (30, 50))
    weights /= weights.sum(axis=1, keepdims=True)
    scale = rng.lognormal(0, 0.3, 30)
    coef = np.full((30, 1), 0.03) + rng.normal(0, 0.001, (30, 1))
    ref = [empirical_excess_draws(crv, coef, values, weights, 0.1, 2.0),
           empirical_excess_draws(crv, coef, values[:1], weights[:1], 0.1, 2.0, scale=scale)]
    monkeypatch.setattr(fractions, "CHUNK_ELEMENTS", 120)
    got = [empirical_excess_draws(crv, coef, values, weights, 0.1, 2.0),
           empirical_excess_draws(crv, coef, values[:1], weights[:1], 0.1, 2.0, scale=scale)]
    for r, g in zip(ref, got, strict=True):
        np.testing.assert_array_equal(r, g)
    direct = 0.9 * np.sum(weights[:1] * np.expm1(
        np.maximum(coef * (np.maximum(values[:1] * scale[:, None], 2.0) - 2.0), 0.0)), axis=1)
    np.testing.assert_allclose(got[1], direct, rtol=1e-12)


# -- fewer points: a two-point Gauss rule per group of bins ---------------------
def _groups(x, w, width, cuts=()):
    """The groups gauss_groups forms, written out with a loop (for the
    checks below): a list of (values, weights) per group."""
    k = np.unique(np.asarray(cuts, dtype=float))
    key = [(math.floor((math.log(v) - math.log(1e-12)) / width), int(np.sum(k <= v)))
           for v in x]
    out = {}
    for v, p, g in zip(x, w, key, strict=True):
        out.setdefault(g, ([], []))
        out[g][0].append(v)
        out[g][1].append(p)
    return [(np.array(v), np.array(p)) for _, (v, p) in sorted(out.items())]


def test_gauss_groups_keep_four_moments_of_each_group():
    """Source: closed form (a two-point Gauss rule integrates 1, t, t^2, t^3
    exactly; its nodes lie inside the group): per group, population, mean,
    variance and third central moment equal those of the group's points
    (numpy sums), the nodes lie within the group's values, the weights are
    positive, and no group straddles a cut."""
    from doseattr.core.exposure.grid import gauss_groups

    rng = np.random.default_rng(31)
    x = np.exp(rng.normal(2.0, 0.6, 4000))
    w = rng.uniform(0.1, 2.0, 4000)
    cuts = (5.0, 9.3)
    v, p = gauss_groups(x, w, cuts, 0.05)
    assert np.all(p > 0) and np.all(np.diff(v) >= 0)
    assert p.sum() == pytest.approx(w.sum(), rel=1e-13)
    at = 0
    for gx, gw in _groups(x, w, 0.05, cuts):
        n = 1 if gx.size == 1 else 2
        nodes, masses = v[at:at + n], p[at:at + n]
        at += n
        assert gx.min() * (1 - 1e-12) <= nodes.min() and nodes.max() <= gx.max() * (1 + 1e-12)
        side = np.searchsorted(cuts, gx, side="right")
        assert np.all(side == side[0])  # the group lies between two cuts
        assert np.all(np.searchsorted(cuts, nodes, side="right") == side[0])
        mu = np.average(gx, weights=gw)
        assert masses.sum() == pytest.approx(gw.sum(), rel=1e-12)
        assert np.average(nodes, weights=masses) == pytest.approx(mu, rel=1e-13)
        for k in (2, 3):
            exact_k = np.average((gx - mu) ** k, weights=gw)
            assert np.average((nodes - mu) ** k, weights=masses) == pytest.approx(
                exact_k, rel=1e-8, abs=1e-12 * mu ** k)
    assert at == v.size


def test_gauss_groups_error_within_the_fourth_order_bound():
    """Source: the Gauss rule's error term (module docstring of
    doseattr.core.exposure.grid): for h = e^(bx) - 1, h'''' = b^4 e^(bx),
    whose sup over a group is at its largest value, |E_g[h] - Q_g[h]| <=
    W_g b^4 e^(b max_g) E_g[pi_2^2] / 24 with E_g[pi_2^2] = m4 - m3^2/m2
    - m2^2 from the group's points (numpy); summed over groups. Also
    bounded by the stated relative (e^0.05 - 1)^4 / 1536 x^4 h''''/h
    form, and a cubic is integrated exactly (rounding 1e-12)."""
    from doseattr.core.exposure.grid import gauss_groups

    rng = np.random.default_rng(32)
    x = np.exp(rng.normal(3.0, 0.8, 6000))
    w = rng.uniform(0.1, 2.0, 6000)
    for b in (0.008, 0.05):
        v, p = gauss_groups(x, w, (), 0.05)
        fine, merged = np.dot(w, np.expm1(b * x)), np.dot(p, np.expm1(b * v))
        bound = 0.0
        for gx, gw in _groups(x, w, 0.05):
            if gx.size < 2:
                continue
            mu = np.average(gx, weights=gw)
            m2, m3, m4 = (np.average((gx - mu) ** k, weights=gw) for k in (2, 3, 4))
            bound += gw.sum() * b ** 4 * math.exp(b * gx.max()) * (m4 - m3 ** 2 / m2
                                                                   - m2 ** 2) / 24
        assert 0 < abs(fine - merged) <= bound * (1 + 1e-6) + 1e-14 * fine
        stated = np.dot(w, math.expm1(0.05) ** 4 / 1536 * (x * math.exp(0.05)) ** 4
                        * b ** 4 * np.exp(b * x * math.exp(0.05)))
        assert bound <= stated
    cubic = lambda t: 2.0 - t + 0.3 * t ** 2 + 0.01 * t ** 3  # noqa: E731
    assert np.dot(p, cubic(v)) == pytest.approx(np.dot(w, cubic(x)), rel=1e-12)


@pytest.mark.parametrize("name", list(CURVES))
def test_quadrature_census_against_per_cell_and_every_bin(cells, summary, name):
    """Source: exact per-cell computation (as above) and the census of every
    bin. The zones as a Gauss rule per 0.05 of ln x (about a tenth of the
    points) keep the 1e-6 of the exact PAF and impact fraction (linear:
    1e-12) and differ from every bin's by the fourth-order term (the
    spline's knots are split at, as its kinks): measured at most 1.5e-8
    (these cells reach x = 870, where b x = 7 and x^4 h''''/h is about
    2400, a stated term of 1e-5 there); asked 1e-7."""
    from doseattr.core.exposure.grid import QUADRATURE_WIDTH

    crv = CURVES[name]
    conc, pop, zone = cells
    tol_paf = 1e-12 if name == "linear" else 1e-6
    for z in range(ZONES):
        sel = zone == z
        ref, fine = exact(conc[sel], pop[sel]), summary.zone_exposure(z)
        few = summary.zone_exposure(z, quadrature=QUADRATURE_WIDTH, splits=crv.kinks())
        assert few.values.size < fine.values.size / 5
        assert np.dot(few.weights, few.values) == pytest.approx(
            np.dot(fine.weights, fine.values), rel=1e-13)
        assert rel(paf(crv, few, minimum_risk=0.0), paf(crv, ref, minimum_risk=0.0)) < tol_paf
        assert rel(paf(crv, few, minimum_risk=0.0), paf(crv, fine, minimum_risk=0.0)) < 1e-7
        assert rel(impact_fraction(crv, few, minimum_risk=0.0),
                   impact_fraction(crv, ref, minimum_risk=0.0)) < 1e-6


@pytest.mark.parametrize("name", list(CURVES))
def test_quadrature_census_with_cuts_and_scenarios(cells, name):
    """Source: exact per-cell computation and the census of every bin, with
    the kinks of the cut test above (minimum risk 8, max_dose 60, Scale(0.8)
    moving them to 10 and 75, Cap(15)) given as cuts: the groups are split
    there too, so PAF and both PIFs stay within 1e-6 of the exact values and
    within 1e-7 of every bin's."""
    from doseattr.core.exposure.grid import QUADRATURE_WIDTH

    base = CURVES[name]
    crv = Curve(base.model, base.coef, base.cov, max_dose=60.0)
    conc, pop, zone = cells
    out = reduce_block(conc, pop, zone, ZONES, cuts=(8.0, 10.0, 15.0, 60.0, 75.0)).summary()
    for z in range(ZONES):
        sel = zone == z
        ref, fine = exact(conc[sel], pop[sel]), out.zone_exposure(z)
        few = out.zone_exposure(z, quadrature=QUADRATURE_WIDTH, splits=crv.kinks())
        assert rel(paf(crv, few, minimum_risk=8.0), paf(crv, ref, minimum_risk=8.0)) < 1e-6
        assert rel(paf(crv, few, minimum_risk=8.0), paf(crv, fine, minimum_risk=8.0)) < 1e-7
        for scenario in (Scale(0.8), Cap(15.0)):
            got = pif(crv, few, scenario, minimum_risk=8.0)
            assert rel(got, pif(crv, ref, scenario, minimum_risk=8.0)) < 1e-6
            assert rel(got, pif(crv, fine, scenario, minimum_risk=8.0)) < 1e-7


def test_quadrature_keeps_zero_and_refuses_bad_input():
    """Source: contract. Population at zero stays a point at 0; a width
    that is not positive and values that are not positive are refused."""
    from doseattr.core.exposure.grid import gauss_groups

    out = reduce_block([0.0, 0.0, 3.0, 3.1, 3.2], [1.0, 2.0, 1.0, 1.0, 1.0],
                       [0, 0, 0, 0, 0], 1).summary()
    few = out.zone_exposure(0, quadrature=0.05)
    assert few.weights[few.values == 0].sum() == pytest.approx(3.0 / 6.0)
    with pytest.raises(ModelError, match="width"):
        gauss_groups([1.0, 2.0], [1.0, 1.0], (), 0.0)
    with pytest.raises(ModelError, match="positive"):
        gauss_groups([0.0, 2.0], [1.0, 1.0])
