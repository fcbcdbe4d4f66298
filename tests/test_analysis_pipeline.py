"""End-to-end runs of the analysis pipeline checked against references from
outside the project: closed forms derived in each test's docstring,
scipy.stats distributions and scipy.integrate.quad.

The inputs (RRs, exposure parameters, tables) are made up for the tests;
every expected value is computed here from an outside formula or library.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from analysis_helpers import write_case
from reference_integrals import expect_over
from scipy import stats

from doseattr.analysis.config import analysis_from_dict, load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

Z975 = stats.norm.ppf(0.975)


def _run(d, base_dir="."):
    return run_analysis(analysis_from_dict(d, base_dir=base_dir))


# -- gamma exposure, log-linear curve -----------------------------------------
def _gamma_case(**attribution):
    return {"unit": "ug/m3",
            "curve": {"model": "log-linear", "rr": 1.25, "per": 10.0, "beyond": "extend"},
            "exposure": {"family": "gamma", "shape": 2.5, "scale": 6.0,
                         "unexposed": attribution.pop("unexposed", 0.0)},
            "attribution": attribution,
            "scenario": [{"name": "cap 15", "cap": 15.0}, {"name": "cut 40%", "scale": 0.6}]}


def test_gamma_loglinear_paf_closed_form():
    r"""Gamma(shape k, scale t) exposure, RR(x) = exp(b x), minimum risk 0.

    The gamma moment generating function (e.g. any probability text's table
    of MGFs) gives :math:`E[e^{bX}] = (1 - b t)^{-k}` for :math:`b t < 1`, so

    .. math:: PAF = 1 - 1/E[RR(X)] = 1 - (1 - b t)^k.

    Scale scenario :math:`g(x) = s x`: :math:`E[e^{bsX}] = (1 - bst)^{-k}`,
    :math:`PIF = 1 - (1 - bt)^k / (1 - bst)^k`.

    Cap at L: :math:`e^{bx} f(x) \propto x^{k-1} e^{-x(1/t - b)}`, a gamma
    density with scale :math:`t' = t/(1 - bt)` (exponential tilting), so
    :math:`E[e^{bX}; X \le L] = (1 - bt)^{-k} G(L; k, t')` and
    :math:`E[e^{b \min(X, L)}] = (1-bt)^{-k} G(L; k, t') + e^{bL} (1 - G(L; k, t))`,
    with :math:`G` the gamma CDF (scipy.stats.gamma).
    """
    r = _run(_gamma_case())
    b, k, t = math.log(1.25) / 10.0, 2.5, 6.0
    e = (1 - b * t) ** -k
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-8)
    tt = t / (1 - b * t)
    e_cap = e * stats.gamma.cdf(15, k, scale=tt) + math.exp(b * 15) * stats.gamma.sf(15, k, scale=t)
    e_scale = (1 - b * 0.6 * t) ** -k
    pifs = {s.name: s.pif.estimate for s in r.scenarios}
    np.testing.assert_allclose(pifs["cap 15"], 1 - e_cap / e, rtol=1e-8)
    np.testing.assert_allclose(pifs["cut 40%"], 1 - e_scale / e, rtol=1e-8)
    assert r.curve.max_dose is None and r.to_dict()["curve"]["max_dose"] is None


def test_gamma_loglinear_with_minimum_risk_and_unexposed():
    r"""As above with minimum risk m > 0 and an unexposed share u (a point
    mass at 0, where :math:`RR_m = 1`):

    .. math::
        E[RR_m(X)] = u + (1-u)\left[G(m; k, t) + e^{-bm} (1 - bt)^{-k}
                     (1 - G(m; k, t'))\right]

    from :math:`RR_m(x) = 1` below m and :math:`e^{b(x - m)}` above, with
    the tilted gamma of the previous test.
    """
    m, u = 4.0, 0.2
    r = _run(_gamma_case(minimum_risk=m, unexposed=u))
    b, k, t = math.log(1.25) / 10.0, 2.5, 6.0
    tt = t / (1 - b * t)
    body = stats.gamma.cdf(m, k, scale=t) + math.exp(-b * m) * (1 - b * t) ** -k * \
        stats.gamma.sf(m, k, scale=tt)
    e = u + (1 - u) * body
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-8)
    assert r.to_dict()["exposure"]["unexposed"] == pytest.approx(u, abs=0)


# -- lognormal exposure, linear excess relative risk ----------------------------
def test_lognormal_linear_err_closed_form():
    r"""Lognormal exposure (GM :math:`e^\mu`, GSD :math:`e^s`), RR = 1 + b x,
    reference dose 0, minimum risk 0, formula extended.

    The lognormal mean is :math:`E[X] = e^{\mu + s^2/2}`, so
    :math:`E[RR] = 1 + b e^{\mu + s^2/2}` and
    :math:`PAF = 1 - 1/(1 + b e^{\mu + s^2/2})`.

    Reduce-by d: :math:`RR(\max(X - d, 0)) = 1 + b (X - d)^+`, and
    :math:`E[(X-d)^+] = E[X] - E[\min(X, d)]` with the lognormal limited
    expectation :math:`E[\min(X, d)] = e^{\mu+s^2/2}\Phi((\ln d - \mu - s^2)/s)
    + d(1 - \Phi((\ln d - \mu)/s))` (integrate :math:`x f(x)` up to d by
    completing the square; the formula is also in loss-distribution texts,
    from memory). Scale s': :math:`E[RR] = 1 + b s' E[X]`.
    """
    gm, gsd, err, per, d = 12.0, 2.2, 0.08, 10.0, 5.0
    r = _run({"unit": "ug/m3",
              "curve": {"model": "linear", "err": err, "per": per, "beyond": "extend"},
              "exposure": {"gm": gm, "gsd": gsd},
              "scenario": [{"name": "minus 5", "reduce_by": d}, {"name": "half", "scale": 0.5}]})
    b, mu, s = err / per, math.log(gm), math.log(gsd)
    mean = math.exp(mu + s * s / 2)
    e = 1 + b * mean
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-8)
    limited = mean * stats.norm.cdf((math.log(d) - mu - s * s) / s) + \
        d * stats.norm.sf((math.log(d) - mu) / s)
    pifs = {sc.name: sc.pif.estimate for sc in r.scenarios}
    np.testing.assert_allclose(pifs["minus 5"], 1 - (1 + b * (mean - limited)) / e, rtol=1e-8)
    np.testing.assert_allclose(pifs["half"], 1 - (1 + b * 0.5 * mean) / e, rtol=1e-8)
    assert r.to_dict()["exposure"]["parameters"] == pytest.approx({"gm": gm, "gsd": gsd})


def test_diverging_integral_is_refused_with_the_setting_to_change():
    """A log-linear curve extended over a lognormal tail has no finite mean
    (the lognormal has no moment generating function for positive
    arguments: methods guide, a known property of the lognormal)."""
    d = {"unit": "ppm", "curve": {"model": "log-linear", "rr": 1.1, "beyond": "extend"},
         "exposure": {"gm": 5.0, "gsd": 2.0}}
    with pytest.raises(InputError, match=r"\[curve\] key 'beyond'.*infinite"):
        _run(d)


# -- a curve fitted to a study table --------------------------------------------
BANDS_NO_COUNTS = """\
lower,upper,dose,rr,ci_lower,ci_upper
0,10,5,1,,
10,20,15,1.30,1.05,1.61
20,40,30,1.55,1.20,2.00
40,,60,2.10,1.50,2.94
"""


def _table_case(tmp_path, bands, extra=""):
    text = f"""\
unit = "ug/m3"
[curve]
table = "bands.csv"
model = "log-linear"
[exposure]
gm = 11.0
gsd = 2.4
{extra}"""
    return run_analysis(load_analysis(write_case(tmp_path, text, bands=bands,
                                                 measurements=None)))


def test_fitted_independent_slope_and_flat_paf(tmp_path):
    r"""Log-linear curve through the reference band, log RRs independent (no
    counts): weighted least squares through the origin gives

    .. math:: \hat b = \frac{\sum x_i y_i / v_i}{\sum x_i^2 / v_i}, \qquad
              \operatorname{var}\hat b = 1 / \sum x_i^2 / v_i

    with :math:`x_i` = dose minus reference dose, :math:`y_i = \ln RR_i`,
    :math:`v_i = ((\ln hi - \ln lo)/(2 z_{0.975}))^2`. The RR is flat above
    the top dose D = 60, so with minimum risk 0,
    :math:`RR_0(x) = e^{b \min(x, D)}` and
    :math:`E = \int_0^D e^{bx} f(x)\,dx + e^{bD} P(X > D)`, computed with
    scipy.integrate.quad and scipy.stats.lognorm. The categorical PAF from
    the reported RRs is the multi-category formula
    :math:`\sum p_i (RR_i - 1)/(1 + \sum p_i (RR_i - 1))` (Hanley 2001,
    J Epidemiol Community Health 55:508) with lognormal band shares.
    """
    r = _table_case(tmp_path, BANDS_NO_COUNTS)
    x = np.array([15.0, 30.0, 60.0]) - 5.0
    rr = np.array([1.30, 1.55, 2.10])
    lo, hi = np.array([1.05, 1.20, 1.50]), np.array([1.61, 2.00, 2.94])
    v = ((np.log(hi) - np.log(lo)) / (2 * Z975)) ** 2
    b = np.sum(x * np.log(rr) / v) / np.sum(x * x / v)
    np.testing.assert_allclose(r.curve.coef[0], b, rtol=1e-10)
    np.testing.assert_allclose(r.curve.cov[0, 0], 1 / np.sum(x * x / v), rtol=1e-10)

    dist = stats.lognorm(s=math.log(2.4), scale=11.0)
    top = 60.0
    body = expect_over(lambda z: math.exp(b * z), dist, (), epsrel=1e-12, limit=200, upper=top)
    e = body + math.exp(b * top) * dist.sf(top)
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-8)

    d = r.to_dict()
    assert d["curve"]["max_dose"] == 60.0 and d["curve"]["covariance_method"] == "independent"
    np.testing.assert_allclose(d["exposure"]["share_beyond_max_dose"], dist.sf(top), rtol=1e-8)
    assert any("treated as independent" in w for w in r.warnings)

    shares = np.diff(np.r_[0.0, dist.cdf([10.0, 20.0, 40.0]), 1.0])
    reported = np.array([1.0, 1.30, 1.55, 2.10])
    excess = np.sum(shares * (reported - 1))
    cat = d["categorical"]
    np.testing.assert_allclose(cat["shares"], shares, rtol=1e-10)
    method = {m["method"]: m for m in cat["methods"]}
    np.testing.assert_allclose(method["reported"]["paf"], excess / (1 + excess), rtol=1e-10)
    assert cat["cutpoints"] == [10.0, 20.0, 40.0]


def _woolf_table():
    """Crude odds ratios and Woolf CIs from a 2 x K table of counts."""
    cases = np.array([80.0, 60.0, 45.0, 30.0])
    controls = np.array([400.0, 210.0, 120.0, 60.0])
    odds = (cases / controls) / (cases[0] / controls[0])
    var = 1 / cases + 1 / controls + 1 / cases[0] + 1 / controls[0]
    lines = ["lower,upper,dose,rr,ci_lower,ci_upper,cases,controls",
             f"0,10,5,1,,,{cases[0]:g},{controls[0]:g}"]
    limits = [(10, 20, 15), (20, 40, 30), (40, "", 60)]
    for i, (lo, hi, dose) in enumerate(limits, start=1):
        se, o = math.sqrt(var[i]), float(odds[i])
        lines.append(f"{lo},{hi},{dose},{o!r},{o * math.exp(-Z975 * se)!r},"
                     f"{o * math.exp(Z975 * se)!r},{cases[i]:g},{controls[i]:g}")
    return "\n".join(lines) + "\n", cases, controls, odds, var


def test_counts_give_woolf_covariance_and_gls_slope(tmp_path):
    r"""For crude odds ratios the Greenland & Longnecker (1992, Am J
    Epidemiol 135:1301) pseudo-counts equal the observed counts, so the
    covariance of the log ORs is Woolf's (1955): variances
    :math:`1/A_i + 1/B_i + 1/A_0 + 1/B_0` and covariances
    :math:`1/A_0 + 1/B_0` (the shared reference cells). The slope is then
    the GLS estimate :math:`(x' V^{-1} x)^{-1} x' V^{-1} y`, computed here
    with numpy from that V.
    """
    text, cases, controls, odds, var = _woolf_table()
    r = _table_case(tmp_path, text)
    d = r.to_dict()["curve"]
    shared = 1 / cases[0] + 1 / controls[0]
    expected = np.full((3, 3), shared)
    np.fill_diagonal(expected, var[1:])
    np.testing.assert_allclose(d["log_rr_covariance"], expected, rtol=1e-6)
    assert d["covariance_method"] == "counts"
    x = np.array([10.0, 25.0, 55.0])
    y = np.log(odds[1:])
    vinv = np.linalg.inv(expected)
    b = (x @ vinv @ y) / (x @ vinv @ x)
    np.testing.assert_allclose(d["coefficients"][0], b, rtol=1e-6)
    assert [f["dose"] for f in d["fitted"]] == [15.0, 30.0, 60.0]
    np.testing.assert_allclose([f["rr_reported"] for f in d["fitted"]], odds[1:], rtol=1e-12)


# -- exposure fitted to measurements --------------------------------------------
def test_weighted_lognormal_fit_matches_closed_form(tmp_path):
    r"""Weighted lognormal maximum likelihood without censoring has a closed
    form: the weighted mean and (divisor sum of weights) variance of
    :math:`\ln x`, i.e. :math:`GM = \exp(\sum w \ln x / \sum w)`,
    :math:`GSD = \exp\sqrt{\sum w (\ln x - \hat\mu)^2 / \sum w}` (the normal
    MLE on the log scale with frequency-type weights).
    """
    values = np.array([3.1, 4.7, 5.2, 6.8, 8.0, 9.9, 12.5, 15.1, 21.0, 30.2])
    weights = np.array([1, 3, 2, 1, 4, 2, 1, 2, 1, 1], dtype=float)
    rows = "\n".join(f"{v},{w:g}" for v, w in zip(values, weights))
    text = """\
unit = "ppm"
[curve]
model = "linear"
err = 0.05
[exposure]
table = "measurements.csv"
family = "lognormal"
"""
    path = write_case(tmp_path, text, bands=None, measurements="value,weight\n" + rows + "\n")
    r = run_analysis(load_analysis(path))
    lx = np.log(values)
    mu = np.sum(weights * lx) / weights.sum()
    s = math.sqrt(np.sum(weights * (lx - mu) ** 2) / weights.sum())
    p = r.to_dict()["exposure"]["parameters"]
    np.testing.assert_allclose(p["gm"], math.exp(mu), rtol=1e-6)
    np.testing.assert_allclose(p["gsd"], math.exp(s), rtol=1e-6)
    d = r.to_dict()["exposure"]
    assert d["n"] == 10 and d["detected"] == 10 and d["censored"] == 0
    # E[RR] = 1 + b E[X] for the lognormal (closed form of the test above)
    e = 1 + 0.05 * math.exp(math.log(p["gm"]) + math.log(p["gsd"]) ** 2 / 2)
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-8)


# -- the results.json contract --------------------------------------------------
CONTRACT = {
    "paf": ["estimate", "lower", "upper"],
    "curve": ["model", "coefficients", "covariance", "max_dose", "nonlinearity_p", "fitted",
              "log_rr_covariance"],
    "exposure": ["family", "parameters", "unexposed", "share_beyond_max_dose", "detected",
                 "censored", "fits"],
    "categorical": ["cutpoints", "shares", "methods", "continuous_paf"],
}


def test_results_json_contract(tmp_path):
    """The keys external validation reads (project API notes) are present,
    of the agreed shapes, and the dictionary is strict JSON."""
    text, *_ = _woolf_table()
    r = _table_case(tmp_path, text, extra='[[scenario]]\nname = "cap"\ncap = 25\n')
    d = r.to_dict()
    json.dumps(d, allow_nan=False)
    assert d["schema_version"] == "2.3" and d["unit"] == "ug/m3"
    for section, keys in CONTRACT.items():
        for key in keys:
            assert key in d[section], (section, key)
    assert d["scenarios"][0]["name"] == "cap"
    assert set(d["scenarios"][0]["pif"]) >= {"estimate", "lower", "upper"}
    assert isinstance(d["curve"]["coefficients"], list)
    assert np.shape(d["curve"]["covariance"]) == (1, 1)
    assert set(d["exposure"]["parameters"]) == {"gm", "gsd"}
    cat = d["categorical"]
    assert len(cat["shares"]) == len(cat["cutpoints"]) + 1
    assert [m["method"] for m in cat["methods"]] == ["reported", "midpoint", "band-mean"]
    assert all(len(m["rr"]) == len(cat["shares"]) for m in cat["methods"])
    np.testing.assert_allclose(sum(cat["shares"]), 1.0, rtol=1e-12)
    assert "Causality" in " ".join(d["cautions"]) and "Miettinen" in " ".join(d["cautions"])


def test_summary_shows_the_key_table(tmp_path):
    r = _table_case(tmp_path, BANDS_NO_COUNTS, extra='[[scenario]]\nname = "cap"\ncap = 25\n')
    text = r.summary()
    for needle in ("PAF (minimum-risk level 0 ug/m3)", "cap", "Categorical comparison",
                   "reported", "band-mean", "Exposure: lognormal", "Curve: log-linear"):
        assert needle in text
    assert f"{100 * r.paf.estimate:.2f}%" in text


# -- more curve and exposure inputs ---------------------------------------------
def test_gamma_from_mean_and_sd_by_moments():
    r"""A gamma distribution given by its mean and SD: by moments,
    shape :math:`k = (\text{mean}/\text{sd})^2` and scale
    :math:`t = \text{sd}^2/\text{mean}` (gamma mean :math:`kt`, variance
    :math:`kt^2`). With RR = exp(bx) and minimum risk 0 the PAF is
    :math:`1 - (1 - bt)^k` (gamma MGF, see the first test)."""
    mean, sd = 9.0, 6.0
    r = _run({"unit": "ug/m3",
              "curve": {"model": "log-linear", "rr": 1.1, "per": 10.0, "beyond": "extend"},
              "exposure": {"family": "gamma", "mean": mean, "sd": sd}})
    k, t = (mean / sd) ** 2, sd * sd / mean
    p = r.to_dict()["exposure"]["parameters"]
    np.testing.assert_allclose([p["shape"], p["scale"]], [k, t], rtol=1e-10)
    b = math.log(1.1) / 10.0
    np.testing.assert_allclose(r.paf.estimate, 1 - (1 - b * t) ** k, rtol=1e-8)


def test_power_curve_with_minimum_risk_closed_form():
    r"""Power curve RR(x) = (x / x_ref)^c (offset 0) over a lognormal,
    minimum risk m > 0: :math:`RR_m(x) = (\max(x, m)/m)^c`, so

    .. math:: E[RR_m] = F(m) + m^{-c} E[X^c; X > m], \quad
              E[X^c; X > m] = e^{c\mu + c^2 s^2/2}\,\Phi((\mu + c s^2 - \ln m)/s)

    (the partial moment of the lognormal: complete the square in the normal
    integral; also in the project's methods guide). F is the lognormal CDF
    (scipy.stats.lognorm).
    """
    c, m, gm, gsd = 0.4, 3.0, 8.0, 1.9
    r = _run({"unit": "mg/m3",
              "curve": {"model": "power", "exponent": c, "reference_dose": 1.0,
                        "beyond": "extend"},
              "exposure": {"gm": gm, "gsd": gsd}, "attribution": {"minimum_risk": m}})
    mu, s = math.log(gm), math.log(gsd)
    dist = stats.lognorm(s=s, scale=gm)
    partial = (math.exp(c * mu + c * c * s * s / 2)
               * stats.norm.cdf((mu + c * s * s - math.log(m)) / s))
    e = dist.cdf(m) + m ** -c * partial
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-8)


def test_power_curve_at_dose_zero_is_refused():
    d = {"unit": "mg/m3", "curve": {"model": "power", "exponent": 0.4, "reference_dose": 1.0,
                                    "beyond": "extend"},
         "exposure": {"gm": 8.0, "gsd": 1.9}}
    with pytest.raises(InputError, match=r"\[attribution\] key 'minimum_risk'.*offset"):
        _run(d)


def test_best_family_reports_every_fit(tmp_path):
    r"""``family = "best"`` fits every family and keeps the lowest AIC. The
    lognormal entry's log-likelihood must equal scipy.stats.lognorm's at the
    closed-form MLE (mean and divisor-n SD of ln x)."""
    values = np.array([2.2, 3.9, 4.4, 5.0, 6.1, 7.3, 8.8, 9.4, 12.0, 14.9, 18.3, 25.1])
    text = """\
unit = "ppm"
[curve]
model = "linear"
err = 0.05
[exposure]
table = "measurements.csv"
family = "best"
"""
    rows = "value\n" + "\n".join(f"{v}" for v in values) + "\n"
    r = run_analysis(load_analysis(write_case(tmp_path, text, bands=None, measurements=rows)))
    fits = r.to_dict()["exposure"]["fits"]
    assert sorted(f["family"] for f in fits) == ["gamma", "lognormal", "weibull"]
    best = min(fits, key=lambda f: f["aic"])
    assert best["family"] == r.to_dict()["exposure"]["family"]
    lx = np.log(values)
    ll = stats.lognorm.logpdf(values, s=lx.std(), scale=math.exp(lx.mean())).sum()
    lognormal = next(f for f in fits if f["family"] == "lognormal")
    np.testing.assert_allclose(lognormal["loglik"], ll, rtol=1e-8)


def test_python_api_for_notebooks(tmp_path):
    import doseattr

    path = write_case(tmp_path)
    r = doseattr.run_analysis(doseattr.load_analysis(path))
    assert isinstance(r, doseattr.Results)
    assert "PAF" in r.summary() and "PAF" in repr(r)
