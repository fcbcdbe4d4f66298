"""Monte Carlo intervals wired through the analysis layer ([uncertainty])."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

K, T, RR, CI, PER = 2.5, 6.0, 1.25, (1.10, 1.42), 10.0


def _case(draws=4000, seed=11, **extra):
    return {"unit": "ug/m3",
            "curve": {"model": "log-linear", "rr": RR, "per": PER, "ci": list(CI),
                      "beyond": "extend"},
            "exposure": {"family": "gamma", "shape": K, "scale": T},
            "uncertainty": {"draws": draws, "seed": seed}, **extra}


def _paf(b):
    """Gamma MGF closed form (see test_analysis_pipeline): 1 - (1 - b t)^k."""
    return 1 - (1 - b * T) ** K


def test_interval_matches_the_coefficient_percentiles():
    r"""Only the curve coefficient varies (the exposure is entered as
    numbers, the minimum-risk level is fixed), and the PAF
    :math:`1 - (1 - bt)^k` increases with b, so the PAF's 2.5th and 97.5th
    percentiles are the PAF at b's own: :math:`\hat b \pm z_{0.975}\,se`
    with :math:`se = (\ln hi - \ln lo)/(2 z_{0.975})/per` (the normal
    approximation the curve's CI implies).

    Monte Carlo error: the sample 2.5% quantile of D normal draws has
    standard error :math:`\sqrt{p(1-p)/D}/\varphi(z_p)` standard deviations
    (asymptotic quantile variance), 0.042 sd for D = 4000; the check allows
    5 of those.
    """
    r = run_analysis(analysis_from_dict(_case()))
    z = stats.norm.ppf(0.975)
    b = math.log(RR) / PER
    se = (math.log(CI[1]) - math.log(CI[0])) / (2 * z) / PER
    tol = 5 * math.sqrt(0.025 * 0.975 / 4000) / stats.norm.pdf(z)
    assert _paf(b + (-z - tol) * se) < r.paf.lower < _paf(b + (-z + tol) * se)
    assert _paf(b + (z - tol) * se) < r.paf.upper < _paf(b + (z + tol) * se)
    np.testing.assert_allclose(r.paf.estimate, _paf(b), rtol=1e-8)
    assert r.paf.mcse is not None and 0 < r.paf.mcse < 0.01


def test_same_seed_same_output_and_another_seed_differs():
    one = json.dumps(run_analysis(analysis_from_dict(_case(draws=300))).to_dict())
    two = json.dumps(run_analysis(analysis_from_dict(_case(draws=300))).to_dict())
    other = json.dumps(run_analysis(analysis_from_dict(_case(draws=300, seed=12))).to_dict())
    assert one == two and one != other


def test_scenarios_get_intervals():
    r = run_analysis(analysis_from_dict(_case(draws=300, scenario=[{"name": "cap", "cap": 8}])))
    pif = r.to_dict()["scenarios"][0]["pif"]
    assert pif["lower"] < pif["estimate"] < pif["upper"]
    assert r.propagation.pif["cap"].shape == (1, 300)


@pytest.mark.parametrize("draws, message", [(50, "at least 100"),
                                            (10**6, "allow_many_draws = true")])
def test_draws_out_of_range(draws, message):
    with pytest.raises(InputError, match=rf"\[uncertainty\] key 'draws'.*{message}"):
        analysis_from_dict(_case(draws=draws))


# -- which input drives the width (issue 5 item 5) ------------------------------
M_LO, M_HI = 2.0, 8.0


def _paf_m(b, m):
    r"""Gamma exposure, RR = exp(bx), minimum risk m (derived in
    test_analysis_pipeline): :math:`E = G(m; k, t) + e^{-bm}(1 - bt)^{-k}
    (1 - G(m; k, t/(1 - bt)))`, G the gamma CDF (scipy.stats.gamma)."""
    e = stats.gamma.cdf(m, K, scale=T) + math.exp(-b * m) * (1 - b * T) ** -K * \
        stats.gamma.sf(m, K, scale=T / (1 - b * T))
    return 1 - 1 / e


def test_width_by_source_one_at_a_time():
    r"""Curve only: the PAF increases with b, so its interval is the PAF at
    :math:`\hat b \pm z_{0.975} se` (m at the middle of its range), within 5
    Monte Carlo standard errors of a normal quantile. Minimum risk only:
    the PAF decreases with m ~ U(lo, hi), so its interval is the PAF at m's
    97.5th and 2.5th percentiles, lo + 0.975 (hi - lo) and lo + 0.025 (hi -
    lo), within 5 standard errors of a uniform sample quantile,
    :math:`\sqrt{p(1-p)/D}\,(hi - lo)`. The exposure is entered as numbers
    and does not vary, so it has no row."""
    draws = 4000
    r = run_analysis(analysis_from_dict(_case(draws=draws, attribution={
        "minimum_risk": [M_LO, M_HI]})))
    rows = {w["source"]: w for w in r.to_dict()["uncertainty"]["width_by_source"]}
    assert list(rows) == ["curve", "minimum_risk"]
    z = stats.norm.ppf(0.975)
    b, m = math.log(RR) / PER, 0.5 * (M_LO + M_HI)
    se = (math.log(CI[1]) - math.log(CI[0])) / (2 * z) / PER
    tol = 5 * math.sqrt(0.025 * 0.975 / draws) / stats.norm.pdf(z)
    curve = rows["curve"]
    assert _paf_m(b + (-z - tol) * se, m) < curve["lower"] < _paf_m(b + (-z + tol) * se, m)
    assert _paf_m(b + (z - tol) * se, m) < curve["upper"] < _paf_m(b + (z + tol) * se, m)
    np.testing.assert_allclose(curve["width"], curve["upper"] - curve["lower"], rtol=1e-12)
    mr, span = rows["minimum_risk"], M_HI - M_LO
    du = 5 * math.sqrt(0.025 * 0.975 / draws) * span
    assert _paf_m(b, M_LO + 0.975 * span + du) < mr["lower"] < _paf_m(b, M_LO + 0.975 * span - du)
    assert _paf_m(b, M_LO + 0.025 * span + du) < mr["upper"] < _paf_m(b, M_LO + 0.025 * span - du)
    both = r.to_dict()["uncertainty"]["width_all"]
    assert both["lower"] == r.paf.lower and both["upper"] == r.paf.upper


def test_poisson_cases_move_the_attributable_cases(tmp_path):
    r"""Only the cases vary (curve without CI): with one shared exposure
    every stratum has the same PAF, so the total PAF does not move (width
    0), while the total attributable cases are PAF x a Poisson total, whose
    2.5th and 97.5th percentiles lie between scipy.stats.poisson.ppf at
    0.015 and 0.035 (resp. 0.965 and 0.985) of the total, the Monte Carlo
    slack of 2,000 draws."""
    (tmp_path / "strata.csv").write_text("stratum,cases\nA,120\nB,80\nC,45\n")
    d = {"unit": "ug/m3", "curve": {"model": "linear", "err": 0.05, "beyond": "extend"},
         "exposure": {"gm": 8.0, "gsd": 2.0}, "burden": {"table": "strata.csv"},
         "uncertainty": {"draws": 2000, "seed": 3, "poisson_cases": True}}
    r = run_analysis(analysis_from_dict(d, base_dir=tmp_path))
    rows = {w.source: w for w in r.width_by_source}
    assert list(rows) == ["cases"]
    assert rows["cases"].width == pytest.approx(0.0, abs=1e-12)
    lo, hi = rows["cases"].attributable
    pois = stats.poisson(245)
    p = r.paf.estimate
    assert p * pois.ppf(0.015) <= lo <= p * pois.ppf(0.035)
    assert p * pois.ppf(0.965) <= hi <= p * pois.ppf(0.985)
