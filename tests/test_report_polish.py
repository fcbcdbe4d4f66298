"""The report reads well everywhere (issue 16 item 4): one rule for
percentages, tables that scroll in their own box, formulas without ``- 0``,
figures also as SVG at a stated resolution, and references for every
published method a run used.

Sources: the percentage rule is checked against the value it rounds (the
bound of rounding to d significant figures, closed form: relative error at
most 5 x 10^-d); PNG sizes against inches x dpi (the PNG IHDR chunk holds
width and height, PNG specification); SVG files are parsed with the
standard library's XML parser.
"""

from __future__ import annotations

import json
import re
import struct
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.cli import main
from doseattr.errors import InputError
from doseattr.outputs.report import render_report
from doseattr.outputs.write import write_outputs
from doseattr.results.numbers import percent, share_text

ROOT = Path(__file__).resolve().parent.parent
SAT = {"model": "saturating-exponential", "alpha": 1.5, "gamma": 0.08, "delta": 1.3,
       "threshold": 0.0}
EXPOSURE = {"gm": 10.0, "gsd": 2.0}


# -- one rule for percentages ----------------------------------------------------------
@given(st.floats(min_value=-2.0, max_value=2.0, allow_nan=False))
def test_percent_never_uses_an_exponent_or_a_negative_zero(v):
    text = percent(v)
    assert "e" not in text and text.endswith("%")
    assert not re.fullmatch(r"-0(\.0*)?%", text)
    p = 100 * v
    if abs(p) >= 0.001:
        shown = float(text.rstrip("%"))
        # rounding to 3 significant figures (closed form bound)
        assert abs(shown - p) <= 5e-3 * abs(p) + 1e-12
        assert (shown < 0) == (p < 0)
    elif p != 0:
        assert text in ("<0.001%", ">-0.001%")


@pytest.mark.parametrize("value, text", [
    (4.3e-7, "<0.001%"),      # the 4.3e-05%
    (-1e-9, ">-0.001%"),      # the issue's -0.00%
    (0.0946, "9.46%"), (0.0016, "0.160%"), (0.0, "0%")])
def test_percent_examples(value, text):
    assert percent(value) == text  # common practice: significant figures, fixed notation


def test_a_band_with_one_home_of_4000_is_not_zero():
    assert share_text(1 / 4000) == "<0.1%"  # the 0.0% for 1 of 4000 homes
    assert share_text(0.0) == "0%"


# -- formulas ----------------------------------------------------------------------------
@pytest.mark.parametrize("curve, formula", [
    ({"model": "log-linear", "rr": 1.1, "per": 10, "ci": [1.05, 1.15], "max_dose": 50},
     "RR = exp(slope * x)"),
    ({"model": "linear", "err": 0.01, "per": 1, "ci": [0.005, 0.015]}, "RR = 1 + slope * x"),
    (SAT, "RR = 1 + alpha (1 - exp(-gamma z^delta)), z = x"),
    ({**SAT, "threshold": 2.4}, "z = max(0, x - 2.4)")])
def test_formulas_have_no_minus_zero(curve, formula):
    r = run_analysis(analysis_from_dict({"unit": "ug/m3", "curve": curve,
                                         "exposure": EXPOSURE}))
    text = r.curve.model.describe()
    assert formula in text
    assert "- 0)" not in text and "x - 0" not in text


# -- the demo's report ---------------------------------------------------------------------
@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    assert main(["demo", "--out", str(out), "--quiet"]) == 0
    return out


def test_every_table_scrolls_in_its_own_box(demo):
    html = (demo / "report.html").read_text()
    tables = html.count("<table")
    assert tables > 5
    assert html.count('<div class="scroll"><table') == tables
    assert re.search(r"\.scroll \{[^}]*overflow-x: auto", html)


def test_the_demo_report_has_no_slips(demo):
    for name in ("report.html", "summary.txt"):
        text = (demo / name).read_text()
        text = re.sub(r"base64,[A-Za-z0-9+/=]+", "", text)  # the embedded images
        assert not re.search(r"\de-\d+%", text), name
        assert "-0.00%" not in text and "(x - 0)" not in text and "x - 0)" not in text, name


# -- [report] figures and dpi --------------------------------------------------------------
def _png_size(data: bytes) -> tuple[int, int]:
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", data[16:24])  # IHDR width, height (PNG specification)


def _curve_run(report: dict | None = None):
    d = {"unit": "ug/m3", "curve": {"model": "log-linear", "rr": 1.1, "per": 10,
                                    "ci": [1.05, 1.15], "max_dose": 50},
         "exposure": EXPOSURE}
    if report is not None:
        d["report"] = report
    return run_analysis(analysis_from_dict(d))


def test_svg_beside_png_and_in_the_manifest(tmp_path):
    out = tmp_path / "o"
    written = write_outputs(_curve_run({"figures": ["png", "svg"]}), out)
    svgs = sorted(p.name for p in (out / "figures").glob("*.svg"))
    pngs = sorted(p.name for p in (out / "figures").glob("*.png"))
    assert svgs and [s[:-4] for s in svgs] == [p[:-4] for p in pngs]
    for name in svgs:
        assert ET.parse(out / "figures" / name).getroot().tag.endswith("svg")
    manifest = {e["path"] for e in json.loads((out / "manifest.json").read_text())["files"]}
    assert {f"figures/{s}" for s in svgs} <= manifest
    assert {out / "figures" / s for s in svgs} <= set(written)


def test_svg_bytes_are_the_same_in_two_runs(tmp_path):
    r = _curve_run({"figures": ["svg"]})
    write_outputs(r, tmp_path / "a")
    write_outputs(r, tmp_path / "b")
    for f in (tmp_path / "a" / "figures").glob("*.svg"):
        assert f.read_bytes() == (tmp_path / "b" / "figures" / f.name).read_bytes(), f.name
    assert not list((tmp_path / "a" / "figures").glob("*.png"))  # only what was asked


@pytest.mark.parametrize("report, dpi", [(None, 150), ({"dpi": 100}, 100)])
def test_png_resolution(tmp_path, report, dpi):
    write_outputs(_curve_run(report), tmp_path / "o")
    width, height = _png_size((tmp_path / "o" / "figures" / "curve.png").read_bytes())
    # the curve figure is 8 x 3.6 inches (outputs.style.new_axes): inches x dpi
    assert (width, height) == (round(8.0 * dpi), round(3.6 * dpi))


@pytest.mark.parametrize("report, message", [
    ({"figures": ["jpg"]}, r"\[report\] key 'figures': 'jpg' is not a figure format"),
    ({"figures": ["png", "png"]}, r"\[report\] key 'figures': names a format twice"),
    ({"dpi": 10}, r"\[report\] key 'dpi': must be between 50 and 600"),
    ({"dpi": "high"}, r"\[report\] key 'dpi': must be a whole number"),
    ({"figure": ["svg"]}, r"unknown key 'figure' in \[report\]; did you mean 'figures'")])
def test_report_section_errors(report, message):
    with pytest.raises(InputError, match=message):
        _curve_run(report)


# -- references ----------------------------------------------------------------------------
def _references(html: str) -> str:
    return html.split("<h3>References</h3>", 1)[1]


def test_the_published_shape_is_cited():
    r = run_analysis(analysis_from_dict({"unit": "ug/m3", "curve": SAT, "exposure": EXPOSURE}))
    refs = _references(render_report(r, figures=False))
    assert "Burnett RT" in refs and "(2014)" in refs and "(2018)" not in refs


def test_the_limit_methods_are_cited(tmp_path):
    assert main(["init", "workplace", str(tmp_path / "w")]) == 0
    assert main(["run", str(tmp_path / "w" / "analysis.toml"), "--out", str(tmp_path / "o"),
                 "--quiet"]) == 0
    refs = _references((tmp_path / "o" / "report.html").read_text())
    assert "EN 689:2018" in refs and "Rappaport SM" in refs


def test_a_run_without_them_does_not_cite_them(demo):
    refs = _references((demo / "report.html").read_text())
    assert "Burnett" not in refs and "EN 689" not in refs
