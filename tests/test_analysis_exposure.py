"""Exposure inputs of the analysis file beyond measurements and GM/GSD:
percentiles, binned tables, zeros as the unexposed share, work histories,
and the empirical PAF reported beside the fitted ones. Each numeric check
names its outside reference.
"""

from __future__ import annotations

import math
from datetime import date

import numpy as np
import pytest
from scipy import optimize, stats

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

ERR = {"model": "linear", "err": 0.04, "per": 1.0, "beyond": "extend"}  # RR = 1 + 0.04 x


def _run(tmp_path, exposure: dict, files: dict | None = None, unit="ug/m3"):
    for name, text in (files or {}).items():
        (tmp_path / name).write_text(text)
    return run_analysis(analysis_from_dict({"unit": unit, "curve": ERR, "exposure": exposure},
                                           base_dir=tmp_path))


def test_two_percentiles_give_the_lognormal_exactly(tmp_path):
    r"""Lognormal quantiles are :math:`e^{\mu + s z_p}`, so the median gives
    :math:`GM = x_{50}` and the 95th percentile
    :math:`GSD = (x_{95}/x_{50})^{1/z_{0.95}}` (scipy.stats.norm.ppf). With
    RR = 1 + b x the PAF is :math:`1 - 1/(1 + b e^{\mu + s^2/2})`
    (lognormal mean)."""
    r = _run(tmp_path, {"percentiles": {"50": 8.0, "95": 20.0}})
    gsd = (20.0 / 8.0) ** (1 / stats.norm.ppf(0.95))
    p = r.to_dict()["exposure"]["parameters"]
    np.testing.assert_allclose([p["gm"], p["gsd"]], [8.0, gsd], rtol=1e-8)
    mean = 8.0 * math.exp(math.log(gsd) ** 2 / 2)
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / (1 + 0.04 * mean), rtol=1e-8)


@pytest.mark.parametrize("pct", ["0", "100", "120"])
def test_percentile_outside_0_100(tmp_path, pct):
    with pytest.raises(InputError, match=rf"\[exposure\] key 'percentiles': percentile {pct} "
                                         "lies outside 0 to 100"):
        _run(tmp_path, {"percentiles": {"50": 8.0, pct: 20.0}})


BINS = """\
lower,upper,count
0,5,120
5,10,260
10,20,310
20,40,150
40,,40
"""


def test_binned_counts_match_scipy_grouped_likelihood(tmp_path):
    r"""Grouped maximum likelihood :math:`\max \sum_j n_j \ln[F(u_j) - F(l_j)]`
    for a lognormal, maximised independently here with
    scipy.optimize.minimize over (ln GM, ln ln GSD) using scipy.stats.lognorm."""
    r = _run(tmp_path, {"bins": "bins.csv", "family": "lognormal"}, {"bins.csv": BINS})
    lo = np.array([0, 5, 10, 20, 40.0])
    up = np.array([5, 10, 20, 40, np.inf])
    n = np.array([120, 260, 310, 150, 40.0])

    def negll(theta):
        d = stats.lognorm(s=math.exp(theta[1]), scale=math.exp(theta[0]))
        return -np.sum(n * np.log(d.cdf(up) - d.cdf(lo)))

    res = optimize.minimize(negll, [math.log(10), math.log(0.7)], method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 5000})
    p = r.to_dict()["exposure"]["parameters"]
    np.testing.assert_allclose([p["gm"], math.log(p["gsd"])],
                               [math.exp(res.x[0]), math.exp(res.x[1])], rtol=1e-5)


def test_shares_must_sum_to_one(tmp_path):
    shares = "lower,upper,share\n0,5,0.2\n5,10,0.3\n10,,0.4\n"
    with pytest.raises(InputError, match=r"bins.csv: column 'share': shares sum to 0.9"):
        _run(tmp_path, {"bins": "bins.csv"}, {"bins.csv": shares})


def test_zeros_give_the_unexposed_share(tmp_path):
    r"""Zeros in the data are people with no exposure: the unexposed share
    is their weighted proportion, and the lognormal is fitted to the rest
    (closed-form weighted MLE on the log scale). With RR = 1 + b x:
    :math:`E[RR] = u + (1 - u)(1 + b\,GM\,e^{\ln^2 GSD/2})`."""
    values = np.array([0, 0, 3.0, 5.5, 7.1, 9.0, 12.4, 20.3])
    weights = np.array([2, 1, 1, 2, 1, 3, 1, 1.0])
    text = "value,weight\n" + "\n".join(f"{v},{w:g}" for v, w in zip(values, weights)) + "\n"
    r = _run(tmp_path, {"table": "m.csv"}, {"m.csv": text})
    u = weights[values == 0].sum() / weights.sum()
    d = r.to_dict()["exposure"]
    np.testing.assert_allclose(d["unexposed"], u, rtol=1e-12)
    pos, w = values[values > 0], weights[values > 0]
    mu = np.sum(w * np.log(pos)) / w.sum()
    s2 = np.sum(w * (np.log(pos) - mu) ** 2) / w.sum()
    np.testing.assert_allclose([d["parameters"]["gm"], d["parameters"]["gsd"]],
                               [math.exp(mu), math.exp(math.sqrt(s2))], rtol=1e-6)
    e = u + (1 - u) * (1 + 0.04 * math.exp(mu + s2 / 2))
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-6)


def test_empirical_paf_is_reported_beside_the_fit(tmp_path):
    r"""The empirical PAF is :math:`1 - 1/\sum_i w_i RR(x_i)`, weights
    normalised to 1 (the weighted mean of RR over the values)."""
    values = np.array([2.0, 3.5, 4.1, 6.0, 8.8, 15.2])
    weights = np.array([1, 2, 1, 1, 3, 1.0])
    text = "value,weight\n" + "\n".join(f"{v},{w:g}" for v, w in zip(values, weights)) + "\n"
    r = _run(tmp_path, {"table": "m.csv", "family": "gamma"}, {"m.csv": text})
    rows = {v["family"]: v for v in r.to_dict()["exposure_comparison"]}
    e = np.sum(weights * (1 + 0.04 * values)) / weights.sum()
    np.testing.assert_allclose(rows["empirical"]["paf"], 1 - 1 / e, rtol=1e-12)
    assert rows["gamma"]["paf"] == r.paf.estimate


HISTORY = """\
worker,start,end,intensity
W1,2000-01-01,2005-07-01,2.0
W1,2005-07-01,2012-01-01,0.5
W2,1995-03-15,2001-03-15,1.2
W3,2011-01-01,2019-06-30,3.0
W4,1990-01-01,1999-12-31,0.8
W5,2003-05-01,2008-05-01,1.5
"""


def test_work_histories_give_cumulative_exposure(tmp_path):
    """Cumulative exposure = sum of intensity x years before the analysis
    date minus the lag, years = days / 365.25 (the issue's convention),
    computed here by hand with datetime arithmetic. W3 started after the
    cutoff, so W3 is unexposed (a zero)."""
    r = _run(tmp_path, {"histories": "h.csv", "as_of": "2020-01-01", "lag_years": 10},
             {"h.csv": HISTORY}, unit="mg/m3-years")
    cutoff = date(2020, 1, 1).toordinal() - 10 * 365.25

    def years(a, b):
        return max(0.0, min(date.fromisoformat(b).toordinal(), cutoff)
                   - date.fromisoformat(a).toordinal()) / 365.25

    expected = {
        "W1": 2.0 * years("2000-01-01", "2005-07-01") + 0.5 * years("2005-07-01", "2012-01-01"),
        "W2": 1.2 * years("1995-03-15", "2001-03-15"),
        "W3": 0.0,
        "W4": 0.8 * years("1990-01-01", "1999-12-31"),
        "W5": 1.5 * years("2003-05-01", "2008-05-01"),
    }
    got = {w["worker"]: w["cumulative"] for w in r.to_dict()["workers"]}
    assert got.keys() == expected.keys()
    np.testing.assert_allclose([got[k] for k in expected], list(expected.values()), rtol=1e-12)
    np.testing.assert_allclose(r.exposure.unexposed, 1 / 5, rtol=1e-12)


def test_overlapping_jobs_are_refused(tmp_path):
    bad = HISTORY.replace("W1,2005-07-01,2012-01-01", "W1,2005-01-01,2012-01-01")
    with pytest.raises(InputError, match=r"h.csv: row 3, column 'start': worker 'W1': the jobs "
                                         r"in rows 2 and 3 overlap"):
        _run(tmp_path, {"histories": "h.csv", "as_of": "2020-01-01"}, {"h.csv": bad},
             unit="mg/m3-years")


def test_dates_out_of_order_are_refused(tmp_path):
    bad = HISTORY.replace("W2,1995-03-15,2001-03-15", "W2,2001-03-15,1995-03-15")
    with pytest.raises(InputError, match=r"h.csv: row 4, column 'end'.*out of order"):
        _run(tmp_path, {"histories": "h.csv", "as_of": "2020-01-01"}, {"h.csv": bad},
             unit="mg/m3-years")


def test_histories_need_a_cumulative_unit(tmp_path):
    with pytest.raises(InputError, match=r"key 'unit'.*mg/m3-years"):
        _run(tmp_path, {"histories": "h.csv", "as_of": "2020-01-01"}, {"h.csv": HISTORY},
             unit="mg/m3")


def test_histories_write_workers_csv(tmp_path):
    from doseattr.outputs.write import write_outputs

    r = _run(tmp_path, {"histories": "h.csv", "as_of": "2020-01-01", "lag_years": 10},
             {"h.csv": HISTORY}, unit="mg/m3-years")
    write_outputs(r, tmp_path / "out", figures=False)
    header = (tmp_path / "out" / "workers.csv").read_text().splitlines()[0]
    for column in ("worker", "cumulative", "duration_years", "mean_intensity"):
        assert column in header
