"""The ``[exposure]`` section: one way of describing the exposure
(measurements, summary statistics, percentiles, bins or work histories) and
the keys that go with it, checked."""

from __future__ import annotations

from datetime import date
from typing import Any

import numpy as np

from doseattr.analysis import schema
from doseattr.analysis.exposure_tables import read_tasks
from doseattr.analysis.schema import Context
from doseattr.analysis.specs import (
    FITTED_FAMILIES,
    SUMMARY_KEYS,
    BinnedExposure,
    ExposureSpec,
    HistoriesExposure,
    MeasuredExposure,
    PercentilesExposure,
    SummaryExposure,
)
from doseattr.analysis.tables import Measurements, read_bins, read_histories, read_measurements
from doseattr.core.exposure.sandwich import WEIGHT_MEANINGS, kish_effective_n
from doseattr.errors import InputError, ModelError

#: Ways of describing the exposure and the keys that give each.
EXPOSURE_MODES: dict[str, tuple[str, ...]] = {
    "table": ("table",), **SUMMARY_KEYS, "percentiles": ("percentiles",), "bins": ("bins",),
    "histories": ("histories",)}


def parse_exposure(e: dict[str, Any], ctx: Context) -> ExposureSpec:
    unexposed = float(e.get("unexposed", 0.0))
    if not 0 <= unexposed < 1:
        raise ctx.error(f"unexposed is a share of the population, from 0 up to (not including) "
                        f"1, got {unexposed:g}", "exposure", "unexposed")
    family = e.get("family")
    modes = EXPOSURE_MODES
    given = [m for m, keys in modes.items() if any(k in e for k in keys)]
    if not given:
        raise InputError("[exposure] needs measurements (table = \"FILE.csv\" with family), "
                         "summary statistics (gm and gsd; shape and scale; mean and sd; "
                         "percentiles), a binned table (bins) or work histories (histories)",
                         source=ctx.source, location="[exposure]")
    if len(given) > 1:
        keys = [k for m in given for k in modes[m] if k in e]
        raise ctx.error(f"give one way of describing the exposure; found {', '.join(keys)}",
                        "exposure", keys[-1])
    mode = given[0]
    for key in modes[mode]:
        if key not in e:
            other = next(k for k in modes[mode] if k != key)
            raise ctx.error(f"missing key '{key}' ({other} and {key} go together)",
                            "exposure", key)
    for key in ("as_of", "lag_years", "tasks"):
        if key in e and mode != "histories":
            raise ctx.error(f"'{key}' goes with histories = \"FILE.csv\"", "exposure", key)
    for key in ("detected", "weight", "weights"):
        if key in e and mode != "table":
            raise ctx.error(f"'{key}' names a column of the measurement table (table = ...)",
                            "exposure", key)
    if family in ("best", "empirical") and mode not in ("table", "histories"):
        what = ("chooses among fits to measurements" if family == "best"
                else "uses the measured values themselves")
        raise ctx.error(f"family = \"{family}\" {what}; it needs table = \"FILE.csv\" or "
                        "histories", "exposure", "family")
    if "substitution" in e and mode != "table":
        raise ctx.error("substitution replaces values below a detection limit in a measurement "
                        "table (table = \"FILE.csv\")", "exposure", "substitution")
    if mode == "table":
        return _measured_exposure(e, family, unexposed, ctx)
    if mode in ("percentiles", "bins", "histories"):
        return _other_exposure(e, mode, family, unexposed, ctx)
    values = {k: float(e[k]) for k in modes[mode]}
    family = _summary_family(mode, family, ctx)
    _check_summary(values, ctx)
    return SummaryExposure(kind=mode, family=family, unexposed=unexposed, values=values)


def _default_family(family: str | None, notes: list[str]) -> str:
    if family is None:
        notes.append("[exposure] family not given: a lognormal distribution was fitted")
        return "lognormal"
    return family


def _measured_exposure(e: dict[str, Any], family: str | None, unexposed: float,
                       ctx: Context) -> MeasuredExposure:
    notes: list[str] = []
    family = _default_family(family, notes)
    path = ctx.table(e["table"], "exposure", "table", unit=e.get("unit"))
    data = read_measurements(path, path, detected_column=e.get("detected", "detected"),
                             weight_column=e.get("weight", "weight"),
                             min_positive=1 if family == "empirical" else 3)
    if data.zeros and "unexposed" in e:
        raise ctx.error(f"{path} has {data.zeros} values of 0, which give the unexposed share "
                        "from the data; remove either the zeros or this key", "exposure",
                        "unexposed")
    censored = int((~data.detected).sum())
    if family == "empirical" and censored:
        raise InputError(f"family = \"empirical\" uses the values as measured and cannot use "
                         f"the {censored} values below a detection limit ('<' values or "
                         f"detected = false; it substitutes nothing); fit "
                         f"{', '.join(FITTED_FAMILIES)} or best, which treat them as censored",
                         source=path,
                         location="column 'value'")
    fractions = _substitution(e, censored, path, ctx)
    if data.worker is not None:
        _check_workers(data, family, path, ctx)
    meaning = _weight_meaning(e, data, family, path, ctx)
    if meaning is not None:
        notes.append(_weights_note(meaning, data, family))
    return MeasuredExposure(family=family, unexposed=unexposed, measurements=data,
                            substitution=fractions, notes=tuple(notes) + data.notes,
                            weights=meaning)


def _check_workers(data: Measurements, family: str, path: str, ctx: Context) -> None:
    """A ``worker`` column asks for the one-way random-effects model on the
    log scale: a lognormal family, unweighted samples with no zeros, and
    repeated samples of at least one worker."""
    assert data.worker is not None
    if family != "lognormal":
        raise ctx.error(f"{path} has a worker column, whose within- and between-worker model "
                        f"is lognormal; set family = \"lognormal\" (got \"{family}\") or "
                        "remove the worker column", "exposure", "family")
    if data.weights is not None:
        raise InputError("a worker column and a weight column together are not supported: "
                         "each personal sample counts once; remove the weights",
                         source=path, location="column 'worker'")
    if data.zeros:
        raise InputError(f"{data.zeros} samples are 0, which the workers' log-scale model "
                         "cannot take; write a result below the detection limit as <limit",
                         source=path, location="column 'value'")
    _, counts = np.unique(data.worker, return_counts=True)
    if counts.size < 2:
        raise InputError(f"every sample is of one worker ('{data.worker[0]}'); the between-"
                         "worker variation needs two workers or more (or remove the worker "
                         "column)", source=path, location="column 'worker'")
    if counts.max() < 2:
        raise InputError(f"each of the {counts.size} workers has one sample, so within- and "
                         "between-worker variation cannot be told apart; repeated samples of "
                         "some workers are needed (or remove the worker column)",
                         source=path, location="column 'worker'")


def _weight_meaning(e: dict[str, Any], data: Measurements, family: str, path: str,
                    ctx: Context) -> str | None:
    """``[exposure] weights``: ``"importance"`` by default when the table
    has weights, ``None`` when it has none (the key is then an error)."""
    if data.weights is None:
        if "weights" in e:
            raise ctx.error(f"weights = \"{e['weights']}\" says what the weight column means, "
                            f"but {path} has no column '{e.get('weight', 'weight')}'; remove "
                            "this key or add the column", "exposure", "weights")
        return None
    meaning = str(e.get("weights", "importance"))
    if meaning not in WEIGHT_MEANINGS:  # the schema checks it first; kept for direct callers
        raise ctx.error(f"weights must be \"importance\" or \"frequency\", got \"{meaning}\"",
                        "exposure", "weights")
    return meaning


def _weights_note(meaning: str, data: Measurements, family: str) -> str:
    """Which meaning of the weights was used, with the Kish effective
    sample size (:func:`~doseattr.core.exposure.sandwich.kish_effective_n`)
    of the values the exposure uses (the positive ones for a fitted family,
    whose zeros give the unexposed share)."""
    assert data.weights is not None
    keep = np.ones(data.n, bool) if family == "empirical" else data.values > 0
    n, kish = int(keep.sum()), kish_effective_n(data.weights[keep])
    size = f"Kish effective sample size {kish:.1f} of {n} values"
    if family == "empirical":
        how = ("the bootstrap resamples rows with equal chance and keeps each row's weight"
               if meaning == "importance" else
               "the bootstrap draws rows with chances proportional to their weights")
    else:
        how = ("the fit's covariance is the sandwich estimator for weighted likelihoods "
               "(Binder 1983)" if meaning == "importance" else
               f"the fit's covariance treats the {n} values as equally informative (inverse "
               "observed information)")
    what = ("population weights (the default with a weight column)" if meaning == "importance"
            else "counts of identical measurements")
    return f"[exposure] weights = \"{meaning}\": {what}; {how}; {size}"


def _substitution(e: dict[str, Any], censored: int, path: str,
                  ctx: Context) -> tuple[float, ...]:
    """Fractions of the detection limit for the substitution comparison
    (e.g. 0.5 for LOD/2); each in (0, 1], each once."""
    if "substitution" not in e:
        return ()
    fractions = tuple(float(v) for v in e["substitution"])
    for f in fractions:
        if not 0 < f <= 1:
            raise ctx.error(f"each fraction of the detection limit must be above 0 and at most "
                            f"1 (0.5 for LOD/2, 0.7071 for LOD/sqrt(2)), got {f:g}", "exposure",
                            "substitution")
    if len(set(fractions)) < len(fractions):
        raise ctx.error("a fraction is listed twice", "exposure", "substitution")
    if e.get("family") == "empirical":
        raise ctx.error("substitution refits the family to substituted values; it does not go "
                        "with family = \"empirical\"", "exposure", "substitution")
    if not censored:
        raise ctx.error(f"{path} has no values below a detection limit, so there is nothing to "
                        "substitute; remove this key", "exposure", "substitution")
    return fractions


def _other_exposure(e: dict[str, Any], mode: str, family: str | None, unexposed: float,
                    ctx: Context) -> ExposureSpec:
    notes: list[str] = []
    family = _default_family(family, notes)
    if mode == "percentiles":
        values = _percentiles(e["percentiles"], ctx)
        return PercentilesExposure(family=family, unexposed=unexposed, values=values,
                                   notes=tuple(notes))
    if mode == "bins":
        path = ctx.table(e["bins"], "exposure", "bins", unit=e.get("unit"))
        bins = read_bins(path, path)
        return BinnedExposure(family=family, unexposed=unexposed, bins=bins,
                              notes=tuple(notes) + bins.notes)
    # intensities are in [exposure] unit, a concentration; without it the
    # header's unit is not checked (the file's unit is cumulative)
    intensity = e.get("unit")
    path = ctx.table(e["histories"], "exposure", "histories", unit=intensity,
                     check_unit=intensity is not None)
    if "as_of" not in e:
        raise ctx.error("missing key 'as_of' (the analysis date, e.g. as_of = \"2024-12-31\"; "
                        "exposure after it minus the lag does not count)", "exposure", "as_of")
    try:
        as_of = date.fromisoformat(e["as_of"])
    except ValueError:
        raise ctx.error(f"'{e['as_of']}' is not an ISO date like 2024-12-31", "exposure",
                        "as_of") from None
    lag = float(e.get("lag_years", 0.0))
    if lag < 0:
        raise ctx.error(f"lag_years must be 0 or more, got {lag:g}", "exposure", "lag_years")
    if "unexposed" in e:
        raise ctx.error("with work histories the unexposed share comes from workers with no "
                        "exposure before the cutoff; remove this key", "exposure", "unexposed")
    tasks = None
    if "tasks" in e:
        tasks_path = ctx.table(e["tasks"], "exposure", "tasks", unit=intensity,
                               check_unit=intensity is not None)
        tasks = read_tasks(tasks_path, tasks_path)
        notes.append(f"jobs with an empty intensity take the 8-hour TWA of their task samples "
                     f"(sum of concentration x minutes / 480; {len(tasks.twa)} jobs sampled)")
    histories = read_histories(path, path, tasks=tasks)
    if "lag_years" not in e:
        notes.append("lag_years not given: no lag (10 years is common practice for cancer "
                     "outcomes)")
    return HistoriesExposure(family=family, histories=histories, as_of=as_of, lag_years=lag,
                             notes=tuple(notes))


def _percentiles(table: dict[str, Any], ctx: Context) -> dict[float, float]:
    out = {}
    for key, value in table.items():
        try:
            pct = float(key)
        except ValueError:
            raise ctx.error(f"'{key}' is not a percentile; write percentiles = {{50 = 8.0, "
                            "95 = 20.0}", "exposure", "percentiles") from None
        if not 0 < pct < 100:
            raise ctx.error(f"percentile {key} lies outside 0 to 100 (write the median as 50, "
                            "not 0.5)", "exposure", "percentiles")
        if not schema.is_number(value) or value <= 0:
            raise ctx.error(f"the value of percentile {key} must be a number above 0, got "
                            f"{schema.describe(value)}", "exposure", "percentiles")
        out[pct] = float(value)
    if len(out) < 2:
        raise ctx.error("give at least two percentiles, for example {50 = 8.0, 95 = 20.0}",
                        "exposure", "percentiles")
    ordered = [out[p] for p in sorted(out)]
    if any(b <= a for a, b in zip(ordered, ordered[1:])):
        raise ctx.error("percentile values must increase with the percentile", "exposure",
                        "percentiles")
    return out


def _summary_family(mode: str, family: str | None, ctx: Context) -> str:
    if mode == "gm-gsd":
        if family not in (None, "lognormal"):
            raise ctx.error(f"gm and gsd describe a lognormal distribution, not {family}",
                            "exposure", "family")
        return "lognormal"
    if family is None:
        need = _either(_families_with(("shape", "scale")) if mode == "shape-scale"
                       else FITTED_FAMILIES)
        raise ctx.error(f"missing key 'family' ({need}) beside "
                        f"{' and '.join(mode.split('-'))}", "exposure", "family")
    if mode == "shape-scale" and family == "lognormal":
        raise ctx.error("a lognormal distribution is given by gm and gsd, not shape and scale",
                        "exposure", "family")
    return family


def _families_with(params: tuple[str, ...]) -> tuple[str, ...]:
    """Families of the core registry whose parameters are ``params``."""
    from doseattr.core.exposure.registry import FAMILIES

    return tuple(name for name, fam in FAMILIES.items() if fam.param_names == params)


def _either(names: tuple[str, ...]) -> str:
    """``"a, b or c"``."""
    return names[0] if len(names) == 1 else f"{', '.join(names[:-1])} or {names[-1]}"


def _check_summary(values: dict[str, float], ctx: Context) -> None:
    from doseattr.core.exposure.registry import lower_bound

    for key, v in values.items():
        low = lower_bound(key)  # the families' declared bounds
        if v > low:
            continue
        if key == "gsd":
            raise ctx.error(f"GSD must be greater than {low:g} (a GSD of 1 means no spread), "
                            f"got {v:g}", "exposure", "gsd")
        if key in ("gm", "mean"):
            what = "negative exposure" if v < 0 else "zero"
            raise ctx.error(f"{key} must be greater than {low:g}, got {v:g} ({what})",
                            "exposure", key)
        raise ctx.error(f"{key} must be greater than {low:g}, got {v:g}", "exposure", key)


def require_cumulative_unit(unit: str, ctx: Context) -> None:
    """With work histories the exposure is cumulative (intensity x years),
    so the file's unit, shared with the curve, must be a cumulative unit."""
    from doseattr.core.exposure.units import cumulative_unit

    try:
        cumulative_unit(unit)
    except ModelError:
        raise ctx.error(f"with work histories the exposure is cumulative, so unit must be a "
                        f"concentration unit times years such as \"mg/m3-years\" (the curve "
                        f"must be in that unit too), got \"{unit}\"", "", "unit") from None
