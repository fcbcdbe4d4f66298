"""Curve models by name."""

from __future__ import annotations

import inspect
from typing import Any

from doseattr.core.curves.base import CurveModel
from doseattr.core.curves.linear import LinearExcess
from doseattr.core.curves.loglinear import LogLinear
from doseattr.core.curves.points import PointsCurve
from doseattr.core.curves.power import Power
from doseattr.core.curves.shapes import LogLogisticWeighted, SaturatingExponential
from doseattr.core.curves.spline import RestrictedCubicSpline
from doseattr.errors import ModelError

MODELS: dict[str, type[CurveModel]] = {
    "log-linear": LogLinear,
    "linear": LinearExcess,
    "power": Power,
    "spline": RestrictedCubicSpline,
    "saturating-exponential": SaturatingExponential,
    "log-logistic-weighted": LogLogisticWeighted,
    "points": PointsCurve,
}


def model_names() -> tuple[str, ...]:
    """Names of the registered curve models, in registration order."""
    return tuple(MODELS)


def make_model(name: str, *, reference_dose: float = 0.0, **settings: Any) -> CurveModel:
    """Instantiate the model called ``name`` with its fixed settings.

    Raises :class:`ModelError` for an unknown name (listing the valid ones),
    a setting the model does not take (listing the ones it does) or a
    required setting left out.
    """
    try:
        cls = MODELS[name]
    except KeyError:
        raise ModelError(f"unknown curve model {name!r}; choose one of "
                         f"{', '.join(repr(k) for k in MODELS)}") from None
    params = {k: p for k, p in inspect.signature(cls.__init__).parameters.items()
              if k not in ("self", "reference_dose")}
    unknown = sorted(set(settings) - set(params))
    if unknown:
        takes = ", ".join(repr(a) for a in params) or "no settings"
        raise ModelError(f"the {name} model does not take {', '.join(map(repr, unknown))}; "
                         f"it takes {takes}")
    missing = [k for k, p in params.items() if p.default is p.empty and k not in settings]
    if missing:
        raise ModelError(f"the {name} model needs {', '.join(map(repr, missing))}")
    return cls(reference_dose=reference_dose, **settings)
