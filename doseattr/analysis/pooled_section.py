"""``[[curve.study]]`` blocks under ``[curve]``: several study tables whose
fitted coefficients are pooled into one curve.

Each block is read and checked exactly as a single ``[curve] table`` is
(:func:`~doseattr.analysis.curve_section._fitted_curve`), with the
curve's shared ``model`` and ``beyond``; a problem is named with its study
(``[[curve.study]] 2 ('Cohort B') key 'table'``, or the study's name before
a table's own row). A study's ``unit`` is converted to the curve's unit
(``[curve] unit``, else the file's), which the file then converts to its
own like any curve (:func:`~doseattr.analysis.units_section.convert_curve`).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from doseattr.analysis import schema
from doseattr.analysis.curve_section import _fitted_curve, _model_settings, knot_settings
from doseattr.analysis.schema import SECTIONS, Context, nonnegative
from doseattr.analysis.specs import POOLING_METHODS, TAU_METHODS, PooledCurve, TableCurve
from doseattr.analysis.units_section import Units, conversion, convert_curve
from doseattr.errors import InputError

#: Keys a ``[[curve.study]]`` block takes.
STUDY_KEYS = tuple(SECTIONS["curve.study"])
#: Keys of ``[curve]`` shared by the pooled studies.
SHARED_KEYS = ("study", "model", "pooling", "tau_method", "predict", "beyond", "max_dose",
               "knots", "knot_count", "offset", "unit")


def parse_pooled(c: dict[str, Any], ctx: Context, units: Units) -> PooledCurve:
    """``[curve]`` with ``[[curve.study]]`` blocks, in the curve's unit."""
    _check_curve_keys(c, ctx)
    blocks = c["study"]
    if len(blocks) < 2:
        raise ctx.error(f"pooling needs at least two [[curve.study]] blocks, found "
                        f"{len(blocks)}; for one study give [curve] table = \"FILE.csv\"",
                        "curve", "study")
    conversion(units, c.get("unit"), "curve", ctx)  # the curve's own unit is checked first
    model = c.get("model", "log-linear")
    _model_settings(c, model, ctx)
    notes = () if "model" in c else ("[curve] model not given: the log-linear model was "
                                     "fitted to each study",)
    beyond, max_dose = _beyond(c, ctx)
    if model != "spline":
        for key in ("knots", "knot_count"):
            if key in c:
                raise ctx.error(f"'{key}' goes with model = \"spline\"", "curve", key)
    knots, knot_count = knot_settings(c, ctx)
    curve_units = Units(c.get("unit", units.unit).strip(), units.molecular_weight)
    studies, names = [], dict[str, int]()
    for i, block in enumerate(blocks):
        name = _name(block, i, names, ctx)
        with study_location(i, name):
            studies.append(_study(block, i, model, beyond, ctx, curve_units))
    return PooledCurve(model=model, beyond=beyond, max_dose=max_dose, notes=notes,
                       studies=tuple(studies), names=tuple(names),
                       pooling=c.get("pooling", POOLING_METHODS[0]),
                       tau_method=c.get("tau_method", TAU_METHODS[0]),
                       predict=bool(c.get("predict", False)), offset=float(c.get("offset", 0.0)),
                       knots=knots, knot_count=knot_count)


def _check_curve_keys(c: dict[str, Any], ctx: Context) -> None:
    """``[curve]`` keys that do not go with pooled studies."""
    for key in c:
        if key in SHARED_KEYS:
            continue
        if key == "table":
            why = ("[curve] table and [[curve.study]] both give the curve's study table; keep "
                   "one (a single table, or two or more study blocks)")
        elif key in STUDY_KEYS:
            why = f"'{key}' belongs to each study: give it in its [[curve.study]] block"
        else:
            why = f"'{key}' does not go with [[curve.study]] blocks (studies pooled by GLS fits)"
        raise ctx.error(why, "curve", key)
    if c.get("pooling") == "fixed" and "tau_method" in c:
        raise ctx.error("tau_method estimates the between-study variance of random effects; "
                        "remove it or set pooling = \"random-effects\"", "curve", "tau_method")


def _beyond(c: dict[str, Any], ctx: Context) -> tuple[str, float | None]:
    max_dose = nonnegative(c, "max_dose", ctx)
    beyond = c.get("beyond", "flat")
    if beyond == "extend" and max_dose is not None:
        raise ctx.error("max_dose holds the curve flat above it; it cannot go with "
                        "beyond = \"extend\"", "curve", "max_dose")
    return beyond, max_dose


def _name(block: dict[str, Any], i: int, names: dict[str, int], ctx: Context) -> str:
    with study_location(i, None):
        schema.check_section(block, "curve.study", source=ctx.source, index=i)
    if "name" not in block:
        raise ctx.error("missing key 'name' (a short label for the study)", "curve.study",
                        "name", i)
    name = block["name"].strip()
    if name in names:
        with study_location(i, name):
            raise ctx.error(f"study name '{name}' is used twice (also in [[curve.study]] "
                            f"{names[name] + 1})", "curve.study", "name", i)
    names[name] = i
    return name


def _study(block: dict[str, Any], i: int, model: str, beyond: str, ctx: Context,
           curve_units: Units) -> TableCurve:
    """One study read as a single ``[curve] table`` would be, its doses in
    the curve's unit."""
    if "table" not in block:
        raise ctx.error("missing key 'table' (a CSV of the study's bands)", "curve.study",
                        "table", i)
    keys = {k: v for k, v in block.items() if k not in ("name", "unit")}
    spec = _fitted_curve({"model": model, "beyond": beyond, **keys}, ctx)
    conv = conversion(curve_units, block.get("unit"), "curve.study", ctx)
    if conv.note is not None:
        conv = dataclasses.replace(conv, note=conv.note.replace(
            "[curve.study] values", f"[[curve.study]] '{block['name'].strip()}' doses"))
    converted = convert_curve(spec, conv, block.get("unit"))
    assert isinstance(converted, TableCurve)
    return converted


@contextmanager
def study_location(index: int, name: str | None) -> Iterator[None]:
    """Name the study in an error about one of its keys or its table:
    ``[[curve.study]] 2 ('Cohort B') key 'table'`` for a key, and the
    study's name before the message of an error in its table file."""
    label = f"[[curve.study]] {index + 1}" + ("" if name is None else f" ('{name}')")
    try:
        yield
    except InputError as exc:
        loc = exc.location or ""
        for prefix in (f"[[curve.study]] {index + 1}", "[curve.study]", "[curve]"):
            key = loc[len(prefix):].strip()
            if loc.startswith(prefix) and (prefix != "[curve]" or _study_key(key)):
                raise InputError(exc.message, source=exc.source,
                                 location=f"{label} {key}".strip()) from None
        who = f"study '{name}'" if name is not None else label
        raise InputError(f"{who}: {exc.message}", source=exc.source,
                         location=exc.location) from None


def _study_key(text: str) -> bool:
    """``"key 'table'"`` for a key of a study block."""
    return any(text == f"key '{k}'" for k in STUDY_KEYS)
