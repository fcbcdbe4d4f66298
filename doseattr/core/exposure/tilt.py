"""Shared pieces of ``Family.tilted_log_breaks``.

When RR(x) grows without bound, the mass of ``RR(x) f(x)`` sits to the
right of the mass of ``f``. Each family finds the breakpoints of a
"tilted" distribution whose density is proportional to the growth bound
times ``f`` and returns them merged with its own breakpoints, so that the
result covers both the body of ``f`` (where RR may be near 1) and the
tilted body. The merged array has ``2K`` columns for every draw (a draw
without tilt repeats its breakpoints; the repeated points give empty
panels).
"""

from __future__ import annotations

from typing import cast

import numpy as np
from numpy.typing import NDArray

from doseattr.core.curves.base import Growth
from doseattr.core.exposure.base import FloatArray
from doseattr.errors import DivergenceError, ModelError

#: What to do about a diverging expectation, for error messages.
REMEDY = ("hold the curve flat beyond the highest dose (set a maximum dose) "
          "or use another exposure family")


def positive_rate(growth: Growth) -> FloatArray:
    """The growth rate with zero and negative values set to 0 (no tilt),
    shaped ``(D, 1)`` or ``(1,)`` to broadcast against breakpoints."""
    if growth.kind not in ("power", "exp"):
        raise ModelError(f"unknown growth kind {growth.kind!r}; expected 'bounded', 'power' or 'exp'")
    rate = np.asarray(growth.rate, dtype=float)
    return cast(FloatArray, np.maximum(rate, 0.0)[..., None])


def merge(own: FloatArray, tilted: FloatArray) -> FloatArray:
    """Own breakpoints plus the tilted ones that lie outside their range.

    Inside the range of the family's own breakpoints the panels are already
    narrow enough for the tilted body (it has the same width on the log
    scale, only shifted), so only the tilted points beyond either end are
    added. A column is kept when any draw needs it; draws that do not
    repeat an end point there (an empty panel). The result stays
    rectangular and sorted.
    """
    own, tilted = np.broadcast_arrays(own, tilted)
    lo, hi = own[..., :1], own[..., -1:]
    outside = (tilted < lo) | (tilted > hi)
    keep = np.any(outside.reshape(-1, outside.shape[-1]), axis=0)
    extra = np.where(outside, tilted, hi)[..., keep]
    return np.sort(np.concatenate([own, extra], axis=-1), axis=-1)


def refuse(bad: NDArray[np.bool_], what: str) -> None:
    """Raise DivergenceError if any draw in ``bad`` diverges.

    ``what`` says what diverges; the message adds how many draws and the
    remedy.
    """
    bad = np.asarray(bad, dtype=bool)
    if not np.any(bad):
        return
    count = f" (in {int(bad.sum())} of {bad.size} draws)" if bad.size > 1 else ""
    raise DivergenceError(f"{what}{count}; {REMEDY}")
