"""The input specs: one frozen type per source of curve and of exposure,
each with the source name the messages use, and one entry per type in
every registry that dispatches on it (builders, unit conversion, the
lines of ``doseattr check``). The schema's lists of models and families
are those of the core registries."""

from __future__ import annotations

import dataclasses
import typing

import pytest
from analysis_helpers import BANDS, MEASUREMENTS

from doseattr.analysis import build, check, schema, units_section
from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.specs import (
    BinnedExposure,
    CurveSpec,
    DrawsCurve,
    EnteredCurve,
    ExposureSpec,
    HistoriesExposure,
    MeasuredExposure,
    PercentilesExposure,
    PointsCurve,
    ShapeCurve,
    SummaryExposure,
    TableCurve,
)
from doseattr.core.curves.registry import MODELS
from doseattr.core.exposure.registry import FAMILIES

POINTS = "dose,rr,ci_lower,ci_upper\n0,1,,\n10,1.20,1.05,1.37\n25,1.45,1.20,1.75\n"
DRAWS = "dose,d1,d2,d3\n0,1,1,1\n20,1.10,1.30,1.20\n50,1.30,1.70,1.40\n"
BINS = "lower,upper,count\n0,5,120\n5,10,260\n10,20,310\n20,,40\n"
HISTORY = ("worker,start,end,intensity\nW1,2000-01-01,2005-07-01,2.0\n"
           "W2,1995-03-15,2001-03-15,1.2\nW3,2001-01-01,2009-06-30,3.0\n"
           "W4,1990-01-01,1999-12-31,0.8\n")
ERR = {"model": "linear", "err": 0.04, "beyond": "extend"}
GM_GSD = {"gm": 8.0, "gsd": 2.0}

CURVES = [
    ({"table": "bands.csv"}, TableCurve, "table"),
    (ERR, EnteredCurve, "entered"),
    ({"points": "points.csv"}, PointsCurve, "points"),
    ({"draws": "draws.csv"}, DrawsCurve, "draws"),
    ({"model": "saturating-exponential", "alpha": 0.5, "gamma": 0.1, "delta": 0.8},
     ShapeCurve, "shape"),
]
EXPOSURES = [
    ({"table": "measurements.csv"}, MeasuredExposure, "measurements", "ug/m3"),
    (GM_GSD, SummaryExposure, "gm-gsd", "ug/m3"),
    ({"shape": 2.0, "scale": 3.0, "family": "gamma"}, SummaryExposure, "shape-scale", "ug/m3"),
    ({"mean": 6.0, "sd": 3.0, "family": "weibull"}, SummaryExposure, "mean-sd", "ug/m3"),
    ({"percentiles": {"50": 8.0, "95": 20.0}}, PercentilesExposure, "percentiles", "ug/m3"),
    ({"bins": "bins.csv"}, BinnedExposure, "bins", "ug/m3"),
    ({"histories": "h.csv", "as_of": "2020-01-01"}, HistoriesExposure, "histories",
     "mg/m3-years"),
]


def _analysis(tmp_path, curve: dict, exposure: dict, unit: str = "ug/m3"):
    for name, text in {"bands.csv": BANDS, "measurements.csv": MEASUREMENTS,
                       "points.csv": POINTS, "draws.csv": DRAWS, "bins.csv": BINS,
                       "h.csv": HISTORY}.items():
        (tmp_path / name).write_text(text)
    return analysis_from_dict({"unit": unit, "curve": curve, "exposure": exposure},
                              base_dir=tmp_path)


@pytest.mark.parametrize("curve, kind, source", CURVES, ids=[c[2] for c in CURVES])
def test_each_curve_source_has_its_own_type(tmp_path, curve, kind, source):
    a = _analysis(tmp_path, curve, GM_GSD)
    assert type(a.curve) is kind and a.curve.source == source
    with pytest.raises(dataclasses.FrozenInstanceError):
        a.curve.model = "linear"  # type: ignore[misc]
    with pytest.raises(AttributeError):
        a.curve.source = "other"  # type: ignore[misc]


@pytest.mark.parametrize("exposure, kind, source, unit", EXPOSURES,
                         ids=[e[2] for e in EXPOSURES])
def test_each_exposure_source_has_its_own_type(tmp_path, exposure, kind, source, unit):
    a = _analysis(tmp_path, ERR, exposure, unit)
    assert type(a.exposure) is kind and a.exposure.source == source
    with pytest.raises(AttributeError):
        a.exposure.source = "other"  # type: ignore[misc]


@pytest.mark.parametrize("curve, kind, source", CURVES, ids=[c[2] for c in CURVES])
def test_only_a_study_table_curve_has_a_study_table(tmp_path, curve, kind, source):
    """The categorical comparison reads ``curve.table`` whatever the source."""
    table = _analysis(tmp_path, curve, GM_GSD).curve.table
    assert (table is not None) == (kind is TableCurve)


@pytest.mark.parametrize("registry", [build.CURVE_BUILDERS, units_section._CURVE_DOSES,
                                      check._CURVE_WORDS],
                         ids=["build", "units", "check"])
def test_every_curve_type_is_in_every_curve_registry(registry):
    assert set(registry) == set(typing.get_args(CurveSpec))


@pytest.mark.parametrize("registry", [build.EXPOSURE_BUILDERS, units_section._EXPOSURE_VALUES,
                                      check._EXPOSURE_WORDS],
                         ids=["build", "units", "check"])
def test_every_exposure_type_is_in_every_exposure_registry(registry):
    assert set(registry) == set(typing.get_args(ExposureSpec))


def test_the_schema_lists_the_core_registries():
    """Every curve model of the core registry but the one for a curve given
    as points is a choice of ``[curve] model``; every family is a choice of
    ``[exposure] family``, beside "best" and "empirical"."""
    models = schema.SECTIONS["curve"]["model"].choices
    families = schema.SECTIONS["exposure"]["family"].choices
    assert set(models) == set(MODELS) - {"points"}
    assert families == tuple(FAMILIES) + ("best", "empirical")
