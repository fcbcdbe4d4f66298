"""``doseattr check`` loads no heavy library: what it imports on the demo
(a fresh interpreter prints ``sys.modules``), and the numpy-only pieces
that replaced scipy.optimize, scipy.stats and statsmodels on that path,
each checked against the library it replaces."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.special
import scipy.stats
from scipy.optimize import brentq, minimize

from doseattr.core.curves.logistic import expit
from doseattr.core.curves.roots import bisect_root
from doseattr.core.exposure.fit import fit_measurements
from doseattr.core.exposure.mle import central_gradient, central_hessian, newton_search
from doseattr.errors import ModelError

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "data_demo" / "analysis.toml"
#: Libraries whose import alone costs more than the whole check of the demo.
HEAVY = ("scipy.stats", "scipy.optimize", "scipy.integrate", "scipy.interpolate",
         "statsmodels", "pandas", "matplotlib", "dask")


def test_check_of_the_demo_imports_no_heavy_library():
    code = ("import sys\nfrom doseattr.cli import main\n"
            f"status = main(['check', {str(DEMO)!r}])\n"
            "print('HEAVY', status, sorted(m for m in sys.modules "
            f"if m.split('.')[0] in {HEAVY!r} or m.rsplit('.', 1)[0] in {HEAVY!r}))")
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                          text=True, check=True)
    assert "point PAF" in done.stdout  # the check ran to its attribution line
    heavy = [line for line in done.stdout.splitlines() if line.startswith("HEAVY")]
    assert heavy == ["HEAVY 0 []"], done.stdout


def test_importing_the_analysis_package_leaves_the_run_pipeline_unloaded():
    code = ("import sys, doseattr.analysis.check, doseattr.analysis as a\n"
            "print('doseattr.analysis.pipeline' in sys.modules, a.run_analysis.__module__)")
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                          text=True, check=True)
    assert done.stdout.split() == ["False", "doseattr.analysis.pipeline"]


def test_expit_equals_scipy_special_expit():
    x = np.r_[np.linspace(-800.0, 800.0, 4001), -1e-300, 0.0, 1e-300, 36.0, 37.0, -745.0]
    normal = x > -700.0  # below, scipy flushes subnormal results to 0
    # source: scipy.special.expit; relative to the value, so tiny results count too
    np.testing.assert_allclose(expit(x[normal]), scipy.special.expit(x[normal]), rtol=4e-16,
                               atol=0)
    # closed form: expit(x) = e^x / (1 + e^x) = e^x to double precision for x < -40
    np.testing.assert_allclose(expit(x[~normal]), np.exp(x[~normal]), rtol=0, atol=0)
    assert float(expit(0.0)) == 0.5  # closed form


def test_bisect_root_equals_brentq():
    n = np.array([120.0, 80.0, 60.0, 30.0])
    lrr = np.log([1.0, 1.4, 2.1, 3.3])

    def f(u: float) -> float:
        return float(np.sum(n * scipy.special.expit(lrr + u)) - 110.0)

    # source: scipy.optimize.brentq with the same tolerances
    expected = brentq(f, -10.0, 10.0, xtol=1e-14, rtol=4 * np.finfo(float).eps)
    assert bisect_root(f, -10.0, 10.0, xtol=1e-14, rtol=4 * np.finfo(float).eps) == \
        pytest.approx(expected, abs=3e-14)
    with pytest.raises(ModelError, match="no sign change"):
        bisect_root(f, 5.0, 10.0, xtol=1e-14, rtol=0.0)


def _censored_lognormal_loglik(x: np.ndarray, detected: np.ndarray):
    def loglik(theta: np.ndarray) -> float:
        mu, log_sigma = theta
        sigma = np.exp(log_sigma)
        dens = scipy.stats.norm.logpdf(np.log(x[detected]), mu, sigma) - np.log(x[detected])
        below = scipy.stats.norm.logcdf(np.log(x[~detected]), mu, sigma)
        return float(dens.sum() + below.sum())
    return loglik


def _sample(seed: int = 7, n: int = 60) -> tuple[np.ndarray, np.ndarray]:
    x = np.random.default_rng(seed).lognormal(1.5, 0.8, n)
    limit = np.quantile(x, 0.2)
    detected = x >= limit
    return np.where(detected, x, limit), detected


def test_central_differences_equal_statsmodels_numdiff():
    numdiff = pytest.importorskip("statsmodels.tools.numdiff")
    x, d = _sample()
    f = _censored_lognormal_loglik(x, d)
    theta = np.array([1.4, np.log(0.75)])
    # source: statsmodels.tools.numdiff approx_hess3 and approx_fprime(centered=True)
    np.testing.assert_allclose(central_hessian(f, theta), numdiff.approx_hess3(theta, f),
                               rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(central_gradient(f, theta),
                               numdiff.approx_fprime(theta, f, centered=True),
                               rtol=1e-10, atol=1e-10)


def test_newton_fit_of_censored_lognormal_equals_scipy_minimize():
    x, d = _sample()
    fitted = fit_measurements("lognormal", x, detected=d)
    f = _censored_lognormal_loglik(x, d)
    # source: scipy.optimize.minimize (Nelder-Mead, tight tolerances) on the
    # censored log-likelihood written here with scipy.stats.norm
    res = minimize(lambda t: -f(t), np.array([1.0, 0.0]), method="Nelder-Mead",
                   options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20000})
    mu, sigma = res.x[0], np.exp(res.x[1])
    gm, gsd = fitted.params
    assert gm == pytest.approx(np.exp(mu), rel=1e-7)
    assert np.log(gsd) == pytest.approx(sigma, rel=1e-7)
    assert fitted.fit is not None and fitted.fit.loglik == pytest.approx(-res.fun, rel=1e-10)


def test_newton_search_gives_up_where_the_information_is_not_positive():
    # f(t) = -t0^2 + t1^2: a saddle (closed form), so Newton must not claim a maximum
    def value_grad(t: np.ndarray) -> tuple[float, np.ndarray]:
        return float(-t[0] ** 2 + t[1] ** 2), np.array([-2 * t[0], 2 * t[1]])

    info = lambda t: np.diag([2.0, -2.0])  # noqa: E731  minus the Hessian, closed form
    assert newton_search(value_grad, info, np.array([1.0, 1.0]), scale=1.0) is None


def test_newton_search_solves_a_concave_quadratic_in_one_step():
    a = np.array([[3.0, 1.0], [1.0, 2.0]])
    b = np.array([1.0, -2.0])
    calls = []

    def value_grad(t: np.ndarray) -> tuple[float, np.ndarray]:
        calls.append(t)
        return float(b @ t - 0.5 * t @ a @ t), b - a @ t

    found = newton_search(value_grad, lambda t: a, np.zeros(2), scale=1.0)
    assert found is not None
    np.testing.assert_allclose(found, np.linalg.solve(a, b), rtol=1e-14)  # closed form
    assert len(calls) == 2  # the start and the one Newton step
