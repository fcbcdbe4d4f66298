"""End to end, issue 4: exposure that arrives as work histories or as a
binned table.

Inputs are invented; expected values are hand-computed cumulative exposures
(the formula in issue 4 item 7, with dates counted by Python's ``datetime``),
closed-form maximum likelihood, scipy.stats CensoredData fits and
scipy.integrate.quad.
"""

from __future__ import annotations

import csv
import math
import warnings
from datetime import date, timedelta

import numpy as np
import pytest
from e2e_helpers import expect_excess, run_api, run_cli
from scipy import stats

# ======================================================================================
# Work histories, a 4-year lag, a worker whose only job falls inside the lag.
# ======================================================================================
JOBS = [  # worker, start, end (first day no longer in the job), 8-hour TWA in mg/m3
    ("w1", "2010-01-01", "2015-07-01", 0.20),
    ("w1", "2015-07-01", "2022-01-01", 0.35),
    ("w2", "2005-03-15", "2012-03-15", 0.50),
    ("w3", "2018-01-01", "2023-06-30", 0.10),
    ("w4", "2021-01-01", "2023-01-01", 0.80),
    ("w5", "2000-01-01", "2019-01-01", 0.05),
    ("w6", "2012-06-01", "2016-06-01", 0.25),
    ("w6", "2017-01-01", "2019-06-01", 0.40),
]
AS_OF, LAG = date(2024, 1, 1), 4.0

HISTORIES = """\
    unit = "mg/m3-years"

    [curve]
    model = "log-linear"
    rr = 1.2
    per = 1
    ci = [1.1, 1.3]
    max_dose = 10

    [exposure]
    histories = "jobs.csv"
    as_of = "2024-01-01"
    lag_years = 4
    family = "lognormal"
"""


def hand_cumulative():
    """Issue 4 item 7: cumulative = sum over jobs of intensity x days counted /
    365.25, counting only days before the cutoff as_of - lag; a 4-year lag is
    4 x 365.25 = 1461 days, so the cutoff is 2020-01-01 (2020 is a leap year:
    366 + 3 x 365 = 1461). Duration: the same sum without the intensity; mean
    intensity: their ratio."""
    cutoff = AS_OF - timedelta(days=LAG * 365.25)
    assert cutoff == date(2020, 1, 1)
    cum, dur = {}, {}
    for w, s, e, c in JOBS:
        days = max(0, (min(date.fromisoformat(e), cutoff) - date.fromisoformat(s)).days)
        cum[w] = cum.get(w, 0.0) + c * days / 365.25
        dur[w] = dur.get(w, 0.0) + days / 365.25
    return cum, dur


@pytest.fixture(scope="module")
def histories(tmp_path_factory):
    folder = tmp_path_factory.mktemp("histories")
    jobs = "worker,start,end,intensity\n" + "".join(f"{w},{s},{e},{c}\n" for w, s, e, c in JOBS)
    return folder, run_cli(folder, HISTORIES, {"jobs.csv": jobs})


def test_workers_csv_has_hand_computed_cumulative_exposure(histories):
    folder, res = histories
    cum, dur = hand_cumulative()
    with open(folder / "out" / "workers.csv", newline="") as fh:
        rows = list(csv.DictReader(line for line in fh if not line.startswith("#")))
    assert {"worker", "cumulative", "duration_years", "mean_intensity"} <= set(rows[0])
    got = {r["worker"]: r for r in rows}
    assert sorted(got) == sorted(cum)
    for w in cum:
        assert float(got[w]["cumulative"]) == pytest.approx(cum[w], rel=1e-9, abs=1e-12), w
        assert float(got[w]["duration_years"]) == pytest.approx(dur[w], rel=1e-9, abs=1e-12), w
        if dur[w] > 0:
            assert float(got[w]["mean_intensity"]) == pytest.approx(cum[w] / dur[w], rel=1e-9), w
    in_json = {r["worker"]: r for r in res["workers"]}
    assert in_json["w1"]["cumulative"] == pytest.approx(cum["w1"], rel=1e-9)


def test_histories_feed_the_fit_and_the_paf(histories):
    """Workers with no exposure before the cutoff are the unexposed share
    (1 of 6 here); the lognormal MLE of the others' cumulative exposure is
    mean and (1/n) SD of the logs (closed form); PAF by quad with
    RR_m(x) - 1 = expm1(ln(1.2) min(x, 10)), m = 0."""
    _, res = histories
    cum, _ = hand_cumulative()
    x = np.array([v for v in cum.values() if v > 0])
    mu, s = np.log(x).mean(), np.log(x).std()
    e = res["exposure"]
    assert e["unexposed"] == pytest.approx(1 / 6, rel=1e-12)
    assert e["parameters"]["gm"] == pytest.approx(math.exp(mu), rel=1e-6)
    assert e["parameters"]["gsd"] == pytest.approx(math.exp(s), rel=1e-6)
    dist = stats.lognorm(s, scale=math.exp(mu))
    ex = (5 / 6) * expect_excess(lambda v: math.expm1(math.log(1.2) * min(v, 10.0)), dist, [10.0])
    assert res["paf"]["estimate"] == pytest.approx(ex / (1 + ex), rel=1e-6)
    assert res["unit"] == "mg/m3-years"


# ======================================================================================
# A binned table with counts and an open top bin, fitted by grouped likelihood.
# ======================================================================================
BINS = [(0, 2, 30), (2, 5, 55), (5, 10, 48), (10, 20, 20), (20, None, 6)]

BINNED = """\
    unit = "ug/m3"

    [curve]
    model = "linear"
    err = 0.1
    per = 10
    max_dose = 40

    [exposure]
    bins = "bins.csv"
    family = "gamma"
"""


def test_binned_gamma_matches_scipy_interval_censored_fit(tmp_path):
    """Grouped (interval-censored) MLE: a count n in (l, u] is n observations
    known only to lie in that interval, so scipy.stats.gamma.fit on
    CensoredData (left-censored for the first bin, interval for the middle,
    right-censored for the open top bin), location fixed at 0, is the
    reference. scipy's optimiser stops near 1e-4 relative: parameters to
    2e-3, and the project's log-likelihood sum n log(F(u) - F(l)) must be at
    least scipy's. PAF: RR - 1 = 0.01 min(x, 40) (no CI: no uncertainty), quad."""
    text = "lower,upper,count\n" + "".join(
        f"{a},{'' if b is None else b},{n}\n" for a, b, n in BINS)
    res = run_api(tmp_path, BINNED, {"bins.csv": text})
    left, interval, right = [], [], []
    for a, b, n in BINS:
        if a == 0:
            left += [b] * n
        elif b is None:
            right += [a] * n
        else:
            interval += [[a, b]] * n
    data = stats.CensoredData(left=left, interval=interval, right=right)
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)  # scipy's optimiser probing, not ours
        k, _, theta = stats.gamma.fit(data, floc=0)

    def loglik(shape, scale):
        d = stats.gamma(shape, scale=scale)
        return sum(n * math.log(d.cdf(math.inf if b is None else b) - d.cdf(a)) for a, b, n in BINS)

    p = res["exposure"]["parameters"]
    assert res["exposure"]["family"] == "gamma"
    assert p["shape"] == pytest.approx(k, rel=2e-3)
    assert p["scale"] == pytest.approx(theta, rel=2e-3)
    assert loglik(p["shape"], p["scale"]) >= loglik(k, theta) - 1e-7
    dist = stats.gamma(p["shape"], scale=p["scale"])
    ex = expect_excess(lambda x: 0.01 * min(x, 40.0), dist, [40.0])
    assert res["paf"]["estimate"] == pytest.approx(ex / (1 + ex), rel=1e-7)


# ======================================================================================
# Summary inputs for every family.
# ======================================================================================
SUMMARY = """\
    unit = "ug/m3"

    [curve]
    model = "log-linear"
    rr = 1.2
    per = 10
    max_dose = 30

    [exposure]
    family = "FAMILY"
    INPUT
"""


@pytest.mark.parametrize("family, given", [
    ("gamma", "percentiles = {50 = 8.0, 95 = 20.0}"),
    ("weibull", "percentiles = {50 = 8.0, 95 = 20.0}"),
    ("weibull", "mean = 10.0\nsd = 6.0"),
])
def test_summary_inputs_for_other_families(tmp_path, family, given):
    """Two percentiles are matched exactly (issue 4 item 4); mean and SD by
    moments (issue 2 item 3).
    gamma: x_95/x_50 depends on the shape only; solve it with scipy.optimize.brentq
    on scipy.stats.gamma.ppf, then scale = x_50 / ppf(0.5; shape).
    weibull percentiles: x_p = scale (-ln(1 - p))^(1/k), so
    k = ln(ln 0.05 / ln 0.5) / ln(x_95/x_50) and scale = x_50 / (ln 2)^(1/k).
    weibull moments: scipy.stats.weibull_min(k, scale) must have the given
    mean and SD."""
    from scipy import optimize

    res = run_api(tmp_path, SUMMARY.replace("FAMILY", family).replace("INPUT", given), {})
    p = res["exposure"]["parameters"]
    assert res["exposure"]["family"] == family
    if family == "gamma":
        k = optimize.brentq(lambda a: stats.gamma.ppf(0.95, a) / stats.gamma.ppf(0.5, a) - 2.5,
                            0.05, 200.0, xtol=1e-14)
        assert p["shape"] == pytest.approx(k, rel=1e-8)
        assert p["scale"] == pytest.approx(8.0 / stats.gamma.ppf(0.5, k), rel=1e-8)
    elif "percentiles" in given:
        k = math.log(math.log(0.05) / math.log(0.5)) / math.log(20.0 / 8.0)
        assert p["shape"] == pytest.approx(k, rel=1e-8)
        assert p["scale"] == pytest.approx(8.0 / math.log(2) ** (1 / k), rel=1e-8)
    else:
        d = stats.weibull_min(p["shape"], scale=p["scale"])
        assert d.mean() == pytest.approx(10.0, rel=1e-8)
        assert d.std() == pytest.approx(6.0, rel=1e-8)
    dist = {"gamma": stats.gamma, "weibull": stats.weibull_min}[family](p["shape"], scale=p["scale"])
    ex = expect_excess(lambda v: math.expm1(math.log(1.2) / 10 * min(v, 30.0)), dist, [30.0])
    assert res["paf"]["estimate"] == pytest.approx(ex / (1 + ex), rel=1e-7)


# ======================================================================================
# The empirical path (issue 4 item 5).
# ======================================================================================
EMPIRICAL = """\
    unit = "ug/m3"

    [curve]
    model = "log-linear"
    rr = 1.2
    per = 10
    max_dose = 30

    [exposure]
    table = "values.csv"
    family = "empirical"
"""


def test_empirical_family_is_the_weighted_mean_of_rr(tmp_path):
    """PAF = 1 - 1/E_w[RR_m(x_i)], the weighted mean over the values (the
    definition in issue 4 item 5, with the PAF of issue 2 item 3)."""
    values = [(0.0, 2), (1.5, 1), (4.0, 3), (9.0, 1), (14.0, 2), (35.0, 1)]
    text = "value,weight\n" + "".join(f"{v},{w}\n" for v, w in values)
    res = run_api(tmp_path, EMPIRICAL, {"values.csv": text})
    x = np.array([v for v, _ in values])
    w = np.array([c for _, c in values], float)
    mean_rr = np.sum(w * np.exp(math.log(1.2) / 10 * np.minimum(x, 30.0))) / w.sum()
    assert res["paf"]["estimate"] == pytest.approx(1 - 1 / mean_rr, rel=1e-12)


def test_heavy_censoring_warns(tmp_path):
    """Issue 4 item 1: more than half of the values censored gets a warning
    (6 of 10 here), and the counts are reported."""
    toml = """\
        unit = "ug/m3"

        [curve]
        model = "log-linear"
        rr = 1.2
        per = 10
        max_dose = 30

        [exposure]
        table = "values.csv"
        family = "lognormal"
    """
    values = ["<1", "<1", "<1", "<2", "<2", "<2", "2.5", "4.1", "7.9", "3.3"]
    res = run_api(tmp_path, toml, {"values.csv": "value\n" + "\n".join(values) + "\n"})
    assert res["exposure"]["censored"] == 6 and res["exposure"]["detected"] == 4
    assert any("censor" in w or "detection limit" in w for w in res["warnings"])
