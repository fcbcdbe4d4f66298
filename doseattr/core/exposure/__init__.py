"""Exposure distributions: families, fits to measurements, summaries, data helpers.

Families (one per module): :class:`LogNormal`, :class:`Gamma`, :class:`Weibull`,
by name through :data:`FAMILIES` / :func:`get_family` (names: :func:`family_names`;
parameters in the exposure's unit: :func:`dose_parameters`). Fits:
:func:`fit_measurements`, :func:`fit_best` (weighted, left-censored maximum
likelihood); from summaries:
:func:`from_parameters`, :func:`from_gm_gsd`, :func:`from_mean_sd`,
:func:`from_percentiles`, :func:`fit_bins`. Data helpers: non-detects, goodness of
fit, empirical distributions, the unexposed share, work histories and units.
"""

from doseattr.core.exposure.base import Exposure, ExposureFit, Family
from doseattr.core.exposure.empirical import EmpiricalExposure, empirical
from doseattr.core.exposure.fit import fit_best, fit_measurements
from doseattr.core.exposure.gamma import Gamma
from doseattr.core.exposure.gof import goodness_of_fit, qq_points
from doseattr.core.exposure.histories import WorkerExposure, cumulative_exposure, twa_8h
from doseattr.core.exposure.lognormal import LogNormal
from doseattr.core.exposure.nondetects import ros_plotting_positions, substitute_nondetects
from doseattr.core.exposure.registry import FAMILIES, dose_parameters, family_names, get_family
from doseattr.core.exposure.summary import (
    fit_bins,
    from_gm_gsd,
    from_mean_sd,
    from_parameters,
    from_percentiles,
)
from doseattr.core.exposure.unexposed import estimate_unexposed, unexposed_from_count
from doseattr.core.exposure.weibull import Weibull

__all__ = [
    "FAMILIES",
    "EmpiricalExposure",
    "Exposure",
    "ExposureFit",
    "Family",
    "Gamma",
    "LogNormal",
    "Weibull",
    "WorkerExposure",
    "cumulative_exposure",
    "dose_parameters",
    "empirical",
    "estimate_unexposed",
    "family_names",
    "fit_best",
    "fit_bins",
    "fit_measurements",
    "from_gm_gsd",
    "from_mean_sd",
    "from_parameters",
    "from_percentiles",
    "get_family",
    "goodness_of_fit",
    "qq_points",
    "ros_plotting_positions",
    "substitute_nondetects",
    "twa_8h",
    "unexposed_from_count",
]
