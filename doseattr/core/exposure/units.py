r"""Units of concentration and of cumulative exposure, and conversions.

A small fixed table rather than a units library: the tool needs a dozen
units in three groups (mass per volume, volume mixing ratio, activity per
volume) plus "x years" for cumulative exposure, and one gas-law
conversion. A general library (e.g. pint) would add a dependency whose
registry, parsing and arithmetic are far larger than this table, and it
would still not know the trade's convention for ppm <-> mg/m3. So the
table is written out here and every conversion is checked in the tests.

Gas conversion at 25 C and 1 atm (common practice in occupational
hygiene, e.g. OSHA and NIOSH tables; from memory):

.. math::

    \mathrm{mg/m^3} = \mathrm{ppm} \times \frac{MW}{24.45},

24.45 L/mol being the molar volume of an ideal gas at 298.15 K and
101.325 kPa, rounded.
"""

from __future__ import annotations

import re

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.exposure.base import FloatArray
from doseattr.errors import ModelError

MOLAR_VOLUME_L = 24.45

#: canonical unit -> (group, factor to the group's base unit)
CONCENTRATION_UNITS: dict[str, tuple[str, float]] = {
    "mg/m3": ("mass", 1.0),
    "ug/m3": ("mass", 1e-3),
    "ng/m3": ("mass", 1e-6),
    "ppm": ("volume", 1.0),
    "ppb": ("volume", 1e-3),
    "Bq/m3": ("activity", 1.0),
    "kBq/m3": ("activity", 1e3),
    "pCi/L": ("activity", 37.0),  # 1 Ci = 3.7e10 Bq (definition); 1 L = 1e-3 m3
}

_ALIASES = {k.lower(): k for k in CONCENTRATION_UNITS} | {"µg/m3": "ug/m3", "μg/m3": "ug/m3", "mcg/m3": "ug/m3"}
_YEARS = ("years", "year", "yrs", "yr", "y")
_CUMULATIVE = re.compile(r"^(?P<conc>.+?)\s*(?:-|\*|x|×|·|\s)\s*(?:" + "|".join(_YEARS) + r")$")


def concentration_unit(text: str) -> str:
    """Canonical name of a concentration unit (``"ug/m³"`` -> ``"ug/m3"``)."""
    key = str(text).strip().replace("³", "3").replace("^3", "3").replace(" ", "").lower()
    try:
        return _ALIASES[key]
    except KeyError:
        raise ModelError(f"unknown concentration unit {text!r}; known: {', '.join(CONCENTRATION_UNITS)}") from None


def cumulative_unit(text: str) -> str:
    """Canonical name of a cumulative unit, ``"<concentration>-years"``."""
    match = _CUMULATIVE.match(str(text).strip().lower())
    if not match:
        raise ModelError(f"unknown cumulative exposure unit {text!r}; write it as a concentration unit "
                         "followed by '-years', e.g. 'mg/m3-years' or 'ppm-years'")
    return f"{concentration_unit(match['conc'])}-years"


def conversion_factor(from_unit: str, to_unit: str, *, molecular_weight: float | None = None) -> float:
    """Factor ``f`` with ``value_in_to = f * value_in_from`` (concentrations).

    ppm (or ppb) <-> mass per volume needs ``molecular_weight`` in g/mol.
    """
    (g1, f1), (g2, f2) = (CONCENTRATION_UNITS[concentration_unit(u)] for u in (from_unit, to_unit))
    if g1 == g2:
        return f1 / f2
    if {g1, g2} != {"mass", "volume"}:
        raise ModelError(f"cannot convert {from_unit!r} to {to_unit!r}: they measure different things")
    if molecular_weight is None or not (np.isfinite(molecular_weight) and molecular_weight > 0):
        raise ModelError(f"converting {from_unit!r} to {to_unit!r} needs the molecular weight (g/mol) of the agent")
    ppm_to_mg = molecular_weight / MOLAR_VOLUME_L
    return f1 * (ppm_to_mg if g1 == "volume" else 1 / ppm_to_mg) / f2


def convert(values: ArrayLike, from_unit: str, to_unit: str, *, molecular_weight: float | None = None) -> FloatArray:
    """Concentrations converted from ``from_unit`` to ``to_unit``."""
    return np.asarray(values, dtype=float) * conversion_factor(from_unit, to_unit, molecular_weight=molecular_weight)


def convert_cumulative(values: ArrayLike, from_unit: str, to_unit: str, *,
                       molecular_weight: float | None = None) -> FloatArray:
    """Cumulative exposures (concentration x years) converted between units."""
    a, b = cumulative_unit(from_unit), cumulative_unit(to_unit)
    return convert(values, a[: -len("-years")], b[: -len("-years")], molecular_weight=molecular_weight)
