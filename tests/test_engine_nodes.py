"""Where the engine places its nodes, and the shortcuts that rely on it.

* Every node lies between the zero-below dose and the flat point, so the
  direct excess forms skip holding doses within them (``inside``). Checked
  by recording the doses the engine asks for, over windows whose ends are
  exact and windows cut at the body, where the gamma family's map from the
  normal score to ``w`` is interpolated.
* The log-linear excess takes ``exp(t) - 1`` in the trailing columns where
  every ``t`` is at least 1/16: checked against ``numpy.expm1`` (at most
  17 x 2^-52 relative, the bound derived in ``fractions``), and ``expm1``
  itself elsewhere.
* ``engine._merged`` against ``numpy.sort`` and ``engine.columns`` against
  ``numpy.concatenate`` (reference library).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from doseattr.core.attribution import engine, fractions
from doseattr.core.attribution.fractions import excess_draws
from doseattr.core.attribution.scenarios import Cap, ReduceBy, Scale
from doseattr.core.curves.base import Curve
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.exposure.registry import FAMILIES

EXPOSURES = [
    ("lognormal", [6.0, 2.5]),
    ("lognormal", [0.5, 1.2]),      # the flat point far beyond the body
    ("gamma", [1.5, 4.0]),
    ("gamma", [0.15, 30.0]),        # a small shape: extra breaks near w = 0
    ("gamma", [40.0, 0.05]),        # the minimum-risk level below the body
    ("weibull", [1.4, 8.0]),
]
SCENARIOS = [None, Cap(12.0), Scale(0.6), ReduceBy(1.5)]


def _recorded_doses(monkeypatch, curve, fam, params, m, scenario=None) -> np.ndarray:
    seen: list[np.ndarray] = []
    original = fractions._excess_m

    def recording(*args):
        inner = original(*args)

        def excess(x, rows, out, inside=False):
            if inside:
                seen.append(np.array(x))
            return inner(x, rows, out, inside)
        return excess

    monkeypatch.setattr(fractions, "_excess_m", recording)
    excess_draws(curve, curve.coef, FAMILIES[fam], params, 0.0, m, scenario)
    return np.concatenate([s.ravel() for s in seen])


@pytest.mark.parametrize("fam,p", EXPOSURES)
@pytest.mark.parametrize("scenario", SCENARIOS, ids=["current", "cap", "scale", "reduce"])
@pytest.mark.parametrize("model", ["linear", "loglinear"])
def test_nodes_lie_between_zero_below_and_flat_point(monkeypatch, fam, p, scenario, model):
    """Each dose given with ``inside`` lies within [zero_below, flat_from]
    (to a relative 1e-12: the doses are exp(a + b w) in floats)."""
    curve = (Curve(LinearExcess(), np.array([0.03]), np.eye(1), max_dose=25.0)
             if model == "linear" else
             Curve(LogLinear(), np.array([0.2]), np.eye(1), max_dose=25.0))
    m = 2.0
    low = m if scenario is None else float(scenario.preimage(np.array([m]))[0])
    top = fractions._flat_from(curve, scenario)
    params = np.array(p) * np.exp(np.random.default_rng(3).normal(0, 0.02, (64, 2)))
    doses = _recorded_doses(monkeypatch, curve, fam, params, m, scenario)
    assert doses.size, "the engine evaluated no nodes"
    assert doses.min() >= low * (1 - 1e-12)
    assert doses.max() <= top * (1 + 1e-12)


@pytest.mark.parametrize("k", [0.2, 0.5, 1.5])
@pytest.mark.parametrize("z", [7.501, 7.52, 7.56])
def test_gamma_window_cut_at_the_body_stays_below_the_flat_point(monkeypatch, k, z):
    """A flat point just beyond the body's normal score 7.5 (placed by
    scipy.stats): the body's end comes from the interpolated quantile
    table, which can lie beyond it (by up to 2% of the dose, seen here
    without the engine's holding); the nodes must not."""
    top = float(stats.gamma(k).isf(stats.norm.sf(z)))
    m = float(stats.gamma(k).ppf(0.5))
    curve = Curve(LinearExcess(), np.array([0.03]), np.eye(1), max_dose=top)
    doses = _recorded_doses(monkeypatch, curve, "gamma", np.array([[k, 1.0]]), m)
    assert doses.min() >= m * (1 - 1e-12)
    assert doses.max() <= top * (1 + 1e-12)


def test_exp_minus_one_within_its_bound_of_expm1():
    """The log-linear excess at t >= 1/16 everywhere against numpy.expm1,
    within the bound derived in fractions (17 x 2^-52 relative)."""
    bound = fractions.EXP_MINUS_ONE_ERROR
    assert bound == 17 * 2.0**-52
    curve = Curve(LogLinear(), np.array([0.3]), np.eye(1), max_dose=400.0)
    coef = np.full((4, 1), 0.3)
    excess = fractions._excess_m(curve, coef, np.full(4, 1.0), None)
    assert excess is not None
    rng = np.random.default_rng(5)
    # t = 0.3 (x - 1) from 1/16 to 100, most of them near 1/16 where the
    # bound is tightest
    t = np.concatenate([1 / 16 + rng.exponential(0.05, (4, 400)),
                        rng.uniform(1 / 16, 100.0, (4, 100))], axis=1)
    x = 1.0 + t / 0.3
    got = excess(x, slice(0, 4), np.empty_like(x), True)
    want = np.expm1(0.3 * (x - 1.0))
    assert (np.abs(got / want - 1.0)).max() <= bound
    # a column with a t below 1/16: expm1 itself there and in the columns
    # before it, exp(t) - 1 only in the columns after it
    x[0, 7] = 1.0 + 0.06 / 0.3
    got = excess(x, slice(0, 4), np.empty_like(x), True)
    want = np.expm1(0.3 * (x - 1.0))
    assert np.array_equal(got[:, :8], want[:, :8])
    assert (np.abs(got / want - 1.0)).max() <= bound
    x[:, -1] = 1.001
    got = excess(x, slice(0, 4), np.empty_like(x), True)
    assert np.array_equal(got, np.expm1(0.3 * (x - 1.0)))


@pytest.mark.parametrize("body_cols", [1, 2, 3, 5, 12])
@pytest.mark.parametrize("cuts", [0, 1, 2, 3, 6])
def test_merged_matches_numpy_sort(body_cols, cuts):
    rng = np.random.default_rng(body_cols * 10 + cuts)
    body = np.sort(rng.normal(size=(40, body_cols)), axis=1)
    extra = rng.normal(size=(40, cuts))
    if cuts:
        extra[::5, 0] = body[::5, 0]        # ties with an edge
        extra[1::7, -1] = -np.inf
    want = np.sort(np.concatenate([body, extra], axis=1), axis=1)
    assert np.array_equal(engine._merged(body, extra), want)


@pytest.mark.parametrize("widths", [(1,), (2, 1), (1, 3, 0, 2)])
def test_columns_are_numpy_concatenate_held_column_major(widths):
    # reference: numpy.concatenate along the columns; the layout is what the
    # engine relies on for speed (engine.columns)
    rng = np.random.default_rng(sum(widths))
    parts = [rng.normal(size=(30, k)) for k in widths]
    parts[0] = np.asfortranarray(parts[0])
    got = engine.columns(*parts)
    assert np.array_equal(got, np.concatenate(parts, axis=1))
    assert got.flags.f_contiguous


def test_engine_values_do_not_depend_on_the_columns_layout():
    # the same kinks given row-major and column-major: the same integrals
    # (elementwise operations, and reductions whose order the layout keeps)
    fam = FAMILIES["lognormal"]
    rng = np.random.default_rng(3)
    params = np.column_stack([rng.uniform(2, 20, 64), rng.uniform(1.5, 3, 64)])
    curve = Curve(LogLinear(), np.array([0.4]), np.array([[0.0004]]), max_dose=30.0)
    kinks = np.ascontiguousarray(np.column_stack([np.full(64, 8.0), rng.uniform(3, 25, 64)]))
    args = dict(growth=curve.growth(curve.coef), flat_from=30.0, zero_below=2.0)
    log_rr = fractions._log_rr_m(curve, np.broadcast_to(curve.coef, (64, 1)),
                                 np.full(64, 2.0), None)
    rows = engine.expected_excess(log_rr, fam, params, kinks=kinks, **args)
    cols = engine.expected_excess(log_rr, fam, params, kinks=np.asfortranarray(kinks), **args)
    assert np.array_equal(rows, cols)
