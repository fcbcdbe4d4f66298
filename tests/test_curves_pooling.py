"""Two-stage pooling of dose-response coefficients (doseattr.core.curves.pooling).

Inputs are seeded simulations; every expected value comes from statsmodels,
scipy, a closed form written out here (stacked GLS, the restricted
likelihood of the stacked model), or a simulation with known truth.
"""

import numpy as np
import pytest
from scipy.linalg import block_diag
from scipy.optimize import approx_fprime, minimize, minimize_scalar
from scipy.stats import chi2, kstest, norm
from statsmodels.stats.meta_analysis import combine_effects

from doseattr.core.curves.pooling import (
    Pooled,
    dl_moment_matrix,
    nonlinearity_test,
    pool,
)
from doseattr.core.curves.pooling_reml import restricted_gradient, restricted_log_likelihood
from doseattr.errors import ModelError


def _univariate(seed, k=10, tau2=0.03):
    rng = np.random.default_rng(seed)
    v = rng.uniform(0.005, 0.05, k)
    return 0.3 + rng.normal(0.0, np.sqrt(v + tau2)), v


def _random_cov(rng, p, size):
    a = rng.normal(size=(p, p)) * size
    return a @ a.T + size ** 2 * np.eye(p)


def _multivariate(seed, k, t, mu, size=0.15, diagonal=False):
    rng = np.random.default_rng(seed)
    p = len(mu)
    s = []
    for _ in range(k):
        si = _random_cov(rng, p, size)
        s.append(np.diag(np.diag(si)) if diagonal else si)
    b = [rng.multivariate_normal(mu, si + t) for si in s]
    return b, s


def _stacked(b, s, t):
    """Stacked model y = X mu + e, X = k identity blocks, V = blockdiag(S_i + T)."""
    k, p = len(b), len(b[0])
    y = np.concatenate(b)
    x = np.tile(np.eye(p), (k, 1))
    v = block_diag(*[si + t for si in s])
    return y, x, v


def _stacked_gls(b, s, t):
    """Closed form: (X'V^-1X)^-1 X'V^-1 y and (X'V^-1X)^-1."""
    y, x, v = _stacked(b, s, t)
    vix = np.linalg.solve(v, x)
    cov = np.linalg.inv(x.T @ vix)
    return cov @ (vix.T @ y), cov


def _stacked_reml_loglik(b, s, t):
    """Restricted log-likelihood of the stacked normal linear model (closed form):
    -1/2 [log|V| + log|X'V^-1X| + r'V^-1 r] - (N - p)/2 log(2 pi)."""
    y, x, v = _stacked(b, s, t)
    mu, cov = _stacked_gls(b, s, t)
    r = y - x @ mu
    n, p = x.shape
    return -0.5 * (np.linalg.slogdet(v)[1] - np.linalg.slogdet(cov)[1]
                   + r @ np.linalg.solve(v, r)) - 0.5 * (n - p) * np.log(2 * np.pi)


def _univariate_reml_negloglik(tau2, b, v):
    """-l_R(tau2) for one coefficient, written out (Viechtbauer 2005, from memory)."""
    w = 1.0 / (v + tau2)
    mu = np.sum(w * b) / np.sum(w)
    return 0.5 * (np.sum(np.log(v + tau2)) + np.log(np.sum(w)) + np.sum(w * (b - mu) ** 2))


# --- one coefficient ---------------------------------------------------------


def test_dl_matches_statsmodels_combine_effects():
    b, v = _univariate(1, k=12, tau2=0.05)
    ref = combine_effects(b, v, method_re="dl")
    assert ref.tau2 > 0  # an interior estimate, where statsmodels does not truncate
    got = pool(b, v, tau_method="dl")
    # Source: statsmodels.stats.meta_analysis.combine_effects(method_re="dl").
    np.testing.assert_allclose(got.coefficients[0], ref.mean_effect_re, rtol=1e-12)
    np.testing.assert_allclose(np.sqrt(got.covariance[0, 0]), ref.sd_eff_w_re, rtol=1e-12)
    np.testing.assert_allclose(got.tau2, ref.tau2, rtol=1e-12)
    np.testing.assert_allclose(got.q, ref.q, rtol=1e-12)
    np.testing.assert_allclose(got.i2, ref.i2, rtol=1e-12)
    np.testing.assert_allclose(got.weights, ref.weights_rel_re, rtol=1e-12)
    np.testing.assert_allclose(got.p_value, ref.test_homogeneity().pvalue, rtol=1e-10)
    assert got.df == ref.df_resid
    np.testing.assert_allclose(got.predictive_covariance()[0, 0],
                               ref.sd_eff_w_re ** 2 + ref.tau2, rtol=1e-12)


def test_fixed_effect_matches_statsmodels_combine_effects():
    b, v = _univariate(2)
    ref = combine_effects(b, v, method_re="dl")
    got = pool(b, v, method="fixed")
    # Source: statsmodels combine_effects, fixed-effect outputs.
    np.testing.assert_allclose(got.coefficients[0], ref.mean_effect_fe, rtol=1e-12)
    np.testing.assert_allclose(np.sqrt(got.covariance[0, 0]), ref.sd_eff_w_fe, rtol=1e-12)
    np.testing.assert_allclose(got.weights, ref.weights_rel_fe, rtol=1e-12)
    np.testing.assert_allclose(got.q, ref.q, rtol=1e-12)
    assert got.tau2 == 0.0 and got.tau_method is None


def test_dl_truncates_at_zero_where_statsmodels_reports_a_negative_moment():
    rng = np.random.default_rng(3)
    v = rng.uniform(0.01, 0.05, 8)
    b = 0.2 + 0.3 * rng.normal(0.0, np.sqrt(v))  # under-dispersed: Q < k - 1
    with np.errstate(invalid="ignore"):  # statsmodels takes sqrt of a negative variance
        ref = combine_effects(b, v, method_re="dl")
    assert ref.tau2 < 0  # statsmodels leaves the moment estimate untruncated
    got = pool(b, v, tau_method="dl")
    # Source: DerSimonian & Laird 1986 truncate at 0 (from memory), whereupon the
    # random-effects estimate is statsmodels' fixed-effect one; I^2 = max(0, .).
    assert got.tau2 == 0.0 and got.i2 == 0.0
    np.testing.assert_allclose(got.coefficients[0], ref.mean_effect_fe, rtol=1e-12)
    np.testing.assert_allclose(np.sqrt(got.covariance[0, 0]), ref.sd_eff_w_fe, rtol=1e-12)


# Seed 6: the REML estimate is on the boundary, tau2 = 0.
@pytest.mark.parametrize("seed, tau2", [(4, 0.04), (5, 0.0), (6, 0.0)])
def test_reml_matches_direct_maximisation(seed, tau2):
    b, v = _univariate(seed, k=9, tau2=tau2)
    # Source: scipy.optimize.minimize_scalar (bounded) on -l_R written out above.
    ref = minimize_scalar(_univariate_reml_negloglik, bounds=(0.0, 1.0), args=(b, v),
                          method="bounded", options=dict(xatol=1e-12))
    got = pool(b, v, tau_method="reml")
    assert got.converged
    assert abs(got.tau2 - ref.x) < 1e-6 * np.mean(v)
    w = 1.0 / (v + ref.x)
    np.testing.assert_allclose(got.coefficients[0], np.sum(w * b) / np.sum(w), rtol=1e-6)
    np.testing.assert_allclose(got.covariance[0, 0], 1.0 / np.sum(w), rtol=1e-6)
    # l_R here adds only the constant -(k - 1)/2 log(2 pi) to the function above.
    np.testing.assert_allclose(got.restricted_loglik,
                               -ref.fun - 0.5 * (b.size - 1) * np.log(2 * np.pi), rtol=1e-9)


# --- several coefficients ----------------------------------------------------

T3 = np.array([[0.04, 0.01, 0.0], [0.01, 0.02, 0.005], [0.0, 0.005, 0.01]])
MU3 = np.array([0.8, 0.4, -0.2])


def test_multivariate_fixed_effect_is_stacked_gls():
    b, s = _multivariate(6, k=7, t=T3, mu=MU3)
    got = pool(b, s, method="fixed")
    mu, cov = _stacked_gls(b, s, np.zeros((3, 3)))
    # Source: closed form, GLS of the stacked model with block-diagonal V.
    np.testing.assert_allclose(got.coefficients, mu, rtol=1e-10)
    np.testing.assert_allclose(got.covariance, cov, rtol=1e-10)
    y, x, v = _stacked(b, s, np.zeros((3, 3)))
    r = y - x @ mu
    np.testing.assert_allclose(got.q, r @ np.linalg.solve(v, r), rtol=1e-10)  # closed form
    assert got.df == 3 * 6
    np.testing.assert_allclose(got.p_value, chi2.sf(got.q, 18), rtol=1e-12)  # scipy.stats.chi2


def test_reml_gives_no_heterogeneity_when_studies_agree():
    rng = np.random.default_rng(7)
    s = [_random_cov(rng, 3, 0.5) for _ in range(8)]  # large covariances
    # Same truth in every study and residuals a tenth of their SD: Q far below df.
    b = [MU3 + 0.1 * np.linalg.cholesky(si) @ rng.normal(size=3) for si in s]
    got = pool(b, s, tau_method="reml")
    mu, cov = _stacked_gls(b, s, np.zeros((3, 3)))
    # Source: closed form. At T = 0 the gradient of l_R is -B/2 + O(residuals^2),
    # negative definite, so T = 0 is the REML estimate and the mean is the GLS one.
    smallest = min(np.min(np.linalg.eigvalsh(si)) for si in s)
    assert np.max(np.linalg.eigvalsh(got.between_covariance)) < 1e-6 * smallest
    se = np.sqrt(np.diag(cov))
    np.testing.assert_allclose(got.coefficients / se, mu / se, atol=1e-6)
    np.testing.assert_allclose(got.covariance, cov, rtol=1e-5)
    assert got.converged


# Smaller T: the estimate is on the boundary (between-study correlation 1);
# larger T: an interior estimate (correlation 0.58).
@pytest.mark.parametrize("t", [np.diag([0.05, 0.02]), np.diag([0.3, 0.15])])
def test_reml_optimum_matches_stacked_likelihood_maximised_directly(t):
    b, s = _multivariate(8, k=10, t=t, mu=np.array([0.5, -0.1]), diagonal=True)
    got = pool(b, s, tau_method="reml")
    assert got.converged
    # Source: closed form, the stacked model's restricted likelihood at the estimate.
    np.testing.assert_allclose(got.restricted_loglik,
                               _stacked_reml_loglik(b, s, got.between_covariance), rtol=1e-10)

    def negloglik(theta):  # T from log variances and atanh of the correlation
        sd = np.exp(theta[:2] / 2)
        rho = np.tanh(theta[2])
        tt = np.array([[sd[0] ** 2, rho * sd[0] * sd[1]], [rho * sd[0] * sd[1], sd[1] ** 2]])
        return -_stacked_reml_loglik(b, s, tt)

    # Source: scipy.optimize.minimize (Nelder-Mead) on the stacked closed form.
    ref = minimize(negloglik, np.array([np.log(0.1), np.log(0.1), 0.0]), method="Nelder-Mead",
                   options=dict(xatol=1e-10, fatol=1e-13, maxiter=20000, maxfev=20000))
    assert got.restricted_loglik >= -ref.fun - 1e-8
    np.testing.assert_allclose(got.restricted_loglik, -ref.fun, atol=1e-6)
    # With diagonal S_i, l_R at a diagonal T is the sum of the two one-coefficient
    # l_R (closed form), so the optimum over all T is at least their maxima's sum.
    bb, vv = np.array(b), np.array([np.diag(si) for si in s])
    diag_max = sum(-minimize_scalar(_univariate_reml_negloglik, bounds=(0.0, 1.0),
                                    args=(bb[:, j], vv[:, j]), method="bounded",
                                    options=dict(xatol=1e-12)).fun for j in range(2))
    assert got.restricted_loglik >= diag_max - 2 * 9 / 2 * np.log(2 * np.pi) - 1e-8


def test_reml_follows_a_change_of_units():
    b, s = _multivariate(6, k=7, t=T3, mu=MU3)
    c = np.array([1e-4, 1.0, 1e3])  # e.g. per ug/m3 versus per mg/m3
    got = pool(b, s)
    scaled = pool([bi * c for bi in b], [si * np.outer(c, c) for si in s])
    # Source: closed form. With b -> Cb, S -> CSC', l_R(CTC') = l_R(T) - (k-1) log|C|,
    # so the REML estimates transform as mu -> C mu, T -> C T C'.
    np.testing.assert_allclose(scaled.coefficients / c, got.coefficients, rtol=1e-7)
    np.testing.assert_allclose(scaled.between_covariance / np.outer(c, c),
                               got.between_covariance, atol=1e-8 * np.max(T3))


def test_restricted_gradient_matches_finite_differences():
    b, s = _multivariate(9, k=6, t=T3, mu=MU3)
    b, s = np.array(b), np.array(s)
    t = np.array([[0.03, 0.004, 0.0], [0.004, 0.02, 0.002], [0.0, 0.002, 0.015]])
    rows, cols = np.triu_indices(3)

    def as_t(x):
        m = np.zeros((3, 3))
        m[rows, cols] = x
        return m + np.triu(m, 1).T

    # Source: scipy.optimize.approx_fprime (central differences not offered:
    # forward differences with a small step). Off-diagonal entries move in pairs.
    fd = approx_fprime(t[rows, cols], lambda x: restricted_log_likelihood(b, s, as_t(x)), 1e-7)
    g = restricted_gradient(b, s, t)
    expected = np.where(rows == cols, 1.0, 2.0) * g[rows, cols]
    np.testing.assert_allclose(fd, expected, rtol=1e-4, atol=1e-4 * np.max(np.abs(expected)))


def test_moment_matrix_is_unbiased():
    rng = np.random.default_rng(10)
    k, t, mu = 6, np.array([[0.04, 0.012], [0.012, 0.02]]), np.array([0.3, -0.1])
    s = np.array([_random_cov(rng, 2, 0.15) for _ in range(k)])
    s_inv = np.linalg.inv(s)
    chol = np.linalg.cholesky(s + t)
    reps = 4000
    est = np.empty((reps, 2, 2))
    for r in range(reps):
        b = mu + np.einsum("kij,kj->ki", chol, rng.normal(size=(k, 2)))
        est[r] = dl_moment_matrix(b, s_inv)
    est = (est + np.swapaxes(est, 1, 2)) / 2
    mc_se = est.std(axis=0, ddof=1) / np.sqrt(reps)
    # Source: simulation with known truth, seeded: E[Q] = (k-1) I + B T (derived).
    assert np.all(np.abs(est.mean(axis=0) - t) < 4 * mc_se)


def test_multivariate_moments_with_diagonal_covariances_are_per_coefficient_dl():
    b, s = _multivariate(11, k=12, t=np.diag([0.06, 0.03]), mu=np.array([0.5, 0.2]),
                         diagonal=True)
    b, s = np.array(b), np.array(s)
    got = dl_moment_matrix(b, np.linalg.inv(s))
    for j in range(2):
        ref = combine_effects(b[:, j], s[:, j, j], method_re="dl")
        # Source: statsmodels combine_effects (DL, untruncated) coefficient by
        # coefficient: with diagonal S_i, B and diag(Q) are the univariate terms.
        np.testing.assert_allclose(got[j, j], ref.tau2, rtol=1e-10)


@pytest.mark.slow
def test_reml_simulation_recovers_mean_and_between_covariance():
    t, mu = np.array([[0.04, 0.01], [0.01, 0.02]]), np.array([0.5, -0.2])
    reps, k = 150, 25
    means, ts = np.empty((reps, 2)), np.empty((reps, 2, 2))
    for r in range(reps):
        b, s = _multivariate(100 + r, k=k, t=t, mu=mu)
        got = pool(b, s, tau_method="reml")
        means[r], ts[r] = got.coefficients, got.between_covariance
    # Source: simulation with known truth, seeded. The mean is unbiased (4 MC SE);
    # REML T is biased only by the PSD boundary: within 4 MC SE plus 15% of truth.
    mc = means.std(axis=0, ddof=1) / np.sqrt(reps)
    assert np.all(np.abs(means.mean(axis=0) - mu) < 4 * mc)
    mc_t = ts.std(axis=0, ddof=1) / np.sqrt(reps)
    assert np.all(np.abs(ts.mean(axis=0) - t) < 4 * mc_t + 0.15 * np.abs(t))


# --- Wald test of the non-linear terms ----------------------------------------

def _pooled(coef, cov):
    p = len(coef)
    return Pooled(coefficients=np.asarray(coef, float), covariance=np.asarray(cov, float),
                  tau2=np.zeros((p, p)), q=0.0, df=p, p_value=1.0, i2=0.0,
                  weights=np.array([0.5, 0.5]), method="fixed", tau_method=None,
                  converged=True, restricted_loglik=0.0, names=("a", "b"))


def test_nonlinearity_test_one_term_is_a_z_test():
    cov = np.array([[0.04, 0.01, 0.0], [0.01, 0.09, 0.02], [0.0, 0.02, 0.25]])
    w, df, p = nonlinearity_test(_pooled([0.1, 0.45, -0.3], cov), [1])
    z = 0.45 / 0.3
    # Source: closed form z^2 and the two-sided normal p (scipy.stats.norm).
    np.testing.assert_allclose(w, z ** 2, rtol=1e-12)
    np.testing.assert_allclose(p, 2 * norm.sf(z), rtol=1e-10)
    assert df == 1


def test_nonlinearity_test_is_chi_square_under_the_null():
    rng = np.random.default_rng(12)
    cov = np.array([[0.04, 0.01, 0.0], [0.01, 0.09, 0.02], [0.0, 0.02, 0.25]])
    draws = rng.multivariate_normal(np.zeros(3), cov, size=2000)
    w = np.array([nonlinearity_test(_pooled(d, cov), [1, 2])[0] for d in draws])
    # Source: simulation with known truth, seeded; scipy.stats.kstest against chi2(2).
    assert kstest(w, chi2(2).cdf).pvalue > 0.01


# --- errors ------------------------------------------------------------------

def test_errors_name_the_study_and_the_fix():
    s = np.eye(2) * 0.01
    with pytest.raises(ModelError, match="at least 2 studies"):
        pool([np.zeros(2)], [s])
    with pytest.raises(ModelError, match="B: coefficients have shape"):
        pool([np.zeros(2), np.zeros(3)], [s, s], names=["A", "B"])
    with pytest.raises(ModelError, match=r"B: covariance has shape \(3, 3\)"):
        pool([np.zeros(2), np.zeros(2)], [s, np.eye(3)], names=["A", "B"])
    bad = np.array([[0.01, 0.02], [0.02, 0.01]])  # eigenvalues 0.03 and -0.01
    with pytest.raises(ModelError, match=r"B: covariance .* not positive definite"):
        pool([np.zeros(2), np.zeros(2)], [s, bad], names=["A", "B"])
    with pytest.raises(ModelError, match="one name per study"):
        pool([np.zeros(2), np.zeros(2)], [s, s], names=["A"])
    with pytest.raises(ModelError, match="pooling method"):
        pool([np.zeros(2), np.zeros(2)], [s, s], method="bayes")
    with pytest.raises(ModelError, match="distinct"):
        nonlinearity_test(pool([np.zeros(2), np.zeros(2)], [s, s]), [2])
