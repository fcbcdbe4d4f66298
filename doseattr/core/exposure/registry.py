"""Exposure families by name."""

from __future__ import annotations

from doseattr.core.exposure.base import Family
from doseattr.core.exposure.gamma import Gamma
from doseattr.core.exposure.lognormal import LogNormal
from doseattr.core.exposure.weibull import Weibull
from doseattr.errors import ModelError

FAMILIES: dict[str, Family] = {"lognormal": LogNormal(), "gamma": Gamma(), "weibull": Weibull()}


def family_names() -> tuple[str, ...]:
    """Names of the registered exposure families, in registration order
    (the choices an input may name, and the families ``fit_best`` tries)."""
    return tuple(FAMILIES)


def dose_parameters(family: str | Family) -> tuple[str, ...]:
    """Public parameters of ``family`` in the exposure's unit (they scale
    with a change of unit; the others are dimensionless)."""
    return get_family(family).dose_params


#: Summary statistics an exposure may be given by that are in its unit.
SUMMARY_STATISTICS_IN_UNIT = ("mean", "sd")


def unit_parameters() -> frozenset[str]:
    """Every parameter name of a registered family, and every summary
    statistic, that is in the exposure's unit (what a change of unit
    multiplies, and what a report prints with the unit)."""
    names = {p for fam in FAMILIES.values() for p in fam.dose_params}
    return frozenset(names | set(SUMMARY_STATISTICS_IN_UNIT))


def lower_bound(parameter: str) -> float:
    """The open lower bound of a parameter or summary statistic: the one
    every registered family that has it declares (0 for the mean and SD)."""
    lows = {fam.bounds[parameter][0] for fam in FAMILIES.values() if parameter in fam.bounds}
    if len(lows) > 1:
        raise ModelError(f"families disagree on the lower bound of {parameter!r}: {sorted(lows)}")
    return lows.pop() if lows else 0.0


def get_family(family: str | Family) -> Family:
    """The family called ``family`` (a Family instance is returned as is)."""
    if isinstance(family, Family):
        return family
    try:
        return FAMILIES[family]
    except (KeyError, TypeError):
        raise ModelError(f"unknown exposure family {family!r}; choose one of: "
                         + ", ".join(FAMILIES)) from None
