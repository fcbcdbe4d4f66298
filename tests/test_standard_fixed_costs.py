"""The per-draw work of the gamma and Weibull standardised variables that
the engine does outside its node loop: values kept for the last inputs,
one-sided fast paths, extra breaks for small shapes. References: scipy.stats
and scipy.special computed here, scipy.integrate.quad (reference_integrals).
"""

from __future__ import annotations

import numpy as np
import pytest
from reference_integrals import expect_over, weibull_w_of_score
from scipy import stats
from scipy.special import gammainc

from doseattr.core.attribution.fractions import excess_draws
from doseattr.core.attribution.scenarios import Cap
from doseattr.core.attribution.standard import GammaStandard, WeibullStandard
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.exposure.registry import FAMILIES


def test_gamma_per_shape_terms_follow_changed_values():
    """The gamma standard keeps its per-shape terms and lower normal scores
    for the last inputs: an array changed in place, or a new one, gets its
    own values (scipy.stats.loggamma for the normaliser, the log density of
    ln Y at the mode ln k, where the kernel is 0; scipy.stats.norm.ppf of
    scipy.special.gammainc for the scores), and the kept arrays are read-only."""
    std = GammaStandard(FAMILIES["gamma"])
    params = np.array([[0.4, 2.0], [3.0, 1.0], [25.0, 0.5]])
    w = np.array([[-3.0], [0.5], [3.3]])
    for _ in range(3):
        k = params[:, :1]
        got = std.log_norm(params)
        np.testing.assert_allclose(got, stats.loggamma.logpdf(np.log(k), k), rtol=1e-12)
        assert not got.flags.writeable
        scores = std.zeta_low(w, params)
        np.testing.assert_allclose(scores, stats.norm.ppf(gammainc(k, np.exp(w))), rtol=1e-12)
        with pytest.raises(ValueError):
            scores[0, 0] = 0.0
        params[:, 0] *= 1.7
        w += 0.25


def test_gamma_draws_alone_and_with_small_shapes():
    """Contract: a gamma draw's result does not depend on the other draws in
    its block, here shapes below SMALL_SHAPE (which get extra breaks) mixed
    with larger ones; and it matches scipy.integrate.quad."""
    family = FAMILIES["gamma"]
    curve = Curve(LinearExcess(), np.array([0.02]), np.eye(1), max_dose=50.0)
    params = np.array([[0.15, 60.0], [2.5, 4.0], [0.25, 30.0], [8.0, 1.5], [0.6, 20.0]])
    block = excess_draws(curve, curve.coef, family, params, 0.0, 2.0, Cap(20.0))
    alone = [excess_draws(curve, curve.coef, family, p, 0.0, 2.0, Cap(20.0))[0] for p in params]
    np.testing.assert_allclose(block, alone, rtol=1e-13)

    def excess(x: float) -> float:
        return 0.02 * (min(max(min(x, 20.0), 2.0), 50.0) - 2.0) / (1 + 0.02 * 2.0)

    for p, got in zip(params, block, strict=True):
        ref = expect_over(excess, family.scipy(p), [2.0, 20.0], epsrel=1e-12, limit=500)
        assert got == pytest.approx(ref, rel=1e-9)  # scipy.integrate.quad


def test_weibull_scores_follow_changed_values():
    """Weibull lower scores kept for the last ``w``: a changed array gets
    its own, Phi^{-1}(1 - exp(-e^w)) (scipy.stats.norm.ppf of the
    closed-form CDF), read-only."""
    std = WeibullStandard(FAMILIES["weibull"])
    w = np.array([[-6.0], [-1.0], [0.2], [1.5]])
    for _ in range(3):
        got = std.zeta_low(w, None)
        np.testing.assert_allclose(got, stats.norm.ppf(-np.expm1(-np.exp(w))), rtol=1e-12)
        assert not got.flags.writeable
        w -= 0.4


@pytest.mark.parametrize("side", ["lower", "upper", "both"])
def test_weibull_maps_on_one_side_and_both(side):
    """zeta and from_zeta over arrays all below the median, all above, and
    mixed (the paths without masks and with): against scipy.stats.norm of
    the closed-form CDF and its inverse, and the same values element by
    element whichever path an element goes through."""
    std = WeibullStandard(FAMILIES["weibull"])
    rng = np.random.default_rng(11)
    u = {"lower": rng.uniform(-25.0, -0.5, (40, 3)), "upper": rng.uniform(-0.3, 5.0, (40, 3)),
         "both": rng.uniform(-25.0, 5.0, (40, 3))}[side]
    e = np.exp(u)
    ref = np.where(e < np.log(2.0), stats.norm.ppf(-np.expm1(-e)), stats.norm.isf(np.exp(-e)))
    z = std.zeta(u.copy(), None)
    np.testing.assert_allclose(z, ref, rtol=1e-10, atol=1e-12)
    one_by_one = np.array([[std.zeta(np.array([[v]]), None)[0, 0] for v in row] for row in u])
    np.testing.assert_array_equal(z, one_by_one)
    z_top, sf = std.zeta_top(u.copy(), None)
    np.testing.assert_array_equal(z_top, z)
    np.testing.assert_allclose(sf, stats.gumbel_l.sf(u), rtol=1e-13)  # W = ln E, minimum Gumbel
    zeta = np.clip(ref, -7.5, 30.0)
    back = std.from_zeta(zeta.copy(), None)
    want = weibull_w_of_score(zeta)
    np.testing.assert_allclose(back, want, rtol=1e-12, atol=1e-12)
    one_by_one = np.array([[std.from_zeta(np.array([[v]]), None)[0, 0] for v in row]
                           for row in zeta])
    np.testing.assert_array_equal(back, one_by_one)


def test_gamma_extra_breaks_only_for_small_shapes():
    """No extra breaks where no shape is below SMALL_SHAPE; where some are,
    those rows get them and the others none (-inf, never inside a window).
    The engine's results with them are checked against quad below."""
    std = GammaStandard(FAMILIES["gamma"])
    assert std.extra_breaks(np.array([[0.5, 1.0], [3.0, 2.0]])).shape == (2, 0)
    got = std.extra_breaks(np.array([[0.2, 1.0], [3.0, 2.0]]))
    assert np.all(np.isfinite(got[0])) and got.shape[1] > 0
    assert np.all(got[1] == -np.inf)
