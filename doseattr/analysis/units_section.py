r"""Units in the analysis file: the top-level ``unit`` (the unit of every
result), optional ``unit`` keys in ``[curve]`` and ``[exposure]`` (the
unit their numbers are written in), and ``molecular_weight`` (g/mol).

Curve and exposure values given in another unit are converted to the
top-level unit here, before anything is computed, with the core's unit
table (:mod:`doseattr.core.exposure.units`): a factor :math:`f` with
value in the analysis unit = :math:`f` x value as given, and for ppm to
mass per volume at 25 C and 1 atm

.. math:: \mathrm{mg/m^3} = \mathrm{ppm} \times MW / 24.45

(common practice in occupational hygiene, as in the core's unit table).
Doses scale by :math:`f`; RRs and dimensionless settings (a GSD, a gamma
shape, a power exponent) do not. Units that measure different things (a
concentration and a cumulative exposure, mass and activity) are refused,
as is ppm against mass per volume without ``molecular_weight``.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from doseattr.analysis.schema import Context
from doseattr.analysis.specs import (
    BinnedExposure,
    CurveSpec,
    DrawsCurve,
    EnteredCurve,
    ExposureSpec,
    GridExposure,
    HistoriesExposure,
    MeasuredExposure,
    PercentilesExposure,
    PointsCurve,
    PooledCurve,
    ShapeCurve,
    StrataExposure,
    SummaryExposure,
    TableCurve,
)
from doseattr.analysis.tables import BurdenTable
from doseattr.core.curves.registry import MODELS
from doseattr.core.exposure.registry import unit_parameters
from doseattr.errors import ModelError


@dataclasses.dataclass(frozen=True)
class Units:
    """The analysis unit and the molecular weight (``None`` if not given)."""

    unit: str
    molecular_weight: float | None = None


@dataclasses.dataclass(frozen=True)
class Conversion:
    """Factor from the unit a section was given in to the analysis unit."""

    factor: float = 1.0
    note: str | None = None


def read_units(data: Mapping[str, Any], ctx: Context) -> Units:
    """The top-level ``unit`` and ``molecular_weight``, checked."""
    mw = data.get("molecular_weight")
    if mw is not None and mw <= 0:
        raise ctx.error(f"molecular_weight is in g/mol and must be above 0, got {mw:g}", "",
                        "molecular_weight")
    return Units(data["unit"].strip(), None if mw is None else float(mw))


def _kind(text: str) -> tuple[str, str] | None:
    """``("concentration", "ppm")``, ``("cumulative", "ppm-years")`` or ``None``."""
    from doseattr.core.exposure.units import concentration_unit, cumulative_unit

    for kind, parse in (("cumulative", cumulative_unit), ("concentration", concentration_unit)):
        try:
            return kind, parse(text)
        except ModelError:
            continue
    return None


def conversion(units: Units, given: str | None, section: str, ctx: Context, *,
               intensity: bool = False) -> Conversion:
    """The factor from ``given`` (the ``unit`` key of ``section``) to the
    analysis unit. ``intensity`` compares a concentration with the
    concentration part of a cumulative analysis unit (work histories)."""
    from doseattr.core.exposure.units import conversion_factor

    target = units.unit
    if intensity:
        kind = _kind(target)
        target = kind[1][: -len("-years")] if kind and kind[0] == "cumulative" else target
    if given is None or given.strip() == target:
        return Conversion()
    frm, to = _check_kinds(_kind(given), _kind(target), given, target, section, ctx,
                           intensity)
    uses_mw = _groups_differ(frm[1], to[1])
    try:
        f = conversion_factor(_conc(frm[1]), _conc(to[1]),
                              molecular_weight=units.molecular_weight if uses_mw else None)
    except ModelError as exc:
        hint = (" (add molecular_weight = ... in g/mol at the top of the file)"
                if "molecular weight" in str(exc) else "")
        raise ctx.error(f"{exc}{hint}", section, "unit") from None
    if f == 1.0:
        return Conversion()
    how = (f", molecular weight {units.molecular_weight:g} g/mol, 24.45 L/mol at 25 C and 1 atm"
           if uses_mw else "")
    what = "intensities" if intensity else "values"
    return Conversion(f, f"[{section}] {what} converted from {given.strip()} to {target} "
                         f"(x {f:.6g}{how})")


def _conc(canonical: str) -> str:
    return canonical[: -len("-years")] if canonical.endswith("-years") else canonical


def _groups_differ(a: str, b: str) -> bool:
    from doseattr.core.exposure.units import CONCENTRATION_UNITS

    return CONCENTRATION_UNITS[_conc(a)][0] != CONCENTRATION_UNITS[_conc(b)][0]


def _check_kinds(frm: tuple[str, str] | None, to: tuple[str, str] | None, given: str,
                 target: str, section: str, ctx: Context,
                 intensity: bool) -> tuple[tuple[str, str], tuple[str, str]]:
    """The kinds of ``given`` and ``target`` (``frm``, ``to``) when one
    converts to the other; else the error that says why not."""
    from doseattr.core.exposure.units import CONCENTRATION_UNITS

    known = ", ".join(CONCENTRATION_UNITS)
    if frm is None:
        raise ctx.error(f"unknown unit '{given}'; known: {known}, and any of them followed by "
                        "'-years' for cumulative exposure", section, "unit")
    if to is None:
        raise ctx.error(f"cannot convert '{given}' to the file's unit '{target}', which is not "
                        f"a unit this tool knows ({known}, or '-years' after one); give "
                        f"[{section}] in '{target}' or change the file's unit", section, "unit")
    if intensity and frm[0] != "concentration":
        raise ctx.error(f"with work histories [exposure] unit is the unit of the intensity "
                        f"column, a concentration such as 'ppm', not '{given}'", section, "unit")
    if frm[0] != to[0]:
        raise ctx.error(f"'{given}' is a {frm[0]} unit but the file's unit '{target}' is a "
                        f"{to[0]} unit (concentration x years); they cannot be converted",
                        section, "unit")
    return frm, to


# -- applying a factor ---------------------------------------------------------------
def _scaled(obj: Any, f: float, *fields: str) -> Any:
    """``obj`` with each named array field multiplied by ``f``."""
    return dataclasses.replace(obj, **{k: np.asarray(getattr(obj, k), float) * f
                                       for k in fields})


def convert_curve(spec: CurveSpec, conv: Conversion, unit: str | None) -> CurveSpec:
    """Every dose of ``spec`` in the analysis unit (doses x f)."""
    if conv.factor == 1.0:
        return dataclasses.replace(spec, unit=unit)
    f = conv.factor
    changes = _CURVE_DOSES[type(spec)](spec, f)
    return dataclasses.replace(spec, unit=unit, notes=_noted(spec.notes, conv),
                               max_dose=None if spec.max_dose is None else spec.max_dose * f,
                               **changes)


def _noted(notes: tuple[str, ...], conv: Conversion) -> tuple[str, ...]:
    return notes + ((conv.note,) if conv.note is not None else ())


def _table_doses(spec: TableCurve, f: float) -> dict[str, Any]:
    return {"offset": spec.offset * f, "table": _scaled(spec.table, f, "lower", "upper", "dose"),
            "knots": None if spec.knots is None else tuple(k * f for k in spec.knots)}


def _entered_doses(spec: EnteredCurve, f: float) -> dict[str, Any]:
    return {"offset": spec.offset * f, "per": spec.per * f,
            "reference_dose": spec.reference_dose * f}


def _given_doses(spec: PointsCurve | DrawsCurve, f: float) -> dict[str, Any]:
    return {"reference_dose": spec.reference_dose * f,
            "given": dataclasses.replace(_scaled(spec.given, f, "doses"),
                                         reference_dose=spec.given.reference_dose * f)}


def _shape_doses(spec: ShapeCurve, f: float) -> dict[str, Any]:
    return {"reference_dose": spec.reference_dose * f, **_shape_in_unit(spec, f)}


def _pooled_doses(spec: PooledCurve, f: float) -> dict[str, Any]:
    """Each study's doses (already in the curve's unit) and the shared
    knots and offset."""
    studies = tuple(dataclasses.replace(s, **_table_doses(s, f)) for s in spec.studies)
    return {"offset": spec.offset * f, "studies": studies,
            "knots": None if spec.knots is None else tuple(k * f for k in spec.knots)}


#: For each source of curve, its doses on the new scale (fields to replace).
_CURVE_DOSES: dict[type, Callable[[Any, float], dict[str, Any]]] = {
    TableCurve: _table_doses, EnteredCurve: _entered_doses, PointsCurve: _given_doses,
    DrawsCurve: _given_doses, ShapeCurve: _shape_doses, PooledCurve: _pooled_doses}


def _shape_in_unit(spec: ShapeCurve, f: float) -> dict[str, Any]:
    r"""Shape settings and coefficients on the new dose scale.

    Doses (threshold, scale, midpoint, spread) scale by f. In the saturating
    exponential :math:`\gamma z^\delta` with :math:`z = z'/f` gives
    :math:`\gamma' = \gamma f^{-\delta}`; its covariance is carried by the
    delta method, :math:`J \Sigma J^T` with
    :math:`\partial\gamma'/\partial\gamma = f^{-\delta}`,
    :math:`\partial\gamma'/\partial\delta = -\gamma f^{-\delta}\ln f`.
    """
    doses = MODELS[spec.model].dose_settings
    settings = {k: v * f if k in doses else v
                for k, v in spec.settings.items()}
    coef, cov = np.array(spec.coef), np.array(spec.cov)
    if spec.model == "saturating-exponential":
        _, g, d = coef
        jac = np.eye(3)
        jac[1, 1] = f ** -d
        jac[1, 2] = -g * f ** -d * math.log(f)
        coef = np.array([coef[0], g * f ** -d, d])
        cov = jac @ cov @ jac.T
    return {"settings": settings, "coef": tuple(float(v) for v in coef),
            "cov": tuple(tuple(float(v) for v in row) for row in cov)}


#: Exposure parameters and summary statistics that are doses (core registry).
DOSE_PARAMETERS = unit_parameters()


def convert_exposure(spec: ExposureSpec, conv: Conversion, unit: str | None) -> ExposureSpec:
    """Every exposure value of ``spec`` in the analysis unit."""
    if conv.factor == 1.0:
        return dataclasses.replace(spec, unit=unit)
    changes = _EXPOSURE_VALUES[type(spec)](spec, conv.factor)
    return dataclasses.replace(spec, unit=unit, notes=_noted(spec.notes, conv), **changes)


def _measured_values(spec: MeasuredExposure, f: float) -> dict[str, Any]:
    return {"measurements": _scaled(spec.measurements, f, "values")}


def _summary_values(spec: SummaryExposure, f: float) -> dict[str, Any]:
    return {"values": {k: v * f if k in DOSE_PARAMETERS else v for k, v in spec.values.items()}}


def _percentile_values(spec: PercentilesExposure, f: float) -> dict[str, Any]:
    return {"values": {k: v * f for k, v in spec.values.items()}}


def _binned_values(spec: BinnedExposure, f: float) -> dict[str, Any]:
    return {"bins": _scaled(spec.bins, f, "lower", "upper")}


def _histories_values(spec: HistoriesExposure, f: float) -> dict[str, Any]:
    return {"histories": _scaled(spec.histories, f, "intensity")}


#: For each source of exposure, its values in the new unit (fields to replace).
_EXPOSURE_VALUES: dict[type, Callable[[Any, float], dict[str, Any]]] = {
    MeasuredExposure: _measured_values, SummaryExposure: _summary_values,
    PercentilesExposure: _percentile_values, BinnedExposure: _binned_values,
    HistoriesExposure: _histories_values,
    # the strata's exposure columns are in the analysis unit already
    StrataExposure: lambda spec, f: {},
    GridExposure: lambda spec, f: {}}  # the cells are read in the file's unit


def convert_burden(table: BurdenTable, conv: Conversion) -> BurdenTable:
    """Per-stratum exposure columns in the analysis unit (they are written
    in the unit of ``[exposure]``)."""
    if conv.factor == 1.0:
        return table
    exposure = tuple(None if e is None else
                     {k: v * conv.factor if k in DOSE_PARAMETERS else v for k, v in e.items()}
                     for e in table.exposure)
    return dataclasses.replace(table, exposure=exposure)
