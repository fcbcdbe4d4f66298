"""Statistics of exposure against an occupational exposure limit (OEL).

:func:`limit_statistics` gives the exceedance fraction, the 95th
percentile and the arithmetic mean with their confidence limits, and the
EN 689 verdict. Exact methods (:mod:`.lognormal_exact`) are used for a
lognormal with no non-detects and unit weights; otherwise profile
likelihood (:mod:`.profile`). The numbers support, and do not replace, the
judgement of a licensed professional under local regulations.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from doseattr.core.exposure.base import Family
from doseattr.core.exposure.fit import Measurements
from doseattr.core.exposure.registry import get_family
from doseattr.core.hygiene.bounds import Bounded
from doseattr.core.hygiene.en689 import CAVEAT, Decision, en689_decision
from doseattr.core.hygiene.lognormal_exact import (
    LAND_SOURCE,
    NCT_SOURCE,
    exceedance_exact,
    mean_land,
    percentile_exact,
)
from doseattr.core.hygiene.profile import (
    PROFILE_SOURCE,
    exceedance_target,
    mean_target,
    percentile_target,
    profile_bounds,
)
from doseattr.errors import ModelError

EN689_SOURCE = "EN 689:2018 (CEN), decision rules from memory"


@dataclass(frozen=True)
class LimitStatistics:
    """Exposure statistics against a limit.

    ``exceedance_tolerated`` is the fraction above the limit taken as
    acceptable (0.05 by default); ``overexposure`` is true when the
    one-sided upper limit of the exceedance fraction is above it.
    ``exact`` says whether the exact lognormal methods were used (else
    profile likelihood).
    """

    limit: float
    confidence: float
    level: float
    exceedance_tolerated: float
    n: int
    n_censored: int
    family: str
    exceedance: Bounded
    p95: Bounded
    mean: Bounded
    decision: Decision
    overexposure: bool
    exact: bool
    methods: tuple[str, ...]
    notes: tuple[str, ...] = ()


def _validate(data: Measurements, limit: float, confidence: float, level: float,
              exceedance: float) -> None:
    if not (np.isfinite(limit) and limit > 0):
        raise ModelError(f"the limit must be a positive number, got {limit}; give the OEL in "
                         "the data's unit")
    if not 0.5 < confidence < 1:
        raise ModelError(f"confidence must lie in (0.5, 1), got {confidence}; EN 689 uses 0.70")
    if not 0 < level < 1:
        raise ModelError(f"level must lie in (0, 1), got {level}; give e.g. 0.95")
    if not 0 < exceedance < 1:
        raise ModelError(f"the tolerated exceedance must lie in (0, 1), got {exceedance}; "
                         "give e.g. 0.05")
    if data.x.size < 3:
        raise ModelError(f"at least 3 measurements are needed, got {data.x.size}; take more "
                         "samples")
    if data.detected.sum() < 3:
        raise ModelError(f"only {int(data.detected.sum())} detected values: the statistics need "
                         "3; for the EN 689 screening test alone use en689_decision")


def is_exact_case(family: Family, data: Measurements) -> bool:
    """Lognormal, no non-detects, unit weights: the exact methods apply."""
    return (family.name == "lognormal" and data.n_censored == 0
            and bool(np.allclose(data.w, 1.0)))


def _bounds(family: Family, data: Measurements, limit: float, confidence: float,
            level: float) -> tuple[Bounded, Bounded, Bounded, bool]:
    if is_exact_case(family, data):
        kw = {"confidence": confidence, "level": level}
        return (exceedance_exact(data.x, limit, **kw), percentile_exact(data.x, 0.95, **kw),
                mean_land(data.x, **kw), True)
    targets = (exceedance_target(limit), percentile_target(0.95), mean_target())
    exc, p95, mean = (profile_bounds(family, data, t, confidence=confidence, level=level)
                      for t in targets)
    return exc, p95, mean, False


def _data_notes(data: Measurements) -> tuple[str, ...]:
    notes = []
    if not np.allclose(data.w, 1.0):
        notes.append("weights are normalised to sum to the number of values, so the limits "
                     f"treat the data as {data.x.size} measurements")
    if 2 * data.n_censored > data.x.size:
        notes.append(f"{data.n_censored} of {data.x.size} values are non-detects: the limits "
                     "rest mostly on the assumed distribution")
    return tuple(notes)


def limit_statistics(family: str | Family, data: Measurements, limit: float, *,
                     confidence: float = 0.70, level: float = 0.95,
                     exceedance: float = 0.05) -> LimitStatistics:
    """Exceedance fraction, 95th percentile and mean with limits, and the
    EN 689 decision.

    Parameters
    ----------
    family
        ``"lognormal"``, ``"gamma"``, ``"weibull"`` or a Family.
    data
        Prepared measurements (:func:`doseattr.core.exposure.fit.prepare`);
        weights are frequency weights.
    limit
        The OEL in the data's unit.
    confidence
        Of the one-sided upper limits (and of the EN 689 UTL), in (0.5, 1).
    level
        Of the two-sided intervals, in (0, 1).
    exceedance
        Tolerated exceedance fraction for the overexposure flag.
    """
    _validate(data, limit, confidence, level, exceedance)
    fam = get_family(family)
    exc, p95, mean, exact = _bounds(fam, data, limit, confidence, level)
    decision = en689_decision(data, limit, p95.ucl, confidence=confidence)
    methods = (NCT_SOURCE, LAND_SOURCE) if exact else (PROFILE_SOURCE,)
    notes = tuple(f"{name}: {b.note}" for name, b in
                  (("exceedance", exc), ("95th percentile", p95), ("mean", mean)) if b.note)
    notes += _data_notes(data)
    over = exc.ucl is None or exc.ucl > exceedance
    if exc.ucl is None:
        notes += ("the upper limit of the exceedance fraction could not be computed: "
                  "overexposure is flagged as a precaution",)
    return LimitStatistics(
        limit=limit, confidence=confidence, level=level, exceedance_tolerated=exceedance,
        n=int(data.x.size), n_censored=data.n_censored, family=fam.name, exceedance=exc,
        p95=p95, mean=mean, decision=decision, overexposure=bool(over), exact=exact,
        methods=methods + (EN689_SOURCE,), notes=notes + (CAVEAT,))
