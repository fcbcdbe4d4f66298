"""Plain JSON numbers from numpy values, refusing what JSON cannot hold.

Every number of ``results.json`` passes through :func:`num` (or the list and
matrix forms); a NaN or infinity reaching it is a bug, except where "no
number" is the meaning (``open_ok``: the open upper limit of a band, the
empty CI of a reference band).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np


def scalar(value: Any) -> float:
    """The first element of ``value`` as a float."""
    return float(np.asarray(value, dtype=float).reshape(-1)[0])


def num(value: Any, *, open_ok: bool = False) -> float | None:
    """A plain float, or ``None`` for a missing value.

    Raises
    ------
    ValueError
        For a non-finite value, unless ``open_ok`` (then ``None``).
    """
    if value is None:
        return None
    v = float(value)
    if not math.isfinite(v):
        if open_ok:
            return None
        raise ValueError(f"non-finite number {v} in results")
    return v


def nums(values: Any) -> list[float | None]:
    """:func:`num` of every element, flattened."""
    return [num(v) for v in np.asarray(values, dtype=float).reshape(-1)]


def matrix(m: Any) -> list[list[float | None]]:
    """A 2-D array as a list of rows of :func:`num`."""
    a = np.atleast_2d(np.asarray(m, dtype=float))
    return [nums(row) for row in a]


def params(values: Mapping[str, Any]) -> dict[str, float | None]:
    """``{name: num(value)}``."""
    return {str(k): num(v) for k, v in values.items()}


def json_safe(obj: Any) -> Any:
    """Return ``obj`` with numpy scalars made plain; assert nothing
    non-finite and nothing of a type JSON cannot hold remains."""
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        assert math.isfinite(v), f"non-finite number {v} in results"
        return v
    assert obj is None or isinstance(obj, str), f"not JSON-safe: {type(obj).__name__}"
    return obj


def pct(v: float | None) -> str:
    """``"12.34%"``, or ``"-"`` for ``None``."""
    return "-" if v is None else f"{100 * v:.2f}%"


def share_text(v: float) -> str:
    """A population share in percent with two significant figures, never in
    exponent form (``"0.19%"``, ``"12%"``, ``"100%"``)."""
    p = 100 * float(v)
    if p >= 99.5:
        return f"{p:.3g}%"  # 99.9% is not 100%
    if p >= 10:
        return f"{p:.0f}%"
    return f"{p:.2g}%" if p >= 1e-4 else f"{p:.1e}%"


def sig(v: float | None) -> str:
    """Four significant digits, or ``"-"`` for ``None``."""
    return "-" if v is None else f"{v:.4g}"
