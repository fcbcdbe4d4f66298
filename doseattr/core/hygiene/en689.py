"""The compliance decision of EN 689:2018 (CEN), rules from memory.

EN 689:2018, "Workplace exposure - Measurement of exposure by inhalation
to chemical agents - Strategy for testing compliance with occupational
exposure limit values" (CEN 2018), as recalled here (from memory, not
checked against the text):

* fewer than 3 measurements: no test is possible;
* 3, 4 or 5 measurements (screening test): any result above the limit
  means the exposure does not comply; it complies when every result is
  below 0.1, 0.15 or 0.2 times the limit respectively; otherwise more
  measurements are needed;
* 6 or more (statistical test): it complies when the upper confidence
  limit (at 70% by default) of the 95th percentile is below the limit,
  and does not comply otherwise (the test itself weighs single results
  above the limit).

A non-detect counts as below a threshold only when its detection limit is
below it; a non-detect is never a result above the limit.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from doseattr.core.exposure.fit import Measurements
from doseattr.errors import ModelError

COMPLIES = "complies"
DOES_NOT_COMPLY = "does not comply"
NO_DECISION = "no decision: more samples needed"
#: Screening thresholds, as fractions of the limit, by number of results.
SCREENING = {3: 0.10, 4: 0.15, 5: 0.20}
CAVEAT = ("This statement follows EN 689:2018 as recalled from memory; it does not replace "
          "the text of the standard, local regulations or the judgement of a licensed "
          "occupational hygienist.")


@dataclass(frozen=True)
class Decision:
    """A compliance verdict with the rule that gave it.

    ``verdict`` is one of ``"complies"``, ``"does not comply"``,
    ``"no decision: more samples needed"``; ``test`` is ``"screening"`` or
    ``"statistical"``; ``rule`` one sentence with the numbers used;
    ``numbers`` the quantities compared.
    """

    verdict: str
    test: str
    rule: str
    numbers: dict[str, float] = field(default_factory=dict)
    from_memory: bool = True
    caveat: str = CAVEAT


def _above_limit(data: Measurements, limit: float, test: str) -> Decision | None:
    over = data.detected & (data.x > limit)
    if not over.any():
        return None
    top = float(data.x[over].max())
    return Decision(DOES_NOT_COMPLY, test,
                    f"{int(over.sum())} of {data.x.size} results exceed the limit {limit:g} "
                    f"(largest {top:g}); any result above the limit means non-compliance",
                    {"limit": limit, "largest_result": top, "n": float(data.x.size)})


def _screening(data: Measurements, limit: float) -> Decision:
    n = data.x.size
    fraction = SCREENING[n]
    threshold = fraction * limit
    top = float(data.x.max())
    numbers = {"limit": limit, "threshold": threshold, "largest_value": top, "n": float(n)}
    if np.all(data.x < threshold):
        return Decision(COMPLIES, "screening",
                        f"all {n} results (detection limits included) are below {fraction:g} x "
                        f"the limit = {threshold:g} (largest {top:g})", numbers)
    return Decision(NO_DECISION, "screening",
                    f"with {n} results all must be below {fraction:g} x the limit = "
                    f"{threshold:g}, but the largest value (result or detection limit) is "
                    f"{top:g}: take more samples (6 or more allow the statistical test)", numbers)


def _statistical(n: int, limit: float, utl: float | None, confidence: float) -> Decision:
    shown = f"{100 * confidence:g}%"
    if utl is None or not np.isfinite(utl):
        return Decision(DOES_NOT_COMPLY, "statistical",
                        f"the {shown} upper confidence limit of the 95th percentile could not be "
                        f"bounded from {n} results, so it is not shown to be below the limit "
                        f"{limit:g}", {"limit": limit, "n": float(n)})
    numbers = {"limit": limit, "utl_p95": float(utl), "confidence": confidence, "n": float(n)}
    if utl < limit:
        return Decision(COMPLIES, "statistical",
                        f"the {shown} upper confidence limit of the 95th percentile, {utl:.4g}, "
                        f"is below the limit {limit:g}", numbers)
    return Decision(DOES_NOT_COMPLY, "statistical",
                    f"the {shown} upper confidence limit of the 95th percentile, {utl:.4g}, is "
                    f"not below the limit {limit:g}", numbers)


def en689_decision(data: Measurements, limit: float, utl_p95: float | None = None, *,
                   confidence: float = 0.70) -> Decision:
    """The EN 689:2018 verdict (module docstring; from memory).

    Parameters
    ----------
    data
        Measurements (non-detects carry their detection limit). ``prepare``
        asks for 3 detected values; a screening set with more non-detects
        may be given as ``Measurements(x, detected, w)`` directly.
    limit
        The occupational exposure limit, in the data's unit.
    utl_p95
        Upper confidence limit of the 95th percentile at ``confidence``;
        needed for 6 or more results (``None`` there reads as unbounded).
    confidence
        Confidence of ``utl_p95`` (EN 689 uses 0.70), for the text.
    """
    n = data.x.size
    if n < 3:
        raise ModelError(f"EN 689 needs at least 3 measurements, got {n}; take more samples")
    if not (np.isfinite(limit) and limit > 0):
        raise ModelError(f"the limit must be a positive number, got {limit}")
    if n <= 5:
        over = _above_limit(data, limit, "screening")
        return over if over is not None else _screening(data, limit)
    return _statistical(n, limit, utl_p95, confidence)
