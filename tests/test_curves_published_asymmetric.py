"""A published linear ERR with an asymmetric CI: the draws honour both limits.

The draws are a shifted lognormal (derivation in ShiftedLogCurve): log(ERR + c) is
normal with c chosen so that the CI is symmetric on that scale. The checks are the
published limits themselves (the known truth of the simulation) with a tolerance from
the large-sample standard error of a sample p-quantile,
sqrt(p (1 - p) / n) / f(q_p) (Cramer 1946, Mathematical Methods of Statistics, 28.5;
from memory), using the density f of the draw distribution at the quantile.
"""

import numpy as np
import pytest
from analysis_helpers import write_case
from scipy.stats import norm

from doseattr.analysis.config import load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.core.curves.published import ShiftedLogCurve, published_curve
from doseattr.core.uncertainty.sampling import curve_draws

Z95 = norm.ppf(0.975)
N = 200_000
#: Darby et al. (2005), BMJ 330:223: lung cancer ERR 8.4% (3.0% to 15.8%) per
#: 100 Bq/m3 of radon (as transcribed in the existing published-curve test).
RADON = {"err": 0.084, "ci": (0.030, 0.158), "per": 100.0}


def _quantile_se(curve: ShiftedLogCurve, p: float, n: int) -> float:
    """SE of the sample p-quantile of the slope draws. The slope is
    b + side * s * expm1(side * sigma Z), increasing in Z, so its density at the
    quantile z_p of Z is phi(z_p) / (s * sigma * exp(side * sigma * z_p)) (change of
    variables)."""
    z = norm.ppf(p)
    density = norm.pdf(z) / (curve.scale * curve.log_sd * np.exp(curve.side * curve.log_sd * z))
    return float(np.sqrt(p * (1 - p) / n) / density)


@pytest.mark.parametrize("case", [
    RADON,
    {"err": 0.5, "ci": (0.1, 0.6), "per": 1.0},        # longer below the estimate
    {"rr": 1.084, "ci": (1.030, 1.158), "per": 100.0},  # the radon ERR given as an RR
])
def test_draw_percentiles_reproduce_the_published_limits(case):
    curve = published_curve("linear", **case)
    assert isinstance(curve, ShiftedLogCurve)
    per = case["per"]
    shift = 1.0 if "rr" in case else 0.0
    lo, hi = (c - shift for c in case["ci"])
    estimate = case.get("err", case.get("rr", 0.0) - shift)
    slopes = curve_draws(curve, N, np.random.default_rng(20260))[:, 0]
    q = np.quantile(slopes, [0.025, 0.5, 0.975])
    tol = [4 * _quantile_se(curve, p, N) for p in (0.025, 0.5, 0.975)]
    np.testing.assert_allclose(q[0], lo / per, atol=tol[0])
    np.testing.assert_allclose(q[1], estimate / per, atol=tol[1])
    np.testing.assert_allclose(q[2], hi / per, atol=tol[2])
    # exact mapping of the normal's quantiles (no simulation)
    np.testing.assert_allclose(curve.from_normal([-Z95, 0.0, Z95])[:, 0],
                               np.array([lo, estimate, hi]) / per, rtol=1e-12)
    # the normal from the half-width misses a limit by far more than the tolerance
    se = np.sqrt(curve.cov[0, 0])
    assert abs(curve.coef[0] - Z95 * se - lo / per) > 10 * tol[0]
    assert any("shifted lognormal" in n for n in curve.notes)


def test_rr_interval_gives_the_published_limits():
    """RR(x) = 1 + b x is monotone in b, so at x = per its interval is 1 + CI."""
    curve = published_curve("linear", **RADON)
    rr, lo, hi = curve.rr_interval(np.array([100.0]))
    np.testing.assert_allclose([rr[0], lo[0], hi[0]], [1.084, 1.030, 1.158], rtol=1e-12)


def test_symmetric_ci_keeps_the_normal_draws_exactly():
    """ERR 0.2 (0.1 to 0.3): symmetric, so the draws are numpy's normal ones with
    sd (hi - lo)/(2 z) (common practice), bit for bit."""
    curve = published_curve("linear", err=0.2, ci=(0.1, 0.3), per=10.0)
    assert not isinstance(curve, ShiftedLogCurve)
    se = 0.2 / (2 * Z95) / 10
    np.testing.assert_allclose(curve.cov, [[se * se]], rtol=1e-12)
    got = curve_draws(curve, 1000, np.random.default_rng(7))
    want = np.random.default_rng(7).multivariate_normal(curve.coef, curve.cov, size=1000,
                                                        method="eigh")
    np.testing.assert_array_equal(got, want)
    assert not any("asymmetric" in n for n in curve.notes)


def test_nearly_symmetric_ci_tends_to_the_normal():
    """As the asymmetry d -> 0 the shifted lognormal tends to b + (u/z) Z: with a
    relative asymmetry d/(hi - lo) = 1e-6 the draws agree with the normal ones up to
    the second-order term u d Z^2 / (2 a z^2) of the expansion (derived; doubled here)."""
    curve = published_curve("linear", err=0.2, ci=(0.1, 0.3 + 2e-7), per=1.0)
    assert isinstance(curve, ShiftedLogCurve)
    z = np.random.default_rng(3).standard_normal(10_000)
    normal = 0.2 + (0.1 + 1e-7) / Z95 * z
    bound = 0.1 * 2e-7 * z**2 / (0.1 * Z95**2) + 1e-15
    assert np.all(np.abs(curve.from_normal(z)[:, 0] - normal) <= bound)


def test_paf_interval_follows_the_published_limits(tmp_path):
    r"""End to end, exposure fixed (GM, GSD given) and no minimum-risk range: with
    RR = 1 + b x the PAF is 1 - 1/(1 + b E[X]) (definition; E[X] = GM exp(ln^2 GSD / 2),
    lognormal mean), increasing in b, so the PAF interval is that formula at the
    published ERR limits, within 4 quantile SEs carried through the formula."""
    gm, gsd = 60.0, 1.8
    text = ('unit = "Bq/m3"\n[curve]\nmodel = "linear"\nerr = 0.084\nper = 100\n'
            'ci = [0.030, 0.158]\n[exposure]\n'
            f'gm = {gm}\ngsd = {gsd}\n[uncertainty]\ndraws = 20000\nseed = 11\n')
    results = run_analysis(load_analysis(write_case(tmp_path, text, bands=None,
                                                    measurements=None)))
    out = results.to_dict()
    mean_x = gm * np.exp(np.log(gsd) ** 2 / 2)

    def paf(err):
        return 1 - 1 / (1 + err / 100 * mean_x)

    curve = published_curve("linear", **RADON)
    for key, err, p in (("lower", 0.030, 0.025), ("upper", 0.158, 0.975)):
        slope_se = _quantile_se(curve, p, 20_000)
        dpaf = mean_x / (1 + err / 100 * mean_x) ** 2       # d PAF / d slope
        np.testing.assert_allclose(out["paf"][key], paf(err), atol=4 * dpaf * slope_se)
    assert any("shifted lognormal" in n for n in out["notes"])
