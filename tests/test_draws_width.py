"""Width by source on the joint run's draws (issue 15 item 3).

Each one-source run must use the joint run's own draws of that source
(common random numbers) with the others at their point values. The draws
are recomputed here with numpy in propagate's order (coefficients,
minimum-risk level, bootstrap rows, Poisson cases), and each PAF from its
definition :math:`1 - 1/E[RR_m(X)]`, :math:`RR_m(x) = e^{b(\\max(x, m) - m)}`
for the log-linear curve; checks are to rounding (rtol 1e-12).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import doseattr.core.uncertainty.propagate as propagate_module
from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.core.curves.published import published_curve
from doseattr.core.exposure.empirical import empirical
from doseattr.core.uncertainty.propagate import Stratum, propagate, vary_only

DRAWS, LO, HI, CASES = 400, 1.0, 5.0, 60.0


@pytest.fixture(scope="module")
def joint():
    rng = np.random.default_rng(3)
    x = np.round(np.exp(1.5 + rng.standard_normal(300)), 1)
    w = 0.2 + rng.random(300)
    e = empirical(x, w)
    curve = published_curve("log-linear", rr=1.3, per=10.0, ci=(1.1, 1.5))
    strata = [Stratum("s", CASES, e)]
    prop = propagate(curve, strata, [], draws=DRAWS, rng=np.random.default_rng(17),
                     minimum_risk=(LO, HI))
    prop_cases = propagate(curve, strata, [], draws=DRAWS, rng=np.random.default_rng(17),
                           minimum_risk=(LO, HI),
                           sources=("curve", "exposure", "minimum_risk", "cases"))
    ref = np.random.default_rng(17)
    b = ref.multivariate_normal(curve.coef, curve.cov, size=DRAWS, method="eigh")[:, 0]
    m = ref.uniform(LO, HI, size=DRAWS)
    idx = ref.integers(0, x.size, size=(DRAWS, x.size))
    cases = ref.poisson(CASES, size=DRAWS).astype(float)
    return dict(x=x, w=w, curve=curve, strata=strata, prop=prop, prop_cases=prop_cases,
                b=b, m=m, idx=idx, cases=cases)


def _paf(b, m, x, w):
    """PAF per draw from the definition (b, m per draw; x, w per draw or shared)."""
    b, m = np.atleast_1d(b)[:, None], np.atleast_1d(m)[:, None]
    rr = np.exp(b * (np.maximum(x, m) - m))
    return 1 - 1 / (np.sum(w * rr, axis=1) / np.sum(w, axis=-1))


def test_each_source_alone_uses_the_joint_draws(joint):
    """Curve alone: the joint coefficients over the point exposure at the
    middle of the range; minimum risk alone: the joint levels; exposure
    alone: the joint bootstrap rows; all together: the joint run itself."""
    x, w, b, m, idx = joint["x"], joint["w"], joint["b"], joint["m"], joint["idx"]
    b0, m0 = float(joint["curve"].coef[0]), 0.5 * (LO + HI)
    args = (joint["curve"], joint["strata"], [], joint["prop"])
    np.testing.assert_allclose(vary_only(*args, ("curve",)).paf[0], _paf(b, m0, x, w),
                               rtol=1e-12)
    np.testing.assert_allclose(vary_only(*args, ("minimum_risk",)).paf[0],
                               _paf(np.full(DRAWS, b0), m, x, w), rtol=1e-12)
    np.testing.assert_allclose(vary_only(*args, ("exposure",)).paf[0],
                               _paf(np.full(DRAWS, b0), np.full(DRAWS, m0), x[idx], w[idx]),
                               rtol=1e-12)
    np.testing.assert_allclose(vary_only(*args, ("curve", "exposure", "minimum_risk")).paf[0],
                               joint["prop"].paf[0], rtol=1e-12)
    np.testing.assert_allclose(joint["prop"].paf[0], _paf(b, m, x[idx], w[idx]), rtol=1e-12)


def _count_integrals(monkeypatch) -> list:
    """The draws of every _fractions call (one per Monte Carlo pass), recorded."""
    sizes: list = []
    real = propagate_module._fractions

    def counted(*a):
        sizes.append(a[-1])
        return real(*a)

    monkeypatch.setattr(propagate_module, "_fractions", counted)
    return sizes


def test_cases_alone_need_no_integral(joint, monkeypatch):
    """Cases alone: the point PAF times the joint Poisson draws (definition
    A = PAF N), computed from one point integral, not one per draw."""
    sizes = _count_integrals(monkeypatch)
    p = vary_only(joint["curve"], joint["strata"], [], joint["prop_cases"], ("cases",))
    assert sizes == [1]
    point = _paf(joint["curve"].coef[:1], [0.5 * (LO + HI)], joint["x"], joint["w"])[0]
    np.testing.assert_array_equal(p.cases[0], joint["cases"])
    np.testing.assert_allclose(p.attributable[0], point * joint["cases"], rtol=1e-12)
    assert joint["prop_cases"].inputs.varying == ("curve", "exposure", "minimum_risk", "cases")


def _analysis(tmp_path, attribution, exposure, draws=300):
    d = {"unit": "ug/m3",
         "curve": {"model": "linear", "err": 0.01, "per": 1.0, "ci": [0.005, 0.015],
                   "beyond": "extend"},
         "exposure": exposure, "attribution": attribution,
         "uncertainty": {"draws": draws, "seed": 2}}
    return analysis_from_dict(d, base_dir=tmp_path)


def test_a_source_varying_alone_has_the_joint_interval(tmp_path, monkeypatch):
    """Only the curve varies (exposure as numbers, one minimum-risk level):
    its row is the joint interval (the same draws, by definition), and the
    Monte Carlo integrates once (the joint run), not twice."""
    sizes = _count_integrals(monkeypatch)
    r = run_analysis(_analysis(tmp_path, {"minimum_risk": 3.0}, {"gm": 8.0, "gsd": 2.0}))
    assert sizes.count(300) == 1
    (row,) = r.width_by_source
    full = r.uncertainty.width_all
    assert row.source == "curve" and (row.lower, row.upper) == (full.lower, full.upper)
    assert (row.lower, row.upper) == (r.paf.lower, r.paf.upper)


def test_width_rows_come_from_the_joint_run(tmp_path):
    """Curve and minimum-risk level vary: each row is the interval of the
    PAF over the joint run's draws of that source alone (numpy quantiles of
    the definition). ERR model: :math:`E[RR_m] = (1 + b E[\\max(X, m)])/(1 + bm)`
    with the lognormal partial expectation
    :math:`E[\\max(X, m)] = m\\Phi(d) + e^{\\mu + \\sigma^2/2}\\Phi(\\sigma - d)`,
    :math:`d = (\\ln m - \\mu)/\\sigma` (closed form, from memory; scipy.stats.norm)."""
    r = run_analysis(_analysis(tmp_path, {"minimum_risk": [LO, HI]}, {"gm": 8.0, "gsd": 2.0}))
    inputs = r.propagation.inputs
    b, m = inputs.coef[:, 0], inputs.minimum_risk
    mu, sigma = np.log(8.0), np.log(2.0)

    def paf(bb, mm):
        d = (np.log(mm) - mu) / sigma
        e_max = mm * stats.norm.cdf(d) + np.exp(mu + sigma**2 / 2) * stats.norm.cdf(sigma - d)
        return 1 - (1 + bb * mm) / (1 + bb * e_max)

    b0, m0 = 0.01, 0.5 * (LO + HI)
    rows = {w.source: w for w in r.width_by_source}
    assert list(rows) == ["curve", "minimum_risk"]
    for source, draws in (("curve", paf(b, np.full_like(b, m0))),
                          ("minimum_risk", paf(np.full_like(m, b0), m))):
        lo, hi = np.quantile(draws, [0.025, 0.975])
        np.testing.assert_allclose([rows[source].lower, rows[source].upper], [lo, hi], rtol=1e-9)
