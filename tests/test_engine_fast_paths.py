"""The engine's fast paths: direct excess forms, node-pair doses, densities
in the standardised variables, block and chunk sizes.

References are outside the engine: scipy.integrate.quad (via
reference_integrals), scipy.stats densities and quantiles.
"""

from __future__ import annotations

import numpy as np
import pytest
from reference_integrals import expect_over, weibull_w_of_score
from scipy import stats

from doseattr.core.attribution import engine
from doseattr.core.attribution.fractions import excess_draws
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale
from doseattr.core.attribution.standard import (
    GammaStandard,
    LogNormalStandard,
    WeibullStandard,
)
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.registry import FAMILIES


def _quad_excess(curve, family, params, m, scenario):
    """E[RR_m(g(X))] - 1 by scipy.integrate.quad, split at every kink."""
    dist = family.scipy(params)
    top = np.inf if curve.max_dose is None else curve.max_dose

    def excess(x):
        y = x if scenario is None else float(scenario.apply(np.array([x]), m)[0])
        y = min(max(y, m), top)
        lr = curve.model.log_rr(np.array([y, m]), curve.coef)
        return float(np.expm1(lr[0] - lr[1]))

    pts = [m] + ([] if curve.max_dose is None else [curve.max_dose])
    if scenario is not None:
        pts = [*scenario.preimage(np.array(pts)), *scenario.own_kinks()]
    return expect_over(excess, dist, pts, epsrel=1e-12, limit=500)


CASES = [
    # linear, reference dose away from 0, cap below the minimum-risk level
    (Curve(LinearExcess(reference_dose=1.0), np.array([0.08]), np.eye(1), max_dose=40.0),
     Cap(3.0), 5.0),
    # decreasing linear curve held flat (RR stays above the floor)
    (Curve(LinearExcess(), np.array([-0.01]), np.eye(1), max_dose=50.0), Scale(0.5), 2.0),
    (Curve(LinearExcess(), np.array([0.05]), np.eye(1)), ReduceBy(2.0), 1.0),
    (Curve(LogLinear(reference_dose=2.0), np.array([0.07]), np.eye(1), max_dose=30.0),
     ReduceBy(4.0), 3.0),
    (Curve(LogLinear(), np.array([-0.05]), np.eye(1)), Cap(10.0), 0.5),
]


@pytest.mark.parametrize("case", range(len(CASES)))
@pytest.mark.parametrize("fam,p", [("lognormal", [6.0, 2.5]), ("gamma", [1.5, 4.0]),
                                   ("weibull", [1.3, 8.0])])
def test_direct_excess_matches_quad(case, fam, p):
    curve, scenario, m = CASES[case]
    family = FAMILIES[fam]
    got = excess_draws(curve, curve.coef, family, np.array(p), 0.0, m, scenario)[0]
    ref = _quad_excess(curve, family, np.array(p), m, scenario)  # scipy.integrate.quad
    assert got == pytest.approx(ref, rel=1e-8, abs=1e-15)


def test_block_and_chunk_sizes_do_not_change_draws(monkeypatch):
    """Contract: each draw's result depends on that draw alone, so blocks of
    7 draws and chunks of 40 values give the defaults' results."""
    rng = np.random.default_rng(3)
    curve = Curve(LogLinear(), np.array([0.3]), np.eye(1), max_dose=25.0)
    coef = rng.normal(0.3, 0.03, size=(50, 1))
    params = np.column_stack([np.exp(rng.normal(1.5, 0.2, 50)), rng.uniform(1.5, 3.0, 50)])
    family = FAMILIES["lognormal"]
    base = excess_draws(curve, coef, family, params, 0.0, 1.0, Scale(0.8))
    monkeypatch.setattr(engine, "BLOCK_DRAWS", 7)
    monkeypatch.setattr(engine, "CHUNK_VALUES", 40)
    small = excess_draws(curve, coef, family, params, 0.0, 1.0, Scale(0.8))
    np.testing.assert_allclose(small, base, rtol=1e-13)


def test_log_densities_in_standard_variables():
    """Log densities of W: lognormal z ~ N(0, 1) (scipy.stats.norm); Weibull
    u = ln E, E ~ Exp(1), the minimum Gumbel (scipy.stats.gumbel_l); gamma
    w = ln Y, Y ~ Gamma(k, 1) (scipy.stats.loggamma), for shapes on both
    sides of DOSE_SHAPE, where the density is formed from the doses."""
    w = np.linspace(-6.0, 3.0, 41)[None, :]
    ln = LogNormalStandard(FAMILIES["lognormal"])
    np.testing.assert_allclose(ln.log_density(w.copy(), np.array([[3.0, 2.0]])),
                               stats.norm.logpdf(w), rtol=1e-13)
    wb = WeibullStandard(FAMILIES["weibull"])
    np.testing.assert_allclose(wb.log_density(w.copy(), np.array([[1.7, 5.0]])),
                               stats.gumbel_l.logpdf(w), rtol=1e-12, atol=1e-13)
    gm = GammaStandard(FAMILIES["gamma"])
    for k, theta in ((0.4, 3.0), (7.0, 0.2), (300.0, 1e-3), (5000.0, 2.0)):
        wk = np.log(k) + w / np.sqrt(k)
        got = gm.log_density(wk.copy(), np.array([[k, theta]]))
        np.testing.assert_allclose(got, stats.loggamma.logpdf(wk, k), rtol=1e-9, atol=1e-9)


def test_weibull_normal_scores():
    """zeta(u) = Phi^{-1}(1 - exp(-e^u)) (scipy.stats.norm.ppf/isf of the
    closed-form CDF) and from_zeta its inverse, on both sides of the median."""
    wb = WeibullStandard(FAMILIES["weibull"])
    u = np.linspace(-20.0, 4.0, 61)[None, :]
    e = np.exp(u)
    ref = np.where(e < np.log(2.0), stats.norm.ppf(-np.expm1(-e)), stats.norm.isf(np.exp(-e)))
    np.testing.assert_allclose(wb.zeta(u.copy(), None), ref, rtol=1e-10, atol=1e-12)
    z = np.linspace(-7.5, 30.0, 76)[None, :]
    back = wb.from_zeta(z.copy(), None)
    np.testing.assert_allclose(back, weibull_w_of_score(z), rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("n", [8, 16, 32])
def test_legendre_rule_is_exact_to_degree_2n_minus_1(n):
    """The engine's Gauss-Legendre rule: integral of x^k over [-1, 1] is
    2/(k+1) for even k, 0 for odd (closed form) for every k < 2n, and the
    rule agrees with scipy.special.roots_legendre (reference library)."""
    import numpy as np
    from scipy.special import roots_legendre

    from doseattr.core.attribution.engine import _legendre

    x, w = _legendre(n)
    for k in range(2 * n):
        exact = 2.0 / (k + 1) if k % 2 == 0 else 0.0
        assert abs(float(w @ x**k) - exact) < 4e-16 * (1 + exact)
    xs, ws = roots_legendre(n)
    np.testing.assert_allclose(x, xs, rtol=0, atol=1e-15)
    np.testing.assert_allclose(w, ws, rtol=2e-12)  # scipy float64 weights: ~1e-13 off


def test_draws_with_different_panel_counts_match_each_draw_alone(monkeypatch):
    """Contract: where the draws of a block need different numbers of panels
    (a panel per row then, no padding), each draw's result is the one it
    gets alone (one draw: one panel layout), and matches quad."""
    rng = np.random.default_rng(11)
    curve = Curve(LogLinear(), np.array([0.4]), np.eye(1), max_dose=30.0)
    coef = rng.normal(0.4, 0.1, size=(30, 1))
    # gamma shapes 1.6 to 55 and scales 1.2 to 6: means either side of the
    # flat point, one to several body panels, graded panels for some draws
    params = np.column_stack([np.exp(rng.uniform(0.5, 4.0, 30)), rng.uniform(1.2, 6.0, 30)])
    family = FAMILIES["gamma"]
    layouts = []
    groups = engine._groups

    def spy(*args):
        out = groups(*args)
        layouts.append([g.draw is not None for g in out])
        return out

    monkeypatch.setattr(engine, "_groups", spy)
    together = excess_draws(curve, coef, family, params, 0.0, 2.0, ReduceBy(3.0))
    assert any(any(kinds) for kinds in layouts)  # the per-row layout was used
    alone = np.array([excess_draws(curve, coef[i:i + 1], family, params[i], 0.0, 2.0,
                                   ReduceBy(3.0))[0] for i in range(30)])
    np.testing.assert_allclose(together, alone, rtol=1e-13)
    for i in range(0, 30, 6):
        c = Curve(LogLinear(), coef[i], np.eye(1), max_dose=30.0)
        ref = _quad_excess(c, family, params[i], 2.0, ReduceBy(3.0))  # scipy.integrate.quad
        assert together[i] == pytest.approx(ref, rel=1e-8)
