"""CSV tables of the results.

Every table is built from the results.json dictionary (the contract in
``API.md``) plus the study's band table, so the CSV files and results.json
can never disagree. Numbers are written at full precision (``repr`` of the
float, which round-trips exactly); empty cells mean "not applicable". Units
are given in the column headers, e.g. ``lower (ug/m3)``.
"""

from __future__ import annotations

import csv
import dataclasses
import math
from pathlib import Path
from typing import Any, Iterable

import numpy as np

from doseattr.outputs.bands import band_arrays

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
        rows_in = None if bands is None else [
            {k: _num(bands[k][i]) for k in ("lower", "upper", "dose", "rr", "ci_lower",
                                            "ci_upper")} | {"reference": bool(bands["reference"][i])}
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
    """Attributable cases by stratum and in total (one block per outcome)."""
    blocks = [(o.get("name"), o.get("burden", o)) for o in d.get("outcomes") or []]
    if not blocks and d.get("burden"):
        blocks = [(None, d["burden"])]
    records = []
    for outcome, burden in blocks:
        if not burden or "strata" not in burden:
            continue
        for s in burden["strata"]:
            records.append(({"outcome": outcome} if outcome else {}) | s)
        total = burden.get("total")
        if total:
            records.append(({"outcome": outcome} if outcome else {}) | {"stratum": "total"} | total)
    return records_table(records) if records else None


def find_workers(results: Any, d: dict) -> Any:
    """Per-worker exposures from work histories, wherever the results keep
    them (``results.workers``, ``results.extra["workers"]``, or the
    ``workers`` list in the results dictionary); ``None`` without histories."""
    for found in (getattr(results, "workers", None),
                  (getattr(results, "extra", None) or {}).get("workers"), d.get("workers")):
        if found is not None:
            return found
    return None


def workers_table(workers: Any) -> Table | None:
    """One row per worker: worker, cumulative, duration_years, mean_intensity."""
    if workers is None or (isinstance(workers, (list, tuple, dict)) and not workers):
        return None
    if hasattr(workers, "cumulative") and hasattr(workers, "duration_years"):
        # a per-worker result object (core.exposure.histories.WorkerExposure)
        workers = {"worker": list(getattr(workers, "workers")),
                   "cumulative": workers.cumulative,
                   "duration_years": workers.duration_years,
                   "mean_intensity": workers.mean_intensity}
    elif dataclasses.is_dataclass(workers) and not isinstance(workers, type):
        workers = {f.name: getattr(workers, f.name) for f in dataclasses.fields(workers)}
    if isinstance(workers, dict):  # column arrays
        cols = [c for c in workers if np.ndim(workers[c]) == 1]
        n = len(workers[cols[0]])
        return cols, [[_plain(workers[c][i]) for c in cols] for i in range(n)]
    records = [w if isinstance(w, dict) else (
        {f.name: getattr(w, f.name) for f in dataclasses.fields(w)}
        if dataclasses.is_dataclass(w) else vars(w)) for w in workers]
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
    burden = burden_table(d)
    if burden is not None:
        tables["burden.csv"] = burden
    w = workers_table(workers)
    if w is not None:
        tables["workers.csv"] = w
    return tables


def _plain(v: Any) -> Any:
    """numpy scalars to Python values."""
    return v.item() if isinstance(v, np.generic) else v


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
