"""End to end: the bundled demo's report shows the numbers of its
results.json.

``doseattr demo --out DIR`` is run once; report.html is read as text (the
standard library's :mod:`html.parser`), and every number shown in its key
tables must be a correct rounding of the matching value in results.json:
a number written with n decimals must lie within half a unit of its last
decimal of the value (percentages divided by 100 first). This checks what a
reader sees against what other programs read, whatever precision the
report chooses.
"""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser

import pytest

from doseattr.cli import main

NUMBER = re.compile(r"[-+\u2212]?\d+(?:\.\d+)?%?")


class Tables(HTMLParser):
    """Every <table> as (caption, rows), each row a list of cell texts
    (th and td alike); also the document's whole text."""

    def __init__(self) -> None:
        super().__init__()
        self.tables: list[tuple[str, list[list[str]]]] = []
        self._caption: str | None = None
        self._rows: list[list[str]] | None = None
        self._cell: list[str] | None = None
        self._in_caption = False
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "table":
            self._caption, self._rows = "", []
        elif tag == "caption":
            self._in_caption = True
        elif tag == "tr" and self._rows is not None:
            self._rows.append([])
        elif tag in ("td", "th") and self._rows is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag == "table" and self._rows is not None:
            self.tables.append((self._caption or "", self._rows))
            self._rows = None
        elif tag == "caption":
            self._in_caption = False
        elif tag in ("td", "th") and self._cell is not None:
            self._rows[-1].append(" ".join("".join(self._cell).split()))
            self._cell = None

    def handle_data(self, data):
        self.text.append(data)
        if self._in_caption:
            self._caption += data
        elif self._cell is not None:
            self._cell.append(data)


def shown(cell: str) -> list[tuple[float, float]]:
    """The numbers written in a cell as (value, half unit of the last digit),
    percentages as fractions."""
    out = []
    for tok in NUMBER.findall(cell):
        pct = tok.endswith("%")
        body = tok.rstrip("%").replace("\u2212", "-")
        decimals = len(body.split(".")[1]) if "." in body else 0
        scale = 0.01 if pct else 1.0
        out.append((float(body) * scale, 0.5 * 10.0**-decimals * scale))
    return out


def agrees(cell: str, *values: float) -> None:
    """Each number in ``cell`` is a correct rounding of the value in turn."""
    nums = shown(cell)
    assert len(nums) >= len(values), f"{cell!r} shows fewer than {len(values)} numbers"
    for (v, half), expected in zip(nums, values):
        assert abs(v - expected) <= half * (1 + 1e-9) + 1e-15, f"{cell!r}: {v} vs {expected}"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    assert main(["demo", "--out", str(out), "--quiet"]) == 0
    parser = Tables()
    parser.feed((out / "report.html").read_text(encoding="utf-8"))
    return json.loads((out / "results.json").read_text()), parser


def table(parser: Tables, caption_word: str | None = None, first: str | None = None):
    """The first table whose caption starts with ``caption_word`` or, with
    ``first``, whose rows include one starting with ``first``."""
    for caption, rows in parser.tables:
        if caption_word is not None and caption.strip().lower().startswith(caption_word.lower()):
            return rows
        if first is not None and any(r and r[0].startswith(first) for r in rows):
            return rows
    raise AssertionError(f"no table with caption {caption_word!r} / row {first!r}")


def row(rows: list[list[str]], start: str) -> list[str]:
    for r in rows:
        if r and r[0].startswith(start):
            return r
    raise AssertionError(f"no row starting {start!r} in {[r[0] for r in rows if r]}")


def test_key_numbers(demo):
    data, parser = demo
    rows = table(parser, first="PAF")
    r = row(rows, "PAF")
    agrees(r[1], data["paf"]["estimate"])
    agrees(r[2], data["paf"]["lower"], data["paf"]["upper"])
    for s in data["scenarios"]:
        r = next(r for r in rows if r[0].startswith("PIF") and s["name"] in r[0])
        agrees(r[1], s["pif"]["estimate"])
        agrees(r[2], s["pif"]["lower"], s["pif"]["upper"])


def test_curve_numbers(demo):
    data, parser = demo
    c = data["curve"]
    r = row(table(parser, "Coefficients"), c["parameter_names"][0])
    agrees(r[1], c["coefficients"][0])
    agrees(r[2], c["standard_errors"][0])
    bands = table(parser, "Study bands")
    for fitted, r in zip(c["fitted"], bands[2:]):  # header, reference band, then the others
        assert r[-1] != "" and shown(r[1])[0][0] == pytest.approx(fitted["dose"])
        agrees(r[2], fitted["rr_reported"])
        agrees(r[-1], fitted["rr_fitted"])
    text = "".join(parser.text)
    q = re.search(r"Q = ([\d.]+) on (\d+) degrees of freedom, p = ([\d.]+)", text)
    assert q is not None
    agrees(q.group(1), c["q"])
    assert int(q.group(2)) == c["df"]
    agrees(q.group(3), c["p_value"])


def test_exposure_numbers(demo):
    data, parser = demo
    e = data["exposure"]
    facts = table(parser, first="Mean exposure")
    agrees(row(facts, "gm")[1], e["parameters"]["gm"])
    agrees(row(facts, "gsd")[1], e["parameters"]["gsd"])
    agrees(row(facts, "Mean exposure")[1], e["mean"])
    agrees(row(facts, "Unexposed")[1], e["unexposed"])
    agrees(row(facts, "Measurements")[1], e["n"], e["detected"], e["censored"])
    agrees(row(facts, "Log-likelihood")[1], e["loglik"], e["aic"])


def test_attribution_numbers(demo):
    data, parser = demo
    facts = table(parser, first="Half of the attributable")
    r = row(facts, "Population above")
    agrees(r[0], data["curve"]["max_dose"])
    agrees(r[1], data["exposure"]["share_beyond_max_dose"])
    agrees(row(facts, "Half of the attributable")[1], data["contribution"]["median"])
    scen = table(parser, "Scenarios")
    for s in data["scenarios"]:
        agrees(row(scen, s["name"])[2], s["pif"]["estimate"])


def test_categorical_numbers(demo):
    data, parser = demo
    cat = data["categorical"]
    bands = table(parser, "Bands")[1:]
    assert len(bands) == len(cat["shares"])
    methods = {m["method"]: m for m in cat["methods"]}
    for i, r in enumerate(bands):
        agrees(r[1], cat["shares"][i])
        agrees(r[2], cat["midpoints"][i])
        agrees(r[3], cat["band_means"][i])
        for cell, name in zip(r[4:], ("reported", "midpoint", "band-mean")):
            agrees(cell, methods[name]["rr"][i])
    vs = table(parser, "Categorical against continuous")
    labels = {"reported": "study's reported", "midpoint": "curve at band midpoints",
              "band-mean": "curve at band means"}
    for name, label in labels.items():
        r = row(vs, label)
        agrees(r[1], methods[name]["paf"])
        # a difference in percentage points: "+4.42 points" is 0.0442
        (v, half), = shown(r[2])
        assert abs(v / 100 - methods[name]["difference"]) <= half / 100 * (1 + 1e-9)
    agrees(row(vs, "Continuous")[1], cat["continuous_paf"])


def test_uncertainty_numbers(demo):
    data, parser = demo
    rows = table(parser, first="PIF, ")
    r = row(rows, "PAF")
    agrees(r[1], data["paf"]["estimate"])
    agrees(r[2], data["paf"]["lower"], data["paf"]["upper"])
    agrees(r[3], data["paf"]["lower_mcse"], data["paf"]["upper_mcse"])  # the limits' MCSE
