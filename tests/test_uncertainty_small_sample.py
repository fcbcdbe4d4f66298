r"""Draws of an importance-weighted fit's parameters: a multivariate t with
the Kish effective sample size less the parameters as degrees of freedom,
scaled by the small-sample factor n_eff / (n_eff - p) (HC1; MacKinnon &
White 1985, J Econometrics 29:305, from memory).

Checks: the t sampler against scipy.stats.t (reference library) at the
quantiles that make the interval limits; frequency-weighted and unweighted
fits keep their normal draws (a closed form: their draws have the fit's
covariance); the coverage this buys is measured by
scripts/coverage_weighted.py (figures in the project's DEVELOPERS.md).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from doseattr.core.exposure.fit import fit_measurements
from doseattr.core.uncertainty.sampling import (
    exposure_draws,
    multivariate_t,
    small_sample_df,
)


def _sample(n, seed):
    rng = np.random.default_rng(seed)
    return np.exp(rng.normal(np.log(10.0), 0.8, n)), rng.lognormal(0.0, 0.74, n)


def test_multivariate_t_matches_scipy_t_quantiles():
    """Each margin of a multivariate t with scale matrix S is a t with scale
    sqrt(S_jj) (Kotz & Nadarajah 2004, from memory); 2.5th and 97.5th
    percentiles of 200,000 draws within 4 Monte Carlo SEs of scipy.stats.t."""
    scale = np.array([[0.04, 0.01], [0.01, 0.09]])
    df = 12.0
    draws = multivariate_t(np.array([1.0, -2.0]), scale, df, 200_000,
                           np.random.default_rng(5))
    for j, loc in enumerate((1.0, -2.0)):
        t = stats.t(df, loc=loc, scale=np.sqrt(scale[j, j]))
        for q in (0.025, 0.975):
            se = np.sqrt(q * (1 - q) / draws.shape[0]) / t.pdf(t.ppf(q))  # sample quantile SD
            assert np.quantile(draws[:, j], q) == pytest.approx(t.ppf(q), abs=4 * se)


def test_importance_fits_get_t_draws_with_kish_degrees_of_freedom():
    x, w = _sample(50, 3)
    ex = fit_measurements("lognormal", x, weights=w, weight_meaning="importance")
    n_eff = w.sum() ** 2 / np.dot(w, w)  # Kish (1965), closed form
    assert small_sample_df(ex) == pytest.approx(n_eff - 2)
    theta = ex.family.to_internal(ex.params)
    d = ex.family.to_internal(exposure_draws(ex, 100_000, np.random.default_rng(1)).params)
    # covariance of the t draws: scale * df / (df - 2), the scale being HC1 x sandwich
    df = n_eff - 2
    expected = ex.fit.cov_internal * n_eff / (n_eff - 2) * df / (df - 2)
    np.testing.assert_allclose(np.cov(d.T), expected, rtol=0.05,
                               atol=0.05 * np.diag(expected).max())
    np.testing.assert_allclose(d.mean(axis=0), theta, atol=0.01)


@pytest.mark.parametrize("meaning", ["frequency", None])
def test_other_fits_keep_normal_draws(meaning):
    x, w = _sample(50, 4)
    ex = fit_measurements("lognormal", x, weights=None if meaning is None else w,
                          weight_meaning=meaning or "importance")
    assert small_sample_df(ex) is None
    d = ex.family.to_internal(exposure_draws(ex, 100_000, np.random.default_rng(2)).params)
    np.testing.assert_allclose(np.cov(d.T), ex.fit.cov_internal, rtol=0.03,
                               atol=0.03 * np.diag(ex.fit.cov_internal).max())
    # normal margins: the sample kurtosis excess is near 0 (a t with 48 df has 0.14)
    assert abs(stats.kurtosis(d[:, 0])) < 0.05
