"""Multi-category PAF, the categorical comparison and the burden density."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats

from doseattr.core.attribution.categorical import (
    band_means,
    band_shares,
    categorical_comparison,
    multi_category_paf,
)
from doseattr.core.attribution.contribution import burden_density
from doseattr.core.attribution.fractions import paf
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.registry import FAMILIES


def test_levin_single_level():
    """One exposed level: the multi-category formula reduces to Levin (1953),
    p(RR - 1) / (1 + p(RR - 1)), written out here."""
    p, rr = 0.3, 2.5
    levin = p * (rr - 1) / (1 + p * (rr - 1))
    assert multi_category_paf([0.7, 0.3], [1.0, 2.5]) == pytest.approx(levin, rel=1e-15)


@given(st.lists(st.floats(0.01, 1.0), min_size=2, max_size=6),
       st.lists(st.floats(1.0, 20.0), min_size=6, max_size=6))
@settings(max_examples=60, deadline=None)
def test_multi_category_equals_case_based(raw_p, rr6):
    """Miettinen (1974) case-based formula sum pc_i (RR_i - 1)/RR_i, with the
    case shares pc_i = p_i RR_i / sum p_j RR_j implied by the population
    shares, equals the population-based multi-category formula (Rockhill,
    Newman & Weinberg 1998): both are 1 - 1/sum p_i RR_i (algebra)."""
    p = np.array(raw_p) / np.sum(raw_p)
    rr = np.concatenate([[1.0], rr6[: len(p) - 1]])
    pc = p * rr / np.sum(p * rr)
    case_based = float(np.sum(pc * (rr - 1) / rr))
    assert multi_category_paf(p, rr) == pytest.approx(case_based, rel=1e-12, abs=1e-15)


def test_shares_and_means_vs_scipy():
    """Band shares and conditional means against scipy.stats.gamma cdf and
    expect(lb, ub) (reference library), with an unexposed share u in the
    first band: p_1 = u + (1-u)F(c1); mean_1 = (1-u)E[X; X<c1]/p_1."""
    k, th, u = 2.2, 4.0, 0.15
    ex = Exposure(FAMILIES["gamma"], np.array([k, th]), u)
    cuts = np.array([3.0, 8.0, 15.0])
    d = stats.gamma(k, scale=th)
    edges = [0.0, 3.0, 8.0, 15.0, np.inf]
    p_ref = np.array([d.cdf(b) - d.cdf(a) for a, b in zip(edges[:-1], edges[1:])]) * (1 - u)
    p_ref[0] += u
    m_ref = np.array([(1 - u) * d.expect(lambda x: x, lb=a, ub=b)
                      for a, b in zip(edges[:-1], edges[1:])]) / p_ref
    assert band_shares(ex, cuts) == pytest.approx(p_ref, rel=1e-10)
    assert band_means(ex, cuts) == pytest.approx(m_ref, rel=1e-7)


def test_band_mean_is_exact_for_linear_curve():
    """For RR = 1 + b x and m = 0, E[RR | band] = RR(E[X | band]), so the
    multi-category formula with band-mean RRs reproduces the continuous PAF
    exactly (linearity of expectation), whatever the cutpoints."""
    curve = Curve(LinearExcess(), np.array([0.08]), np.eye(1))
    ex = Exposure(FAMILIES["lognormal"], np.array([5.0, 2.5]), 0.1)
    cmp_ = categorical_comparison(curve, ex, minimum_risk=0.0, cutpoints=[2.0, 6.0, 20.0])
    band_mean = {m.method: m for m in cmp_.methods}["band-mean"]
    assert band_mean.paf == pytest.approx(cmp_.continuous_paf, rel=1e-9)
    assert abs(band_mean.difference) < 1e-9


def test_convergence_with_more_bands():
    """For a convex RR (log-linear), Jensen's inequality makes RR(band mean)
    <= E[RR | band], and the gap shrinks as bands narrow: the categorical PAF
    rises towards the continuous one (Jensen 1906; common practice)."""
    curve = Curve(LogLinear(), np.array([0.1]), np.eye(1), max_dose=60.0)
    ex = Exposure(FAMILIES["gamma"], np.array([2.0, 5.0]))
    cmp_ = categorical_comparison(curve, ex, minimum_risk=0.0, cutpoints=[5.0, 10.0, 20.0])
    values = np.array([v for _, v in cmp_.convergence])
    assert np.all(values <= cmp_.continuous_paf + 1e-12)
    assert abs(values[-1] - cmp_.continuous_paf) < abs(values[0] - cmp_.continuous_paf)
    assert [k for k, _ in cmp_.convergence] == list(range(2, 21))


def test_reported_method_present_only_when_given():
    curve = Curve(LinearExcess(), np.array([0.05]), np.eye(1))
    ex = Exposure(FAMILIES["lognormal"], np.array([5.0, 2.0]))
    no = categorical_comparison(curve, ex, minimum_risk=0.0, cutpoints=[5.0])
    yes = categorical_comparison(curve, ex, minimum_risk=0.0, cutpoints=[5.0], reported_rr=[1.0, 1.4])
    assert [m.method for m in no.methods] == ["midpoint", "band-mean"]
    rep = yes.methods[0]
    p = band_shares(ex, [5.0])
    assert rep.method == "reported"
    assert rep.paf == pytest.approx(p[1] * 0.4 / (1 + p[1] * 0.4), rel=1e-12)


def test_burden_density_integrates_to_paf():
    """The density f(x)(RR_m(x) - 1)/E[RR_m] integrates to the PAF
    (definition); checked with scipy.integrate.quad of the same expression
    built from scipy.stats.lognorm, and the cumulative share at the grid end
    against quad up to that point."""
    curve = Curve(LinearExcess(), np.array([0.04]), np.eye(1), max_dose=40.0)
    ex = Exposure(FAMILIES["lognormal"], np.array([6.0, 2.2]), 0.2)
    m = 2.0
    c = burden_density(curve, ex, m)
    d = ex.family.scipy(ex.params)
    e_total = 1 / (1 - paf(curve, ex, minimum_risk=m))

    def dens(x):
        rr = 1 + 0.04 * min(max(x, m), 40.0)
        return 0.8 * d.pdf(x) * (rr / (1 + 0.04 * m) - 1) / e_total

    total = integrate.quad(dens, 0, m)[0] + integrate.quad(dens, m, 40)[0] \
        + integrate.quad(dens, 40, np.inf)[0]
    assert total == pytest.approx(paf(curve, ex, minimum_risk=m), rel=1e-7)
    assert c.paf == pytest.approx(paf(curve, ex, minimum_risk=m), rel=1e-12)
    assert np.interp(20.0, c.x, c.density) == pytest.approx(dens(20.0), rel=1e-3)
    end = c.x[-1]
    upto = integrate.quad(dens, m, min(end, 40.0))[0] + (integrate.quad(dens, 40.0, end)[0] if end > 40 else 0)
    assert c.cumulative[-1] == pytest.approx(upto / total, rel=1e-7)
    assert 0 < c.median < end


def test_empirical_path_is_weighted_mean():
    """family = empirical: PAF = 1 - 1/E with E the weighted mean of RR_m over
    the values (definition of expectation over a discrete distribution),
    computed here with numpy.average."""
    from doseattr.core.exposure.empirical import empirical
    x = np.array([0.0, 1.5, 4.0, 9.0, 22.0])
    w = np.array([3.0, 1.0, 2.0, 1.0, 0.5])
    curve = Curve(LinearExcess(), np.array([0.05]), np.eye(1), max_dose=15.0)
    m = 1.0
    rr = (1 + 0.05 * np.minimum(np.maximum(x, m), 15.0)) / (1 + 0.05 * m)
    e = np.average(rr, weights=w)
    assert paf(curve, empirical(x, w), minimum_risk=m) == pytest.approx(1 - 1 / e, rel=1e-12)
    c = burden_density(curve, empirical(x, w), m)
    assert c.paf == pytest.approx(1 - 1 / e, rel=1e-12)
    assert c.cumulative[-1] == pytest.approx(1.0, rel=1e-12)


def test_empirical_categorical_comparison():
    """Empirical exposure: band shares and band means are weighted sums over
    the values in each band (definition), written out with numpy here; the
    band-mean method is exact for a linear curve (linearity of expectation)."""
    from doseattr.core.exposure.empirical import empirical
    x = np.array([0.5, 1.5, 4.0, 6.0, 9.0, 22.0, 40.0])
    w = np.array([3.0, 1.0, 2.0, 1.0, 1.0, 0.5, 0.25])
    ex = empirical(x, w, unexposed=0.1)
    curve = Curve(LinearExcess(), np.array([0.05]), np.eye(1))
    cmp_ = categorical_comparison(curve, ex, minimum_risk=0.0, cutpoints=[2.0, 10.0])
    wn = w / w.sum()
    in_band = [(x <= 2.0), (x > 2.0) & (x <= 10.0), (x > 10.0)]
    shares = np.array([0.9 * wn[b].sum() for b in in_band])
    shares[0] += 0.1
    means = np.array([0.9 * (wn[b] * x[b]).sum() for b in in_band]) / shares
    assert cmp_.shares == pytest.approx(shares, rel=1e-12)
    assert cmp_.band_means == pytest.approx(means, rel=1e-12)
    bm = {m.method: m for m in cmp_.methods}["band-mean"]
    assert bm.paf == pytest.approx(cmp_.continuous_paf, rel=1e-12)
    assert len(cmp_.convergence) == 19
