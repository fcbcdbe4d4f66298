"""Fill the results layer's section records from the core objects of a run
(the facts the pipeline knows are recorded here, so that no output has to
work them out again)."""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from doseattr.core.curves.base import Curve
from doseattr.core.exposure.base import Exposure
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.results.records import (
    AnyExposure,
    CurveSection,
    CurveVariant,
    ExposureSection,
    ExposureVariant,
    FamilyFit,
    GoodnessOfFit,
    PoolingSection,
    StratumExposure,
    SubstitutionResult,
    Workers,
)


def share_above(exposure: AnyExposure, dose: float | None) -> float | None:
    """Population share above ``dose`` (``None`` for no dose)."""
    if dose is None:
        return None
    return float(np.asarray(exposure.sf(np.array([dose])), dtype=float).reshape(-1)[0])


def exposure_mean(exposure: AnyExposure) -> float:
    """Population mean exposure, the unexposed counted at zero."""
    if isinstance(exposure, EmpiricalExposure):
        return float(exposure.mean())
    one = float(np.asarray(exposure.family.mean(exposure.params), dtype=float).reshape(-1)[0])
    return (1.0 - exposure.unexposed) * one


def zero_share(exposure: AnyExposure) -> float:
    """The unexposed share, plus the weighted share of zeros among the
    values on the empirical path."""
    if isinstance(exposure, EmpiricalExposure):
        return float(exposure.zero_share)
    return float(exposure.unexposed)


def goodness_of_fit(fit: Any) -> GoodnessOfFit | None:
    """The fit's goodness-of-fit record, or ``None`` without measurements."""
    gof = getattr(fit, "gof", None)
    if not gof:
        return None
    return GoodnessOfFit(gof.get("test"), _float(gof.get("statistic")),
                         _float(gof.get("p_value")), int(gof.get("n") or 0), gof.get("note"))


def family_fits(exposure: AnyExposure, parametric: tuple[Exposure, ...]) -> tuple[FamilyFit, ...]:
    """Every parametric fit tried: the main one, the alternatives of
    ``family = "best"``, or the comparison fits of the empirical path."""
    tried: list[tuple[Any, Any, Any]] = [(e.family, e.params, e.fit) for e in parametric]
    if exposure.fit is not None and exposure.fit.loglik is not None:
        tried.insert(0, (exposure.family, exposure.params, exposure.fit))
    tried += list(exposure.alternatives)
    return tuple(FamilyFit(fam.name,
                           dict(zip(fam.param_names, np.asarray(p, float).tolist(), strict=True)),
                           _float(getattr(fit, "loglik", None)), _float(getattr(fit, "aic", None)),
                           goodness_of_fit(fit))
                 for fam, p, fit in tried)


def workers(w: Any) -> Workers | None:
    """Per-worker totals from the core ``WorkerExposure``."""
    if w is None:
        return None
    return Workers(tuple(str(n) for n in w.workers), tuple(map(float, w.cumulative)),
                   tuple(map(float, w.duration_years)), tuple(map(float, w.mean_intensity)))


def curve_section(curve: Curve, exposure: AnyExposure, bands: Any,
                  comparison: tuple[CurveVariant, ...],
                  sensitivity: tuple[CurveVariant, ...],
                  pooling: PoolingSection | None = None) -> CurveSection:
    """The curve section; each variant is marked ``used`` when it is the
    analysis's own curve and given its spline non-linearity test (a pooled
    spline's is the test on the pooled coefficients' own covariance)."""
    comparison = tuple(_variant(v, curve) for v in comparison)
    sensitivity = tuple(_variant(v, curve) for v in sensitivity)
    linear_p = nonlinearity_p(curve) if pooling is None else (
        None if pooling.nonlinearity is None else pooling.nonlinearity[2])
    return CurveSection(curve, bands, comparison, sensitivity, linear_p,
                        share_above(exposure, curve.max_dose),
                        share_above(exposure, curve.data_max), pooling)


def exposure_section(curve: Curve, exposure: AnyExposure, *,
                     comparison: tuple[ExposureVariant, ...],
                     substitution: tuple[SubstitutionResult, ...], worker_totals: Any,
                     parametric: tuple[Exposure, ...], samples: Exposure | None = None,
                     worker_model: Any = None) -> ExposureSection:
    """The exposure's record; with a worker column (``samples`` and
    ``worker_model`` given) the goodness of fit is the single samples'."""
    fitted = exposure if samples is None else samples
    return ExposureSection(exposure, exposure_mean(exposure), zero_share(exposure),
                           share_above(exposure, curve.max_dose),
                           share_above(exposure, curve.data_max),
                           goodness_of_fit(fitted.fit), family_fits(fitted, parametric),
                           comparison, substitution, workers(worker_totals), parametric,
                           weights=getattr(exposure.fit, "weights_meaning", None),
                           effective_n=_float(getattr(exposure.fit, "effective_n", None)),
                           samples=samples, worker_model=worker_model)


def _variant(v: CurveVariant, main: Curve) -> CurveVariant:
    return dataclasses.replace(v, used=v.used or v.curve is main,
                               nonlinearity_p=None if v.curve is None else nonlinearity_p(v.curve))


def stratum_exposure(exposure: AnyExposure, shared: AnyExposure,
                     given: dict[str, float] | None) -> StratumExposure:
    """The exposure of one stratum, and whether it is its own."""
    return StratumExposure(exposure is not shared, exposure.family.name,
                           {k: float(v) for k, v in exposure.parameters.items()},
                           exposure_mean(exposure),
                           None if given is None else {k: float(v) for k, v in given.items()})


def nonlinearity_p(curve: Curve) -> float | None:
    """p-value of the Wald test that a spline is linear (``None`` for other
    models): core :func:`~doseattr.core.curves.spline.nonlinearity_test`."""
    if curve.model.name != "spline":
        return None
    from doseattr.core.curves.spline import nonlinearity_test
    from doseattr.errors import ModelError

    try:
        return float(nonlinearity_test(curve)[2])
    except ModelError:
        return None


def _float(value: Any) -> float | None:
    return None if value is None else float(value)
