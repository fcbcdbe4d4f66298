"""Read the study's band table into plain arrays for plots and tables.

The analysis layer keeps the study table as ``Results.band_table``; this
module accepts it as an object with one array-like attribute per column, a
mapping of columns, a pandas DataFrame, or a sequence of row objects or
mappings, and returns one float array per column (``nan`` where empty) and
a boolean ``reference`` array.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

COLUMNS = ("lower", "upper", "dose", "rr", "ci_lower", "ci_upper")
REFERENCE_NAMES = ("reference", "is_reference", "ref")


def band_arrays(table: Any) -> dict[str, np.ndarray] | None:
    """Columns of ``table`` as arrays, or ``None`` when there is no table."""
    if table is None:
        return None
    columns = _as_columns(table)
    if columns is None:
        return None
    n = len(columns["rr"])
    out = {name: _floats(columns.get(name), n) for name in COLUMNS}
    ref = next((columns[k] for k in REFERENCE_NAMES if columns.get(k) is not None), None)
    out["reference"] = (np.asarray(ref, bool) if ref is not None
                        else np.isclose(out["rr"], 1.0) & ~np.isfinite(out["ci_lower"]))
    out["upper"] = np.where(np.isnan(out["upper"]), np.inf, out["upper"])
    return out


def _as_columns(table: Any) -> dict[str, Any] | None:
    if hasattr(table, "to_dict") and hasattr(table, "columns"):  # pandas DataFrame
        return {c: table[c].to_numpy() for c in table.columns}
    if isinstance(table, Mapping):
        return dict(table) if "rr" in table else None
    if hasattr(table, "rr") and not isinstance(getattr(table, "rr"), (int, float)):
        names = COLUMNS + REFERENCE_NAMES
        return {k: getattr(table, k) for k in names if hasattr(table, k)}
    rows = list(table)
    if not rows:
        return None
    get = (lambda r, k: r.get(k)) if isinstance(rows[0], Mapping) else (
        lambda r, k: getattr(r, k, None))
    keys = [k for k in COLUMNS + REFERENCE_NAMES if get(rows[0], k) is not None or k in COLUMNS]
    return {k: [get(r, k) for r in rows] for k in keys}


def _floats(values: Any, n: int) -> np.ndarray:
    if values is None:
        return np.full(n, np.nan)
    return np.array([np.nan if v is None or v == "" else float(v) for v in values], float)
