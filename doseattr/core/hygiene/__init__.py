"""Exposure against an occupational exposure limit (OEL).

Exceedance fraction, 95th percentile and arithmetic mean with confidence
limits (:func:`limit_statistics`): exact lognormal methods
(:mod:`.lognormal_exact`: non-central t, Land's interval) when nothing is
censored and weights are equal, profile likelihood (:mod:`.profile`)
otherwise; the EN 689:2018 verdict (:mod:`.en689`, rules from memory).
Results support, and do not replace, a licensed professional's judgement
under local regulations.
"""

from doseattr.core.hygiene.bounds import Bounded
from doseattr.core.hygiene.en689 import Decision, en689_decision
from doseattr.core.hygiene.limits import LimitStatistics, limit_statistics
from doseattr.core.hygiene.lognormal_exact import exceedance_exact, mean_land, percentile_exact
from doseattr.core.hygiene.profile import (
    exceedance_target,
    mean_target,
    percentile_target,
    profile_bounds,
)

__all__ = [
    "Bounded",
    "Decision",
    "LimitStatistics",
    "en689_decision",
    "exceedance_exact",
    "exceedance_target",
    "limit_statistics",
    "mean_land",
    "mean_target",
    "percentile_exact",
    "percentile_target",
    "profile_bounds",
]
