"""Exposure families by name."""

from __future__ import annotations

from doseattr.core.exposure.base import Family
from doseattr.core.exposure.gamma import Gamma
from doseattr.core.exposure.lognormal import LogNormal
from doseattr.core.exposure.weibull import Weibull
from doseattr.errors import ModelError

FAMILIES: dict[str, Family] = {"lognormal": LogNormal(), "gamma": Gamma(), "weibull": Weibull()}


def get_family(family: str | Family) -> Family:
    """The family called ``family`` (a Family instance is returned as is)."""
    if isinstance(family, Family):
        return family
    try:
        return FAMILIES[family]
    except (KeyError, TypeError):
        raise ModelError(f"unknown exposure family {family!r}; choose one of: "
                         + ", ".join(FAMILIES)) from None
