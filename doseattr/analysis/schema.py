"""The declared schema of the analysis file: which keys each section takes,
of which type, and how a value of the wrong type is reported.

Each section is a table of :class:`Key` declarations. :func:`check_section`
refuses unknown keys (suggesting the nearest known one with
:func:`difflib.get_close_matches`) and values of the wrong type, naming the
section and key. Which keys go together is checked in
:mod:`doseattr.analysis.config`, section by section.
"""

from __future__ import annotations

import difflib
import math
import os
import sys
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from doseattr.analysis.specs import (
    BURDEN_METHODS,
    FITTED_FAMILIES,
    FITTED_MODELS,
    POOLING_METHODS,
    SHAPE_MODELS,
    TAU_METHODS,
)
from doseattr.core.attribution.scenarios import SCENARIO_KINDS
from doseattr.core.exposure.sandwich import WEIGHT_MEANINGS
from doseattr.errors import InputError

if TYPE_CHECKING:
    from doseattr.analysis.tablefile import TableOptions, TableRef

#: Models ``[curve] model`` takes: those of the core registry that can be
#: fitted to a study table, then the published shapes.
CURVE_MODELS = FITTED_MODELS + SHAPE_MODELS
DESIGNS = ("case-control", "incidence-rate", "cumulative-incidence")
#: The largest finite float; TOML integers beyond it are not numbers here.
MAX_FLOAT = sys.float_info.max

#: Families ``[exposure] family`` takes: the core registry's, then the
#: choice by lowest AIC and the values themselves.
FAMILIES = FITTED_FAMILIES + ("best", "empirical")


@dataclass(frozen=True)
class Key:
    """One allowed key.

    ``kind`` is one of ``"text"``, ``"number"``, ``"integer"``, ``"bool"``,
    ``"numbers"`` (a list of numbers), ``"pair"`` (two numbers),
    ``"number-or-pair"``, ``"texts"`` (a list of text), ``"table"`` (a
    TOML inline table of numbers keyed by number), ``"blocks"`` (an array
    of tables, ``[[curve.study]]``) or ``"path"`` (text naming a file,
    relative to the analysis file). ``choices`` restricts text.
    """

    kind: str
    choices: tuple[str, ...] = ()
    help: str = ""


SECTIONS: dict[str, dict[str, Key]] = {
    "": {
        "unit": Key("text", help="unit of exposure for the curve and the exposure data"),
        "title": Key("text", help="a title for the report"),
        "molecular_weight": Key("number", help="g/mol, to convert ppm or ppb to mass per "
                                               "volume"),
    },
    "curve": {
        "table": Key("path", help="CSV of the study's bands"),
        "design": Key("text", DESIGNS),
        "model": Key("text", CURVE_MODELS),
        "beyond": Key("text", ("flat", "extend")),
        "offset": Key("number"),
        "rr": Key("number", help="RR per `per` units (log-linear)"),
        "err": Key("number", help="excess relative risk per `per` units (linear)"),
        "exponent": Key("number", help="power exponent (power)"),
        "per": Key("number"),
        "ci": Key("pair"),
        "reference_dose": Key("number"),
        "max_dose": Key("number"),
        "dose": Key("text", ("given", "midpoint", "band-mean", "band-median")),
        "covariance": Key("text", ("counts", "effective-counts", "independent")),
        "total_cases": Key("number", help="the study's total cases (effective counts)"),
        "total_controls": Key("number", help="the study's total controls (effective counts)"),
        "total_person_time": Key("number",
                                 help="the study's total person-time (effective counts)"),
        "knots": Key("numbers"),
        "knot_count": Key("integer"),
        "points": Key("path"),
        "draws": Key("path"),
        "compare_models": Key("texts"),
        "unit": Key("text", help="unit of the curve's doses (default: the file's unit)"),
        "threshold": Key("number", help="dose below which RR is 1 (published shapes)"),
        "alpha": Key("number"), "gamma": Key("number"), "delta": Key("number"),
        "alpha_se": Key("number"), "gamma_se": Key("number"), "delta_se": Key("number"),
        "theta": Key("number"), "theta_se": Key("number"),
        "scale": Key("number"), "midpoint": Key("number"), "spread": Key("number"),
        "study": Key("blocks", help="[[curve.study]] blocks: two or more study tables pooled "
                                    "into one curve"),
        "pooling": Key("text", POOLING_METHODS, help="how the studies' coefficients are "
                                                     "pooled (default random-effects)"),
        "tau_method": Key("text", TAU_METHODS, help="between-study variance: reml (default) "
                                                    "or dl (DerSimonian & Laird 1986)"),
        "predict": Key("bool", help="Monte Carlo draws of a new population's curve (adds the "
                                    "between-study variance)"),
    },
    "curve.study": {
        "name": Key("text", help="a short label for the study"),
        "table": Key("path", help="CSV of the study's bands"),
        "design": Key("text", DESIGNS),
        "covariance": Key("text", ("counts", "effective-counts", "independent")),
        "dose": Key("text", ("given", "midpoint", "band-mean", "band-median")),
        "unit": Key("text", help="unit of the study's doses (default: the curve's unit)"),
        "total_cases": Key("number", help="the study's total cases (effective counts)"),
        "total_controls": Key("number", help="the study's total controls (effective counts)"),
        "total_person_time": Key("number",
                                 help="the study's total person-time (effective counts)"),
    },
    "exposure": {
        "table": Key("path", help="CSV of measurements (column value, optional weight)"),
        "family": Key("text", FAMILIES),
        "gm": Key("number"),
        "gsd": Key("number"),
        "shape": Key("number"),
        "scale": Key("number"),
        "mean": Key("number"),
        "sd": Key("number"),
        "unexposed": Key("number"),
        "percentiles": Key("table"),
        "bins": Key("path"),
        "histories": Key("path"),
        "tasks": Key("path", help="task samples giving jobs' 8-hour TWA (with histories)"),
        "as_of": Key("text"),
        "lag_years": Key("number"),
        "detected": Key("text", help="name of the detected column"),
        "weight": Key("text", help="name of the weight column"),
        "weights": Key("text", WEIGHT_MEANINGS,
                       help="what the weights are: importance (population weights, the "
                            "default) or frequency (counts of identical measurements)"),
        "unit": Key("text", help="unit of the exposure values (default: the file's unit)"),
        "substitution": Key("numbers", help="fractions of the detection limit to substitute "
                                            "for comparison, e.g. [0.5]"),
    },
    "attribution": {
        "minimum_risk": Key("number-or-pair"),
        "cutpoints": Key("numbers"),
    },
    "scenario": {
        "name": Key("text"),
        **{kind: Key("number") for kind in SCENARIO_KINDS},
        "comply": Key("bool", help="scale exposure so that its 95th percentile meets [limit]"),
    },
    "limit": {
        "value": Key("number", help="the occupational exposure limit (an 8-hour TWA)"),
        "unit": Key("text", help="unit of the limit (default: the file's unit)"),
        "confidence": Key("number", help="confidence of the compliance test (default 0.70, "
                                         "EN 689)"),
        "exceedance": Key("number", help="tolerated exceedance fraction (default 0.05)"),
    },
    "uncertainty": {
        "draws": Key("integer"),
        "seed": Key("integer"),
        "allow_many_draws": Key("bool", help="permit more than MAX_DRAWS draws"),
        "poisson_cases": Key("bool", help="Poisson variation of the observed cases"),
        "precision": Key("number", help="largest Monte Carlo SE of an interval limit"),
    },
    "burden": {
        "table": Key("path", help="CSV of strata: cases, or population and rate"),
        "rate_per": Key("number", help="people a rate is given per (default 100000)"),
        "method": Key("text", BURDEN_METHODS, help="from fractions to cases (default paf)"),
    },
    "outcome": {
        "name": Key("text"),
        "curve": Key("table"),
        "burden": Key("table"),
        "groups": Key("texts", help="the burden table's groups this curve applies to"),
    },
    "grid": {
        "concentration": Key("path", help="concentration raster (GeoTIFF .tif or NetCDF .nc)"),
        "variable": Key("text", help="the concentration's variable in a NetCDF file"),
        "population": Key("path", help="population raster on the concentration's grid"),
        "zones": Key("path", help="raster of integer zone ids on the same grid"),
        "zone_names": Key("path", help="CSV with columns zone and name"),
        "cells": Key("path", help="Parquet or CSV of cells: value, population, optional zone"),
        "error_gsd": Key("number", help="GSD (above 1) of a lognormal error of each cell"),
        "chunk": Key("integer", help="cells per side of a chunk read at once"),
    },
    "report": {
        "figures": Key("texts", help='figure files to write: ["png"] (default) or '
                                     '["png", "svg"]'),
        "dpi": Key("integer", help="resolution of the PNG figures (default 150)"),
        "contribution_table": Key("bool", help="also write contribution.csv: every value's "
                                               "share of the attributable excess"),
    },
    "tables": {
        "delimiter": Key("text", help="the character between columns of CSV tables "
                                      "(default \",\"; \"\\t\" for tabs)"),
        "decimal": Key("text", (".", ","), help="decimal mark of numbers in CSV tables"),
        "encoding": Key("text", help="text encoding of CSV tables (default utf-8)"),
    },
    "compute": {
        "scheduler": Key("text", help="address of a dask.distributed scheduler, "
                                      "tcp://host:port (default: this machine)"),
    },
}

#: Keys that name a table (read by :mod:`doseattr.analysis.csvfile`): each
#: takes a file name, an inline table ``{path = "x.csv", delimiter = ";"}``
#: with the options of :data:`TABLE_OPTIONS`, or from Python a pandas
#: DataFrame (or a numpy array of measured values).
TABLE_KEYS = {("curve", "table"), ("curve", "points"), ("curve", "draws"),
              ("exposure", "table"), ("exposure", "bins"), ("exposure", "histories"),
              ("exposure", "tasks"), ("burden", "table"), ("grid", "zone_names")}
#: The options of one table, given where its path is.
TABLE_OPTIONS: dict[str, Key] = {
    "path": Key("path", help="the table's file: .csv, .tsv, .xlsx or .parquet"),
    **SECTIONS["tables"],
    "sheet": Key("text", help="the sheet of an .xlsx workbook (a name, or 1 for the first)"),
}

#: Sections written as arrays of tables (``[[scenario]]``).
ARRAY_SECTIONS = ("scenario", "outcome")


def section_label(section: str, index: int | None = None) -> str:
    """``"[curve]"``, ``"[[scenario]] 2"`` or ``""`` for the top level."""
    if not section:
        return ""
    if index is None:
        return f"[{section}]"
    return f"[[{section}]] {index + 1}"


def key_location(section: str, key: str, index: int | None = None) -> str:
    """``"[curve] key 'model'"``; ``"key 'unit'"`` at the top level."""
    label = section_label(section, index)
    return f"{label} key '{key}'" if label else f"key '{key}'"


def suggest(word: str, options: list[str] | tuple[str, ...]) -> str:
    """``"; did you mean 'x'?"`` for the nearest option, or ``""``."""
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return f"; did you mean '{close[0]}'?" if close else ""


def check_section(values: dict[str, Any], section: str, *, source: str | None,
                  index: int | None = None) -> None:
    """Refuse unknown keys and values of the wrong type in one section."""
    schema = SECTIONS[section]
    for key, value in values.items():
        if key not in schema:
            where = section_label(section, index) or "the top level of the file"
            known = list(schema) + (list(SECTIONS) if not section else [])
            raise InputError(f"unknown key '{key}' in {where}{suggest(key, known)}",
                             source=source, location=key_location(section, key, index))
        check_value(value, schema[key], section=section, key=key, source=source, index=index)


def check_value(value: Any, spec: Key, *, section: str, key: str, source: str | None,
                index: int | None = None) -> None:
    """Raise :class:`InputError` unless ``value`` has the declared kind."""

    def fail(expected: str) -> None:
        raise InputError(f"must be {expected}, got {describe(value)}", source=source,
                         location=key_location(section, key, index))

    kind = spec.kind
    if kind == "path" and (section, key) in TABLE_KEYS and not isinstance(value, str):
        check_table_value(value, section=section, key=key, source=source, index=index)
        return
    if kind in ("text", "path"):
        if not isinstance(value, str) or not value.strip():
            fail("text (in quotes)" if kind == "text" else "a file name (in quotes)")
        if spec.choices and value not in spec.choices:
            raise InputError(
                f"'{value}' is not one of {', '.join(spec.choices)}{suggest(value, spec.choices)}",
                source=source, location=key_location(section, key, index))
    elif kind == "number":
        if not is_number(value):
            fail("a number")
    elif kind == "integer":
        if not (isinstance(value, int) and not isinstance(value, bool)):
            fail("a whole number")
    elif kind == "bool":
        if not isinstance(value, bool):
            fail("true or false")
    elif kind == "numbers":
        if not (isinstance(value, list) and value and all(is_number(v) for v in value)):
            fail("a list of numbers like [5, 10, 20]")
    elif kind == "pair":
        if not (isinstance(value, list) and len(value) == 2 and all(is_number(v) for v in value)):
            fail("two numbers like [1.02, 1.10]")
    elif kind == "number-or-pair":
        if not (is_number(value) or (isinstance(value, list) and len(value) == 2
                                     and all(is_number(v) for v in value))):
            fail("a number or a range of two numbers like [2, 5]")
    elif kind == "texts":
        if not (isinstance(value, list) and value and all(isinstance(v, str) for v in value)):
            fail('a list of names like ["log-linear", "spline"]')
    elif kind == "table":
        if not isinstance(value, dict):
            fail("a table like {50 = 8.0, 95 = 20.0}")
    elif kind == "blocks":
        if not (isinstance(value, list) and all(isinstance(v, dict) for v in value)):
            fail(f"[[{section}.{key}]] blocks (double brackets), one block per {key}")
    else:  # pragma: no cover - a schema error, not a user error
        raise AssertionError(f"unknown kind {kind}")


def check_table_value(value: Any, *, section: str, key: str, source: str | None,
                      index: int | None = None) -> None:
    """A table key's value other than a file name: an inline table of
    :data:`TABLE_OPTIONS` (with ``path``), or a table in memory."""
    from doseattr.analysis.tablefile import is_in_memory

    location = key_location(section, key, index)
    if is_in_memory(value):
        return
    if not isinstance(value, dict):
        raise InputError(f"must be a file name (in quotes) or {{path = \"...\", ...}} with "
                         f"the table's options, got {describe(value)}", source=source,
                         location=location)
    if "path" not in value:
        raise InputError("missing key 'path' in the table's options (for example "
                         "{path = \"samples.csv\", delimiter = \";\"})", source=source,
                         location=location)
    for name, item in value.items():
        if name not in TABLE_OPTIONS:
            raise InputError(f"unknown table option '{name}' (options: "
                             f"{', '.join(TABLE_OPTIONS)}){suggest(name, list(TABLE_OPTIONS))}",
                             source=source, location=location)
        if name == "sheet" and isinstance(item, int) and not isinstance(item, bool):
            if item < 1:
                raise InputError(f"sheet = {item}: sheets are counted from 1 (the first), or "
                                 "give the sheet's name", source=source, location=location)
            continue
        check_value(item, TABLE_OPTIONS[name], section=section, key=f"{key}.{name}",
                    source=source, index=index)


def is_number(value: Any) -> bool:
    """A finite TOML integer or float (not a boolean, not inf or nan)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return False
    if isinstance(value, int):  # TOML integers are unbounded; float() overflows past 1.8e308
        return abs(value) <= MAX_FLOAT
    return math.isfinite(value)


def describe(value: Any) -> str:
    """How a TOML value looks, for messages."""
    if isinstance(value, str):
        if len(value) > 60:
            return f"text '{value[:40]}...' ({len(value)} characters)"
        return f"text '{value}'" + (" (remove the quotes)" if _numeric_text(value) else "")
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int) and abs(value) > MAX_FLOAT:
        return f"an integer of {len(str(abs(value)))} digits (beyond the float range, about 1.8e308)"
    if isinstance(value, (int, float)):
        return f"{value}"
    if isinstance(value, list):
        text = f"a list {value}"
        return text if len(text) <= 80 else text[:77] + "..."
    if isinstance(value, dict):
        return "a table"
    return type(value).__name__


def _numeric_text(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


# -- where values come from ------------------------------------------------------
@dataclass(frozen=True)
class Context:
    """Where the values being checked come from: the analysis file (or
    ``None`` for a dictionary) and the folder its paths are relative to."""

    source: str | None
    base_dir: str
    #: The file's unit (checked against units in tables' headers).
    unit: str | None = None
    #: ``[tables]``: options of every CSV table.
    tables: Mapping[str, Any] = field(default_factory=dict)
    #: ``[exposure] unit``, the unit of a burden table's exposure columns.
    exposure_unit: str | None = None

    def error(self, message: str, section: str, key: str,
              index: int | None = None) -> InputError:
        return InputError(message, source=self.source,
                          location=key_location(section, key, index))

    def path(self, value: str, section: str, key: str) -> str:
        """A table path as the user can find it: joined to the analysis
        file's folder as given (not made absolute)."""
        path = value if os.path.isabs(value) else os.path.join(self.base_dir, value)
        if not Path(path).is_file():
            what = "is a folder, not a file" if Path(path).is_dir() else "file not found"
            raise self.error(f"{what}: {path}", section, key)
        return path


    def table(self, value: Any, section: str, key: str, *, unit: str | None = None,
              unit_origin: str | None = None, check_unit: bool = True) -> TableRef:
        """The table a table key names, with how to read it: a file (its
        path checked as :meth:`path` does) with the ``[tables]`` options
        and its own (``{path = ..., delimiter = ...}``), or a table given
        from Python, named ``<DataFrame for [exposure] table>``. ``unit``
        is the unit of the table's exposure columns (default: the file's;
        ``check_unit=False`` checks no unit in the header)."""
        from doseattr.analysis.tablefile import TableRef, in_memory_name, is_in_memory

        expected = None if not check_unit else unit if unit is not None else self.unit
        origin = unit_origin or ("the file's unit" if unit is None else f"[{section}] unit")
        if is_in_memory(value):
            name = in_memory_name(key_location(section, key), value)
            return TableRef(name, _options({}, {}, expected, origin), value)
        own = dict(value) if isinstance(value, Mapping) else {"path": value}
        path = self.path(own.pop("path"), section, key)
        shared = self._shared_options(path)
        own = self._own_options(own, path, section, key)
        check_text_options({**shared, **own}, self, section, key)
        return TableRef(path, _options(shared, own, expected, origin))

    def _shared_options(self, path: str) -> dict[str, Any]:
        """``[tables]`` for a CSV table (a .tsv keeps its tabs)."""
        from doseattr.analysis.tablefile import TAB_SUFFIXES, format_of, suffix

        if format_of(path) != "text":
            return {}
        shared = dict(self.tables)
        if suffix(path) in TAB_SUFFIXES:
            shared.pop("delimiter", None)
        return shared

    def _own_options(self, own: dict[str, Any], path: str, section: str,
                     key: str) -> dict[str, Any]:
        from doseattr.analysis.tablefile import format_of

        kind = format_of(path)
        for name in own:
            if name == "sheet" and kind != "xlsx":
                raise self.error(f"sheet goes with an .xlsx workbook; {path} is not one",
                                 section, key)
            if name != "sheet" and kind != "text":
                what = "an .xlsx workbook" if kind == "xlsx" else "a Parquet file"
                raise self.error(f"{name} goes with CSV text tables; {path} is {what}, whose "
                                 "cells need no delimiter, decimal or encoding", section, key)
        return own

    def check_tables(self) -> None:
        """``[tables]``: one character between columns, a known encoding,
        a decimal mark that is not the delimiter."""
        check_text_options(self.tables, self, "tables", "delimiter")


def check_text_options(options: Mapping[str, Any], ctx: Context, section: str,
                       key: str) -> None:
    from doseattr.analysis.tablefile import check_codec

    delimiter = options.get("delimiter")
    where = "tables" if section == "tables" else section
    if delimiter is not None and len(delimiter) != 1:
        raise ctx.error(f"delimiter is one character (\",\", \";\" or \"\\t\" for a tab), "
                        f"got '{delimiter}'", where, "delimiter" if section == "tables" else key)
    encoding = options.get("encoding")
    if encoding is not None and not check_codec(encoding):
        raise ctx.error(f"unknown encoding '{encoding}' (for example \"utf-8\", \"cp1252\" or "
                        "\"latin-1\")", where, "encoding" if section == "tables" else key)
    if options.get("decimal", ".") == (delimiter or ","):
        raise ctx.error(f"decimal = \"{options.get('decimal')}\" is also the delimiter; with "
                        "decimal commas the columns are separated by another character, "
                        "usually delimiter = \";\"", where,
                        "decimal" if section == "tables" else key)


def _options(shared: Mapping[str, Any], own: Mapping[str, Any], unit: str | None,
             origin: str) -> TableOptions:
    from doseattr.analysis.tablefile import TableOptions

    merged = {**shared, **own}
    encoding = merged.get("encoding", "utf-8-sig")
    if encoding.lower().replace("-", "").replace("_", "") == "utf8":
        encoding = "utf-8-sig"  # a byte-order mark is dropped
    return TableOptions(delimiter=merged.get("delimiter"), decimal=merged.get("decimal", "."),
                        encoding=encoding, sheet=merged.get("sheet"),
                        unit=unit, unit_origin=origin)


def only_one(values: Mapping[str, Any], keys: tuple[str, ...], ctx: Context,
              section: str) -> str | None:
    given = [k for k in keys if k in values]
    if len(given) > 1:
        raise ctx.error(f"give only one of {', '.join(keys)}; found {' and '.join(given)}",
                        section, given[1])
    return given[0] if given else None


def nonnegative(values: Mapping[str, Any], key: str, ctx: Context,
                 section: str = "curve") -> float | None:
    if key not in values:
        return None
    v = float(values[key])
    if v < 0:
        raise ctx.error(f"negative exposure {v:g}; must be 0 or more", section, key)
    return v
