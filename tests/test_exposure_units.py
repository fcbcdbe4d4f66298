"""Concentration and cumulative-exposure units."""

import numpy as np
import pytest
from scipy import constants

from doseattr.core.exposure.units import (
    MOLAR_VOLUME_L,
    concentration_unit,
    conversion_factor,
    convert,
    convert_cumulative,
    cumulative_unit,
)
from doseattr.errors import ModelError


def test_molar_volume_matches_the_ideal_gas_law():
    """Source: scipy.constants: V = R T / p at 298.15 K, 101325 Pa, in litres
    (24.465 L/mol); the trade's 24.45 is its rounded value (common practice)."""
    v = constants.R * 298.15 / constants.atm * 1000
    np.testing.assert_allclose(MOLAR_VOLUME_L, v, rtol=1e-3)


def test_ppm_to_mg_per_m3():
    """Source: mg/m3 = ppm x MW / 24.45 (common practice; from memory), and SI
    prefixes (1 mg = 1000 ug, 1 ppm = 1000 ppb)."""
    mw = 78.11
    np.testing.assert_allclose(convert([2.0], "ppm", "mg/m3", molecular_weight=mw), [2.0 * mw / 24.45], rtol=1e-14)
    np.testing.assert_allclose(convert([500.0], "ppb", "ug/m3", molecular_weight=mw), [500.0 * mw / 24.45],
                               rtol=1e-14)
    np.testing.assert_allclose(conversion_factor("ug/m3", "mg/m3"), 1e-3, rtol=1e-15)
    np.testing.assert_allclose(conversion_factor("mg/m3", "ppm", molecular_weight=mw)
                               * conversion_factor("ppm", "mg/m3", molecular_weight=mw), 1.0, rtol=1e-14)


def test_radon_units():
    """Source: 1 Ci = 3.7e10 Bq (definition), so 1 pCi/L = 0.037 Bq per 1e-3 m3 = 37 Bq/m3."""
    np.testing.assert_allclose(conversion_factor("pCi/L", "Bq/m3"), 37.0, rtol=1e-15)


def test_unit_names_and_aliases():
    """Source: contract (canonical names)."""
    assert concentration_unit("µg/m³") == "ug/m3"
    assert concentration_unit(" MG/M3 ") == "mg/m3"
    assert cumulative_unit("mg/m3-years") == "mg/m3-years"
    assert cumulative_unit("ppm x yr") == "ppm-years"
    np.testing.assert_allclose(convert_cumulative([3.0], "ppm-years", "mg/m3-years", molecular_weight=28.01),
                               [3.0 * 28.01 / 24.45], rtol=1e-14)


@pytest.mark.parametrize("call,match", [
    (lambda: concentration_unit("mg/l"), "unknown concentration unit 'mg/l'"),
    (lambda: conversion_factor("ppm", "mg/m3"), "needs the molecular weight"),
    (lambda: conversion_factor("Bq/m3", "mg/m3"), "measure different things"),
    (lambda: cumulative_unit("mg/m3"), "unknown cumulative exposure unit"),
    (lambda: convert_cumulative([1.0], "mg/m3", "mg/m3-years"), "unknown cumulative"),
])
def test_unit_refusals(call, match):
    """Source: contract (ModelError on unknown or mismatched units)."""
    with pytest.raises(ModelError, match=match):
        call()
