"""Breakpoints in t = ln x: coverage of f and of RR(x) f(x), and divergence.

Coverage is measured with scipy.stats (tail probabilities) and
scipy.integrate.quad (tail mass of x^b f or e^(cx) f); full moments use
closed forms derived in the docstrings.
"""

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import gammaln, roots_legendre

from doseattr.core.curves.base import Growth
from doseattr.core.exposure import FAMILIES
from doseattr.errors import DivergenceError


def reference(name, params):
    a, b = params
    if name == "lognormal":
        return stats.lognorm(s=np.log(b), scale=a)
    if name == "gamma":
        return stats.gamma(a=a, scale=b)
    return stats.weibull_min(c=a, scale=b)


COVER = [("lognormal", (2.0, 1.05)), ("lognormal", (5.0, 2.5)), ("lognormal", (0.1, 8.0)),
         ("gamma", (0.05, 2.0)), ("gamma", (0.3, 1.0)), ("gamma", (1.0, 5.0)), ("gamma", (40.0, 0.2)),
         ("gamma", (800.0, 1.0)), ("weibull", (0.3, 1.0)), ("weibull", (1.0, 3.0)), ("weibull", (8.0, 2.0))]


def power(b):
    return Growth("power", np.asarray(b, dtype=float))


def exp_growth(c):
    return Growth("exp", np.asarray(c, dtype=float))


@pytest.mark.parametrize("name,params", COVER)
def test_log_breaks_cover_the_distribution(name, params):
    """Source: scipy.stats cdf/sf at the outer breakpoints (< 1e-15 outside)."""
    t = FAMILIES[name].log_breaks(np.array(params))
    ref = reference(name, params)
    assert t.shape == (13,) and np.all(np.diff(t) > 0) and np.all(np.isfinite(t))
    assert ref.cdf(np.exp(t[0])) < 1e-15
    assert ref.sf(np.exp(t[-1])) < 1e-15
    # the breaks are not wastefully wide: the outer ones sit in the far tails, not beyond 1e-40
    assert ref.sf(np.exp(t[-1])) > 1e-40


@pytest.mark.parametrize("name", list(FAMILIES))
def test_log_breaks_rectangular_over_draws(name):
    """Source: the same call row by row (one shape per row, K fixed)."""
    fam = FAMILIES[name]
    params = np.array([[1.5, 2.0], [3.0, 1.7], [1.5, 5.0]])
    got = fam.log_breaks(params)
    assert got.shape == (3, 13)
    for row, p in zip(got, params):
        np.testing.assert_allclose(row, fam.log_breaks(p), rtol=1e-13)


def power_moment(name, params, b):
    """E[X^b] in closed form: lognormal exp(b mu + b^2 s^2 / 2) (normal mgf of
    ln X); gamma scale^b Gamma(k + b)/Gamma(k); Weibull scale^b Gamma(1 + b/k)
    (substitute E = (x/scale)^k, standard exponential)."""
    a, c = params
    if name == "lognormal":
        return np.exp(b * np.log(a) + 0.5 * (b * np.log(c)) ** 2)
    if name == "gamma":
        return c ** b * np.exp(gammaln(a + b) - gammaln(a))
    return c ** b * np.exp(gammaln(1 + b / a))


POWER = [("lognormal", (2.0, 3.0), 1.0), ("lognormal", (2.0, 3.0), 4.0), ("gamma", (0.5, 2.0), 2.0),
         ("gamma", (3.0, 1.0), 6.0), ("weibull", (0.6, 2.0), 1.5), ("weibull", (2.0, 1.0), 5.0)]


def tail_mass_log_scale(log_integrand_x, t0):
    """quad over t = ln x in [t0, t0 + 40] of exp(log g(e^t) + t): g's mass
    beyond e^t0 (for the cases here, whose tails fall at least exponentially
    in x, nothing measurable lies beyond e^(t0 + 40))."""
    return integrate.quad(lambda t: np.exp(log_integrand_x(np.exp(t)) + t), t0, t0 + 40.0,
                          epsabs=0, epsrel=1e-8, limit=400)[0]


@pytest.mark.parametrize("name,params,b", POWER)
def test_power_tilt_covers_x_to_the_b_times_f(name, params, b):
    """Source: scipy.integrate.quad (on the log scale) of x^b f(x), f from
    scipy.stats logpdf, beyond the last tilted break, relative to E[X^b]
    (closed form above)."""
    fam, ref = FAMILIES[name], reference(name, params)
    t = fam.tilted_log_breaks(np.array(params), power(b))
    own = fam.log_breaks(np.array(params))
    assert t.shape[0] > own.shape[0] and np.all(np.diff(t) >= 0) and np.all(np.isin(own, t))
    tail = tail_mass_log_scale(lambda x: b * np.log(x) + ref.logpdf(x), t[-1])
    assert tail / power_moment(name, params, b) < 1e-14


@pytest.mark.parametrize("name,params,b", [("lognormal", (2.0, 3.0), 4.0), ("gamma", (3.0, 1.0), 6.0),
                                           ("weibull", (0.6, 2.0), 3.0)])
def test_untilted_breaks_would_not_cover_a_steep_power(name, params, b):
    """Source: as above; shows the tilt is needed (the test above can fail)."""
    fam, ref = FAMILIES[name], reference(name, params)
    top = fam.log_breaks(np.array(params))[-1]
    tail = tail_mass_log_scale(lambda x: b * np.log(x) + ref.logpdf(x), top)
    assert tail / power_moment(name, params, b) > 1e-12


def gauss_on_breaks(t, log_integrand, nodes=20):
    """Fixed-node Gauss-Legendre on each panel between breakpoints (scipy roots)."""
    z, w = roots_legendre(nodes)
    a, b = t[:-1, None], t[1:, None]
    tt = 0.5 * (b - a) * z + 0.5 * (a + b)
    return float(np.sum(0.5 * (b - a) * w * np.exp(log_integrand(tt))))


@pytest.mark.parametrize("name,params,b", POWER)
def test_fixed_nodes_on_tilted_breaks_reproduce_the_moment(name, params, b):
    """Source: closed-form E[X^b] (power_moment docstring); 20-point
    Gauss-Legendre (scipy.special.roots_legendre) per panel between breaks."""
    fam = FAMILIES[name]
    p = np.array(params)
    t = fam.tilted_log_breaks(p, power(b))
    got = gauss_on_breaks(t, lambda tt: b * tt + fam.log_density_log(tt.ravel(), p).reshape(tt.shape))
    np.testing.assert_allclose(got, power_moment(name, params, b), rtol=1e-8)


def test_gamma_exponential_tilt_reproduces_the_mgf():
    """Source: the gamma moment generating function E[e^(cX)] = (1 - c scale)^(-shape)
    for c scale < 1 (e.g. Johnson, Kotz & Balakrishnan 1994, ch. 17), with
    20-point Gauss-Legendre per panel."""
    fam = FAMILIES["gamma"]
    for k, theta, c in [(2.0, 1.5, 0.6), (0.7, 3.0, 0.3), (5.0, 1.0, 0.95)]:
        p = np.array([k, theta])
        t = fam.tilted_log_breaks(p, exp_growth(c))
        got = gauss_on_breaks(t, lambda tt, c=c, p=p: c * np.exp(tt) + fam.log_density_log(tt.ravel(), p).reshape(tt.shape))
        np.testing.assert_allclose(got, (1 - c * theta) ** (-k), rtol=1e-8)


@pytest.mark.parametrize("k,lam,c", [(1.5, 2.0, 0.8), (3.0, 5.0, 2.0), (1.1, 1.0, 0.5), (2.0, 10.0, 1.0)])
def test_weibull_exponential_tilt_covers_the_mass(k, lam, c):
    """Source: scipy.integrate.quad of e^(cx) f(x) (scipy.stats weibull_min pdf
    in log form): tail beyond the last break < 1e-14 of the total, and the
    fixed-node integral over the breaks equals quad's total."""
    fam, ref = FAMILIES["weibull"], stats.weibull_min(c=k, scale=lam)
    p = np.array([k, lam])
    t = fam.tilted_log_breaks(p, exp_growth(c))

    def integrand(x):
        return np.exp(c * x + ref.logpdf(x))

    mode = np.exp(t[len(t) // 2])
    total = sum(integrate.quad(integrand, lo, hi, epsabs=0, epsrel=1e-12, limit=200)[0]
                for lo, hi in [(0, mode), (mode, np.exp(t[-1])), (np.exp(t[-1]), np.inf)])
    tail = integrate.quad(integrand, np.exp(t[-1]), np.inf, epsabs=0, epsrel=1e-8)[0]
    assert tail / total < 1e-14
    got = gauss_on_breaks(t, lambda tt: c * np.exp(tt) + fam.log_density_log(tt.ravel(), p).reshape(tt.shape))
    np.testing.assert_allclose(got, total, rtol=1e-8)


def test_weibull_shape_one_is_the_exponential_case():
    """Source: exponential mgf E[e^(cX)] = 1/(1 - c scale), c scale < 1."""
    fam = FAMILIES["weibull"]
    p = np.array([1.0, 2.0])
    t = fam.tilted_log_breaks(p, exp_growth(0.4))
    got = gauss_on_breaks(t, lambda tt: 0.4 * np.exp(tt) + fam.log_density_log(tt.ravel(), p).reshape(tt.shape))
    np.testing.assert_allclose(got, 1 / (1 - 0.8), rtol=1e-8)


def test_per_draw_rates_and_no_tilt_for_non_positive_rates():
    """Source: the tilt rules (rate <= 0 means no tilt) applied row by row."""
    fam = FAMILIES["lognormal"]
    params = np.array([[2.0, 2.0], [3.0, 1.5]])
    t = fam.tilted_log_breaks(params, power([0.0, 2.0]))
    own = fam.log_breaks(params)
    extra = t.shape[1] - own.shape[1]
    assert extra > 0
    # the untilted draw only repeats its top breakpoint (empty panels)
    np.testing.assert_allclose(t[0], np.sort(np.concatenate([own[0], np.repeat(own[0, -1], extra)])),
                               rtol=1e-14)
    np.testing.assert_allclose(t[1], fam.tilted_log_breaks(params[1], power(2.0)), rtol=1e-14)
    single = fam.tilted_log_breaks(params[0], power([-1.0, 1.0]))
    assert single.shape[0] == 2 and np.all(np.diff(single, axis=1) >= 0)
    np.testing.assert_allclose(single[0, :own.shape[1]], own[0], rtol=1e-14)
    np.testing.assert_allclose(fam.tilted_log_breaks(params, exp_growth([0.0, -0.2])), own)
    np.testing.assert_allclose(fam.tilted_log_breaks(params, Growth.bounded()), own)


@pytest.mark.parametrize("name,params,rate,match", [
    ("lognormal", [[2.0, 2.0], [2.0, 2.0]], [0.0, 0.1], r"moment generating function diverges \(in 1 of 2 draws\)"),
    ("gamma", [3.0, 2.0], 0.5, "slope x scale >= 1"),
    ("weibull", [0.8, 2.0], 0.01, "shape < 1"),
    ("weibull", [1.0, 2.0], 0.5, "slope x scale >= 1"),
    ("weibull", [1.05, 10.0], 5.0, "beyond floating-point range"),
])
def test_divergence_is_refused_with_the_reason(name, params, rate, match):
    """Source: closed forms: the lognormal mgf is infinite for any positive
    argument; the gamma mgf (1 - c scale)^-k needs c scale < 1; for a Weibull
    with shape < 1, c x - (x/scale)^k -> +inf; for shape 1 it is the
    exponential mgf; for shape just above 1 and c scale >> 1 the maximum of
    c x - (x/scale)^k is about c x* (1 - 1/k) with x* = scale (c scale/k)^(1/(k-1)),
    here far above 700."""
    with pytest.raises(DivergenceError, match=match) as err:
        FAMILIES[name].tilted_log_breaks(np.array(params), exp_growth(rate))
    assert "maximum dose" in str(err.value)
