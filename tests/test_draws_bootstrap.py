"""The empirical bootstrap in bounded memory (issue 15 item 3).

Every expected value is recomputed here with numpy: the row bootstrap
written out with the Generator calls it is defined by (Efron 1979, Ann Stat
7:1, from memory: ``n`` rows drawn with replacement; uniformly with their
weights kept for importance weights, with chances proportional to the
weights for frequency weights), and the PAF of each resample from its
definition :math:`1 - 1/E[RR_m(X)]`. The chunked bootstrap must draw the
same numbers, so the checks are to rounding (rtol 1e-12), not statistical.
"""

from __future__ import annotations

import tracemalloc
from dataclasses import replace

import numpy as np
import pytest

from doseattr.core.curves.published import published_curve
from doseattr.core.exposure.empirical import EmpiricalExposure, empirical
from doseattr.core.uncertainty.propagate import Stratum, propagate
from doseattr.core.uncertainty.sampling import exposure_draws

B, PER, CI = np.log(1.3) / 10.0, 10.0, (1.1, 1.5)  # invented inputs


def _values(n: int, seed: int = 3, rounding: int | None = 1):
    rng = np.random.default_rng(seed)
    x = np.exp(1.5 + rng.standard_normal(n))
    return (x if rounding is None else np.round(x, rounding)), 0.2 + rng.random(n)


def _numpy_rows(e: EmpiricalExposure, rng: np.random.Generator, draws: int):
    """Row indices and kept weights of the row bootstrap, numpy's own calls."""
    n = e.values.size
    if e.weights_meaning == "frequency":
        idx = rng.choice(n, size=(draws, n), p=e.weights)
        return idx, np.ones((draws, n))
    idx = rng.integers(0, n, size=(draws, n))
    return idx, e.weights[idx]


@pytest.mark.parametrize("rounding", [1, None])
@pytest.mark.parametrize("meaning", ["importance", "frequency", None])
def test_chunks_are_the_row_bootstrap_on_distinct_values(meaning, rounding, monkeypatch):
    """Small chunks (7 draws) that do not divide the draws: per draw, the
    weights on the distinct values give the resample's weighted mean of
    any h (numpy row bootstrap, same seed), and the generator ends where
    numpy's calls leave it. Rounded values have duplicates, collapsed;
    distinct ones are their own points."""
    x, w = _values(500, rounding=rounding)
    e = empirical(x, None if meaning is None else w, weight_meaning=meaning or "importance")
    monkeypatch.setattr(EmpiricalExposure, "CHUNK_ELEMENTS", 7 * x.size)
    values, point_weights, inverse = e.points
    if rounding is None:
        assert inverse is None and values is e.values
    else:
        assert inverse is not None and values.size < x.size
        np.testing.assert_array_equal(values[inverse], x)  # numpy.unique's inverse
    np.testing.assert_allclose(point_weights @ np.sqrt(values), e.weights @ np.sqrt(x), rtol=1e-12)
    ref_rng, rng = np.random.default_rng(9), np.random.default_rng(9)
    idx, kept = _numpy_rows(e, ref_rng, 50)
    h = np.sqrt(x)
    expected = np.sum(h[idx] * kept, axis=1) / kept.sum(axis=1)
    parts = list(e.bootstrap_chunks(rng, 50))
    assert [r.stop - r.start for r, _ in parts] == [7] * 7 + [1]
    got = np.concatenate([wu @ np.sqrt(values) for _, wu in parts])
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    assert ref_rng.random() == rng.random()
    skipped = np.random.default_rng(9)
    e.skip_bootstrap(skipped, 50)
    again = np.random.default_rng(9)
    _numpy_rows(e, again, 50)
    assert skipped.random() == again.random()


@pytest.mark.parametrize("keep", [True, False])
def test_exposure_draws_replay_and_leave_the_stream_as_before(keep, monkeypatch):
    """A Resample gives the same resamples on every replay, kept (small
    bootstraps, computed once) or replayed from its generator, and the draws
    after it are those after numpy's bootstrap calls (so cases drawn next
    from the same generator are unchanged)."""
    from doseattr.core.uncertainty import sampling

    monkeypatch.setattr(sampling, "KEEP_ELEMENTS", 1 << 23 if keep else 0)
    x, w = _values(300, rounding=None)
    e = empirical(x, w)
    rng = np.random.default_rng(4)
    ex = exposure_draws(e, 40, rng)
    assert ex.resample is not None and ex.varies
    assert (ex.resample.kept is not None) == keep
    first = np.concatenate([c for _, c in ex.resample.chunks()])
    second = np.concatenate([c for _, c in ex.resample.chunks()])
    np.testing.assert_array_equal(first, second)
    ref = np.random.default_rng(4)
    idx, kept = _numpy_rows(e, ref, 40)
    np.testing.assert_allclose(first @ ex.values[0], np.sum(x[idx] * kept, 1) / kept.sum(1),
                               rtol=1e-12)
    assert rng.poisson(50.0, 5).tolist() == ref.poisson(50.0, 5).tolist()


@pytest.mark.parametrize("method", ["paf", "impact-function"])
@pytest.mark.parametrize("meaning", ["importance", "frequency"])
def test_propagate_equals_a_numpy_bootstrap_of_the_paf(method, meaning):
    r"""Curve, minimum-risk level and exposure vary, 20% unexposed: the
    draws are numpy's, in propagate's order (coefficients, minimum-risk
    level, bootstrap rows, Poisson cases), and per draw
    :math:`E = u + (1-u) \sum \omega RR_m / \sum \omega`,
    :math:`RR_m(x) = e^{b(\max(x, m) - m)}`; PAF = 1 - 1/E, and the impact
    fraction :math:`(1-u) \sum \omega (1 - 1/RR_m) / \sum \omega`
    (definitions)."""
    x, w = _values(400)
    e = replace(empirical(x, w, weight_meaning=meaning), unexposed=0.2)
    curve = published_curve("log-linear", rr=1.3, per=PER, ci=CI)
    draws, lo, hi = 300, 1.0, 5.0
    prop = propagate(curve, [Stratum("s", 80.0, e)], [], draws=draws,
                     rng=np.random.default_rng(21), minimum_risk=(lo, hi), method=method)
    rng = np.random.default_rng(21)
    b = rng.multivariate_normal(curve.coef, curve.cov, size=draws, method="eigh")[:, 0]
    m = rng.uniform(lo, hi, size=draws)
    idx, kept = _numpy_rows(e, rng, draws)
    cases = rng.poisson(80.0, size=(1, draws)).astype(float)
    rr = np.exp(b[:, None] * (np.maximum(x[idx], m[:, None]) - m[:, None]))
    if method == "paf":
        big_e = 0.2 + 0.8 * np.sum(kept * rr, 1) / kept.sum(1)
        expected = 1 - 1 / big_e
    else:
        expected = 0.8 * np.sum(kept * (1 - 1 / rr), 1) / kept.sum(1)
    np.testing.assert_allclose(prop.paf[0], expected, rtol=1e-12)
    np.testing.assert_array_equal(prop.cases, cases)


def test_fixed_curve_evaluates_the_distinct_values_once():
    """Only the exposure varies: the integrand is taken at each distinct
    value once and each draw is a weighted sum; the PAFs are numpy's
    bootstrap of the definition."""
    x, w = _values(2000)
    e = empirical(x, w)
    curve = published_curve("log-linear", rr=1.3, per=PER)
    prop = propagate(curve, [Stratum("s", 1.0, e)], [], draws=200,
                     rng=np.random.default_rng(5), minimum_risk=(2.0, 2.0),
                     sources=("exposure",))
    rng = np.random.default_rng(5)
    idx, kept = _numpy_rows(e, rng, 200)
    big_e = np.sum(kept * np.exp(B * (np.maximum(x[idx], 2.0) - 2.0)), 1) / kept.sum(1)
    np.testing.assert_allclose(prop.paf[0], 1 - 1 / big_e, rtol=1e-12)


def test_memory_stays_below_one_draws_by_values_array():
    """100,000 values x 400 draws: one (draws, n) float array would take
    320 MB; the chunked bootstrap's numpy allocations (tracemalloc) stay
    under a quarter of that (bound: CHUNK_ELEMENTS rows x a few arrays)."""
    x, w = _values(100_000, rounding=None)
    e = empirical(x, w)
    curve = published_curve("log-linear", rr=1.3, per=PER, ci=CI)
    tracemalloc.start()
    try:
        prop = propagate(curve, [Stratum("s", 1.0, e)], [], draws=400,
                         rng=np.random.default_rng(8), minimum_risk=(1.0, 3.0))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 80e6, peak / 1e6
    assert np.all(np.isfinite(prop.paf)) and np.ptp(prop.paf) > 0
