"""The registries are the one list: every registered exposure family and curve
model has tests, and each family's declared dose parameters and bounds hold.

Coverage is read from the test sources: a family counts as tested when some
``tests/test_exposure_*.py`` names its class or its registered name (as a
string), a curve model when some ``tests/test_curves_*.py`` does. Registering
a family or model without such tests fails here.

Unit check, source: a change of unit multiplies the exposure by ``c``, and
``cX`` has CDF ``F(x / c)`` (a scale transform; derived here). In
``scipy.stats`` the same transform multiplies the ``scale`` argument by ``c``
(scipy.stats documentation: ``pdf(x, scale=s) = pdf(x / s) / s``). A family
is closed under it with exactly its declared dose parameters multiplied by
``c``; any other choice of dose parameters changes the distribution.

Bounds check, source: the parameter domains of the ``scipy.stats``
distributions (``scipy.stats`` returns NaN outside them); a lognormal GSD of 1
is scipy's ``s = ln gsd = 0``.
"""

import ast
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from doseattr.core.attribution.scenarios import SCENARIO_KINDS
from doseattr.core.curves.registry import MODELS, model_names
from doseattr.core.exposure import fit_best
from doseattr.core.exposure.registry import FAMILIES, dose_parameters, family_names
from doseattr.errors import ModelError

TESTS = Path(__file__).resolve().parent
FACTORS = (1e-3, 24.45 / 98.96, 7.0, 1e4)
QUANTILES = np.array([1e-6, 0.01, 0.2, 0.5, 0.8, 0.99, 1 - 1e-6])


def _names_in(path: Path) -> tuple[set[str], set[str]]:
    """Identifiers (names, attributes, imported names) and string constants of a module."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    identifiers: set[str] = set()
    strings: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Name):
            identifiers.add(node.id)
        elif isinstance(node, ast.Attribute):
            identifiers.add(node.attr)
        elif isinstance(node, ast.alias):
            identifiers.add(node.name.rsplit(".", 1)[-1])
        elif isinstance(node, ast.Constant) and isinstance(node.value, str):
            strings.add(node.value)
    return identifiers, strings


def _modules_naming(prefix: str, class_name: str, name: str) -> list[str]:
    """Test modules ``prefix*.py`` (not this one) that name the class or the registered name."""
    found = []
    for path in sorted(TESTS.glob(f"{prefix}*.py")):
        if path.resolve() == Path(__file__).resolve():
            continue
        identifiers, strings = _names_in(path)
        if class_name in identifiers or name in strings:
            found.append(path.name)
    return found


def test_the_scan_finds_nothing_for_an_unregistered_name():
    """The coverage scan is not vacuous: a name no test uses is reported as untested."""
    assert _modules_naming("test_exposure_", "NoSuchFamily", "no-such-family") == []
    assert _modules_naming("test_curves_", "NoSuchModel", "no-such-model") == []


@pytest.mark.parametrize("name", family_names())
def test_every_registered_family_has_tests(name):
    cls = type(FAMILIES[name])
    found = _modules_naming("test_exposure_", cls.__name__, name)
    assert found, (f"exposure family {name!r} is registered in FAMILIES but no "
                   f"tests/test_exposure_*.py names {cls.__name__} or {name!r}: add tests "
                   f"that check it against scipy.stats or a closed form")


@pytest.mark.parametrize("name", model_names())
def test_every_registered_curve_model_has_tests(name):
    cls = MODELS[name]
    found = _modules_naming("test_curves_", cls.__name__, name)
    assert found, (f"curve model {name!r} is registered in MODELS but no "
                   f"tests/test_curves_*.py names {cls.__name__} or {name!r}: add tests "
                   f"that check it against a closed form or a published table")


def _inside(lower: float, upper: float, u: float) -> float:
    """A point strictly inside ``(lower, upper)`` for ``u`` in [-1, 1]."""
    if np.isfinite(upper):
        return lower + (upper - lower) * (0.5 + 0.45 * u)
    return lower + float(np.exp(2.0 * u))


def _parameter_draws(fam, n=5, seed=20):
    rng = np.random.default_rng(seed)
    return [np.array([_inside(*fam.bounds[p], rng.uniform(-1, 1)) for p in fam.param_names])
            for _ in range(n)]


def _scaled_scipy(dist, c):
    """The scipy.stats distribution of ``c X`` for a frozen ``dist`` of ``X``."""
    kwds = dict(dist.kwds)
    kwds["scale"] = kwds.get("scale", 1.0) * c
    kwds["loc"] = kwds.get("loc", 0.0) * c
    return dist.dist(*dist.args, **kwds)


@pytest.mark.parametrize("name", family_names())
def test_log_sd_is_the_sd_of_log_x(name):
    """Each family's declared SD of ln X (used to refuse spreads too narrow
    for double precision) equals sqrt(E[(ln X - E ln X)^2]) computed by
    scipy.stats' ``expect`` on the family's own scipy distribution."""
    from scipy import integrate

    fam = FAMILIES[name]
    for p in _parameter_draws(fam, 4, seed=11):
        dist = fam.scipy(p)
        # on t = ln x, split at the log quantiles so quad sees every part
        t = np.log(dist.ppf([1e-12, 0.01, 0.25, 0.5, 0.75, 0.99, 1 - 1e-12]))

        def moment(g, dist=dist, t=t):
            return sum(integrate.quad(lambda u: g(u) * dist.pdf(np.exp(u)) * np.exp(u), a, b,
                                      epsabs=0, epsrel=1e-12, limit=200)[0]
                       for a, b in zip(t[:-1], t[1:]))

        m = moment(lambda u: u)
        sd = np.sqrt(moment(lambda u, m=m: (u - m) ** 2))
        assert fam.log_sd(p) == pytest.approx(sd, rel=1e-6)


@pytest.mark.parametrize("name", family_names())
def test_declarations_name_the_family_parameters(name):
    fam = FAMILIES[name]
    assert set(fam.bounds) == set(fam.param_names)
    assert set(fam.dose_params) <= set(fam.param_names)
    assert dose_parameters(name) == fam.dose_params
    for lower, upper in fam.bounds.values():
        assert lower < upper


@pytest.mark.parametrize("name", family_names())
def test_a_change_of_unit_scales_exactly_the_dose_parameters(name):
    """cdf(c x; p') == cdf(x; p) with p' the dose parameters times c, and p' is
    the scipy.stats distribution with its scale times c (module docstring)."""
    fam = FAMILIES[name]
    for p in _parameter_draws(fam):
        dist = fam.scipy(p)
        x = dist.ppf(QUANTILES)
        np.testing.assert_allclose(fam.cdf(x, p), dist.cdf(x), rtol=1e-9)
        for c in FACTORS:
            pc = fam.in_unit(p, c)
            ref = _scaled_scipy(dist, c)
            np.testing.assert_allclose(fam.cdf(c * x, pc), fam.cdf(x, p), rtol=1e-10)
            np.testing.assert_allclose(fam.sf(c * x, pc), fam.sf(x, p), rtol=1e-10)
            np.testing.assert_allclose(fam.cdf(c * x, pc), ref.cdf(c * x), rtol=1e-9)
            np.testing.assert_allclose(fam.ppf(QUANTILES, pc), ref.ppf(QUANTILES), rtol=1e-9)
            np.testing.assert_allclose(fam.mean(pc), ref.mean(), rtol=1e-10)
            for j, pname in enumerate(fam.param_names):
                if pname not in fam.dose_params:
                    assert pc[j] == p[j], f"{name}: {pname} is not in the dose unit"


@pytest.mark.parametrize("name", family_names())
def test_bounds_are_where_the_distribution_stops_existing(name):
    """At a declared lower bound scipy.stats has no distribution (NaN) and
    ``check`` refuses; just inside both accept (module docstring)."""
    fam = FAMILIES[name]
    p0 = _parameter_draws(fam, n=1)[0]
    for j, pname in enumerate(fam.param_names):
        lower, _ = fam.bounds[pname]
        at, near = p0.copy(), p0.copy()
        at[j] = lower
        near[j] = lower + 1e-6 * max(1.0, abs(lower))
        x = fam.scipy(p0).median()
        with np.errstate(all="ignore"):
            assert np.isnan(fam.scipy(at).cdf(x)), f"{name}: scipy accepts {pname} = {lower}"
        with pytest.raises(ModelError, match=pname):
            fam.check(at)
        fam.check(near)
        assert np.isfinite(fam.scipy(near).cdf(x))


def test_fit_best_tries_every_registered_family():
    """Source: scipy.stats.gamma sample; fit_best's default list is the registry."""
    x = stats.gamma(a=2.0, scale=3.0).rvs(300, random_state=np.random.default_rng(4))
    e = fit_best(x)
    tried = {e.family.name} | {fam.name for fam, _, _ in e.alternatives}
    assert tried == set(family_names())


# -- scenario types ---------------------------------------------------------------
@pytest.mark.parametrize("kind", list(SCENARIO_KINDS))
def test_every_scenario_type_is_tested_and_accepted(kind):
    """A registered scenario type has tests (``tests/test_attribution_*.py``
    naming its class or kind) and is a key of ``[[scenario]]`` (the schema
    reads the registry)."""
    from doseattr.analysis.schema import SECTIONS

    cls = SCENARIO_KINDS[kind]
    assert cls.kind == kind
    assert _modules_naming("test_attribution_", cls.__name__, kind), kind
    assert kind in SECTIONS["scenario"]


@pytest.mark.parametrize("kind, good, bad", [
    ("cap", 15.0, 0.0), ("scale", 0.8, 1.5), ("reduce_by", 2.0, -1.0)])
def test_scenario_values_are_checked_where_declared(tmp_path, kind, good, bad):
    """Each type's own rule (common practice: a cap and a reduction are
    positive amounts, a scale factor lies in (0, 1]) refuses the bad value
    with one line naming the scenario's key, and accepts the good one."""
    from doseattr.analysis.config import analysis_from_dict
    from doseattr.errors import InputError

    def analysis(value):
        return analysis_from_dict({
            "unit": "ug/m3", "curve": {"model": "linear", "err": 0.01},
            "exposure": {"gm": 8.0, "gsd": 2.0},
            "scenario": [{"name": "s", kind: value}]}, base_dir=tmp_path)

    assert analysis(good).scenarios[0].kind == kind
    with pytest.raises(InputError, match=rf"key '{kind}'"):
        analysis(bad)
    assert SCENARIO_KINDS[kind].value_problem(good) is None
    assert SCENARIO_KINDS[kind].value_problem(bad) is not None
