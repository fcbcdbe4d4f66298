"""The random-effects model of within- and between-worker variation
(doseattr.core.hygiene.workers), checked against statsmodels' MixedLM,
closed forms derived here, scipy's adaptive quadrature and seeded
simulations with known truth."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import log_ndtr, ndtr
from statsmodels.regression.mixed_linear_model import MixedLM
from statsmodels.tools.numdiff import approx_fprime, approx_hess3
from statsmodels.tools.sm_exceptions import ConvergenceWarning

from doseattr.core.exposure.lognormal import LogNormal
from doseattr.core.hygiene import workers as W
from doseattr.core.uncertainty.sampling import exposure_draws
from doseattr.errors import ModelError


def simulate(seed: int, sizes: np.ndarray | list[int], mu: float, sb: float, sw: float,
             censored_share: float = 0.0):
    """Log-scale samples of the model with known truth; values below the
    ``censored_share`` quantile of the marginal are reported as non-detects
    at that limit."""
    rng = np.random.default_rng(seed)
    sizes = np.asarray(sizes)
    code = np.repeat(np.arange(sizes.size), sizes)
    y = mu + rng.normal(0.0, sb, sizes.size)[code] + rng.normal(0.0, sw, code.size)
    detected = np.ones(y.size, bool)
    if censored_share > 0:
        limit = mu + stats.norm.ppf(censored_share) * np.hypot(sb, sw)
        detected = y >= limit
        y = np.where(detected, y, limit)
    return y, detected, code, np.array([f"w{c:03d}" for c in code])


def mixedlm(y, code):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return MixedLM(y, np.ones((y.size, 1)), groups=code).fit(reml=False, method=["bfgs"],
                                                                 gtol=1e-10)


# -- fully detected data ----------------------------------------------------

def test_unbalanced_detected_data_agree_with_statsmodels_mixedlm():
    sizes = np.random.default_rng(1).integers(2, 9, 30)
    y, det, code, worker = simulate(2, sizes, 0.3, 0.7, 0.5)
    model = W.fit_workers(np.exp(y), det, worker)
    ref = mixedlm(y, code)  # statsmodels MixedLM, reml=False
    assert model.mu == pytest.approx(ref.fe_params[0], abs=1e-6)
    assert model.sigma_between ** 2 == pytest.approx(ref.cov_re[0, 0], rel=1e-4)
    assert model.sigma_within ** 2 == pytest.approx(ref.scale, rel=1e-4)
    assert model.loglik == pytest.approx(ref.llf, abs=1e-6)
    # BLUPs: statsmodels' predicted random effects at its ML estimates
    blup = np.array([ref.random_effects[i].iloc[0] for i in range(sizes.size)])
    mine = np.array([w.mean_log for w in model.workers]) - model.mu
    np.testing.assert_allclose(mine, blup, atol=1e-5)
    # standard error of mu: statsmodels' (X'V^-1 X)^-1, which the observed
    # information reproduces at the MLE up to the small mu-variance coupling
    assert np.sqrt(model.cov[0, 0]) == pytest.approx(ref.bse_fe[0], rel=1e-3)
    assert model.n_samples == y.size and model.n_workers == 30 and model.n_censored == 0


def test_balanced_detected_data_match_the_anova_closed_form():
    # closed form (derived): balanced k workers x n samples, the ML
    # estimates are mu = grand mean, sw^2 = MSW and
    # sb^2 = ((k - 1)/k MSB - MSW)/n = (SSB/k - MSW)/n when positive
    k, n = 12, 4
    y, det, _code, worker = simulate(3, [n] * k, -0.5, 0.6, 0.4)
    yi = y.reshape(k, n)
    msw = np.sum((yi - yi.mean(1, keepdims=True)) ** 2) / (k * (n - 1))
    ssb = n * np.sum((yi.mean(1) - y.mean()) ** 2)
    vb = (ssb / k - msw) / n
    assert vb > 0
    model = W.fit_workers(np.exp(y), det, worker)
    assert model.mu == pytest.approx(y.mean(), abs=1e-8)
    assert model.sigma_within ** 2 == pytest.approx(msw, rel=1e-6)
    assert model.sigma_between ** 2 == pytest.approx(vb, rel=1e-6)
    assert model.icc == pytest.approx(vb / (vb + msw), rel=1e-6)
    assert model.gsd_within == pytest.approx(np.exp(np.sqrt(msw)), rel=1e-6)


def test_no_between_worker_spread_is_reported_at_the_boundary():
    # closed form (derived): with identical worker means (SSB = 0) the ML
    # between-worker variance is 0 and sw^2 = SST/(kn)
    k, n = 10, 3
    e = np.random.default_rng(4).normal(0.0, 0.5, (k, n))
    y = (e - e.mean(1, keepdims=True) + 0.2).ravel()
    worker = np.repeat([f"w{i}" for i in range(k)], n)
    model = W.fit_workers(np.exp(y), np.ones(y.size, bool), worker)
    assert model.at_boundary and model.sigma_between == 0 and model.cov is None
    assert any("boundary" in note for note in model.notes)
    assert model.mu == pytest.approx(0.2, abs=1e-8)
    assert model.sigma_within ** 2 == pytest.approx(np.mean((y - 0.2) ** 2), rel=1e-6)
    with pytest.raises(ModelError, match="between-worker SD is estimated at 0"):
        W.long_term_exposure(model)
    with pytest.raises(ModelError, match="no interval"):
        W.exceedance_of_worker_means(model, 1.0)


def test_censored_data_without_worker_differences_fall_back_to_independent_values():
    # independent route: with identical worker means the ML is at sb = 0, where
    # the model is independent left-censored normal values on the log scale,
    # maximised here with scipy.optimize on scipy.stats log densities and CDFs
    k, n = 10, 4
    e = np.random.default_rng(12).normal(0.0, 0.5, (k, n))
    y = (e - e.mean(1, keepdims=True) + 0.2).ravel()
    limit = np.quantile(y, 0.3)
    det = y >= limit
    y = np.where(det, y, limit)
    model = W.fit_workers(np.exp(y), det, np.repeat([f"w{i}" for i in range(k)], n))

    def neg(th):
        return -(stats.norm.logpdf(y[det], th[0], np.exp(th[1])).sum()
                 + stats.norm.logcdf(y[~det], th[0], np.exp(th[1])).sum())

    from scipy.optimize import minimize
    ref = minimize(neg, [0.0, np.log(0.5)], method="Nelder-Mead",
                   options={"xatol": 1e-10, "fatol": 1e-12})
    assert model.at_boundary and model.sigma_between == 0
    assert model.mu == pytest.approx(ref.x[0], abs=1e-6)
    assert model.sigma_within == pytest.approx(np.exp(ref.x[1]), rel=1e-6)
    assert model.loglik == pytest.approx(-ref.fun, abs=1e-8)
    assert all(w.long_term_mean == pytest.approx(np.exp(model.mu + model.sigma_within ** 2 / 2))
               for w in model.workers)


def test_worker_posteriors_of_detected_data_match_the_normal_closed_form():
    # closed form (derived): b_i | y ~ N(m, v), m = n sb^2 (ybar - mu) / tau,
    # v = sb^2 sw^2 / tau, tau = sw^2 + n sb^2; E[exp(b)] = exp(m + v/2)
    y, det, code, worker = simulate(5, [2, 3, 5, 8, 4, 6], 1.0, 0.8, 0.5)
    model = W.fit_workers(np.exp(y), det, worker)
    mu, vb, vw = model.mu, model.sigma_between ** 2, model.sigma_within ** 2
    z = stats.norm.ppf(0.975)
    for i, est in enumerate(model.workers):
        yi = y[code == i]
        tau = vw + yi.size * vb
        m, v = yi.size * vb * (yi.mean() - mu) / tau, vb * vw / tau
        assert est.mean_log == pytest.approx(mu + m, abs=1e-9)
        assert est.sd_log == pytest.approx(np.sqrt(v), rel=1e-8)
        assert est.long_term_mean == pytest.approx(np.exp(mu + m + v / 2 + vw / 2), rel=1e-8)
        assert est.lower == pytest.approx(np.exp(mu + m - z * np.sqrt(v) + vw / 2), rel=1e-5)
        assert est.upper == pytest.approx(np.exp(mu + m + z * np.sqrt(v) + vw / 2), rel=1e-5)


# -- the worker integrals -----------------------------------------------------

def _one_worker(y, det):
    return W.build_samples(np.asarray(y, float), np.asarray(det, bool),
                           np.zeros(len(y), int), ("a",))


def _quad_loglik(y, det, mu, sb, sw):
    """ln of the worker integral by scipy.integrate.quad, the integrand in
    closed form (normal densities and CDFs), split at its mode and at the
    detection limits."""
    y, det = np.asarray(y, float), np.asarray(det, bool)

    def log_f(b):
        u = (y - mu - b) / sw
        terms = np.where(det, stats.norm.logpdf(u) - np.log(sw), log_ndtr(u))
        return terms.sum() + stats.norm.logpdf(b / sb) - np.log(sb)

    from scipy.optimize import minimize_scalar
    mode = minimize_scalar(lambda b: -log_f(b), bracket=(-1.0, 1.0)).x
    top = log_f(mode)
    width = 40 * sb + 40 * sw
    h = 1e-4 * min(sb, sw)
    sd = h / np.sqrt(2 * top - log_f(mode - h) - log_f(mode + h))
    steps = sd * 2.0 ** np.arange(0, 40)
    edges = np.unique(np.r_[mode - width, mode - steps, mode, mode + steps, y - mu, mode + width])
    edges = edges[(edges >= mode - width) & (edges <= mode + width)]
    total = sum(integrate.quad(lambda b: np.exp(log_f(b) - top), a, c, epsabs=0,
                               epsrel=1e-13, limit=400)[0]
                for a, c in zip(edges[:-1], edges[1:]))
    return top + np.log(total)


@pytest.mark.parametrize(("y", "det", "sb", "sw"), [
    ([-0.5, 0.1, 0.3, -0.2, 0.4], [False, False, True, True, True], 1.0, 0.5),
    ([-0.5, 0.0, 0.5], [False, False, False], 3.0, 0.3),       # only non-detects, sb >> sw
    ([-0.4, -0.4, 0.2, 0.6, 0.1, -0.3, 0.9, 0.0] * 3, [False, True] * 12, 0.5, 1.0),
    ([0.0, 0.0, -0.3, 0.4], [False, False, True, True], 30.0, 0.1),
])
def test_censored_worker_integral_matches_scipy_quad(y, det, sb, sw):
    s = _one_worker(y, det)
    mine = W.quadrature(s, 0.2, sb, sw).loglik[0]
    assert mine == pytest.approx(_quad_loglik(y, det, 0.2, sb, sw), abs=1e-8)  # scipy quad


@pytest.mark.parametrize(("sb", "sw"), [(1.0, 1.0), (10.0, 0.1), (1000.0, 0.1)])
def test_one_non_detect_has_its_closed_form(sb, sw):
    # closed form (derived): P(mu + b + e < ln L) = Phi((ln L - mu)/sqrt(sb^2 + sw^2))
    s = _one_worker([-0.5], [False])
    mine = W.quadrature(s, 0.2, sb, sw).loglik[0]
    assert mine == pytest.approx(log_ndtr(-0.7 / np.hypot(sb, sw)), abs=1e-9)


def test_quadrature_reproduces_the_closed_form_marginal_of_detected_data():
    # closed form: the normal marginal likelihood (derived in the module)
    y, det, _code, worker = simulate(6, [2, 3, 8, 5, 40], 0.0, 2.0, 0.2)
    s = W.samples(np.exp(y), det, worker)
    for sb, sw in [(2.0, 0.2), (0.01, 1.0), (0.7, 0.5)]:
        quad = float(np.sum(W.quadrature(s, 0.1, sb, sw).loglik))
        assert quad == pytest.approx(W.closed_form_loglik(s, 0.1, sb, sw), abs=1e-8)


def test_censored_gradient_matches_finite_differences():
    y, det, _code, worker = simulate(7, [3, 4, 5, 2, 6, 3], 0.0, 0.8, 0.6, censored_share=0.3)
    s = W.samples(np.exp(y), det, worker)
    theta = np.array([0.1, np.log(0.7), np.log(0.5)])
    grad = W.loglik_and_gradient(s, theta)[1]
    fd = approx_fprime(theta, lambda th: W.loglik_and_gradient(s, th)[0], centered=True)
    np.testing.assert_allclose(grad, fd, rtol=1e-6, atol=1e-7)  # statsmodels numdiff
    # the observed information behind the covariance: second differences of
    # the log-likelihood itself (statsmodels numdiff)
    hess = approx_hess3(theta, lambda th: W.loglik_and_gradient(s, th)[0])
    np.testing.assert_allclose(W.hessian(s, theta), hess, rtol=1e-4, atol=1e-5)


def test_censored_worker_posterior_matches_scipy_quad():
    # posterior of b given the worker's samples, by scipy.integrate.quad
    y, det, sb, sw, mu = [-0.5, 0.0, 0.4], [False, False, True], 1.2, 0.4, 0.1
    s = W.build_samples(np.array(y + [0.3, 0.2]), np.array(det + [True, True]),
                        np.array([0, 0, 0, 1, 1]), ("a", "b"))
    est = W.worker_estimates(s, mu, sb, sw)[0]

    def dens(b):
        u = (np.array(y) - mu - b) / sw
        t = np.where(det, stats.norm.logpdf(u), log_ndtr(u)).sum() + stats.norm.logpdf(b / sb)
        return np.exp(t)

    lim = (-12.0, 8.0)
    z = integrate.quad(dens, *lim, points=[-0.6, -0.1], epsabs=0, epsrel=1e-12)[0]
    mean = integrate.quad(lambda b: b * dens(b), *lim, points=[-0.6, -0.1], epsabs=0, epsrel=1e-12)[0] / z
    ltm = integrate.quad(lambda b: np.exp(b) * dens(b), *lim, points=[-0.6, -0.1], epsabs=0,
                         epsrel=1e-12)[0] / z
    lower = integrate.quad(dens, lim[0], np.log(est.lower) - mu - sw ** 2 / 2)[0] / z
    assert est.mean_log == pytest.approx(mu + mean, abs=1e-8)
    assert est.long_term_mean == pytest.approx(np.exp(mu + sw ** 2 / 2) * ltm, rel=1e-8)
    assert lower == pytest.approx(0.025, abs=1e-4)
    assert est.n == 3 and est.n_censored == 2


# -- censored data: recovery of known truth -------------------------------------

def test_censored_fit_recovers_the_truth():
    # simulation, seeded: 40 workers x 5 samples, 30% non-detects
    truth = np.array([0.0, np.log(0.8), np.log(0.6)])
    y, det, _code, worker = simulate(8, [5] * 40, 0.0, 0.8, 0.6, censored_share=0.3)
    assert 0.2 < np.mean(~det) < 0.4
    model = W.fit_workers(np.exp(y), det, worker)
    est = np.array([model.mu, np.log(model.sigma_between), np.log(model.sigma_within)])
    se = np.sqrt(np.diag(model.cov))
    assert np.all(np.abs(est - truth) < 3 * se)
    assert np.all(se < [0.2, 0.3, 0.12])
    assert model.n_censored == int(np.sum(~det)) and "left-censored" in model.method


@pytest.mark.slow
def test_wald_interval_of_mu_covers_with_censoring():
    # simulation, seeded: 40 data sets of 15 workers x 4 samples, 30% non-detects
    hits, reps = 0, 40
    for rep in range(reps):
        y, det, _code, worker = simulate(100 + rep, [4] * 15, 1.0, 0.7, 0.5, censored_share=0.3)
        model = W.fit_workers(np.exp(y), det, worker)
        hits += abs(model.mu - 1.0) < 1.96 * np.sqrt(model.cov[0, 0])
    # nominal 95%; binomial SD of the rate about 3.4% at 40 data sets
    assert 0.85 <= hits / reps <= 1.0


# -- uses of the fit --------------------------------------------------------------

@pytest.fixture(scope="module")
def censored_model():
    y, det, _code, worker = simulate(9, [5] * 30, 0.0, 0.9, 0.5, censored_share=0.3)
    return W.fit_workers(np.exp(y), det, worker)


def test_exceedance_of_worker_means_is_the_lognormal_tail(censored_model):
    m = censored_model
    limit = 2.5
    est, lo, hi = W.exceedance_of_worker_means(m, limit)
    # closed form (from memory): P = 1 - Phi((ln L - mu - sw^2/2)/sb)
    z = (m.mu + m.sigma_within ** 2 / 2 - np.log(limit)) / m.sigma_between
    assert est == pytest.approx(ndtr(z), rel=1e-12)
    # simulation, seeded: share of simulated workers' long-term means above L
    b = np.random.default_rng(10).normal(0.0, m.sigma_between, 400_000)
    share = np.mean(np.exp(m.mu + b + m.sigma_within ** 2 / 2) > limit)
    assert share == pytest.approx(est, abs=4 * np.sqrt(est * (1 - est) / b.size))
    # delta method on the probit scale with a numerical gradient (statsmodels numdiff)
    theta = np.array([m.mu, np.log(m.sigma_between), np.log(m.sigma_within)])

    def probit(th):
        return (th[0] + np.exp(2 * th[2]) / 2 - np.log(limit)) / np.exp(th[1])

    g = approx_fprime(theta, probit, centered=True)
    se = np.sqrt(g @ m.cov @ g)
    assert lo == pytest.approx(ndtr(z - 1.959963984540054 * se), rel=1e-6)
    assert hi == pytest.approx(ndtr(z + 1.959963984540054 * se), rel=1e-6)
    assert lo < est < hi


def test_workers_above_are_those_whose_long_term_mean_exceeds(censored_model):
    limit = 1.5
    above = W.workers_above(censored_model, limit)
    means = [w.long_term_mean for w in above]
    assert means == sorted(means, reverse=True) and all(v > limit for v in means)
    rest = [w for w in censored_model.workers if w not in above]
    assert all(w.long_term_mean <= limit for w in rest)
    assert len(above) + len(rest) == censored_model.n_workers and above


def test_long_term_exposure_is_lognormal_with_delta_method_covariance(censored_model):
    m = censored_model
    exp_ = W.long_term_exposure(m)
    assert isinstance(exp_.family, LogNormal) and exp_.source == "measurements"
    # closed form: gm = exp(mu + sw^2/2), gsd = exp(sb)
    assert exp_.parameters["gm"] == pytest.approx(np.exp(m.mu + m.sigma_within ** 2 / 2))
    assert exp_.parameters["gsd"] == pytest.approx(np.exp(m.sigma_between))
    # delta method with the Jacobian by finite differences (statsmodels numdiff)
    theta = np.array([m.mu, np.log(m.sigma_between), np.log(m.sigma_within)])

    def internal(th):
        return np.array([th[0] + np.exp(2 * th[2]) / 2, th[1]])

    jac = approx_fprime(theta, internal, centered=True)
    np.testing.assert_allclose(exp_.fit.cov_internal, jac @ m.cov @ jac.T, rtol=1e-6)
    assert any("long-term mean" in n for n in exp_.notes)
    # the Monte Carlo sampler draws from that covariance (simulation, seeded)
    draws = exposure_draws(exp_, 20_000, np.random.default_rng(11))
    inner = LogNormal().to_internal(draws.params)
    np.testing.assert_allclose(np.cov(inner.T), exp_.fit.cov_internal, rtol=0.05)


def test_within_worker_note_names_the_widening():
    assert "wider" in W.within_worker_note() and "long-term" in W.WITHIN_WORKER_NOTE


# -- errors ---------------------------------------------------------------------

@pytest.mark.parametrize(("values", "detected", "worker", "match"), [
    ([1.0, 2.0, 3.0], [True] * 3, ["a", "a", "a"], "at least 2 workers"),
    ([1.0, 2.0, 3.0, 4.0], [True] * 4, ["a", "b", "c", "d"], "repeated samples"),
    ([1.0, 2.0, 3.0, 4.0], [True, True, False, False], ["a", "a", "b", "b"], "at least 3"),
    ([1.0, -2.0, 3.0, 4.0], [True] * 4, ["a", "a", "b", "b"], "positive"),
    ([1.0, 2.0, 3.0], [True] * 3, ["a", "b"], "same length"),
])
def test_unusable_designs_are_refused(values, detected, worker, match):
    with pytest.raises(ModelError, match=match):
        W.fit_workers(values, detected, worker)


def test_limit_must_be_positive(censored_model):
    with pytest.raises(ModelError, match="positive"):
        W.workers_above(censored_model, 0.0)
    with pytest.raises(ModelError, match="positive"):
        W.exceedance_of_worker_means(censored_model, float("nan"))
