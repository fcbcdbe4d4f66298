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
    """``"12.3%"``, or ``"-"`` for ``None`` (:func:`percent`)."""
    return percent(v)


def share_text(v: float) -> str:
    """A population share in percent (:func:`percent`, two significant
    figures): ``"0.19%"``, ``"12%"``, ``"99.9%"``, ``"<0.1%"`` below 0.1%
    (a band holding 1 of 4000 homes), ``"0%"`` for none."""
    p = 100 * float(v)
    if p >= 99.5 and p < 100:
        return percent(v, digits=3, floor=0.1, zeros=False)  # 99.9% is not 100%
    return percent(v, digits=2, floor=0.1, zeros=False)


def share_or_dash(v: float | None) -> str:
    """:func:`share_text`, or ``"-"`` for ``None`` (a bound not found)."""
    return "-" if v is None else share_text(v)


def sig(v: float | None) -> str:
    """Four significant digits, or ``"-"`` for ``None``."""
    return "-" if v is None else f"{v:.4g}"


def percent(v: float | None, digits: int = 3, floor: float = 0.001, *,
            zeros: bool = True) -> str:
    """A fraction as a percentage: the one rule of every report, table of
    text and summary.

    ``digits`` significant figures in fixed notation (never an exponent,
    ``"4.3e-05%"``); trailing zeros kept, as they are significant
    (``"0.160%"``); exactly zero as ``"0%"``; a magnitude below ``floor``
    percent as ``"<0.001%"`` (or ``">-0.001%"``), so that neither ``0.0%``
    for a share holding a few people nor a negative zero (``"-0.00%"``) is
    ever shown. ``None`` or a value that is not finite gives ``"-"``.
    ``zeros=False`` drops trailing zeros (``"5%"``, for population shares).
    """
    if v is None or not math.isfinite(float(v)):
        return "-"
    p = 100 * float(v)
    if p == 0:
        return "0%"
    if abs(p) < floor:
        return f"<{floor:g}%" if p > 0 else f">-{floor:g}%"
    rounded = abs(float(f"{p:.{digits}g}"))  # 99.96 -> 100: one decimal fewer
    decimals = max(0, digits - 1 - math.floor(math.log10(rounded)))
    text = f"{p:.{decimals}f}"
    if float(text) == 0:  # rounded away: show the floor rather than a zero
        return f"<{floor:g}%" if p > 0 else f">-{floor:g}%"
    if not zeros and "." in text:
        text = text.rstrip("0").rstrip(".")
    return text + "%"
