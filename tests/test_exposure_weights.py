r"""What the weights of measurements mean: frequency weights keep the inverse
observed information, importance (population) weights take the sandwich
covariance of Binder (1983, Int Stat Rev 51:279), and the Kish effective
sample size is reported. Each check names its outside reference.

Closed forms used below (the normal on the log scale, ``y = ln x``, internal
parameters ``(mu, eta = ln s)``; derived here by differentiating
:math:`\ell_i = -\eta - (y_i - \mu)^2 e^{-2\eta}/2`):

- scores :math:`\partial_\mu \ell_i = z_i / s`,
  :math:`\partial_\eta \ell_i = z_i^2 - 1` with :math:`z_i = (y_i - \mu)/s`;
- at the weighted MLE (:math:`\sum w_i z_i = 0`, :math:`\sum w_i z_i^2 = \sum w_i`)
  the weighted information is :math:`A = \mathrm{diag}(W/s^2, 2W)`, ``W = sum w``;
- so the sandwich variance of :math:`\hat\mu` is
  :math:`\sum w_i^2 (y_i - \hat\mu)^2 / W^2` exactly, and with the weights
  normalised to ``n`` the model-based covariance is
  :math:`\mathrm{diag}(s^2/n, 1/(2n))`.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.core.exposure.empirical import empirical
from doseattr.core.exposure.fit import fit_best, fit_measurements
from doseattr.core.exposure.sandwich import kish_effective_n
from doseattr.errors import InputError, ModelError


def _sample(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return rng.lognormal(1.0, 0.8, n), rng.lognormal(0.0, 0.8, n)


# -- the sandwich against closed forms and statsmodels ------------------------------
def test_sandwich_variance_of_log_gm_is_the_weighted_mean_closed_form():
    """Uncensored lognormal: the weighted MLE of mu is the weighted mean of
    ln x, whose sandwich variance is sum w^2 (y - mu)^2 / (sum w)^2 (module
    docstring). The numerical scores and Hessian agree to far better than
    1e-5 (central-difference error O(h^2), h about 6e-6)."""
    x, w = _sample(60, 1)
    f = fit_measurements("lognormal", x, weights=w, weight_meaning="importance")
    y = np.log(x)
    mu = np.average(y, weights=w)
    expected = np.sum(w**2 * (y - mu) ** 2) / w.sum() ** 2
    assert f.fit is not None and f.fit.cov_internal is not None
    np.testing.assert_allclose(f.fit.cov_internal[0, 0], expected, rtol=1e-5)


def test_sandwich_variance_of_log_gm_matches_statsmodels_wls_hc0():
    """statsmodels WLS of ln x on a constant with cov_type HC0 is the
    White/Huber sandwich of the weighted mean, the same estimator."""
    x, w = _sample(45, 2)
    f = fit_measurements("lognormal", x, weights=w, weight_meaning="importance")
    ols = sm.WLS(np.log(x), np.ones((x.size, 1)), weights=w).fit(cov_type="HC0")
    assert f.fit is not None and f.fit.cov_internal is not None
    np.testing.assert_allclose(f.fit.cov_internal[0, 0], ols.cov_params()[0, 0], rtol=1e-5)


def test_equal_weights_sandwich_equals_model_based_for_log_gm_exactly():
    """With all weights 1, B_mumu = sum z^2 / s^2 = n / s^2 = A_mumu exactly
    (s^2 is the MLE), and A is diagonal, so the sandwich and model-based
    variances of mu coincide exactly (module docstring)."""
    x, _ = _sample(30, 3)
    ones = np.ones(x.size)
    imp = fit_measurements("lognormal", x, weights=ones, weight_meaning="importance").fit
    freq = fit_measurements("lognormal", x, weights=ones, weight_meaning="frequency").fit
    assert imp is not None and freq is not None
    assert imp.cov_internal is not None and freq.cov_internal is not None
    np.testing.assert_allclose(imp.cov_internal[0, 0], freq.cov_internal[0, 0], rtol=1e-6)


def test_equal_weights_sandwich_tends_to_model_based_on_a_large_sample():
    r"""For eta = ln s, B_etaeta / n = mean(z^4) - 1 and A_etaeta / n = 2, so
    the sandwich over the model-based variance is (mean(z^4) - 1) / 2, which
    tends to 1 (normal kurtosis 3). With n = 100000 normal values the SD of
    mean(z^4) is sqrt(96 / n) = 0.031, of the ratio 0.016: a tolerance of
    0.08 is 5 SD. The correlation of (mu, eta) is mean(z^3) / sqrt(2) in
    the sandwich, SD sqrt(15 / n) / sqrt(2) = 0.009: bound 0.05."""
    x, _ = _sample(100_000, 4)
    ones = np.ones(x.size)
    imp = fit_measurements("lognormal", x, weights=ones, weight_meaning="importance").fit
    freq = fit_measurements("lognormal", x, weights=ones).fit
    assert imp is not None and freq is not None
    assert imp.cov_internal is not None and freq.cov_internal is not None
    ratio = np.diag(imp.cov_internal) / np.diag(freq.cov_internal)
    np.testing.assert_allclose(ratio, 1.0, atol=0.08)
    v = imp.cov_internal
    assert abs(v[0, 1] / np.sqrt(v[0, 0] * v[1, 1])) < 0.05


def test_frequency_weights_keep_the_inverse_information_closed_form():
    """Frequency weights (and no weights) keep today's covariance: with the
    weights normalised to n it is diag(s^2 / n, 1 / (2n)) for the lognormal
    (module docstring)."""
    x, w = _sample(40, 5)
    y = np.log(x)
    mu = np.average(y, weights=w)
    s2 = np.average((y - mu) ** 2, weights=w)
    expected = np.diag([s2 / x.size, 1 / (2 * x.size)])
    for fit in (fit_measurements("lognormal", x, weights=w).fit,
                fit_measurements("lognormal", x, weights=w, weight_meaning="frequency").fit):
        assert fit is not None and fit.cov_internal is not None
        np.testing.assert_allclose(fit.cov_internal, expected, rtol=1e-6, atol=1e-9)
        assert fit.weights_meaning == "frequency"
    plain = fit_measurements("lognormal", x, weight_meaning="importance").fit
    assert plain is not None and plain.cov_internal is not None
    np.testing.assert_allclose(plain.cov_internal, np.diag([np.var(y) / x.size, 1 / (2 * x.size)]),
                               rtol=1e-6, atol=1e-9)
    assert plain.weights_meaning is None and plain.effective_n is None


def test_censored_weighted_sandwich_matches_the_spread_over_simulated_samples():
    """Left-censored lognormal (censored below exp(-0.5), about 31%), weights
    lognormal with sigma 0.8, 100 values, 300 simulated samples with known
    truth: the mean sandwich variance of ln GM matches the variance of the
    estimates across samples. The sample variance of 300 estimates has
    relative SE sqrt(2 / 299) = 0.08: tolerance 0.25 (3 SE). The frequency
    covariance is too small by about the Kish factor n_eff / n = exp(-0.64)
    = 0.53; it must fall below 0.8 of the spread (more than 3 SE)."""
    rng = np.random.default_rng(6)
    est, sandwich_var, model_var = [], [], []
    for _ in range(300):
        y, w = rng.normal(0.0, 1.0, 100), rng.lognormal(0.0, 0.8, 100)
        det = y > -0.5
        x = np.exp(np.where(det, y, -0.5))
        f = fit_measurements("lognormal", x, detected=det, weights=w, weight_meaning="importance")
        assert f.fit is not None and f.fit.cov_internal is not None
        est.append(np.log(f.params[0]))
        sandwich_var.append(f.fit.cov_internal[0, 0])
        g = fit_measurements("lognormal", x, detected=det, weights=w)
        assert g.fit is not None and g.fit.cov_internal is not None
        model_var.append(g.fit.cov_internal[0, 0])
    spread = np.var(est, ddof=1)
    assert abs(np.mean(sandwich_var) / spread - 1) < 0.25
    assert np.mean(model_var) / spread < 0.8


def test_gamma_and_best_fits_carry_the_meaning():
    """Every family's fit takes the meaning; the sandwich is invariant to a
    common rescaling of the weights (A scales by c, B by c^2: Binder 1983)."""
    x, w = _sample(50, 7)
    a = fit_measurements("gamma", x, weights=w, weight_meaning="importance").fit
    b = fit_measurements("gamma", x, weights=7.5 * w, weight_meaning="importance").fit
    assert a is not None and b is not None
    assert a.cov_internal is not None and b.cov_internal is not None
    np.testing.assert_allclose(a.cov_internal, b.cov_internal, rtol=1e-5)
    best = fit_best(x, weights=w, weight_meaning="importance")
    assert best.fit is not None and best.fit.weights_meaning == "importance"
    assert all(fit is not None and fit.weights_meaning == "importance"
               for _, _, fit in best.alternatives)
    with pytest.raises(ModelError, match="weights must be \"frequency\" or \"importance\""):
        fit_best(x, weights=w, weight_meaning="survey")


# -- Kish -----------------------------------------------------------------------------
def test_kish_effective_sample_size_closed_forms():
    """(sum w)^2 / sum w^2 (Kish 1965, Survey Sampling, from memory): n for
    equal weights of any size; for k weights a and m weights b,
    (k a + m b)^2 / (k a^2 + m b^2)."""
    assert kish_effective_n(np.full(12, 3.3)) == pytest.approx(12.0, rel=1e-12)
    w = np.array([1.0] * 6 + [4.0] * 2)
    assert kish_effective_n(w) == pytest.approx((6 + 8) ** 2 / (6 + 32), rel=1e-12)
    x, wl = _sample(20, 8)
    fit = fit_measurements("lognormal", x, weights=wl, weight_meaning="importance").fit
    assert fit is not None
    assert fit.effective_n == pytest.approx(wl.sum() ** 2 / np.sum(wl**2), rel=1e-12)


# -- the empirical bootstrap ------------------------------------------------------------
def test_empirical_bootstrap_variance_follows_the_meaning():
    r"""The bootstrap variance of the weighted mean (empirical.py docstring):
    frequency weights draw rows with chances w, so the mean of n equally
    weighted draws has variance Var_w(x) / n exactly; importance weights keep
    the weights, giving about sum w^2 (x - mean)^2 / (sum w)^2 (the
    linearisation variance of a ratio; its bias is O(1/n), under 1% at
    n = 200). With 20000 draws the variance estimates have relative SE
    sqrt(2 / 20000) = 0.01: tolerance 0.05."""
    x, w = _sample(200, 9)
    p = w / w.sum()
    m = np.dot(p, x)
    rng = np.random.default_rng(10)
    freq = empirical(x, w, weight_meaning="frequency")
    v, q = freq.bootstrap(rng, 20_000)
    np.testing.assert_allclose(np.var(np.sum(v * q, axis=1)), np.dot(p, (x - m) ** 2) / x.size,
                               rtol=0.05)
    imp = empirical(x, w, weight_meaning="importance")
    v, q = imp.bootstrap(rng, 20_000)
    np.testing.assert_allclose(np.var(np.sum(v * q, axis=1)), np.sum(p**2 * (x - m) ** 2),
                               rtol=0.05)
    assert imp.fit.effective_n == pytest.approx(kish_effective_n(w), rel=1e-12)
    assert empirical(x).weights_meaning is None


# -- the analysis key -------------------------------------------------------------------
ERR = {"model": "linear", "err": 0.04, "per": 1.0, "beyond": "extend"}  # RR = 1 + 0.04 x
WEIGHTED = "value,weight\n" + "".join(f"{v},{w}\n" for v, w in zip(
    (12.0, 9.5, 15.6, 3.7, 17.3, 11.0, 8.2, 26.4), (1, 2, 1, 1, 3, 1, 2, 1)))


def _run(tmp_path, exposure: dict, text: str = WEIGHTED):
    (tmp_path / "m.csv").write_text(text)
    d = {"unit": "ug/m3", "curve": ERR, "exposure": {"table": "m.csv", **exposure},
         "uncertainty": {"draws": 200, "seed": 1}}
    return run_analysis(analysis_from_dict(d, base_dir=tmp_path))


def test_weights_default_to_importance_with_a_weight_column(tmp_path):
    """Default importance: the exposure record says so and gives Kish's
    n_eff = (sum w)^2 / sum w^2 = 144 / 22 for the weights 1,2,1,1,3,1,2,1
    (Kish 1965, from memory); the note names the meaning and n_eff."""
    r = _run(tmp_path, {"family": "lognormal"}).to_dict()
    ex = r["exposure"]
    assert ex["weights"] == "importance"
    assert ex["effective_n"] == pytest.approx(144 / 22, rel=1e-9)
    assert any("weights = \"importance\"" in n and "6.5 of 8" in n for n in r["notes"])


def test_frequency_weights_keep_the_fit_covariance(tmp_path):
    """weights = "frequency" gives the same exposure covariance as the core
    fit with frequency weights, the closed form diag(s^2/n, 1/(2n))."""
    r = _run(tmp_path, {"family": "lognormal", "weights": "frequency"})
    ex = r.to_dict()["exposure"]
    assert ex["weights"] == "frequency"
    fit = r.exposure_section.exposure.fit
    x = np.array([12.0, 9.5, 15.6, 3.7, 17.3, 11.0, 8.2, 26.4])
    w = np.array([1, 2, 1, 1, 3, 1, 2, 1.0])
    y = np.log(x)
    s2 = np.average((y - np.average(y, weights=w)) ** 2, weights=w)
    np.testing.assert_allclose(fit.cov_internal, np.diag([s2 / 8, 1 / 16]), rtol=1e-6, atol=1e-9)
    assert any("weights = \"frequency\"" in n for n in r.to_dict()["notes"])


def test_no_weight_column_gives_null_weights(tmp_path):
    r = _run(tmp_path, {"family": "lognormal"}, "value\n3\n5\n8\n13\n").to_dict()
    assert r["exposure"]["weights"] is None and r["exposure"]["effective_n"] is None
    with pytest.raises(InputError, match=r"\[exposure\] key 'weights'.*no column 'weight'"):
        _run(tmp_path, {"family": "lognormal", "weights": "importance"}, "value\n3\n5\n8\n13\n")


def test_a_wrong_weights_value_is_one_line_naming_the_key(tmp_path):
    with pytest.raises(InputError) as err:
        _run(tmp_path, {"family": "lognormal", "weights": "survey"})
    text = str(err.value)
    assert "\n" not in text
    assert "[exposure] key 'weights'" in text and "frequency" in text and "importance" in text


def test_empirical_weights_set_the_bootstrap(tmp_path):
    r = _run(tmp_path, {"family": "empirical", "weights": "frequency"})
    assert r.exposure_section.exposure.weights_meaning == "frequency"
    assert r.to_dict()["exposure"]["weights"] == "frequency"
    assert any("chances proportional to their weights" in n for n in r.to_dict()["notes"])
