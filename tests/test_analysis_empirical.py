"""``family = "empirical"`` as the main exposure (issue 4 item 5): the PAF
is the weighted mean of RR over the values, with no fitted distribution.

Expected values come from the definition written out with numpy, from
closed-form weighted maximum likelihood checked with scipy.stats, and from
a bootstrap computed here with numpy. The inputs are invented.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.cli import main
from doseattr.errors import InputError

VALUES = np.array([0.0, 2.0, 3.5, 4.1, 6.0, 8.8, 15.2, 22.7])
WEIGHTS = np.array([2, 1, 2, 1, 1, 3, 1, 1.0])
B, M, CAP = math.log(1.3) / 10.0, 3.0, 9.0  # RR = exp(B x), minimum risk M


def _table(values=VALUES, weights=WEIGHTS) -> str:
    return "value,weight\n" + "".join(f"{v:g},{w:g}\n" for v, w in zip(values, weights))


def _case(tmp_path, exposure=None, text=None, **extra):
    (tmp_path / "m.csv").write_text(text or _table())
    d = {"unit": "ug/m3",
         "curve": {"model": "log-linear", "rr": 1.3, "per": 10.0, "beyond": "extend"},
         "exposure": {"table": "m.csv", "family": "empirical", **(exposure or {})},
         "attribution": {"minimum_risk": M},
         "scenario": [{"name": "cap", "cap": CAP}], **extra}
    return run_analysis(analysis_from_dict(d, base_dir=tmp_path))


def _rr_m(x):
    """RR_m(x) = RR(max(x, m)) / RR(m) for RR = exp(b x) (issue 2 item 3)."""
    return np.exp(B * (np.maximum(x, M) - M))


def test_paf_is_the_weighted_mean_of_rr_over_the_values(tmp_path):
    r"""Definition: :math:`PAF = 1 - 1/E[RR_m(X)]` with
    :math:`E[RR_m(X)] = \sum_i w_i RR_m(x_i) / \sum_i w_i` (numpy.average);
    the zero is an ordinary value (RR_m = 1). Cap scenario:
    :math:`PIF = 1 - E[RR_m(\min(X, L))]/E[RR_m(X)]`."""
    r = _case(tmp_path)
    e = np.average(_rr_m(VALUES), weights=WEIGHTS)
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-12)
    e_cap = np.average(_rr_m(np.minimum(VALUES, CAP)), weights=WEIGHTS)
    np.testing.assert_allclose(r.scenarios[0].pif.estimate, 1 - e_cap / e, rtol=1e-12)
    d = r.to_dict()["exposure"]
    assert d["family"] == "empirical" and d["parameters"] == {}
    np.testing.assert_allclose(d["unexposed"], WEIGHTS[0] / WEIGHTS.sum(), rtol=1e-12)
    np.testing.assert_allclose(d["mean"], np.average(VALUES, weights=WEIGHTS), rtol=1e-12)


def test_typed_unexposed_share_is_a_point_mass_at_zero(tmp_path):
    r""":math:`E[RR_m] = u + (1 - u) \sum_i w_i RR_m(x_i)` (issue 4 item 6)."""
    u = 0.15
    r = _case(tmp_path, {"unexposed": u}, text=_table(VALUES[1:], WEIGHTS[1:]))
    e = u + (1 - u) * np.average(_rr_m(VALUES[1:]), weights=WEIGHTS[1:])
    np.testing.assert_allclose(r.paf.estimate, 1 - 1 / e, rtol=1e-12)


def test_parametric_fits_are_listed_beside_it(tmp_path):
    r"""``exposure.fits`` lists the families fitted to the positive values
    for comparison. The lognormal entry is the weighted MLE in closed form
    (weighted mean and divisor-n SD of ln x, weights scaled to sum to n)
    and its log-likelihood is scipy.stats.lognorm's at that point."""
    r = _case(tmp_path)
    d = r.to_dict()
    fits = {f["family"]: f for f in d["exposure"]["fits"]}
    assert set(fits) == {"lognormal", "gamma", "weibull"}
    x, w = VALUES[1:], WEIGHTS[1:]
    w = w * x.size / w.sum()
    mu = np.average(np.log(x), weights=w)
    s = math.sqrt(np.average((np.log(x) - mu) ** 2, weights=w))
    p = fits["lognormal"]["parameters"]
    np.testing.assert_allclose([p["gm"], p["gsd"]], [math.exp(mu), math.exp(s)], rtol=1e-6)
    ll = np.sum(w * stats.lognorm.logpdf(x, s=s, scale=math.exp(mu)))
    np.testing.assert_allclose(fits["lognormal"]["loglik"], ll, rtol=1e-8)
    rows = {v["family"]: v for v in d["exposure_comparison"]}
    assert rows["empirical"]["paf"] == r.paf.estimate
    assert set(rows) == {"empirical", "lognormal", "gamma", "weibull"}


def test_bootstrap_interval_matches_a_numpy_bootstrap(tmp_path):
    r"""Only the exposure varies (the curve has no CI): the interval is the
    2.5th/97.5th percentile of the PAF over a weighted bootstrap of the rows
    (Efron 1979, Ann Stat 7:1, from memory; rows drawn with replacement,
    weights kept and renormalised). Recomputed here with numpy on 20,000
    resamples; the limits agree within Monte Carlo error (10% of the
    interval's width allowed; the sample 2.5% quantile of 2,000 draws has a
    standard error of about 2-3% of the width for a distribution like this)."""
    r = _case(tmp_path, uncertainty={"draws": 2000, "seed": 4})
    rng = np.random.default_rng(99)
    idx = rng.integers(0, VALUES.size, size=(20000, VALUES.size))
    e = np.sum(_rr_m(VALUES[idx]) * WEIGHTS[idx], axis=1) / WEIGHTS[idx].sum(axis=1)
    lo, hi = np.quantile(1 - 1 / e, [0.025, 0.975])
    tol = 0.1 * (hi - lo)
    assert abs(r.paf.lower - lo) < tol and abs(r.paf.upper - hi) < tol
    widths = {w.source: w for w in r.width_by_source}
    assert set(widths) == {"exposure"}


def test_non_detects_are_refused(tmp_path):
    text = "value\n<1.0\n2.0\n3.5\n4.1\n6.0\n"
    with pytest.raises(InputError, match=r"m.csv: column 'value': family = \"empirical\" uses "
                                         r"the values as measured and cannot use the 1 values "
                                         r"below a detection limit"):
        _case(tmp_path, text=text)


def test_band_mean_doses_need_a_fitted_family(tmp_path):
    (tmp_path / "bands.csv").write_text("lower,upper,rr,ci_lower,ci_upper\n0,5,1,,\n"
                                        "5,,1.4,1.1,1.8\n")
    (tmp_path / "m.csv").write_text(_table())
    d = {"unit": "ug/m3", "curve": {"table": "bands.csv", "dose": "band-mean"},
         "exposure": {"table": "m.csv", "family": "empirical"}}
    with pytest.raises(InputError, match=r"\[curve\] key 'dose'.*fitted exposure distribution"):
        run_analysis(analysis_from_dict(d, base_dir=tmp_path))


def test_stratum_mean_and_sd_need_a_family(tmp_path):
    (tmp_path / "strata.csv").write_text("stratum,cases,mean,sd\nA,10,5,2\nB,20,,\n")
    with pytest.raises(InputError, match=r"strata.csv: row 2, column 'sd': mean and sd need a "
                                         r"fitted family"):
        _case(tmp_path, burden={"table": "strata.csv"})


def test_command_line_run_writes_results(tmp_path, capsys):
    (tmp_path / "m.csv").write_text(_table())
    (tmp_path / "a.toml").write_text(
        'unit = "ug/m3"\n[curve]\nmodel = "linear"\nerr = 0.02\n'
        '[exposure]\ntable = "m.csv"\nfamily = "empirical"\n')
    code = main(["run", str(tmp_path / "a.toml"), "--out", str(tmp_path / "out"), "--quiet"])
    assert code == 0, capsys.readouterr().err
    data = json.loads((tmp_path / "out" / "results.json").read_text())
    e = np.average(1 + 0.02 * VALUES, weights=WEIGHTS)  # definition, RR = 1 + b x
    np.testing.assert_allclose(data["paf"]["estimate"], 1 - 1 / e, rtol=1e-12)
