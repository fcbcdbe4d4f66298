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
