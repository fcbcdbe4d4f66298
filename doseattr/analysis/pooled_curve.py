r"""Several studies, one curve: each ``[[curve.study]]`` fitted on its own,
then the coefficients pooled.

Stage one fits every study's table by GLS with its own covariance of the
log RRs, exactly as a single ``[curve] table`` is fitted
(:func:`~doseattr.analysis.build.fit_pooled_study`); a spline uses knots
shared by all studies, by default at Harrell's quantiles of every study's
assigned doses together. Stage two pools the coefficients
:math:`b_i \sim N(\mu, S_i + T)` with the core's
:func:`~doseattr.core.curves.pooling.pool` (DerSimonian & Laird 1986,
Control Clin Trials 7:177; Jackson, Riley & White 2011, Stat Med 30:2481;
Gasparrini, Armstrong & Kenward 2012, Stat Med 31:3821).

The pooled curve's coefficients are :math:`\hat\mu`; the Monte Carlo draws
them from :math:`N(\hat\mu, \operatorname{cov}\hat\mu)` (the average
population of the studies) or, with ``predict = true``, from
:math:`N(\hat\mu, \operatorname{cov}\hat\mu + \hat T)` (a new population's
curve).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from doseattr.analysis.alarms import pooling_alarms
from doseattr.analysis.build import (
    BuiltCurve,
    CurveInputs,
    as_input_error,
    band_doses,
    fit_pooled_study,
)
from doseattr.analysis.csvfile import FloatArray
from doseattr.analysis.pooled_section import study_location
from doseattr.analysis.schema import key_location
from doseattr.analysis.specs import PooledCurve
from doseattr.core.curves.base import Curve, CurveModel
from doseattr.core.curves.spline import RestrictedCubicSpline
from doseattr.errors import InputError
from doseattr.results.records import PooledStudy, PoolingSection

#: What the pooled curve's interval means, for the notes.
MEAN_NOTE = ("the Monte Carlo draws the pooled coefficients from their own uncertainty: the "
             "interval is that of the average curve of the studies' populations, not of any "
             "one population's curve (set [curve] predict = true for a new population)")
PREDICT_NOTE = ("[curve] predict = true: the Monte Carlo draws a new population's curve, the "
                "pooled coefficients' covariance plus the between-study covariance tau^2 "
                "(Higgins, Thompson & Spiegelhalter 2009, J R Stat Soc A 172:137): the "
                "interval includes the variation between populations, and is wider than that "
                "of the average curve whenever tau^2 > 0")


def build_pooled(spec: PooledCurve, inputs: CurveInputs) -> BuiltCurve:
    """Fit each study, pool the coefficients, and return the pooled curve
    with its :class:`~doseattr.results.records.PoolingSection`."""
    from doseattr.core.curves.pooling import nonlinearity_test, pool

    studies = tuple(dataclasses.replace(s, offset=spec.offset) for s in spec.studies)
    knots = shared_knots(spec, inputs) if spec.model == "spline" else None
    fits = []
    for i, (name, study) in enumerate(zip(spec.names, studies, strict=True)):
        with study_location(i, name):
            fits.append(fit_pooled_study(study, inputs, knots))
    with as_input_error(inputs.source, key_location("curve", "pooling"),
                        "the studies' coefficients cannot be pooled: "):
        pooled = pool([f.curve.coef for f in fits], [f.curve.cov for f in fits],
                      method=spec.pooling, tau_method=spec.tau_method, names=spec.names)
    model = _pooled_model(spec, fits, knots, inputs.source)
    data_max = max(float(f.curve.data_max or 0.0) for f in fits)
    max_dose = None if spec.beyond == "extend" else (
        spec.max_dose if spec.max_dose is not None else data_max)
    mean = Curve(model, pooled.coefficients, pooled.covariance, max_dose=max_dose,
                 data_max=data_max, source="pooled", notes=pooled.notes)
    prediction = (dataclasses.replace(mean, cov=pooled.predictive_covariance())
                  if spec.predict else None)
    nonlinear = None
    if isinstance(model, RestrictedCubicSpline):
        with as_input_error(inputs.source, key_location("curve", "knots")):
            nonlinear = nonlinearity_test(pooled, [int(i) for i in model.nonlinear_index])
    records = tuple(
        PooledStudy(name, f.curve, f.bands, float(w), s.design, s.covariance, s.unit)
        for name, f, s, w in zip(spec.names, fits, studies, pooled.weights, strict=True)
        if f.bands is not None)
    section = PoolingSection(pooled, records, mean, spec.predict, prediction, nonlinear)
    warnings = [f"study '{n}': {w}" for n, f in zip(spec.names, fits) for w in f.warnings]
    warnings += pooling_alarms(pooled, spec.predict)
    notes = [f"study '{n}': {t}" for n, f in zip(spec.names, fits) for t in f.notes]
    notes += [_pooling_note(spec, pooled.coefficients.size), PREDICT_NOTE if spec.predict
              else MEAN_NOTE, *_reference_notes(spec, fits, model)]
    return BuiltCurve(prediction or mean, None, tuple(warnings), tuple(notes), pooling=section)


def shared_knots(spec: PooledCurve, inputs: CurveInputs) -> FloatArray:
    """The spline's knots shared by every study: ``[curve] knots`` (within
    the assigned doses of all studies) or Harrell's quantiles of every
    study's assigned doses together (:func:`~doseattr.core.curves.spline.default_knots`,
    as for one study)."""
    from doseattr.core.curves.spline import default_knots

    doses = []
    for i, (name, study) in enumerate(zip(spec.names, spec.studies, strict=True)):
        with study_location(i, name):
            doses.append(band_doses(study.table, study.dose_rule, inputs.exposure,
                                    source=inputs.source).doses)
    every = np.concatenate(doses)
    n_knots = spec.knot_count if spec.knots is None else len(spec.knots)
    key = "knot_count" if spec.knots is None else "knots"
    distinct = np.unique(every)
    if distinct.size < n_knots:
        raise InputError(f"the {len(doses)} studies have {distinct.size} distinct assigned "
                         f"doses, fewer than the {n_knots} knots of the spline; use fewer "
                         "knots (3 at least) or a model with one coefficient, such as "
                         "log-linear", source=inputs.source,
                         location=key_location("curve", key))
    if spec.knots is not None:
        knots = np.asarray(spec.knots, dtype=float)
        if knots[0] < every.min() or knots[-1] > every.max():
            raise InputError(f"knots must lie within the studies' assigned doses "
                             f"({every.min():g} to {every.max():g}); got {knots[0]:g} to "
                             f"{knots[-1]:g}", source=inputs.source,
                             location=key_location("curve", "knots"))
        return knots
    with as_input_error(inputs.source, key_location("curve", "knot_count")):
        return default_knots(every, spec.knot_count)


def _pooled_model(spec: PooledCurve, fits: list[BuiltCurve], knots: FloatArray | None,
                  source: str | None) -> CurveModel:
    """The model of the pooled curve, with RR = 1 at the lowest of the
    studies' reference doses."""
    from doseattr.core.curves.registry import make_model

    ref = min(float(f.curve.model.reference_dose) for f in fits)
    settings: dict[str, object] = {}
    if spec.model == "spline":
        settings["knots"] = knots
    if spec.model == "power":
        settings["offset"] = spec.offset
    with as_input_error(source, key_location("curve", "model")):
        return make_model(spec.model, reference_dose=ref, **settings)


def _pooling_note(spec: PooledCurve, p: int) -> str:
    what = (f"{len(spec.studies)} studies' {spec.model} coefficients pooled by "
            + ("fixed effect (inverse-variance GLS)" if spec.pooling == "fixed" else
               f"random effects, between-study variance by {spec.tau_method.upper()}"))
    if p > 1 and spec.pooling != "fixed":
        what += f" (multivariate, {p} coefficients)"
    return what


def _reference_notes(spec: PooledCurve, fits: list[BuiltCurve], model: CurveModel) -> list[str]:
    """A linear (excess relative risk) slope is relative to the risk at its
    study's reference dose; the other models' coefficients are not."""
    refs = {float(f.curve.model.reference_dose) for f in fits}
    if len(refs) == 1:
        return []
    text = (f"the studies' reference doses differ ({', '.join(f'{r:g}' for r in sorted(refs))});"
            f" the pooled curve has RR = 1 at {model.reference_dose:g}")
    if spec.model == "linear":
        text += ("; each linear slope is an excess relative risk relative to its own reference "
                 "dose, so the pooled slope mixes slightly different quantities")
    return [text]
