"""End to end, issue 3: curves as they come in the literature (a restricted
cubic spline fitted to band estimates, a curve given as points, a curve
given as draws, band doses from the exposure distribution, a table without
counts).

Inputs are invented; expected values come from a second construction of
the spline written out here from the textbook formula, numpy generalized
least squares with the Woolf covariance, scipy.integrate.quad over
scipy.stats densities, and scipy.stats.chi2.
"""

from __future__ import annotations

import math
import textwrap

import numpy as np
import pytest
from e2e_helpers import run_api, run_cli
from reference_integrals import expect_over
from scipy import integrate, stats

Z975 = stats.norm.ppf(0.975)  # scipy.stats


def paf_by_quad(rr_m, dist, kinks) -> float:
    """PAF = e/(1 + e), e = E[RR_m(X) - 1] by scipy.integrate.quad split at the kinks."""
    e = expect_over(lambda x: rr_m(x) - 1, dist, kinks, epsrel=1e-12, limit=400)
    return e / (1 + e)


def lognormal(gm, gsd):
    return stats.lognorm(math.log(gsd), scale=gm)  # scipy.stats, GM/GSD parametrisation


# ======================================================================================
# A restricted cubic spline with given knots, fitted to a case-control table.
# ======================================================================================
CASES = [100, 90, 85, 70, 50, 30]
CONTROLS = [500, 380, 300, 220, 150, 90]
LIMITS = [(0, 4), (4, 8), (8, 15), (15, 25), (25, 40), (40, 60)]
DOSES = np.array([2.0, 6.0, 11.5, 20.0, 32.5, 50.0])  # band midpoints
KNOTS = np.array([6.0, 20.0, 40.0])

SPLINE = """\
    unit = "ug/m3"

    [curve]
    table = "bands.csv"
    design = "case-control"
    model = "spline"
    knots = [6, 20, 40]

    [exposure]
    family = "lognormal"
    gm = 12.0
    gsd = 2.0

    [attribution]
    minimum_risk = 2.0
"""


def woolf(cases, controls):
    """Crude odds ratios against band 0 with the Woolf covariance
    (var = 1/A_i + 1/B_i + 1/A_0 + 1/B_0, cov = 1/A_0 + 1/B_0), which the
    Greenland & Longnecker (1992) pseudo-counts equal for crude ratios."""
    a, b = np.asarray(cases, float), np.asarray(controls, float)
    rr = (a[1:] / b[1:]) / (a[0] / b[0])
    var = 1 / a[1:] + 1 / b[1:] + 1 / a[0] + 1 / b[0]
    cov = np.full((rr.size, rr.size), 1 / a[0] + 1 / b[0])
    np.fill_diagonal(cov, var)
    return rr, cov


def rcs_basis(x, t):
    """Restricted cubic spline basis in truncated-power form (Harrell,
    Regression Modeling Strategies, 2nd ed. 2015, chapter 2; section and
    equation numbers from memory, the formula written out here), without
    its optional (t_k - t_1)^2 scaling, which fitted values do not depend
    on: X_1 = x and, for j = 1..k-2,
    X_{j+1} = (x - t_j)_+^3 - (x - t_{k-1})_+^3 (t_k - t_j)/(t_k - t_{k-1})
              + (x - t_k)_+^3 (t_{k-1} - t_j)/(t_k - t_{k-1})."""
    x = np.atleast_1d(np.asarray(x, float))
    k = len(t)
    cols = [x]
    p = lambda v: np.maximum(v, 0.0) ** 3  # noqa: E731
    for j in range(k - 2):
        cols.append(p(x - t[j]) - p(x - t[k - 2]) * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
                    + p(x - t[k - 1]) * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2]))
    return np.column_stack(cols)


@pytest.fixture(scope="module")
def spline(tmp_path_factory):
    rr, _ = woolf(CASES, CONTROLS)
    var = 1 / np.array(CASES[1:]) + 1 / np.array(CONTROLS[1:]) + 1 / CASES[0] + 1 / CONTROLS[0]
    rows = ["lower,upper,rr,ci_lower,ci_upper,cases,controls",
            f"0,4,1,,,{CASES[0]},{CONTROLS[0]}"]
    for i, (lo, hi) in enumerate(LIMITS[1:]):
        s, r = math.sqrt(var[i]), float(rr[i])
        rows.append(f"{lo},{hi},{r!r},{r * math.exp(-Z975 * s)!r},"
                    f"{r * math.exp(Z975 * s)!r},{CASES[i + 1]},{CONTROLS[i + 1]}")
    return run_cli(tmp_path_factory.mktemp("spline"), SPLINE, {"bands.csv": "\n".join(rows) + "\n"})


def _spline_reference():
    """GLS through the reference dose d_0 = 2 in the basis above:
    X = B(d_i) - B(d_0), b = (X'V^-1 X)^-1 X'V^-1 y, cov = (X'V^-1 X)^-1,
    Q = r'V^-1 r on (5 - 2) df; Wald test of non-linearity W = b_2^2/var(b_2)
    on 1 df (the hypothesis "the curve is linear in x" is a linear subspace,
    so W does not depend on how the non-linear term is written)."""
    rr, cov = woolf(CASES, CONTROLS)
    X = rcs_basis(DOSES[1:], KNOTS) - rcs_basis(DOSES[0], KNOTS)
    vi = np.linalg.inv(cov)
    info = np.linalg.inv(X.T @ vi @ X)
    b = info @ X.T @ vi @ np.log(rr)
    r = np.log(rr) - X @ b
    wald = b[1] ** 2 / info[1, 1]
    return b, info, float(r @ vi @ r), stats.chi2.sf(wald, 1), cov


def spline_log_rr(x, b):
    return float(((rcs_basis(x, KNOTS) - rcs_basis(DOSES[0], KNOTS)) @ b)[0])


def test_spline_fit_matches_a_second_construction(spline):
    b, _info, q, p_nonlin, cov = _spline_reference()
    c = spline["curve"]
    assert c["model"] == "spline"
    np.testing.assert_allclose(c["log_rr_covariance"], cov, rtol=1e-6)
    assert np.asarray(c["covariance"]).shape == (2, 2)  # over the spline's 2 coefficients
    fitted = c["fitted"]
    assert [f["dose"] for f in fitted] == DOSES[1:].tolist()
    expected = [math.exp(spline_log_rr(d, b)) for d in DOSES[1:]]
    assert [f["rr_fitted"] for f in fitted] == pytest.approx(expected, rel=1e-6)
    assert c["q"] == pytest.approx(q, rel=1e-5) and c["df"] == 3
    assert c["nonlinearity_p"] == pytest.approx(p_nonlin, rel=1e-5)


def test_spline_paf_uses_the_whole_curve(spline):
    """The PAF integrates the curve at every dose, so it compares the two
    constructions everywhere, not only at band doses. RR_m(x) =
    exp(f(min(max(x, 2), 50)) - f(2)), flat beyond the top dose 50."""
    b, *_ = _spline_reference()

    def rr_m(x):
        return math.exp(spline_log_rr(min(max(x, 2.0), 50.0), b))

    expected = paf_by_quad(rr_m, lognormal(12.0, 2.0), [2.0, *KNOTS, 50.0])
    assert spline["paf"]["estimate"] == pytest.approx(expected, rel=1e-6)
    assert spline["curve"]["max_dose"] == 50.0


# ======================================================================================
# Curves given as points, and as draws.
# ======================================================================================
POINTS = """\
    dose,rr,ci_lower,ci_upper
    0,1,,
    10,1.15,1.05,1.26
    25,1.40,1.15,1.70
    50,1.60,1.20,2.15
"""


def test_points_curve_interpolated_on_log_scale(tmp_path):
    """Issue 3 item 3: log RR interpolated linearly between the points
    (numpy.interp on ln RR), flat beyond the last point. Gamma by moments
    (shape = mean^2/sd^2, scale = sd^2/mean), m = 0, PAF by quad."""
    toml = """\
        unit = "ug/m3"

        [curve]
        points = "points.csv"

        [exposure]
        family = "gamma"
        mean = 15.0
        sd = 12.0
    """
    res = run_api(tmp_path, toml, {"points.csv": POINTS})
    d = np.array([0.0, 10.0, 25.0, 50.0])
    y = np.log([1.0, 1.15, 1.40, 1.60])
    dist = stats.gamma(15.0**2 / 12.0**2, scale=12.0**2 / 15.0)
    expected = paf_by_quad(lambda x: math.exp(np.interp(x, d, y)), dist, d[1:])
    assert res["paf"]["estimate"] == pytest.approx(expected, rel=1e-7)


DRAWS = """\
    dose,d1,d2,d3,d4,d5
    0,1,1,1,1,1
    5,1.02,1.05,1.04,1.10,1.01
    15,1.10,1.20,1.12,1.30,1.08
    40,1.25,1.50,1.35,1.70,1.20
"""


def test_draws_curve_point_estimate_is_the_median_curve(tmp_path):
    """Issue 3 item 3: the point estimate is the median of the draws at each
    dose (numpy.median), interpolated linearly on the log scale, flat beyond
    40. m = 5: RR_m(x) = RR(max(x, 5))/RR(5). Lognormal GM 10, GSD 2, quad."""
    toml = """\
        unit = "ug/m3"

        [curve]
        draws = "draws.csv"

        [exposure]
        family = "lognormal"
        gm = 10.0
        gsd = 2.0

        [attribution]
        minimum_risk = 5.0
    """
    res = run_api(tmp_path, toml, {"draws.csv": DRAWS})
    table = np.array([[float(v) for v in line.split(",")]
                      for line in textwrap.dedent(DRAWS).strip().splitlines()[1:]])
    d, y = table[:, 0], np.log(np.median(table[:, 1:], axis=1))

    def rr_m(x):
        return math.exp(np.interp(max(x, 5.0), d, y) - np.interp(5.0, d, y))

    expected = paf_by_quad(rr_m, lognormal(10.0, 2.0), [5.0, 15.0, 40.0])
    assert res["paf"]["estimate"] == pytest.approx(expected, rel=1e-7)


# ======================================================================================
# Band doses from the exposure distribution; a table with no counts.
# ======================================================================================
NO_COUNTS = """\
    lower,upper,rr,ci_lower,ci_upper
    0,5,1,,
    5,10,1.15,0.95,1.39
    10,20,1.32,1.08,1.61
    20,,1.70,1.30,2.22
"""


def test_band_mean_doses_and_effective_counts(tmp_path):
    """dose = "band-mean": each band's dose is the mean of the population's
    exposed distribution within it, E[X | l < X < u] = int_l^u x f / (F(u) - F(l))
    (quad; the open top band needs no width rule). No counts but a design:
    effective counts (Hamling et al. 2008). Whatever counts A_i, B_i are
    found, the log-OR covariance they give is var_i = 1/A_i + 1/B_i + c on the
    diagonal, kept equal to the CI-implied ((ln hi - ln lo)/(2 z))^2
    (issue 3 item 6), and c = 1/A_0 + 1/B_0 off the diagonal, so 0 < c < var_i.
    The slope is then the GLS estimate with that covariance."""
    toml = """\
        unit = "ug/m3"

        [curve]
        table = "bands.csv"
        design = "case-control"
        model = "log-linear"
        dose = "band-mean"

        [exposure]
        family = "lognormal"
        gm = 8.0
        gsd = 2.2
    """
    res = run_api(tmp_path, toml, {"bands.csv": NO_COUNTS})
    dist = lognormal(8.0, 2.2)
    edges = [(0, 5), (5, 10), (10, 20), (20, math.inf)]
    means = [integrate.quad(lambda x: x * dist.pdf(x), a, b, epsabs=0, epsrel=1e-12)[0]
             / (dist.cdf(b) - dist.cdf(a)) for a, b in edges]
    c = res["curve"]
    assert c["covariance_method"] == "effective-counts"
    assert [f["dose"] for f in c["fitted"]] == pytest.approx(means[1:], rel=1e-7)
    assert c["reference_dose"] == pytest.approx(means[0], rel=1e-7)
    rr = np.array([1.15, 1.32, 1.70])
    lo, hi = np.array([0.95, 1.08, 1.30]), np.array([1.39, 1.61, 2.22])
    v = np.asarray(c["log_rr_covariance"])
    np.testing.assert_allclose(np.diag(v), ((np.log(hi) - np.log(lo)) / (2 * Z975)) ** 2,
                               rtol=1e-9)
    off = v[~np.eye(3, dtype=bool)]
    assert np.ptp(off) <= 1e-12 * off.max()
    assert 0 < off[0] < np.diag(v).min()
    x = np.array(means[1:]) - means[0]
    vi = np.linalg.inv(v)
    b = (x @ vi @ np.log(rr)) / (x @ vi @ x)
    assert c["coefficients"] == pytest.approx([b], rel=1e-6)
    assert c["covariance"][0][0] == pytest.approx(1 / (x @ vi @ x), rel=1e-6)


# ======================================================================================
# Published shapes entered with their parameters; a curve and exposure in other units.
# ======================================================================================
def test_log_logistic_weighted_shape(tmp_path):
    """log RR(z) = theta log(z/a + 1)/(1 + exp(-(z - u)/v)), z = max(0, x - cf),
    relative to RR at x = 0 (z = 0, log RR 0) (Burnett et al. 2018, PNAS
    115:9592; the parameter set theta 0.1430, a 1.6, u 15.5, v 36.8, cf 2.4
    is from memory and serves only as an input here). Extended over a
    lognormal: the RR grows like a power of z, so every moment is finite.
    PAF by quad with m = 0."""
    toml = """\
        unit = "ug/m3"

        [curve]
        model = "log-logistic-weighted"
        theta = 0.1430
        theta_se = 0.01807
        scale = 1.6
        midpoint = 15.5
        spread = 36.8
        threshold = 2.4

        [exposure]
        family = "lognormal"
        gm = 20.0
        gsd = 1.8
    """
    res = run_api(tmp_path, toml, {})

    def rr(x):
        z = max(0.0, x - 2.4)
        return math.exp(0.1430 * math.log1p(z / 1.6) / (1 + math.exp(-(z - 15.5) / 36.8)))

    assert res["paf"]["estimate"] == pytest.approx(
        paf_by_quad(rr, lognormal(20.0, 1.8), [2.4]), rel=1e-7)
    assert res["curve"]["covariance"] == [[pytest.approx(0.01807**2, rel=1e-12)]]


def test_saturating_exponential_shape_with_minimum_risk(tmp_path):
    """RR(z) = 1 + a(1 - exp(-g z^d)), z = max(0, x - cf) (Burnett et al.
    2014, Environ Health Perspect 122:397; invented parameters), minimum-risk
    level 8 above the threshold 5: RR_m(x) = RR(max(x, 8))/RR(8). Quad."""
    toml = """\
        unit = "ug/m3"

        [curve]
        model = "saturating-exponential"
        alpha = 1.5
        gamma = 0.02
        delta = 1.2
        threshold = 5.0

        [exposure]
        family = "gamma"
        shape = 2.0
        scale = 12.0

        [attribution]
        minimum_risk = 8.0
    """
    res = run_api(tmp_path, toml, {})

    def rr(x):
        return 1 + 1.5 * -math.expm1(-0.02 * max(0.0, x - 5.0) ** 1.2)

    expected = paf_by_quad(lambda x: rr(max(x, 8.0)) / rr(8.0), stats.gamma(2.0, scale=12.0),
                           [5.0, 8.0])
    assert res["paf"]["estimate"] == pytest.approx(expected, rel=1e-7)


def test_curve_and_exposure_in_other_units(tmp_path):
    """The file's unit is mg/m3; the curve is published per 100 ug/m3
    (1 mg = 1000 ug, so per 0.1 mg/m3, held flat above 2000 ug/m3 = 2 mg/m3);
    the exposure GM is in ppm of toluene (molecular weight 92.14 g/mol),
    mg/m3 = ppm x MW / 24.45 at 25 C and 1 atm (common practice in
    occupational hygiene; 24.45 L/mol is the molar volume of an ideal gas
    there). A GSD has no unit. PAF by quad in mg/m3."""
    toml = """\
        unit = "mg/m3"
        molecular_weight = 92.14

        [curve]
        model = "log-linear"
        rr = 1.1
        per = 100
        unit = "ug/m3"
        max_dose = 2000

        [exposure]
        family = "lognormal"
        gm = 0.5
        gsd = 2.0
        unit = "ppm"
    """
    res = run_api(tmp_path, toml, {})
    gm = 0.5 * 92.14 / 24.45
    b = math.log(1.1) / 0.1
    assert res["unit"] == "mg/m3"
    assert res["exposure"]["parameters"]["gm"] == pytest.approx(gm, rel=1e-12)
    assert res["exposure"]["parameters"]["gsd"] == pytest.approx(2.0, rel=1e-12)
    assert res["curve"]["coefficients"] == pytest.approx([b], rel=1e-12)
    assert res["curve"]["max_dose"] == pytest.approx(2.0, rel=1e-12)
    expected = paf_by_quad(lambda x: math.exp(b * min(x, 2.0)), lognormal(gm, 2.0), [2.0])
    assert res["paf"]["estimate"] == pytest.approx(expected, rel=1e-7)


def test_band_median_doses_and_independent_covariance(tmp_path):
    """dose = "band-median": the conditional median of the exposed
    distribution within each band, F^-1((F(l) + F(u))/2) (scipy.stats
    lognorm.cdf/ppf). covariance = "independent": the log-RR covariance is
    diagonal with the CI-implied variances, the slope is weighted least
    squares, and the output says the estimates were treated as independent
    (issue 2 item 3)."""
    toml = """\
        unit = "ug/m3"

        [curve]
        table = "bands.csv"
        model = "log-linear"
        dose = "band-median"
        covariance = "independent"

        [exposure]
        family = "lognormal"
        gm = 8.0
        gsd = 2.2
    """
    res = run_api(tmp_path, toml, {"bands.csv": NO_COUNTS})
    dist = lognormal(8.0, 2.2)
    edges = [(0, 5), (5, 10), (10, 20), (20, math.inf)]
    medians = [dist.ppf((dist.cdf(a) + dist.cdf(b)) / 2) for a, b in edges]
    c = res["curve"]
    assert [f["dose"] for f in c["fitted"]] == pytest.approx(medians[1:], rel=1e-7)
    assert c["reference_dose"] == pytest.approx(medians[0], rel=1e-7)
    lo, hi = np.array([0.95, 1.08, 1.30]), np.array([1.39, 1.61, 2.22])
    var = ((np.log(hi) - np.log(lo)) / (2 * Z975)) ** 2
    np.testing.assert_allclose(c["log_rr_covariance"], np.diag(var), rtol=1e-9, atol=1e-15)
    x = np.array(medians[1:]) - medians[0]
    y = np.log([1.15, 1.32, 1.70])
    assert c["coefficients"] == pytest.approx([np.sum(x * y / var) / np.sum(x * x / var)], rel=1e-6)
    assert any("independent" in w for w in res["warnings"] + res["notes"])


def test_poor_fit_warns_and_suggests_the_spline(tmp_path):
    """Issue 3 item 6: a p-value below 0.05 gets a warning suggesting the
    spline. A strongly saturating table with large counts (crude ORs 2.0,
    2.2, 2.25 at doses 5, 15, 30) cannot be fitted by a log-linear curve;
    the GLS Q (Woolf covariance, see woolf above) and scipy.stats.chi2 give
    the p-value the warning is based on."""
    cases, controls = [1000, 2000, 2200, 2250], [5000, 5000, 5000, 5000]
    rr, cov = woolf(cases, controls)
    rows = ["lower,upper,rr,ci_lower,ci_upper,cases,controls", "0,2,1,,,1000,5000"]
    for (lo, hi), r, v, a, b in zip([(2, 8), (8, 22), (22, 38)], rr, np.diag(cov), cases[1:],
                                    controls[1:]):
        r, s = float(r), math.sqrt(v)
        rows.append(f"{lo},{hi},{r!r},{r * math.exp(-Z975 * s)!r},{r * math.exp(Z975 * s)!r},{a},{b}")
    toml = """\
        unit = "ug/m3"

        [curve]
        table = "bands.csv"
        model = "log-linear"

        [exposure]
        family = "lognormal"
        gm = 8.0
        gsd = 2.0
    """
    res = run_api(tmp_path, toml, {"bands.csv": "\n".join(rows) + "\n"})
    x = np.array([5.0, 15.0, 30.0]) - 1.0
    vi = np.linalg.inv(cov)
    b = (x @ vi @ np.log(rr)) / (x @ vi @ x)
    r = np.log(rr) - b * x
    p = stats.chi2.sf(float(r @ vi @ r), 2)
    assert p < 0.05
    assert res["curve"]["p_value"] == pytest.approx(p, rel=1e-5, abs=1e-300)
    assert any("spline" in w for w in res["warnings"])
