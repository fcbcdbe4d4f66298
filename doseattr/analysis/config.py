"""The analysis file: read (TOML, with :mod:`tomllib`), checked against the
declared schema (:mod:`doseattr.analysis.schema`), its tables read and
checked (:mod:`doseattr.analysis.tables`), and frozen into an
:class:`Analysis`.

Everything the user typed is checked here, before any computing starts and
long before anything is written: unknown keys (with the nearest known key
suggested), values of the wrong type, keys that must go together, values
out of range (a GSD of 1 or less, a scale outside (0, 1], a negative
exposure). File paths are relative to the analysis file.

Example::

    unit = "ug/m3"
    title = "Fine particles in Example Town"

    [curve]
    table = "study_bands.csv"
    model = "log-linear"

    [exposure]
    table = "measurements.csv"
    family = "lognormal"

    [attribution]
    minimum_risk = 2.0

    [[scenario]]
    name = "Cap at 10"
    cap = 10
"""

from __future__ import annotations

import dataclasses
import os
import re
import tomllib
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import Any

from doseattr.analysis import schema
from doseattr.analysis.curve_section import parse_curve
from doseattr.analysis.exposure_section import parse_exposure, require_cumulative_unit
from doseattr.analysis.report_section import report_settings
from doseattr.analysis.schema import ARRAY_SECTIONS, SECTIONS, Context, suggest
from doseattr.analysis.specs import (
    BURDEN_METHODS,
    DEFAULT_EXCEEDANCE,
    DEFAULT_LIMIT_CONFIDENCE,
    DEFAULT_RATE_PER,
    DEFAULT_SEED,
    MAX_DRAWS,
    MIN_DRAWS,
    Analysis,
    AttributionSpec,
    BurdenSpec,
    CurveSpec,
    ExposureSpec,
    GridExposure,
    HistoriesExposure,
    LimitSpec,
    MeasuredExposure,
    OutcomeSpec,
    ScenarioSpec,
    StrataExposure,
    UncertaintySpec,
)
from doseattr.analysis.tables import read_burden
from doseattr.analysis.units_section import (
    Conversion,
    Units,
    conversion,
    convert_burden,
    convert_curve,
    convert_exposure,
    read_units,
)
from doseattr.core.attribution.scenarios import SCENARIO_KINDS
from doseattr.errors import InputError

__all__ = ["Analysis", "AttributionSpec", "BurdenSpec", "CurveSpec", "ExposureSpec",
           "OutcomeSpec", "ScenarioSpec", "UncertaintySpec", "analysis_from_dict",
           "load_analysis"]


# -- entry points -----------------------------------------------------------
def load_analysis(path: str | os.PathLike[str]) -> Analysis:
    """Read and check an analysis file; paths in it are relative to it."""
    source = os.fspath(path)
    text, raw = "", b""
    try:
        with open(source, "rb") as fh:
            raw = fh.read()
        text = raw.decode("utf-8-sig")  # a byte-order mark is dropped
        data = tomllib.loads(text)
    except FileNotFoundError:
        raise InputError("analysis file not found", source=source) from None
    except IsADirectoryError:
        raise InputError("is a folder; give the analysis file (.toml)", source=source) from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {_one_line(str(exc))}", source=source,
                         location=_toml_line(str(exc), text)) from None
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].count(b"\n") + 1
        raise InputError("cannot be read as UTF-8 text (a byte that is not UTF-8); save the "
                         "file as UTF-8", source=source, location=f"line {line}") from None
    except ValueError as exc:  # e.g. an integer longer than Python converts (4300 digits)
        raise InputError(f"not valid TOML: {_one_line(str(exc))}", source=source) from None
    except OSError as exc:
        raise InputError(f"cannot be read: {exc.strerror or exc}", source=source) from None
    return _build(data, base_dir=os.path.dirname(source), source=source)


def _toml_line(message: str, text: str) -> str:
    """``"line N"`` of a TOML error (tomllib says it only in its message)."""
    found = re.search(r"at line (\d+)", message)
    return f"line {found.group(1)}" if found else f"line {text.count(chr(10)) + 1} (end of file)"


def _one_line(text: str, limit: int = 200) -> str:
    """``text`` on one line, cut to ``limit`` characters."""
    text = " ".join(text.split())
    return text if len(text) <= limit else text[:limit - 3] + "..."


def analysis_from_dict(d: Mapping[str, Any], base_dir: str | os.PathLike[str] = ".") -> Analysis:
    """Check an analysis given as a dictionary shaped like the TOML file
    (for notebooks); table paths are relative to ``base_dir``.

    Where a table path goes, a pandas DataFrame (columns named as in the
    file) or, for measurements, a 1-D numpy array of values may stand
    instead; messages and provenance name it ``<DataFrame for [exposure]
    table>``, and provenance holds the SHA-256 of its cells as CSV."""
    if not isinstance(d, Mapping):
        raise InputError(f"an analysis must be a dictionary, got {type(d).__name__}")
    return _build(dict(d), base_dir=os.fspath(base_dir), source=None)


# -- the whole file -----------------------------------------------------------
def _build(data: dict[str, Any], *, base_dir: str, source: str | None) -> Analysis:
    unit = data.get("unit")
    ctx = Context(source, base_dir, unit=unit.strip() if isinstance(unit, str) else None,
                  tables=data["tables"] if isinstance(data.get("tables"), dict) else {},
                  exposure_unit=_exposure_unit(data))
    top = {k: v for k, v in data.items() if k not in SECTIONS or k == ""}
    _check_sections(data, ctx)
    ctx.check_tables()
    _check_grid_sections(data, source)
    schema.check_section(top, "", source=source)
    if "unit" not in data:
        raise ctx.error('missing key \'unit\' at the top of the file (for example unit = "ug/m3")',
                        "", "unit")
    units = read_units(data, ctx)
    if "exposure" in data:
        exposure, conv = _exposure(data["exposure"], ctx, units)
    else:
        conv = Conversion()
    burden = _burden(data["burden"], ctx, conv) if "burden" in data else None
    outcomes = _outcomes(data.get("outcome", []), ctx, units, conv, burden)
    uncertainty = _uncertainty(data["uncertainty"], ctx) if "uncertainty" in data else None
    if "grid" in data:
        exposure = _grid(data, ctx, burden, outcomes, uncertainty)
    elif "exposure" not in data:
        exposure = _strata_exposure(burden, outcomes, source)
    if "curve" not in data and not outcomes:
        raise InputError("missing section [curve]", source=source)
    curve = _curve(data["curve"], ctx, units) if "curve" in data else outcomes[0].curve
    attribution = _attribution(data.get("attribution", {}), ctx)
    limit = _limit(data["limit"], ctx, units, exposure) if "limit" in data else None
    scenarios = _scenarios(data.get("scenario", []), ctx, limit)
    report_settings(data.get("report"), source)  # [report]: checked here, read by the writer
    if "curve" not in data and burden is None:
        burden = outcomes[0].burden
    if isinstance(exposure, GridExposure):
        exposure = dataclasses.replace(exposure, cuts=grid_cuts(curve, outcomes, attribution,
                                                                scenarios))
    if (uncertainty is not None and uncertainty.poisson_cases and burden is None
            and not any(o.burden for o in outcomes)):
        raise ctx.error("poisson_cases varies the observed cases of [burden]; add a [burden] "
                        "table or remove this key", "uncertainty", "poisson_cases")
    return Analysis(unit=data["unit"].strip(), curve=curve, exposure=exposure,
                    attribution=attribution, scenarios=scenarios, title=data.get("title"),
                    uncertainty=uncertainty, burden=burden, outcomes=outcomes, source=source,
                    base_dir=base_dir, settings=data, molecular_weight=units.molecular_weight,
                    own_curve="curve" in data, limit=limit)


def _exposure_unit(data: dict[str, Any]) -> str | None:
    e = data.get("exposure")
    unit = e.get("unit") if isinstance(e, dict) else None
    return unit.strip() if isinstance(unit, str) else None


def _check_grid_sections(data: dict[str, Any], source: str | None) -> None:
    """``[grid]`` replaces ``[exposure]``; ``[compute]`` goes with ``[grid]``."""
    if "grid" in data and "exposure" in data:
        raise InputError("[grid] and [exposure] both give the exposure; keep one (the grid's "
                         "cells are the population's exposure)", source=source,
                         location="[exposure]")
    if "compute" in data and "grid" not in data:
        raise InputError("[compute] says where a [grid] analysis is computed; add [grid] or "
                         "remove [compute]", source=source, location="[compute]")


def _grid(data: dict[str, Any], ctx: Context, burden: BurdenSpec | None,
          outcomes: tuple[OutcomeSpec, ...], uncertainty: UncertaintySpec | None
          ) -> GridExposure:
    """``[grid]`` (and ``[compute]``) checked; the zones are the strata of
    every burden table (the file's and each outcome's)."""
    from doseattr.analysis.grid_inputs import parse_compute, parse_grid

    spec = parse_grid(data["grid"], ctx)
    scheduler = parse_compute(data.get("compute", {}), ctx)
    tables = tuple(b.table for b in (burden, *(o.burden for o in outcomes)) if b is not None)
    seed = uncertainty.seed if uncertainty is not None else DEFAULT_SEED
    return GridExposure(family="empirical", grid=spec, tables=tables, scheduler=scheduler,
                        seed=seed)


def grid_cuts(curve: CurveSpec, outcomes: tuple[OutcomeSpec, ...],
              attribution: AttributionSpec, scenarios: tuple[ScenarioSpec, ...]
              ) -> tuple[float, ...]:
    """Where the integrands of a grid run have kinks, for the reduction to
    split its bins at: the minimum-risk level ``m`` and each stated
    ``max_dose`` ``d`` (a fitted curve's own top dose is not known yet), and
    where each scenario ``g`` sends them (``g(x) = m`` or ``d``) or has its
    own (a cap)."""
    levels = [attribution.minimum_risk]
    for c in (curve, *(o.curve for o in outcomes)):
        top = getattr(c, "max_dose", None)
        if top is not None:
            levels.append(float(top))
    cuts = set(levels)
    for sc in scenarios:
        for level in levels:
            if sc.kind == "scale":
                cuts.add(level / sc.value)
            elif sc.kind == "reduce_by":
                cuts.add(level + sc.value)
        if sc.kind == "cap":
            cuts.add(sc.value)
    return tuple(sorted(c for c in cuts if c > 0 and c < float("inf")))


def with_scheduler(analysis: Analysis, address: str) -> Analysis:
    """``analysis`` computed on the dask.distributed scheduler at
    ``address`` (the command line's ``--scheduler``, which overrides
    ``[compute] scheduler``); only a ``[grid]`` analysis uses one."""
    from doseattr.analysis.grid_inputs import parse_compute

    if not isinstance(analysis.exposure, GridExposure):
        raise InputError("--scheduler computes a [grid] analysis on a dask cluster; this "
                         "analysis has no [grid]", source=analysis.source)
    ctx = Context(analysis.source, analysis.base_dir)
    scheduler = parse_compute({"scheduler": address}, ctx)
    return dataclasses.replace(analysis, exposure=dataclasses.replace(analysis.exposure,
                                                                      scheduler=scheduler))


def _strata_exposure(burden: BurdenSpec | None, outcomes: tuple[OutcomeSpec, ...],
                     source: str | None) -> StrataExposure:
    """No ``[exposure]``: the population is the mixture of the burden
    table's rows, which must each give their own exposure (checked when it
    is built)."""
    tables = [b.table for b in (burden, *(o.burden for o in outcomes)) if b is not None]
    if not tables:
        raise InputError("missing section [exposure] (or a [burden] table whose every row "
                         "gives its own exposure, gm and gsd)", source=source)
    return StrataExposure(family="empirical", table=tables[0])


def _curve(c: dict[str, Any], ctx: Context, units: Units) -> CurveSpec:
    """``[curve]`` checked, its doses converted to the file's unit."""
    from doseattr.analysis.pooled_section import parse_pooled

    spec = parse_pooled(c, ctx, units) if "study" in c else parse_curve(c, ctx)
    conv = conversion(units, c.get("unit"), "curve", ctx)
    return convert_curve(spec, conv, c.get("unit"))


def _exposure(e: dict[str, Any], ctx: Context, units: Units) -> tuple[ExposureSpec, Conversion]:
    """``[exposure]`` checked, its values converted to the file's unit (for
    work histories, the intensities to the concentration part of it)."""
    spec = parse_exposure(e, ctx)
    histories = isinstance(spec, HistoriesExposure)
    if histories:
        require_cumulative_unit(units.unit, ctx)
    conv = conversion(units, e.get("unit"), "exposure", ctx, intensity=histories)
    return convert_exposure(spec, conv, e.get("unit")), conv


def _check_sections(data: dict[str, Any], ctx: Context) -> None:
    for name, value in data.items():
        if name not in SECTIONS or name == "":
            if isinstance(value, dict):
                hint = suggest(name, [s for s in SECTIONS if s])
                raise InputError(f"unknown section [{name}]{hint}", source=ctx.source,
                                 location=f"[{name}]")
            continue
        if name in ARRAY_SECTIONS:
            if isinstance(value, dict):
                raise InputError(f"write each {name} as [[{name}]] (double brackets), one block "
                                 f"per {name}", source=ctx.source, location=f"[{name}]")
            if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
                raise InputError(f"'{name}' must be [[{name}]] blocks", source=ctx.source,
                                 location=f"[[{name}]]")
            for i, block in enumerate(value):
                schema.check_section(block, name, source=ctx.source, index=i)
        else:
            if not isinstance(value, dict):
                raise InputError(f"'{name}' must be a section [{name}] with keys under it",
                                 source=ctx.source, location=f"key '{name}'")
            schema.check_section(value, name, source=ctx.source)


def _attribution(a: dict[str, Any], ctx: Context) -> AttributionSpec:
    m = a.get("minimum_risk", 0.0)
    rng = None
    if isinstance(m, list):
        lo, hi = float(m[0]), float(m[1])
        if lo > hi:
            raise ctx.error(f"the range's low end {lo:g} is above its high end {hi:g}",
                            "attribution", "minimum_risk")
        rng, m = (lo, hi), 0.5 * (lo + hi)
        low = lo
    else:
        m = low = float(m)
    if low < 0:
        raise ctx.error(f"negative exposure {low:g}; the minimum-risk level must be 0 or more",
                        "attribution", "minimum_risk")
    cuts = None
    if "cutpoints" in a:
        cuts = tuple(float(v) for v in a["cutpoints"])
        if cuts[0] <= 0:
            raise ctx.error(f"cutpoints must be above 0 (the first band starts at 0), got "
                            f"{cuts[0]:g}", "attribution", "cutpoints")
        if any(b <= a_ for a_, b in zip(cuts, cuts[1:])):
            raise ctx.error("cutpoints must increase, for example [5, 10, 20]",
                            "attribution", "cutpoints")
    return AttributionSpec(minimum_risk=float(m), minimum_risk_range=rng, cutpoints=cuts)


def _scenarios(blocks: list[dict[str, Any]], ctx: Context,
               limit: LimitSpec | None = None) -> tuple[ScenarioSpec, ...]:
    out: list[ScenarioSpec] = []
    names: dict[str, int] = {}
    kinds_all = (*SCENARIO_KINDS, "comply")
    for i, block in enumerate(blocks):
        if "name" not in block:
            raise ctx.error("missing key 'name' (a short label for the scenario)", "scenario",
                            "name", i)
        kinds = [k for k in kinds_all if k in block]
        if len(kinds) != 1:
            found = f"found {' and '.join(kinds)}" if kinds else "found none"
            *first, last = kinds_all
            raise ctx.error(f"give exactly one of {', '.join(first)} or {last} ({found})",
                            "scenario", kinds[1] if len(kinds) > 1 else first[0], i)
        kind, name = kinds[0], block["name"].strip()
        if name in names:
            raise ctx.error(f"scenario name '{name}' is used twice (also in [[scenario]] "
                            f"{names[name] + 1})", "scenario", "name", i)
        names[name] = i
        if kind == "comply":
            out.append(_comply(block, ctx, limit, name, i))
            continue
        value = float(block[kind])
        problem = SCENARIO_KINDS[kind].value_problem(value)
        if problem is not None:
            raise ctx.error(problem, "scenario", kind, i)
        out.append(ScenarioSpec(name=name, kind=kind, value=value, index=i))
    return tuple(out)


def _comply(block: dict[str, Any], ctx: Context, limit: LimitSpec | None, name: str,
            i: int) -> ScenarioSpec:
    """``comply = true``: the exposure rescaled so that its 95th percentile
    meets the limit (the factor follows from the fit, when it is built)."""
    if block["comply"] is not True:
        raise ctx.error("comply = false asks for nothing; remove the scenario or write "
                        "comply = true", "scenario", "comply", i)
    if limit is None:
        raise ctx.error("comply = true scales exposure down to the limit value; add a [limit] "
                        "section with value = ...", "scenario", "comply", i)
    return ScenarioSpec(name=name, kind="comply", value=limit.value, index=i)


#: ``[limit] confidence`` must lie strictly between these.
CONFIDENCE_RANGE = (0.5, 1.0)


def _limit(lim: dict[str, Any], ctx: Context, units: Units,
           exposure: ExposureSpec | None) -> LimitSpec:
    """``[limit]``: the limit value (above 0; converted from its own
    ``unit``), ``confidence`` in (0.5, 1) and ``exceedance`` in (0, 0.5);
    it needs measurements fitted by a family."""
    if not isinstance(exposure, MeasuredExposure):
        raise ctx.error("[limit] tests compliance of measured samples; give them as [exposure] "
                        "table = \"samples.csv\" with a fitted family", "limit", "value")
    if exposure.family == "empirical":
        raise ctx.error("[limit] needs a fitted distribution (its 95th percentile and "
                        "confidence limits); set [exposure] family = \"lognormal\" (or "
                        "\"best\") instead of \"empirical\"", "exposure", "family")
    m = exposure.measurements
    if m.zeros or exposure.unexposed:
        raise ctx.error("[limit] tests the samples of one exposed group, which has no "
                        "unexposed share: write results below the detection limit as <limit "
                        "instead of 0, and remove [exposure] unexposed", "limit", "value")
    if exposure.weights == "importance":
        raise ctx.error("[limit] takes each sample once (or weights that count identical "
                        "samples, weights = \"frequency\"); importance weights are not "
                        "supported for compliance", "exposure", "weights")
    if "value" not in lim:
        raise ctx.error("missing key 'value' (the limit, for example value = 0.05)", "limit",
                        "value")
    value = float(lim["value"])
    if not value > 0:
        raise ctx.error(f"the limit must be above 0, got {value:g}", "limit", "value")
    confidence = float(lim.get("confidence", DEFAULT_LIMIT_CONFIDENCE))
    lo, hi = CONFIDENCE_RANGE
    if not lo < confidence < hi:
        raise ctx.error(f"confidence must be above {lo:g} and below {hi:g} (0.70 is EN 689's "
                        f"level; 0.90 and 0.95 are stricter), got {confidence:g}", "limit",
                        "confidence")
    exceedance = float(lim.get("exceedance", DEFAULT_EXCEEDANCE))
    if not 0 < exceedance < 0.5:
        raise ctx.error(f"exceedance is the tolerated share of exposures above the limit, "
                        f"above 0 and below 0.5 (0.05 is usual), got {exceedance:g}", "limit",
                        "exceedance")
    conv = conversion(units, lim.get("unit"), "limit", ctx)
    notes = () if conv.note is None else (conv.note.replace("values", "value"),)
    return LimitSpec(value * conv.factor, confidence, exceedance, notes)


def _uncertainty(u: dict[str, Any], ctx: Context) -> UncertaintySpec:
    draws = u.get("draws", 1000)
    if draws < MIN_DRAWS:
        raise ctx.error(f"draws must be at least {MIN_DRAWS} for stable 2.5th and 97.5th "
                        f"percentiles, got {draws}", "uncertainty", "draws")
    if draws > MAX_DRAWS and not u.get("allow_many_draws", False):
        raise ctx.error(f"{draws} draws is above {MAX_DRAWS}; add allow_many_draws = true if "
                        "you mean it (time and memory grow with the draws)",
                        "uncertainty", "draws")
    seed = u.get("seed", DEFAULT_SEED)
    if seed < 0:
        raise ctx.error(f"seed must be 0 or more, got {seed}", "uncertainty", "seed")
    precision = u.get("precision")
    if precision is not None and not 0 < precision < 0.1:
        raise ctx.error(f"precision is the largest Monte Carlo standard error wanted for an "
                        f"interval limit of a fraction, above 0 and below 0.1 (0.001 is a tenth "
                        f"of a percentage point), got {precision:g}", "uncertainty", "precision")
    return UncertaintySpec(draws=int(draws), seed=int(seed), seed_given="seed" in u,
                           poisson_cases=bool(u.get("poisson_cases", False)),
                           precision=None if precision is None else float(precision))


def _burden(b: dict[str, Any], ctx: Context, conv: Conversion) -> BurdenSpec:
    """``[burden]``: ``table``, ``rate_per`` (people a rate is given per,
    default 100000) and ``method`` (``"paf"`` or ``"impact-function"``);
    per-stratum exposure columns are in the [exposure] unit."""
    if "table" not in b:
        raise ctx.error("missing key 'table' (a CSV with columns stratum and cases, or "
                        "stratum, population and rate)", "burden", "table")
    rate_per = float(b.get("rate_per", DEFAULT_RATE_PER))
    if not rate_per > 0:
        raise ctx.error(f"rate_per must be above 0 (the rate column gives cases per rate_per "
                        f"people per year, for example 100000), got {rate_per:g}",
                        "burden", "rate_per")
    method = b.get("method", BURDEN_METHODS[0])
    if method not in BURDEN_METHODS:  # the schema refuses it first; kept for direct calls
        raise ctx.error(f"'{method}' is not one of {', '.join(BURDEN_METHODS)}", "burden",
                        "method")
    path = ctx.table(b["table"], "burden", "table", unit=ctx.exposure_unit,
                     unit_origin="[exposure] unit" if ctx.exposure_unit else None)
    table = convert_burden(read_burden(path, path, rate_per=rate_per), conv)
    return BurdenSpec(table, method=method, rate_per=rate_per)


def _outcomes(blocks: list[dict[str, Any]], ctx: Context, units: Units,
              conv: Conversion, top_burden: BurdenSpec | None) -> tuple[OutcomeSpec, ...]:
    """``[[outcome]]`` blocks, each with ``name``, ``[outcome.curve]`` (keys
    as in [curve]), optionally ``[outcome.burden]`` (keys as in [burden])
    and ``groups``: blocks with one name and disjoint groups are one
    outcome with group-specific curves (:func:`_check_groups`)."""
    out = []
    for i, block in enumerate(blocks):
        if "name" not in block:
            raise ctx.error("missing key 'name'", "outcome", "name", i)
        name = block["name"].strip()
        if "curve" not in block:
            raise ctx.error("missing [outcome.curve] (the outcome's RR curve, keys as in "
                            "[curve])", "outcome", "curve", i)
        with outcome_location(i, name):
            schema.check_section(block["curve"], "curve", source=ctx.source)
            curve = _curve(block["curve"], ctx, units)
            burden = None
            if "burden" in block:
                schema.check_section(block["burden"], "burden", source=ctx.source)
                burden = _burden(block["burden"], ctx, conv)
        groups = _groups(block, ctx, i)
        out.append(OutcomeSpec(name, curve, burden or top_burden, groups))
    _check_groups(out, ctx, top_burden)
    return tuple(out)


def _groups(block: dict[str, Any], ctx: Context, i: int) -> tuple[str, ...] | None:
    if "groups" not in block:
        return None
    groups = tuple(str(g).strip() for g in block["groups"])
    if not groups or any(not g for g in groups):
        raise ctx.error("groups must list one or more group labels of the burden table, "
                        "for example groups = [\"65-74\", \"75+\"]", "outcome", "groups", i)
    twice = sorted({g for g in groups if groups.count(g) > 1})
    if twice:
        raise ctx.error(f"group '{twice[0]}' is listed twice", "outcome", "groups", i)
    return groups


def _check_groups(outcomes: list[OutcomeSpec], ctx: Context,
                  top_burden: BurdenSpec | None) -> None:
    """Blocks of one name must each carry ``groups``, disjoint, of one
    burden table with a ``group`` column; every row of that table is
    covered by exactly one of them and every listed group has rows."""
    by_name: dict[str, list[int]] = {}
    for i, o in enumerate(outcomes):
        by_name.setdefault(o.name, []).append(i)
    for name, idx in by_name.items():
        blocks = [outcomes[i] for i in idx]
        if len(idx) > 1 and any(b.groups is None for b in blocks):
            raise ctx.error(f"outcome name '{name}' is used twice; blocks that share a name "
                            "need groups = [...] (disjoint groups of the burden table) to "
                            "give group-specific curves", "outcome", "name", idx[1])
        if all(b.groups is None for b in blocks):
            continue
        table = _group_table(name, idx, outcomes, ctx, top_burden)
        _check_cover(name, idx, outcomes, table, ctx)


def _group_table(name: str, idx: list[int], outcomes: list[OutcomeSpec], ctx: Context,
                 top_burden: BurdenSpec | None):
    """The one burden table of an outcome with groups."""
    tables = [(i, (outcomes[i].burden or top_burden)) for i in idx]
    for i, spec in tables:
        if spec is None:
            raise ctx.error(f"outcome '{name}' has groups but no burden table; add [burden] "
                            "(or [outcome.burden]) with a group column", "outcome", "groups", i)
    first_i, first = tables[0]
    assert first is not None
    for i, spec in tables[1:]:
        assert spec is not None
        if spec.table.source != first.table.source:
            raise ctx.error(f"the blocks of outcome '{name}' use different burden tables "
                            f"({first.table.source} and {spec.table.source}); give them one "
                            "table", "outcome", "burden", i)
    table = first.table
    if table.groups is None:
        raise ctx.error(f"outcome '{name}' has groups, but {table.source} has no group "
                        "column; add one (a label per row) or remove groups", "outcome",
                        "groups", first_i)
    return table


def _check_cover(name: str, idx: list[int], outcomes: list[OutcomeSpec], table,
                 ctx: Context) -> None:
    present = set(table.groups)
    owner: dict[str, int] = {}
    for i in idx:
        groups = outcomes[i].groups
        if groups is None:
            raise ctx.error(f"outcome '{name}': every block needs groups once one has them",
                            "outcome", "groups", i)
        for g in groups:
            if g in owner:
                raise ctx.error(f"group '{g}' of outcome '{name}' is in two blocks "
                                f"([[outcome]] {owner[g] + 1} and {i + 1}); each group "
                                "takes one curve", "outcome", "groups", i)
            if g not in present:
                raise ctx.error(f"group '{g}' has no row in {table.source} (its groups: "
                                f"{', '.join(sorted(present))})", "outcome", "groups", i)
            owner[g] = i
    for r, g in enumerate(table.groups):
        if g not in owner:
            raise InputError(f"no curve of outcome '{name}' covers group '{g}'; add it to "
                             "the groups of one of its [[outcome]] blocks",
                             source=table.source, location=f"row {table.lines[r]}, column "
                             "'group'")


@contextmanager
def outcome_location(index: int, name: str) -> Iterator[None]:
    """Errors about ``[curve]``, ``[[curve.study]]`` or ``[burden]`` keys
    inside an outcome name ``[outcome.curve]``, ``[[outcome.curve.study]]``
    or ``[outcome.burden]`` of that outcome instead."""
    try:
        yield
    except InputError as exc:
        loc = exc.location or ""
        where = f"[[outcome]] {index + 1} ('{name}')"
        if loc.startswith("[[curve.study]]"):
            loc = f"{where} [[outcome.curve.study]]{loc[len('[[curve.study]]'):]}"
        for section in ("curve", "burden"):
            if loc.startswith(f"[{section}]"):
                loc = f"{where} [outcome.{section}]{loc[len(section) + 2:]}"
        raise InputError(exc.message, source=exc.source, location=loc or None) from None
