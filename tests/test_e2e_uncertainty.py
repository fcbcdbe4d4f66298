"""End to end, issue 5: Monte Carlo intervals, attributable cases by stratum,
several outcomes in one analysis.

Inputs are invented; expected values come from scipy.integrate.quad over
scipy.stats densities, from the normal distribution's percentiles
(scipy.stats.norm) and from derivations in the docstrings.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from e2e_helpers import expect_excess, run_api, run_cli
from scipy import stats

Z975 = stats.norm.ppf(0.975)  # scipy.stats


def estimate(v):
    """A stratum's ``paf`` is a number or an object with ``estimate`` (issue 5
    names the key, not its shape)."""
    return v["estimate"] if isinstance(v, dict) else v


def lognormal(gm, gsd):
    return stats.lognorm(math.log(gsd), scale=gm)  # scipy.stats, GM/GSD parametrisation


# ======================================================================================
# Case G: coefficient uncertainty only, a burden table with a stratum of its own exposure.
# ======================================================================================
CASE_G = """\
    unit = "ug/m3"

    [curve]
    model = "log-linear"
    rr = 1.08
    per = 10
    ci = [1.05, 1.11]
    max_dose = 50

    [exposure]
    family = "lognormal"
    gm = 9.0
    gsd = 1.8

    [attribution]
    minimum_risk = 2.4

    [[scenario]]
    name = "cap 20"
    cap = 20

    [uncertainty]
    draws = 2000
    seed = 11

    [burden]
    table = "strata.csv"
"""

STRATA = """\
    stratum,cases,population,gm,gsd
    north,120,50000,,
    south,80,30000,14,1.6
    east,45.5,20000,,
"""

B_HAT = math.log(1.08) / 10
SE_B = (math.log(1.11) - math.log(1.05)) / (2 * Z975) / 10  # symmetric CI on the log scale


def paf_at(b: float, dist, m: float = 2.4, top: float = 50.0) -> float:
    """PAF of RR_m(x) = exp(b (min(max(x, m), top) - m)) over ``dist`` (quad)."""
    e = expect_excess(lambda x: math.expm1(b * (min(max(x, m), top) - m)), dist, [m, top])
    return e / (1 + e)


@pytest.fixture(scope="module")
def case_g(tmp_path_factory):
    return run_api(tmp_path_factory.mktemp("case_g"), CASE_G, {"strata.csv": STRATA})


def test_point_estimates_are_the_quad_values(case_g):
    shared = lognormal(9.0, 1.8)
    assert case_g["paf"]["estimate"] == pytest.approx(paf_at(B_HAT, shared), rel=1e-7)


def test_interval_matches_paf_at_coefficient_percentiles(case_g):
    """Only the coefficient varies (the exposure is typed in), and the PAF is
    increasing in b (every RR_m(x) - 1 = expm1(b (...)) with (...) >= 0 is), so
    the 2.5th percentile of the PAF draws is the PAF at the 2.5th percentile of
    the b draws. With D = 2000 normal draws that percentile is b_hat + se
    (-1.96 + delta), where the sample quantile's standard error is
    sqrt(p (1 - p)/D)/phi(z_p) = 0.0597 (in units of se); delta within
    +-0.24 (4 standard errors) makes a failure by chance ~1e-4."""
    shared = lognormal(9.0, 1.8)
    qse = math.sqrt(0.025 * 0.975 / 2000) / stats.norm.pdf(Z975)
    d = 4 * qse
    lo = case_g["paf"]["lower"]
    hi = case_g["paf"]["upper"]
    assert paf_at(B_HAT - (Z975 + d) * SE_B, shared) <= lo <= paf_at(B_HAT - (Z975 - d) * SE_B, shared)
    assert paf_at(B_HAT + (Z975 - d) * SE_B, shared) <= hi <= paf_at(B_HAT + (Z975 + d) * SE_B, shared)
    assert case_g["paf"]["mcse"] > 0
    pif = case_g["scenarios"][0]["pif"]
    assert pif["lower"] < pif["estimate"] < pif["upper"]


def test_strata_attributable_cases(case_g):
    """Attributable cases = cases x PAF of the stratum's own exposure
    (issue 5 item 2); a stratum with gm/gsd uses them, the others the shared
    exposure; total PAF = total attributable / total cases."""
    b = case_g["burden"]
    strata = {s["stratum"]: s for s in b["strata"]}
    assert list(strata) == ["north", "south", "east"]
    expected_paf = {"north": paf_at(B_HAT, lognormal(9.0, 1.8)),
                    "south": paf_at(B_HAT, lognormal(14.0, 1.6)),
                    "east": paf_at(B_HAT, lognormal(9.0, 1.8))}
    cases = {"north": 120.0, "south": 80.0, "east": 45.5}
    for name, s in strata.items():
        assert s["cases"] == cases[name]
        assert estimate(s["paf"]) == pytest.approx(expected_paf[name], rel=1e-7), name
        assert s["attributable"]["estimate"] == pytest.approx(
            cases[name] * expected_paf[name], rel=1e-7), name
        assert s["attributable"]["lower"] < s["attributable"]["estimate"] < s["attributable"]["upper"]
    total = b["total"]
    assert total["cases"] == pytest.approx(sum(cases.values()), rel=1e-12)
    tot_attr = sum(cases[k] * expected_paf[k] for k in cases)
    assert total["attributable"]["estimate"] == pytest.approx(tot_attr, rel=1e-7)
    assert estimate(total["paf"]) == pytest.approx(tot_attr / sum(cases.values()), rel=1e-7)


def test_total_interval_is_the_sum_of_comonotone_strata(case_g):
    """Every stratum's attributable cases are an increasing function of the
    one varying coefficient b, so in every draw the strata and their total
    are ordered the same way: the k-th smallest total is the sum of the k-th
    smallest stratum values, and any percentile (numpy's linear
    interpolation between the same two order statistics) of the total is the
    sum of the strata's percentiles. Totals summed draw by draw (issue 5)
    must satisfy this exactly, up to rounding."""
    b = case_g["burden"]
    for key in ("lower", "upper"):
        assert b["total"]["attributable"][key] == pytest.approx(
            sum(s["attributable"][key] for s in b["strata"]), rel=1e-9)


# ======================================================================================
# Case H: two outcomes, each with its own curve (power with an offset; linear ERR),
# sharing a lognormal exposure given by three percentiles.
# ======================================================================================
CASE_H = """\
    unit = "ug/m3"

    [exposure]
    family = "lognormal"
    percentiles = {25 = 4.0, 50 = 6.5, 90 = 15.0}

    [attribution]
    minimum_risk = 1.0

    [[outcome]]
    name = "asthma"
    [outcome.curve]
    model = "power"
    exponent = 0.35
    ci = [0.2, 0.5]
    offset = 2.0
    [outcome.burden]
    table = "asthma.csv"

    [[outcome]]
    name = "copd"
    [outcome.curve]
    model = "linear"
    err = 0.05
    per = 10
    ci = [0.01, 0.09]
    max_dose = 30
"""

ASTHMA = """\
    stratum,cases
    girls,300
    boys,410
"""


@pytest.fixture(scope="module")
def case_h(tmp_path_factory):
    return run_cli(tmp_path_factory.mktemp("case_h"), CASE_H, {"asthma.csv": ASTHMA})


def _percentile_fit():
    """Three percentiles, least squares on the log scale: ln x_p = mu + s z_p
    is linear in (mu, s), so the fit is ordinary least squares of ln x_p on
    z_p = scipy.stats.norm.ppf(p) (numpy.linalg.lstsq); GM = e^mu, GSD = e^s."""
    p = np.array([0.25, 0.50, 0.90])
    x = np.array([4.0, 6.5, 15.0])
    a = np.column_stack([np.ones(3), stats.norm.ppf(p)])
    (mu, s), *_ = np.linalg.lstsq(a, np.log(x), rcond=None)
    return math.exp(mu), math.exp(s)


def test_lognormal_from_three_percentiles(case_h):
    gm, gsd = _percentile_fit()
    p = case_h["exposure"]["parameters"]
    assert p["gm"] == pytest.approx(gm, rel=1e-7)
    assert p["gsd"] == pytest.approx(gsd, rel=1e-7)


def test_each_outcome_has_its_own_paf(case_h):
    """asthma: power RR = ((x + 2)/(0 + 2))^0.35, extended (no max_dose),
    RR_m(x) = ((max(x, 1) + 2)/3)^0.35; a power curve over a lognormal has
    every moment, so the integral is finite. copd: RR = 1 + 0.005 min(x, 30),
    RR_m(x) - 1 = 0.005 (min(max(x, 1), 30) - 1)/(1 + 0.005).
    Both by quad over the lognormal of the percentile fit."""
    gm, gsd = _percentile_fit()
    dist = lognormal(gm, gsd)
    outcomes = {o["name"]: o for o in case_h["outcomes"]}
    assert list(outcomes) == ["asthma", "copd"]
    e = expect_excess(lambda x: math.expm1(0.35 * math.log((max(x, 1.0) + 2) / 3)), dist, [1.0])
    assert outcomes["asthma"]["paf"]["estimate"] == pytest.approx(e / (1 + e), rel=1e-6)
    e = expect_excess(lambda x: 0.005 * (min(max(x, 1.0), 30.0) - 1) / 1.005, dist, [1.0, 30.0])
    assert outcomes["copd"]["paf"]["estimate"] == pytest.approx(e / (1 + e), rel=1e-6)
    assert outcomes["asthma"]["curve"]["model"] == "power"
    assert outcomes["copd"]["curve"]["model"] == "linear"
    strata = outcomes["asthma"]["burden"]["strata"]
    assert [s["stratum"] for s in strata] == ["girls", "boys"]
    for s, n in zip(strata, (300.0, 410.0)):
        assert s["attributable"]["estimate"] == pytest.approx(
            n * outcomes["asthma"]["paf"]["estimate"], rel=1e-9)


def _num(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _interval(d) -> bool:
    return all(_num(d[k]) for k in ("estimate", "lower", "upper")) and d["lower"] <= d["upper"]


def test_contract_issue5_keys(case_g, case_h):
    """The keys issue 5 says external validation reads, with their types."""
    assert _interval(case_g["paf"])
    for s in case_g["scenarios"]:
        assert _interval(s["pif"])
    for s in case_g["burden"]["strata"]:
        assert isinstance(s["stratum"], str) and _num(s["cases"])
        assert _interval(s["attributable"]) and _num(estimate(s["paf"]))
    total = case_g["burden"]["total"]
    assert _num(total["cases"]) and _interval(total["attributable"]) and _num(estimate(total["paf"]))
    assert isinstance(case_h["outcomes"], list) and len(case_h["outcomes"]) == 2
    for o in case_h["outcomes"]:
        assert isinstance(o["name"], str)
        assert _num(o["paf"]["estimate"]) and isinstance(o["scenarios"], list)
        assert "burden" in o and "curve" in o


# ======================================================================================
# One source of uncertainty at a time: the exposure fit, then the minimum-risk range.
# ======================================================================================
EXPOSURE_ONLY = """\
    unit = "ug/m3"

    [curve]
    model = "linear"
    err = 0.2
    per = 10

    [exposure]
    table = "values.csv"
    family = "lognormal"

    [uncertainty]
    draws = 2000
    seed = 3
"""


def test_exposure_fit_uncertainty_matches_asymptotic_normal(tmp_path):
    """Only the exposure varies (the curve has no CI). For n uncensored,
    unweighted values the lognormal MLE is mu = mean(ln x), s = sd(ln x)
    (1/n); its inverse Fisher information on (mu, ln s) is diag(s^2/n, 1/(2n))
    (normal-theory result, e.g. any mathematical statistics text; from
    memory). With a linear ERR curve extended and m = 0,
    PAF = b E[X]/(1 + b E[X]), E[X] = exp(mu + s^2/2), so a reference
    Monte Carlo of 200,000 draws of (mu, ln s) gives the PAF's distribution.
    The project's 2.5th/97.5th percentiles from D = 2000 draws must sit at
    reference probabilities 0.025/0.975 within 4 sqrt(p(1 - p)/D) = 0.014
    (binomial error of a sample quantile's rank)."""
    rng = np.random.default_rng(99)
    x = np.round(np.exp(rng.normal(2.0, 0.7, size=40)), 3)
    res = run_api(tmp_path, EXPOSURE_ONLY, {"values.csv": "value\n" + "".join(f"{v}\n" for v in x)})
    lx = np.log(x)
    mu, s, n, b = lx.mean(), lx.std(), x.size, 0.02
    ref = np.random.default_rng(1)
    m_draw = ref.normal(mu, s / math.sqrt(n), size=200_000)
    s_draw = np.exp(ref.normal(math.log(s), math.sqrt(1 / (2 * n)), size=200_000))
    mean = np.exp(m_draw + s_draw**2 / 2)
    pafs = np.sort(b * mean / (1 + b * mean))
    tol = 4 * math.sqrt(0.025 * 0.975 / 2000)
    for key, p in (("lower", 0.025), ("upper", 0.975)):
        rank = np.searchsorted(pafs, res["paf"][key]) / pafs.size
        assert abs(rank - p) <= tol, (key, rank)
    point = b * math.exp(mu + s**2 / 2)
    assert res["paf"]["estimate"] == pytest.approx(point / (1 + point), rel=1e-6)


MIN_RISK_RANGE = """\
    unit = "ug/m3"

    [curve]
    model = "log-linear"
    rr = 1.3
    per = 10

    [exposure]
    family = "gamma"
    shape = 3.0
    scale = 2.0

    [attribution]
    minimum_risk = [2.0, 6.0]

    [uncertainty]
    draws = 1000
    seed = 8
"""


def test_minimum_risk_range_interval(tmp_path):
    """Only m varies, uniform on [2, 6] (issue 5 item 1), point estimate at
    m = 4. The PAF falls as m rises (RR_m(x) - 1 = expm1(b max(x - m, 0)) falls
    pointwise), so its 2.5th percentile is the PAF at m's 97.5th percentile,
    2 + 0.975 x 4, and vice versa. A sample quantile of D = 1000 uniform
    draws has standard error sqrt(p(1 - p)/D) x 4 = 0.0198; bounds at 4 of
    those. Closed form for the gamma (see excess_above in test_e2e_numbers):
    E[exp(b max(X - m, 0))] = F(m) + e^{-bm}(1 - bt)^{-k} S'(m)."""
    res = run_api(tmp_path, MIN_RISK_RANGE, {})
    b, k, t = math.log(1.3) / 10, 3.0, 2.0

    def paf(m):
        tilted = stats.gamma(k, scale=t / (1 - b * t))
        e = stats.gamma(k, scale=t).cdf(m) + math.exp(-b * m) * (1 - b * t) ** (-k) * tilted.sf(m)
        return 1 - 1 / e

    d = 4 * 4 * math.sqrt(0.025 * 0.975 / 1000)
    assert res["paf"]["estimate"] == pytest.approx(paf(4.0), rel=1e-8)
    assert paf(5.9 + d) <= res["paf"]["lower"] <= paf(5.9 - d)
    assert paf(2.1 + d) <= res["paf"]["upper"] <= paf(2.1 - d)
    assert res["minimum_risk_range"] == [2.0, 6.0]
