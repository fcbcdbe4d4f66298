r"""Monte Carlo propagation to fractions and attributable cases.

For each draw :math:`d` the curve coefficients, the exposure parameters and
the minimum-risk level are drawn (:mod:`.sampling`), and the expected excess
risk :math:`E_d - 1` is integrated for the current exposure and for each
scenario with the vectorised engine. Then, per stratum :math:`s`,

.. math::
    PAF_{sd} = \frac{E_{sd} - 1}{E_{sd}}, \qquad
    A_{sd} = PAF_{sd}\, N_{sd},

with :math:`N_{sd}` the observed cases (or a Poisson draw around them).
Totals are sums over strata within each draw, so the interval of a total is
consistent with the strata, and the overall PAF is
:math:`\sum_s A_{sd} / \sum_s N_{sd}`. Strata that share an exposure
distribution share its draws (one sample of the shared survey), and are
integrated once. Exposures of one family are integrated together, their
parameter draws stacked into one engine call per scenario (each draw's
integral depends on that draw alone, so this changes nothing but the
rounding and the per-call cost).

A weighted bootstrap of an empirical exposure is never held as a draws x
values array: its resamples are replayed a few draws at a time as weights on
the distinct values (:class:`~doseattr.core.uncertainty.sampling.Resample`),
every scenario integrated on each chunk, and when neither the curve nor the
minimum-risk level varies the integrand is evaluated once per distinct value.

The propagation keeps its input draws (:class:`InputDraws`), so
:func:`vary_only` gives the outputs with some inputs at their point values
from the same draws (common random numbers) without drawing again.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from typing import cast

import numpy as np
from numpy.typing import NDArray

from doseattr.core.attribution.fractions import (
    empirical_excess_draws,
    excess_draws,
    paf_from_excess,
    pif_from_excess,
)
from doseattr.core.attribution.impact import empirical_impact_draws, impact_draws
from doseattr.core.attribution.scenarios import Scenario
from doseattr.core.curves.base import Curve
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.core.uncertainty.sampling import (
    ExposureDraws,
    case_draws,
    curve_draws,
    exposure_draws,
    fixed_exposure,
    minimum_risk_draws,
)

FloatArray = NDArray[np.float64]
AnyExposure = Exposure | EmpiricalExposure

SOURCES = ("curve", "exposure", "minimum_risk", "cases")


@dataclass(frozen=True)
class Stratum:
    """A population stratum: its name, observed cases and exposure."""

    name: str
    cases: float
    exposure: AnyExposure


@dataclass(frozen=True, eq=False)
class InputDraws:
    """The draws a propagation was computed from: coefficients ``(D, p)``,
    minimum-risk levels ``(D,)`` and its point value, each unique
    exposure's draws (by ``id``, with the exposure), the case draws ``(D,)``
    by stratum name, and which sources actually vary in them (draws that
    are not all at the point value)."""

    coef: FloatArray
    minimum_risk: FloatArray
    minimum_risk_point: float
    exposures: dict[int, tuple[AnyExposure, ExposureDraws]]
    cases: dict[str, FloatArray]
    varying: tuple[str, ...]

    @property
    def draws(self) -> int:
        return int(self.minimum_risk.size)


@dataclass(frozen=True, eq=False)
class Propagation:
    """Draws of every output, shape ``(S, D)`` per stratum or ``(D,)``.

    ``paf[s]``, ``attributable[s]``; ``pif[name][s]`` and
    ``averted[name][s]`` per scenario; ``total_*`` summed over strata;
    ``inputs`` the draws they came from (``None`` for point values),
    ``method`` as in :func:`propagate`.
    """

    strata: tuple[str, ...]
    cases: FloatArray
    paf: FloatArray
    attributable: FloatArray
    pif: dict[str, FloatArray]
    averted: dict[str, FloatArray]
    sources: tuple[str, ...] = field(default=SOURCES)
    inputs: InputDraws | None = None
    method: str = "paf"

    @property
    def total_cases(self) -> FloatArray:
        return cast(FloatArray, self.cases.sum(axis=0))

    @property
    def total_attributable(self) -> FloatArray:
        return cast(FloatArray, self.attributable.sum(axis=0))

    @property
    def total_paf(self) -> FloatArray:
        """Total attributable over total cases per draw. A draw whose
        Poisson case counts are all zero has no such ratio; it gets the
        stratum PAFs weighted by the mean case counts instead."""
        return self._ratio(self.total_attributable, self.paf)

    def total_averted(self, name: str) -> FloatArray:
        return cast(FloatArray, self.averted[name].sum(axis=0))

    def total_pif(self, name: str) -> FloatArray:
        return self._ratio(self.total_averted(name), self.pif[name])

    def _ratio(self, total: FloatArray, fraction: FloatArray) -> FloatArray:
        cases = self.total_cases
        mean = self.cases.mean(axis=1)
        fallback = (fraction * mean[:, None]).sum(axis=0) / max(float(mean.sum()), 1e-300)
        return np.where(cases > 0, total / np.where(cases > 0, cases, 1.0), fallback)


def propagate(curve: Curve, strata: Sequence[Stratum], scenarios: Sequence[Scenario], *,
              draws: int, rng: np.random.Generator, minimum_risk: tuple[float, float],
              sources: Sequence[str] = SOURCES,
              progress: Callable[[int], None] | None = None, method: str = "paf",
              curve_rng: np.random.Generator | None = None,
              case_rng: np.random.Generator | None = None) -> Propagation:
    """Draws of PAF, PIF and attributable cases for every stratum.

    Parameters
    ----------
    sources
        Which inputs vary: any of ``"curve"``, ``"exposure"``,
        ``"minimum_risk"``, ``"cases"`` (Poisson). The others stay at their
        point values. To see which input drives the width of an interval,
        :func:`vary_only` takes one source at a time from the draws this
        run keeps (``Propagation.inputs``).
    progress
        Called with the number of integrals finished, after each batch.
    method
        ``"paf"``: the fractions are :math:`1 - 1/E[RR_m(X)]` and
        :math:`1 - E[RR_m(g(X))]/E[RR_m(X)]`; ``"impact-function"``: they
        are :math:`E[1 - 1/RR_m(X)]` and :math:`E[1 - RR_m(g(X))/RR_m(X)]`
        (:mod:`doseattr.core.attribution.impact`).
    curve_rng, case_rng
        Separate generators for the curve coefficients and the Poisson
        cases. With them, ``rng`` draws only the minimum-risk level and the
        exposures, so runs of different curves (or of different strata)
        that pass the same ``rng`` seed share those draws exactly (common
        random numbers across curves) while their curves and cases stay
        independent. Without them every draw comes from ``rng``.
    """
    assert set(sources) <= set(SOURCES), sources
    assert method in METHODS, method
    assert len({s.name for s in strata}) == len(strata), "stratum names must be unique"
    n = int(draws)
    coef = (curve_draws(curve, n, rng if curve_rng is None else curve_rng) if "curve" in sources
            else np.broadcast_to(curve.coef, (n, curve.coef.size)))
    lo, hi = minimum_risk
    m = minimum_risk_draws(lo, hi, n, rng) if "minimum_risk" in sources else np.full(n, 0.5 * (lo + hi))
    exposures = _unique_exposures(strata)
    ex_draws = {key: (exposure_draws(e, n, rng) if "exposure" in sources else fixed_exposure(e, n))
                for key, e in exposures.items()}
    observed = np.array([s.cases for s in strata], dtype=float)
    cases = np.asarray(case_draws(observed, n, rng if case_rng is None else case_rng,
                                  "cases" in sources), dtype=float)
    fractions = _fractions(method, curve, coef, exposures, ex_draws, m, scenarios, progress, n)
    varying = _varying(sources, curve, coef, lo < hi, ex_draws.values(), cases, observed)
    inputs = InputDraws(coef, m, 0.5 * (lo + hi),
                        {key: (e, ex_draws[key]) for key, e in exposures.items()},
                        {s.name: cases[i] for i, s in enumerate(strata)}, varying)
    return _assemble(strata, scenarios, cases, fractions, tuple(sources), inputs, method)


def vary_only(curve: Curve, strata: Sequence[Stratum], scenarios: Sequence[Scenario],
              joint: Propagation, sources: Sequence[str], *, method: str = "paf",
              progress: Callable[[int], None] | None = None) -> Propagation:
    """The outputs with only ``sources`` varying, from the draws of the run
    ``joint`` (common random numbers), the other inputs at their point
    values: the one-at-a-time runs of a sensitivity analysis without new
    draws.

    ``strata`` may differ from the joint run's, but each exposure and (when
    ``"cases"`` varies) each stratum name must be among its. Nothing is
    integrated when none of the varying sources enters the integrals (only
    ``"cases"``, or inputs whose draws sit at their point values): the
    point fractions then stand for every draw.
    """
    inputs = joint.inputs
    assert inputs is not None, "vary_only needs the draws of a propagate run"
    assert set(sources) <= set(SOURCES) and method in METHODS, (sources, method)
    n, sources = inputs.draws, tuple(sources)
    exposures = _unique_exposures(strata)
    cases = np.stack([inputs.cases[s.name] if "cases" in sources
                      else np.full(n, float(s.cases)) for s in strata])
    if not set(sources) & set(inputs.varying) - {"cases"}:
        fixed = {key: fixed_exposure(e, 1) for key, e in exposures.items()}
        point = _fractions(method, curve, curve.coef[None, :], exposures, fixed,
                           np.array([inputs.minimum_risk_point]), scenarios, None, 1)
        fractions = {key: np.broadcast_to(v, (n,)) for key, v in point.items()}
    else:
        coef = (inputs.coef if "curve" in sources
                else np.broadcast_to(curve.coef, (n, curve.coef.size)))
        m = (inputs.minimum_risk if "minimum_risk" in sources
             else np.full(n, inputs.minimum_risk_point))
        ex_draws = {key: (inputs.exposures[key][1] if "exposure" in sources
                          else _at_points(e, n)) for key, e in exposures.items()}
        fractions = _fractions(method, curve, coef, exposures, ex_draws, m, scenarios, progress, n)
    return _assemble(strata, scenarios, cases, fractions, sources, inputs, method)


def _at_points(exposure: AnyExposure, n: int) -> ExposureDraws:
    """The exposure at its point estimate; an empirical one on its distinct
    values with their summed weights (the same expectation, fewer points)."""
    if isinstance(exposure, EmpiricalExposure):
        values, weights, _ = exposure.points
        return ExposureDraws(values=values[None, :], weights=weights[None, :])
    return fixed_exposure(exposure, n)


def _varying(sources: Sequence[str], curve: Curve, coef: FloatArray, m_range: bool,
             ex_draws: Iterable[ExposureDraws], cases: FloatArray,
             observed: FloatArray) -> tuple[str, ...]:
    """The sources whose draws are not all at their point values."""
    flags = {"curve": bool(np.any(coef != curve.coef)), "minimum_risk": m_range,
             "exposure": any(ex.varies for ex in ex_draws),
             "cases": bool(np.any(cases != observed[:, None]))}
    return tuple(k for k in SOURCES if k in sources and flags[k])


def point_values(curve: Curve, strata: Sequence[Stratum], scenarios: Sequence[Scenario],
                 minimum_risk: float, method: str = "paf") -> Propagation:
    """The same outputs at the point estimates of every input (one "draw")."""
    assert method in METHODS, method
    exposures = _unique_exposures(strata)
    fixed = {key: fixed_exposure(e, 1) for key, e in exposures.items()}
    fractions = _fractions(method, curve, curve.coef[None, :], exposures, fixed,
                           np.array([minimum_risk]), scenarios, None, 1)
    cases = np.array([[s.cases] for s in strata], dtype=float)
    return _assemble(strata, scenarios, cases, fractions, (), method=method)


#: The two ways from fractions to attributable cases.
METHODS = ("paf", "impact-function")

#: (exposure key, scenario name or None) -> fraction draws (D,)
_Fractions = dict[tuple[int, "str | None"], FloatArray]


#: Most stacked rows (exposures x draws) integrated in one call of the
#: family path (at least one exposure a call). Enough rows that the fixed
#: cost of a call is shared, few enough that the per-call arrays stay
#: small: larger batches measured no faster (3,000 lognormal strata x
#: 1,000 draws, 100 x 10,000).
BATCH_ROWS = 1 << 17


def _fractions(method: str, curve: Curve, coef: FloatArray, exposures: dict[int, AnyExposure],
               ex_draws: dict[int, ExposureDraws], m: FloatArray,
               scenarios: Sequence[Scenario], progress: Callable[[int], None] | None,
               n: int) -> _Fractions:
    """The attributable fraction (key ``None``) and each scenario's
    averted fraction per unique exposure, by ``method``.

    Exposures of one family are integrated together (:func:`_stacked`);
    empirical exposures one at a time."""
    out: _Fractions = {}
    functions = (excess_draws, empirical_excess_draws) if method == "paf" else (
        impact_draws, empirical_impact_draws)
    for keys, values in _batches(functions, curve, coef, exposures, ex_draws, m, scenarios):
        for key, v in zip(keys, values):
            if method == "paf":
                out[key, None] = paf_from_excess(v[None])
                for g in scenarios:
                    out[key, g.name] = pif_from_excess(v[None], v[g.name])
            else:
                out.update({(key, name): x for name, x in v.items()})
        if progress is not None:
            progress(len(keys) * n * (1 + len(scenarios)))
    return out


_Values = dict["str | None", FloatArray]


def _batches(functions: tuple[Callable[..., FloatArray], Callable[..., FloatArray]],
             curve: Curve, coef: FloatArray, exposures: dict[int, AnyExposure],
             ex_draws: dict[int, ExposureDraws], m: FloatArray,
             scenarios: Sequence[Scenario]) -> Iterable[tuple[list[int], list[_Values]]]:
    """``(keys, values per key)`` for runs of exposures: each empirical
    exposure alone, and the family exposures grouped by family in runs of
    at most :data:`BATCH_ROWS` stacked rows (at least one exposure)."""
    groups: dict[int, list[int]] = {}
    for key, e in exposures.items():
        ex = ex_draws[key]
        if isinstance(e, EmpiricalExposure):
            if ex.resample is not None:
                yield [key], [_resampled(functions[1], curve, coef, e, ex, m, scenarios)]
            else:
                yield [key], [{None if g is None else g.name:
                               _expectation(functions, curve, coef, e, ex, m, g)
                               for g in (None, *scenarios)}]
        else:
            groups.setdefault(id(e.family), []).append(key)
    for keys in groups.values():
        first = ex_draws[keys[0]].params
        assert first is not None
        d = max(1, int(np.atleast_2d(first).shape[0]))
        per = max(1, BATCH_ROWS // d)
        for i in range(0, len(keys), per):
            run = keys[i:i + per]
            yield run, _stacked(functions[0], curve, coef,
                                [cast(Exposure, exposures[k]) for k in run],
                                [ex_draws[k] for k in run], m, scenarios)


def _stacked(function: Callable[..., FloatArray], curve: Curve, coef: FloatArray,
             exposures: Sequence[Exposure], ex: Sequence[ExposureDraws], m: FloatArray,
             scenarios: Sequence[Scenario]) -> list[_Values]:
    """``function`` (a family path) for exposures of one family in one call
    per scenario: their parameter draws stacked to ``(E*D, k)``, the
    coefficients, minimum-risk levels and unexposed shares tiled to match,
    and the result split back per exposure. Each draw's value depends on
    that draw's row alone (the engine's panels are per draw), so this
    equals one call per exposure."""
    params = [np.atleast_2d(np.asarray(x.params, dtype=float)) for x in ex]
    d = max(max(p.shape[0] for p in params), coef.shape[0], m.size)
    rows = [np.broadcast_to(p, (d, p.shape[1])) for p in params]
    stack = np.concatenate(rows)
    k = len(exposures)
    coefs = np.tile(np.broadcast_to(coef, (d, coef.shape[1])), (k, 1))
    ms = np.tile(np.broadcast_to(m, (d,)), k)
    us = np.repeat(np.array([e.unexposed for e in exposures], dtype=float), d)
    family = exposures[0].family
    out: list[_Values] = [{} for _ in exposures]
    for g in (None, *scenarios):
        name = None if g is None else g.name
        flat = function(curve, coefs, family, stack, us, ms, g).reshape(k, d)
        for i in range(k):
            out[i][name] = flat[i]
    return out


def _resampled(function: Callable[..., FloatArray], curve: Curve, coef: FloatArray,
               exposure: AnyExposure, ex: ExposureDraws, m: FloatArray,
               scenarios: Sequence[Scenario]) -> dict[str | None, FloatArray]:
    r"""``function`` (an empirical path) per draw over a replayed bootstrap,
    every scenario on each chunk of resampled weights ``W (k, U)``.

    When the coefficients and the minimum-risk level are the same in every
    draw, the integrand is evaluated once at the ``U`` distinct values
    (each value its own one-point "draw") and draw ``d``'s expectation is
    the weighted sum :math:`\sum_u W_{du} h(x_u)`."""
    assert ex.resample is not None and ex.values is not None
    values, n = ex.values, ex.resample.draws
    jobs = [(None if g is None else g.name, g) for g in (None, *scenarios)]
    out = {key: np.empty(n) for key, _ in jobs}
    u = exposure.unexposed
    fixed = bool(np.all(coef == coef[0]) and np.all(m == m[0]))
    at_points = ({key: function(curve, coef[:1], values.T, np.ones((values.size, 1)), u, m[0], g)
                  for key, g in jobs} if fixed else {})
    for rows, w in ex.resample.chunks():
        for key, g in jobs:
            out[key][rows] = (w @ at_points[key] if fixed
                              else function(curve, coef[rows], values, w, u, m[rows], g))
    return out


def _assemble(strata: Sequence[Stratum], scenarios: Sequence[Scenario], cases: FloatArray,
              fractions: _Fractions, sources: tuple[str, ...], inputs: InputDraws | None = None,
              method: str = "paf") -> Propagation:
    keys = [id(s.exposure) for s in strata]
    paf = np.stack([fractions[k, None] for k in keys])
    pif = {scn.name: np.stack([fractions[k, scn.name] for k in keys]) for scn in scenarios}
    return Propagation(tuple(s.name for s in strata), cases, paf, paf * cases, pif,
                       {k: v * cases for k, v in pif.items()}, sources, inputs, method)


def _unique_exposures(strata: Sequence[Stratum]) -> dict[int, AnyExposure]:
    return {id(s.exposure): s.exposure for s in strata}


def _impact(curve: Curve, coef: FloatArray, exposure: AnyExposure, ex: ExposureDraws,
            m: FloatArray, scenario: Scenario | None) -> FloatArray:
    """Impact (or averted) fraction draws: :mod:`doseattr.core.attribution.impact`."""
    return _expectation((impact_draws, empirical_impact_draws), curve, coef, exposure, ex, m,
                        scenario)


def _excess(curve: Curve, coef: FloatArray, exposure: AnyExposure, ex: ExposureDraws,
            m: FloatArray, scenario: Scenario | None) -> FloatArray:
    """Expected excess draws: :mod:`doseattr.core.attribution.fractions`."""
    return _expectation((excess_draws, empirical_excess_draws), curve, coef, exposure, ex, m,
                        scenario)


def _expectation(functions: tuple[Callable[..., FloatArray], Callable[..., FloatArray]],
                 curve: Curve, coef: FloatArray, exposure: AnyExposure, ex: ExposureDraws,
                 m: FloatArray, scenario: Scenario | None) -> FloatArray:
    """``functions`` = (family path, empirical path) called with the draws;
    exposure_draws fills values and weights for an empirical exposure,
    params otherwise."""
    family_path, empirical_path = functions
    if isinstance(exposure, EmpiricalExposure):
        assert ex.values is not None and ex.weights is not None
        return empirical_path(curve, coef, ex.values, ex.weights, exposure.unexposed, m,
                              scenario, scale=ex.scale)
    assert ex.params is not None
    return family_path(curve, coef, exposure.family, ex.params, exposure.unexposed, m, scenario)
