"""CSV tables of the results.

Every table is built from the results.json dictionary (``Results.to_dict()``)
plus the study's band table and the per-worker exposures, so the CSV files
and results.json can never disagree. Optional tables (burden, comparisons,
width by source, workers) are written only when the results hold them.
Numbers are written at full precision (``repr`` of the float, which
round-trips exactly); empty cells mean "not applicable". Units are given in
the column headers, e.g. ``lower (ug/m3)``.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import Any, Iterable

import numpy as np

from doseattr.outputs.bands import band_arrays
from doseattr.outputs.records import (
    burden_blocks,
    estimate_of,
    scenario_effects,
    substitution,
    width_by_source,
)

Table = tuple[list[str], list[list[Any]]]


def cell(value: Any) -> str:
    """One CSV cell: full-precision floats, empty for ``None``.

    Non-finite floats never reach results (RULES item 6); an infinite
    upper band limit is written as an empty cell (open-ended).
    """
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):  # includes numpy.float64
        return repr(float(value)) if math.isfinite(value) else ""
    if isinstance(value, int):
        return str(value)
    if isinstance(value, np.generic):
        return cell(value.item())
    return str(value)


def write_csv(path: Path, table: Table) -> Path:
    """Write ``(header, rows)`` to ``path`` (UTF-8, ``\\n`` line ends)."""
    header, rows = table
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        for row in rows:
            writer.writerow([cell(v) for v in row])
    return path


def with_unit(name: str, unit: str | None) -> str:
    return f"{name} ({unit})" if unit else name


def estimate_cells(est: Any) -> list[Any]:
    """``[estimate, lower, upper, mcse]`` of an estimate dict or a number."""
    if isinstance(est, dict):
        return [est.get("estimate"), est.get("lower"), est.get("upper"), est.get("mcse")]
    return [est, None, None, None]


ESTIMATE_COLUMNS = ["estimate", "lower", "upper", "mcse"]


def summary_table(d: dict) -> Table:
    """PAF and every scenario's PIF with their intervals."""
    rows = [["PAF", "", *estimate_cells(d["paf"])]]
    for s in d.get("scenarios", []):
        rows.append(["PIF", s["name"], *estimate_cells(s["pif"])])
    return ["quantity", "scenario", *ESTIMATE_COLUMNS], rows


def scenarios_table(d: dict) -> Table:
    """One row per scenario: its kind, value (with unit where it has one), PIF."""
    unit = d.get("unit")
    rows = []
    for s in d.get("scenarios", []):
        value_unit = "" if s.get("kind") == "scale" else (unit or "")
        rows.append([s["name"], s.get("kind"), s.get("value"), value_unit,
                     *estimate_cells(s["pif"])])
    header = ["name", "kind", "value", "value_unit", "pif", "pif_lower", "pif_upper", "pif_mcse"]
    return header, rows


def categorical_table(d: dict) -> Table:
    """One row per band of the categorical comparison: limits, population
    share, midpoint, conditional mean, and the RR each method assigns."""
    cat, unit = d["categorical"], d.get("unit")
    cuts = list(cat["cutpoints"])
    lowers, uppers = [0.0, *cuts], [*cuts, None]
    methods = cat["methods"]
    header = ["band", with_unit("lower", unit), with_unit("upper", unit), "share",
              with_unit("midpoint", unit), with_unit("band_mean", unit),
              *[f"rr_{m['method']}" for m in methods]]
    rows = []
    for i, share in enumerate(cat["shares"]):
        mid = _item(cat.get("midpoints"), i)
        mean = _item(cat.get("band_means"), i)
        rows.append([i + 1, lowers[i], uppers[i], share, mid, mean,
                     *[_item(m["rr"], i) for m in methods]])
    return header, rows


def categorical_paf_table(d: dict) -> Table:
    """PAF by each categorical method, its difference from the continuous
    PAF, and the continuous PAF itself."""
    cat = d["categorical"]
    rows = [[m["method"], m["paf"], m.get("difference")] for m in cat["methods"]]
    rows.append(["continuous", cat["continuous_paf"], 0.0])
    return ["method", "paf", "difference_from_continuous"], rows


def convergence_table(d: dict) -> Table:
    cat = d["categorical"]
    rows = [[c["bands"], c["paf"], cat["continuous_paf"]] for c in cat.get("convergence", [])]
    return ["bands", "categorical_paf", "continuous_paf"], rows


def curve_fit_table(d: dict, band_table: Any = None) -> Table:
    """The study's bands with assigned dose (and how it was assigned),
    reported RR and CI, and the fitted RR at the assigned dose (1 for the
    reference band)."""
    unit = d.get("unit")
    fitted = d["curve"].get("fitted") or []
    rows_in = d.get("bands")
    if not rows_in:
        bands = band_arrays(band_table)
        keys = ("lower", "upper", "dose", "rr", "ci_lower", "ci_upper")
        rows_in = None if bands is None else [
            {k: _num(bands[k][i]) for k in keys} | {"reference": bool(bands["reference"][i])}
            for i in range(len(bands["rr"]))]
    if not rows_in:
        header = [with_unit("dose", unit), "rr_reported", "rr_fitted"]
        return header, [[f["dose"], f["rr_reported"], f["rr_fitted"]] for f in fitted]
    header = ["band", with_unit("lower", unit), with_unit("upper", unit), with_unit("dose", unit),
              "dose_rule", "rr", "ci_lower", "ci_upper", "reference", "rr_fitted"]
    fitted_iter = iter(fitted)
    rows = []
    for i, b in enumerate(rows_in):
        ref = bool(b.get("reference"))
        fit = None if ref else next(fitted_iter, None)
        rows.append([i + 1, b.get("lower"), b.get("upper"), b.get("dose"), b.get("dose_rule"),
                     b.get("rr"), b.get("ci_lower"), b.get("ci_upper"), ref,
                     1.0 if ref else (fit or {}).get("rr_fitted")])
    return header, rows


def coefficients_table(d: dict) -> Table:
    """Coefficients, standard errors and the covariance matrix by rows."""
    c = d["curve"]
    names = list(c.get("parameter_names") or [f"b{i}" for i in range(len(c["coefficients"]))])
    ses = c.get("standard_errors") or [None] * len(names)
    header = ["parameter", "estimate", "standard_error", *[f"cov_{n}" for n in names]]
    rows = [[n, b, se, *row] for n, b, se, row in zip(names, c["coefficients"], ses,
                                                       c["covariance"])]
    return header, rows


def exposure_fits_table(d: dict) -> Table:
    """Every family fitted (or the one entered), parameters, log-likelihood, AIC."""
    e = d["exposure"]
    fits = e.get("fits") or [{"family": e["family"], "parameters": e["parameters"],
                              "loglik": e.get("loglik"), "aic": e.get("aic")}]
    names: list[str] = []
    for f in fits:
        names += [k for k in f["parameters"] if k not in names]
    header = ["family", "selected", *names, "loglik", "aic"]
    rows = [[f["family"], f["family"] == e["family"], *[f["parameters"].get(n) for n in names],
             f.get("loglik"), f.get("aic")] for f in fits]
    return header, rows


def records_table(records: Iterable[dict], first: str | None = None) -> Table:
    """Flatten a list of (possibly nested) records into columns; nested
    keys are joined with ``_`` (``attributable_lower``)."""
    flat = [_flatten(r) for r in records]
    header: list[str] = []
    for r in flat:
        header += [k for k in r if k not in header]
    if first in header:
        header.remove(first)
        header.insert(0, first)
    return header, [[r.get(k) for k in header] for r in flat]


def burden_table(d: dict) -> Table | None:
    """Attributable cases by stratum and in total (one block per outcome).

    The PAF of a row is written as ``paf_estimate``, ``paf_lower``, ... whether
    the contract holds it as an estimate object or as a number with
    ``paf_interval`` beside it; per-scenario results go to
    :func:`burden_scenarios_table`.
    """
    records = []
    for outcome, burden in burden_blocks(d):
        rows = list(burden["strata"])
        if burden.get("total"):
            rows.append({"stratum": "total", **burden["total"]})
        for r in rows:
            flat = {k: v for k, v in r.items() if k not in ("scenarios", "paf_interval")}
            flat["paf"] = estimate_of(r, "paf")
            records.append(({"outcome": outcome} if outcome else {}) | flat)
    return records_table(records) if records else None


def burden_scenarios_table(d: dict) -> Table | None:
    """One row per outcome, stratum (and total) and scenario: the PIF and the
    cases averted, each with its interval."""
    header = ["outcome", "stratum", "scenario", *[f"pif_{c}" for c in ESTIMATE_COLUMNS],
              *[f"averted_{c}" for c in ESTIMATE_COLUMNS]]
    rows = []
    for outcome, burden in burden_blocks(d):
        records = list(burden["strata"])
        if burden.get("total"):
            records.append({"stratum": "total", **burden["total"]})
        for r in records:
            for s in scenario_effects(r):
                rows.append([outcome, r.get("stratum"), s["name"],
                             *estimate_cells(s["pif"] or {}), *estimate_cells(s["averted"] or {})])
    if not any(r[0] for r in rows):
        header, rows = header[1:], [r[1:] for r in rows]
    return (header, rows) if rows else None


def model_comparison_table(d: dict) -> Table | None:
    """PAF and fit of each model in ``compare_models`` (``model_comparison``)."""
    return _variant_table(d.get("model_comparison"), "model")


def dose_sensitivity_table(d: dict) -> Table | None:
    """PAF and fit under each dose-assignment rule (``dose_sensitivity``),
    with the assigned doses ``dose_1`` ... in the unit of the analysis."""
    return _variant_table(d.get("dose_sensitivity"), "dose_rule", unit=d.get("unit"))


def _variant_table(variants: Any, label: str, unit: str | None = None) -> Table | None:
    if not variants:
        return None
    n_coef = max(len(v.get("coefficients") or []) for v in variants)
    n_dose = max(len(v.get("doses") or []) for v in variants) if unit is not None else 0
    header = [label, "model", *[f"coefficient_{i + 1}" for i in range(n_coef)],
              *[f"standard_error_{i + 1}" for i in range(n_coef)],
              *[with_unit(f"dose_{i + 1}", unit) for i in range(n_dose)],
              "q", "df", "p_value", "nonlinearity_p", "paf", "problem"]
    rows = []
    for v in variants:
        coef = _padded(v.get("coefficients"), n_coef)
        ses = _padded(v.get("standard_errors"), n_coef)
        doses = _padded(v.get("doses"), n_dose)
        rows.append([v.get("label"), v.get("model"), *coef, *ses, *doses, v.get("q"),
                     v.get("df"), v.get("p_value"), v.get("nonlinearity_p"), v.get("paf"),
                     v.get("problem")])
    return header, rows


def exposure_comparison_table(d: dict) -> Table | None:
    """PAF under each fitted family and the empirical distribution
    (``exposure_comparison``)."""
    rows_in = d.get("exposure_comparison") or []
    if not rows_in:
        return None
    names: list[str] = []
    for r in rows_in:
        names += [k for k in (r.get("parameters") or {}) if k not in names]
    header = ["family", *names, "aic", "paf", "problem"]
    return header, [[r.get("family"), *[(r.get("parameters") or {}).get(n) for n in names],
                     r.get("aic"), r.get("paf"), r.get("problem")] for r in rows_in]


def substitution_table(d: dict) -> Table | None:
    """Non-detects replaced by a fraction of their limit (comparison only):
    fraction, fitted parameters, PAF, difference from the analysis's PAF."""
    rows_in = substitution(d)
    if not rows_in:
        return None
    names: list[str] = []
    for r in rows_in:
        names += [k for k in (r.get("parameters") or {}) if k not in names]
    header = ["fraction", *names, "paf", "difference"]
    return header, [[r.get("fraction"), *[(r.get("parameters") or {}).get(n) for n in names],
                     r.get("paf"), r.get("difference")] for r in rows_in]


def width_by_source_table(d: dict) -> Table | None:
    """The PAF interval with one source of uncertainty at a time."""
    rows_in = width_by_source(d)
    if not rows_in:
        return None
    return (["source", "lower", "upper", "width"],
            [[r.get("source"), r.get("lower"), r.get("upper"), r.get("width")] for r in rows_in])


def workers_table(workers: Any) -> Table | None:
    """One row per worker: worker, cumulative, duration_years, mean_intensity.

    ``workers`` is the core ``WorkerExposure`` (``Results.workers``) or the
    ``workers`` list of the results dictionary.
    """
    if workers is None or (isinstance(workers, (list, tuple)) and not workers):
        return None
    if hasattr(workers, "cumulative") and hasattr(workers, "duration_years"):
        records = [{"worker": str(w), "cumulative": _plain(c), "duration_years": _plain(t),
                    "mean_intensity": _plain(m)}
                   for w, c, t, m in zip(workers.worker, workers.cumulative,
                                         workers.duration_years, workers.mean_intensity)]
    else:
        records = list(workers)
    return records_table(records, first="worker")


def all_tables(d: dict, band_table: Any = None, workers: Any = None) -> dict[str, Table]:
    """Every CSV file name with its table; optional ones only when present."""
    tables = {
        "summary.csv": summary_table(d),
        "scenarios.csv": scenarios_table(d),
        "curve_fit.csv": curve_fit_table(d, band_table),
        "curve_coefficients.csv": coefficients_table(d),
        "exposure_fits.csv": exposure_fits_table(d),
    }
    if d.get("categorical"):
        tables["categorical.csv"] = categorical_table(d)
        tables["categorical_paf.csv"] = categorical_paf_table(d)
        tables["convergence.csv"] = convergence_table(d)
    optional = {
        "burden.csv": burden_table(d),
        "burden_scenarios.csv": burden_scenarios_table(d),
        "model_comparison.csv": model_comparison_table(d),
        "dose_sensitivity.csv": dose_sensitivity_table(d),
        "exposure_comparison.csv": exposure_comparison_table(d),
        "substitution.csv": substitution_table(d),
        "width_by_source.csv": width_by_source_table(d),
        "workers.csv": workers_table(workers),
    }
    tables.update({name: t for name, t in optional.items() if t is not None})
    return tables


def _plain(v: Any) -> Any:
    """numpy scalars to Python values."""
    return v.item() if isinstance(v, np.generic) else v


def _padded(values: Any, n: int) -> list[Any]:
    values = list(values or [])[:n]
    return values + [None] * (n - len(values))


def _item(seq: Any, i: int) -> Any:
    return None if seq is None or i >= len(seq) else seq[i]


def _num(v: float) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def _flatten(record: dict, prefix: str = "") -> dict:
    out: dict = {}
    for k, v in record.items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            out |= _flatten(v, f"{key}_")
        else:
            out[key] = v
    return out
