"""Outputs of a ``[grid]`` analysis: zones.csv, the two maps and the
report's grid section.

The burden results come from the real pipeline on invented inputs (a
linear excess-risk curve over each stratum's own lognormal exposure, with
and without age groups); the grid record is then attached by hand
(``dataclasses.replace(results, grid=GridSection(...))``) with invented
zones and small synthetic maps, zones listed in another order than the
burden's strata so that a match by position would fail.

Sources of the expected values:

* closed form derived here: for RR(x) = 1 + b x, minimum risk 0, over a
  lognormal with geometric mean GM and GSD, E[RR] = 1 + b GM exp(ln^2 GSD
  / 2) (the lognormal mean), so with e = b GM exp(ln^2 GSD / 2) the PAF is
  e / (1 + e); a scenario scaling exposure by 1/2 gives E[RR(X/2)] =
  1 + e/2, so PIF = 1 - (1 + e/2)/(1 + e) = (e/2) / (1 + e). Under the PAF
  method attributable = cases x PAF and averted = cases x PIF; cases =
  population x rate / 100,000 (the burden table's definition of a rate).
* hand sums of the burden rows the zone stands for (a stratum's groups),
  and ratios of the record's own numbers (PAF = attributable / cases,
  PIF = averted / cases) computed here;
* common practice: relative luminance with the Rec. 709 coefficients
  (0.2126 R + 0.7152 G + 0.0722 B on linearised sRGB) to check that the
  colour scales run light to dark.
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import base64
import csv
import dataclasses
import json
import math

import matplotlib.pyplot as plt
import numpy as np
import pytest
from test_outputs_cases import html_tables, run_pipeline

from doseattr.outputs import gallery, grid_figures, tables
from doseattr.outputs.burden_report import cases as cases_text
from doseattr.outputs.markup import estimate_text, interval, num
from doseattr.outputs.report import render_report
from doseattr.outputs.style import png_bytes
from doseattr.outputs.write import write_outputs
from doseattr.outputs.zones import zone_rows
from doseattr.results.records import GridMaps, GridSection

B = 0.004          # excess relative risk per ug/m3 (test input)
UNIT = "ug/m3"
SCENARIOS = [{"name": "half", "scale": 0.5}, {"name": "cap <15> & co", "cap": 15.0}]

#: Four districts in two age groups, each district with its own exposure.
GROUPED = """\
stratum,group,population,rate,gm,gsd
North,65-74,20000,1500,8,2
North,75+,12000,5200,8,2
South,65-74,18000,1400,14,2.5
South,75+,9000,5000,14,2.5
East,65-74,5000,1300,6,1.8
East,75+,3000,4800,6,1.8
West,65-74,40000,1200,11,2.2
West,75+,15000,4900,11,2.2
"""
#: The zones in grid order (not the burden's): id, name, stratum, the
#: grid's population and mean concentration (invented).
GROUPED_ZONES = ((40, "West", "West", 55210.5, 12.5), (10, "North", "North", 32044.0, 9.1),
                 (30, "East", "East", 7980.25, 6.9), (20, "South", "South", 27100.0, 19.2))

#: Twelve zones without groups or populations, strata labelled by zone id.
PLAIN_STRATA = [(str(100 + k), 50.0 + 37.0 * ((5 * k) % 12), 5.0 + 1.5 * ((7 * k) % 12), 2.0)
                for k in range(12)]
PLAIN = "stratum,cases,gm,gsd\n" + "".join(f"{s},{c:g},{g:g},{d:g}\n"
                                           for s, c, g, d in PLAIN_STRATA)


def _settings(table: str, draws: int | None = 200) -> dict:
    d = {"unit": UNIT, "curve": {"model": "linear", "err": B, "ci": [0.5 * B, 1.5 * B],
                                 "beyond": "extend"},
         "exposure": {"gm": 10.0, "gsd": 2.0}, "burden": {"table": table},
         "scenario": SCENARIOS}
    if draws:
        d["uncertainty"] = {"draws": draws, "seed": 11}
    return d


def _maps(rows: int = 6, cols: int = 8, step: int = 3, extent=None, crs=None) -> GridMaps:
    conc = np.arange(rows * cols, dtype=float).reshape(rows, cols) / 4.0 + 2.0
    conc[0, :2] = np.nan
    per_1000 = conc * 0.05
    per_1000[-1, -1] = np.nan
    return GridMaps(conc, per_1000, step=step, extent=extent, crs=crs)


def _grid(zones, maps: GridMaps | None, **more) -> GridSection:
    ids, names, strata, pop, mean = zip(*zones)
    fields = {"files": {"concentration": "pm25 <2023>.tif", "population": "people.tif",
                        "zones": "districts.tif"},
              "zone_ids": ids, "zone_names": names, "zone_population": pop, "zone_mean": mean,
              "cells": 48_000, "skipped_cells": 1_250, "skipped_population": 312.5,
              "error_gsd": 1.25, "maps": maps, "scheduler": "tcp://10.1.2.3:8786",
              "zone_strata": strata}
    fields.update(more)
    return GridSection(**fields)


@pytest.fixture(scope="module")
def grouped_base(tmp_path_factory):
    folder = tmp_path_factory.mktemp("grouped")
    return run_pipeline(folder, _settings("rows.csv"), {"rows.csv": GROUPED})


@pytest.fixture(scope="module")
def grouped(grouped_base):
    maps = _maps(extent=(500_000.0, 524_000.0, 4_100_000.0, 4_118_000.0), crs="EPSG:32633")
    return dataclasses.replace(grouped_base, grid=_grid(GROUPED_ZONES, maps))


@pytest.fixture(scope="module")
def plain(tmp_path_factory):
    folder = tmp_path_factory.mktemp("plain")
    base = run_pipeline(folder, _settings("rows.csv", draws=None), {"rows.csv": PLAIN})
    # grid order: the strata reversed; names are not the strata labels
    zones = [(int(s), f"Zone {s} & <co>", s, 1000.0 + i, g)
             for i, (s, _c, g, _d) in enumerate(reversed(PLAIN_STRATA))]
    return dataclasses.replace(base, grid=_grid(zones, _maps(step=1), error_gsd=None,
                                                scheduler=None))


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def read_table(table, tmp_path) -> tuple[list[str], list[dict[str, str]]]:
    """The table as written to disk, read back with the csv module."""
    path = tables.write_csv(tmp_path / "zones.csv", table)
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        return list(reader.fieldnames or []), list(reader)


def _input_rows(text: str) -> list[dict[str, str]]:
    return list(csv.DictReader(text.splitlines()))


def _e(gm: float, gsd: float) -> float:
    """b E[X] over the lognormal (module docstring, closed form)."""
    return B * gm * math.exp(math.log(gsd) ** 2 / 2)


# -- zones.csv ---------------------------------------------------------------
def test_zones_csv_sums_the_groups_and_follows_the_zones(grouped, tmp_path):
    """One row per zone in the grid's order; each row is its stratum summed
    across its age groups: cases = sum of population x rate / 100,000 over
    the stratum's rows, attributable = cases x e/(1+e) and averted by
    "half" = cases x (e/2)/(1+e) (closed forms, module docstring), equal
    to the hand sums of the group rows; PAF = attributable / cases and
    PIF = averted / cases; rate = attributable / population x 100,000.
    Intervals are those of the stratum totals (sums draw by draw)."""
    burden = grouped.burden
    _header, rows = read_table(tables.all_tables(grouped)["zones.csv"], tmp_path)
    assert [int(r["zone"]) for r in rows] == [z[0] for z in GROUPED_ZONES]
    inputs = _input_rows(GROUPED)
    totals = {s.stratum: s for s in burden.stratum_totals}
    for row, (_zid, name, stratum, pop, mean) in zip(rows, GROUPED_ZONES, strict=True):
        assert row["name"] == name
        assert float(row["population"]) == pop           # the grid's population
        assert float(row[f"mean_concentration ({UNIT})"]) == mean
        mine = [r for r in inputs if r["stratum"] == stratum]
        cases = sum(float(r["population"]) * float(r["rate"]) / 1e5 for r in mine)
        people = sum(float(r["population"]) for r in mine)
        e = _e(float(mine[0]["gm"]), float(mine[0]["gsd"]))
        att = float(row["attributable"])
        np.testing.assert_allclose(float(row["cases"]), cases, rtol=1e-12)
        np.testing.assert_allclose(att, cases * e / (1 + e), rtol=1e-8)
        np.testing.assert_allclose(float(row["averted_half"]), cases * (e / 2) / (1 + e),
                                   rtol=1e-8)
        group_rows = [s for s in burden.strata if s.stratum == stratum]
        assert len(group_rows) == 2
        np.testing.assert_allclose(att, sum(s.attributable.estimate for s in group_rows),
                                   rtol=1e-12)
        for scen in ("half", "cap <15> & co"):
            averted = sum(next(x for x in s.scenarios if x.name == scen).averted.estimate
                          for s in group_rows)
            np.testing.assert_allclose(float(row[f"averted_{scen}"]), averted, rtol=1e-12)
            np.testing.assert_allclose(float(row[f"pif_{scen}"]),
                                       float(row[f"averted_{scen}"]) / float(row["cases"]),
                                       rtol=1e-12)
        np.testing.assert_allclose(float(row["paf"]), att / float(row["cases"]), rtol=1e-12)
        per = "(per 100000)"
        np.testing.assert_allclose(float(row[f"attributable_rate {per}"]), att / people * 1e5,
                                   rtol=1e-12)
        t = totals[stratum]
        assert t.attributable.lower is not None
        assert float(row["attributable_lower"]) == t.attributable.lower
        assert float(row["attributable_upper"]) == t.attributable.upper
        assert float(row["paf_lower"]) == t.paf.lower
        assert float(row[f"attributable_rate_upper {per}"]) == t.attributable_rate.upper
        half = next(x for x in t.scenarios if x.name == "half")
        assert float(row["averted_lower_half"]) == half.averted.lower
        assert float(row["pif_upper_half"]) == half.pif.upper
        assert float(row["attributable_lower"]) < att < float(row["attributable_upper"])


def test_zones_csv_header(grouped, plain):
    """The columns as documented in tables.zones_table: the unit in the
    concentration's header, the rate's per-people in its own, one column
    group per scenario of results.attribution.scenarios; no rate columns
    without populations."""
    header, _ = tables.all_tables(grouped)["zones.csv"]
    assert header[:8] == ["zone", "name", "population", f"mean_concentration ({UNIT})",
                          "cases", "attributable", "attributable_lower", "attributable_upper"]
    assert header[8:14] == ["attributable_rate (per 100000)",
                            "attributable_rate_lower (per 100000)",
                            "attributable_rate_upper (per 100000)", "paf", "paf_lower",
                            "paf_upper"]
    for s in grouped.attribution.scenarios:
        for q in ("pif", "averted"):
            assert [f"{q}_{s.name}", f"{q}_lower_{s.name}", f"{q}_upper_{s.name}"] == \
                header[header.index(f"{q}_{s.name}"):header.index(f"{q}_{s.name}") + 3]
    plain_header, _ = tables.all_tables(plain)["zones.csv"]
    assert not [h for h in plain_header if h.startswith("attributable_rate")]
    assert len(plain_header) == 4 + 4 + 3 + 6 * len(SCENARIOS)


def test_zones_csv_without_groups_is_the_stratum_row(plain, tmp_path):
    """Without groups each zone's row is the burden row of its stratum,
    matched by zone_strata (ids as text here, not the zone names), in the
    grid's order (the strata reversed); PAF = attributable / cases and
    PIF = averted / cases (computed here), attributable = cases x e/(1+e)
    (closed form) with each stratum's own exposure."""
    _, rows = read_table(tables.all_tables(plain)["zones.csv"], tmp_path)
    by_stratum = {s.stratum: s for s in plain.burden.strata}
    expected = list(reversed(PLAIN_STRATA))
    assert [r["zone"] for r in rows] == [s for s, _c, _g, _d in expected]
    for row, (stratum, cases, gm, gsd) in zip(rows, expected, strict=True):
        s = by_stratum[stratum]
        assert float(row["cases"]) == s.cases == cases
        assert float(row["attributable"]) == s.attributable.estimate
        assert row["attributable_lower"] == ""           # no uncertainty in this run
        e = _e(gm, gsd)
        np.testing.assert_allclose(float(row["attributable"]), cases * e / (1 + e), rtol=1e-8)
        np.testing.assert_allclose(float(row["paf"]), s.attributable.estimate / s.cases,
                                   rtol=1e-12)
        for x in s.scenarios:
            np.testing.assert_allclose(float(row[f"pif_{x.name}"]), x.averted.estimate / s.cases,
                                       rtol=1e-12)
            assert float(row[f"averted_{x.name}"]) == x.averted.estimate


def test_no_grid_no_zones_csv_no_maps_no_section(grouped_base):
    """Without grid nothing of the grid appears: no zones.csv, no map, no
    report section; the burden outputs are unchanged."""
    assert grouped_base.grid is None
    assert "zones.csv" not in tables.all_tables(grouped_base)
    assert tables.zones_table(None, grouped_base.burden) is None
    images = gallery.render_figures(grouped_base)
    assert not [n for n in images if n.startswith("grid")]
    assert "burden" in images
    html = render_report(grouped_base, images=images)
    assert 'id="grid"' not in html and "zones.csv" not in html


def test_unmatched_zone_is_empty_and_warned(plain, tmp_path):
    """A zone whose stratum is not in the burden table gets empty burden
    cells and a warning naming it; zone_strata of the wrong length is
    refused."""
    g = plain.grid
    strata = ("no such stratum",) + g.zone_strata[1:]
    r = dataclasses.replace(plain, grid=dataclasses.replace(g, zone_strata=strata))
    _, rows = read_table(tables.all_tables(r)["zones.csv"], tmp_path)
    assert rows[0]["cases"] == rows[0]["attributable"] == rows[0]["pif_half"] == ""
    assert rows[1]["cases"] != ""
    html = render_report(r, figures=False)
    assert "1 zone(s) have no result in the burden table: 111 (Zone 111 &amp; &lt;co&gt;)" in html
    bad = dataclasses.replace(g, zone_strata=g.zone_strata[:-1])
    with pytest.raises(ValueError, match="11 zone strata for 12 zones"):
        zone_rows(bad, plain.burden)


# -- report ------------------------------------------------------------------
def _top_table(html: str):
    found = [(c, h, r) for c, h, r in html_tables(html) if "most attributable cases" in c]
    assert len(found) == 1
    return found[0]


def test_report_top_zones_ordered_by_attributable(plain):
    """The ten zones with the most attributable cases of twelve, most
    first (sorted here from the burden rows), each with its zone id, name,
    population and mean from the grid and its attributable cases."""
    html = render_report(plain, figures=False)
    caption, header, rows = _top_table(html)
    assert caption == "The 10 zones with the most attributable cases, of 12"
    assert "Attributable cases" in header and not any("per 100,000" in h for h in header)
    grid = plain.grid
    zone_of = {st: k for k, st in enumerate(grid.zone_strata)}
    ranked = sorted(plain.burden.strata, key=lambda s: -s.attributable.estimate)[:10]
    assert [r[0] for r in rows] == [s.stratum for s in ranked]
    for row, s in zip(rows, ranked, strict=True):
        k = zone_of[s.stratum]
        assert row[1] == grid.zone_names[k]
        assert row[2] == cases_text(grid.zone_population[k])
        assert row[3] == num(grid.zone_mean[k])
        assert row[4] == cases_text(s.attributable.estimate)
    values = [s.attributable.estimate for s in ranked]
    assert values == sorted(values, reverse=True)


def test_report_grid_section(grouped):
    """What was read (files, cells, skipped cells and their population,
    the exposure-model error, the scheduler), both maps embedded with the
    decimation caption, and every zone (four) by attributable cases with
    its interval and rate."""
    images = gallery.render_figures(grouped)
    assert list(images)[-2:] == ["grid_concentration", "grid_attributable"]
    html = render_report(grouped, images=images)
    section = html[html.index('<section id="grid">'):]
    section = section[:section.index("</section>")]
    for name in ("grid_concentration", "grid_attributable"):
        assert base64.b64encode(images[name]).decode("ascii") in section
    assert section.count("every 3rd cell in each direction") == 4   # alt and caption, 2 maps
    assert "for display only" in section and "EPSG:32633" in section
    facts = dict(html_tables(section)[0][2][i] for i in range(len(html_tables(section)[0][2])))
    assert facts["Concentration raster"] == "pm25 <2023>.tif"
    assert facts["Cells read"] == "48,000"
    assert facts["Cells skipped as nodata"].startswith("1,250 (2.60% of them)")
    assert facts["Cells skipped as nodata"].endswith("population of 312")
    assert "GSD 1.25" in facts["Exposure-model error"]
    assert facts["Computed on"] == "tcp://10.1.2.3:8786"
    caption, header, rows = _top_table(section)
    assert caption == "All 4 zones, most attributable cases first"
    totals = {s.stratum: s for s in grouped.burden.stratum_totals}
    ranked = sorted(GROUPED_ZONES, key=lambda z: -totals[z[2]].attributable.estimate)
    assert [r[1] for r in rows] == [z[1] for z in ranked]
    assert header[-1] == "Attributable per 100,000 (95% interval)"
    for row, z in zip(rows, ranked, strict=True):
        t = totals[z[2]]
        assert row[5] == interval(t.attributable.lower, t.attributable.upper, cases_text)
        assert row[6] == estimate_text(t.attributable_rate, cases_text)


def test_report_without_maps_says_so(plain):
    """A grid record without maps (a cell table) draws no map and says why."""
    r = dataclasses.replace(plain, grid=dataclasses.replace(plain.grid, maps=None))
    images = gallery.render_figures(r)
    assert not [n for n in images if n.startswith("grid")]
    html = render_report(r, images=images)
    assert "No maps are drawn" in html and "none stated" in html
    assert "zones.csv" in tables.all_tables(r)


def test_write_outputs_writes_zones_and_maps(grouped, tmp_path):
    """write_outputs puts zones.csv and both maps in the folder and lists
    them in manifest.json."""
    written = write_outputs(grouped, tmp_path / "out")
    names = {p.relative_to(tmp_path / "out").as_posix() for p in written}
    assert {"zones.csv", "figures/grid_concentration.png",
            "figures/grid_attributable.png"} <= names
    listed = {f["path"] for f in json.loads((tmp_path / "out" / "manifest.json").read_text())
              ["files"]}
    assert {"zones.csv", "figures/grid_attributable.png"} <= listed


# -- maps --------------------------------------------------------------------
def _image(figure, kind):
    ax = figure.axes[0]
    found = [im for im in ax.get_images() if im.get_gid() == f"grid-{kind}"]
    assert len(found) == 1
    return ax, found[0]


def test_maps_draw_the_record(grouped, plain):
    """Each map draws its array (NaN masked) with a colour bar giving the
    unit; with an extent the axes are the extent, without one the grid's
    cell indices of the shown cells (every step-th)."""
    maps = grouped.grid.maps
    for kind, values in (("concentration", maps.concentration),
                         ("attributable", maps.attributable_per_1000)):
        figure = grid_figures.map_figure(maps, kind, UNIT)
        ax, im = _image(figure, kind)
        drawn = im.get_array()
        np.testing.assert_array_equal(np.ma.getmaskarray(drawn), np.isnan(values))
        np.testing.assert_array_equal(drawn.compressed(), values[~np.isnan(values)])
        assert ax.get_xlim() == (500_000.0, 524_000.0)
        assert ax.get_ylim() == (4_100_000.0, 4_118_000.0)
        assert len(figure.axes) == 2                       # the map and its colour bar
        label = figure.axes[1].get_ylabel()
        assert label == (f"Concentration ({UNIT})" if kind == "concentration"
                         else "Attributable cases per 1,000 people")
        assert "every 3rd cell" in figure.get_supxlabel()
    ax, _ = _image(grid_figures.map_figure(plain.grid.maps, "concentration", UNIT),
                   "concentration")
    rows, cols = plain.grid.maps.concentration.shape
    assert ax.get_xlim() == (-0.5, cols - 0.5)
    assert ax.get_ylim() == (rows - 0.5, -0.5)            # row 0 at the top
    assert "Every cell" in ax.figure.get_supxlabel()


def test_all_nan_and_single_cell_maps(plain):
    """A map with no data is drawn all grey, says so and has no colour bar;
    a single cell is drawn with a widened scale around its value; the
    gallery and the report take both."""
    empty = GridMaps(np.full((3, 4), np.nan), np.full((3, 4), np.nan), step=5)
    one = GridMaps(np.array([[7.5]]), np.array([[0.0]]), step=1)
    for maps in (empty, one):
        for kind in ("concentration", "attributable"):
            figure = grid_figures.map_figure(maps, kind, UNIT)
            ax, im = _image(figure, kind)
            values = maps.concentration if kind == "concentration" else \
                maps.attributable_per_1000
            np.testing.assert_array_equal(np.ma.getmaskarray(im.get_array()), np.isnan(values))
            if maps is empty:
                assert len(figure.axes) == 1
                assert [t.get_text() for t in ax.texts] == ["no cell with data"]
            else:
                lo, hi = im.get_clim()
                assert lo < float(values[0, 0]) < hi
        r = dataclasses.replace(plain, grid=dataclasses.replace(plain.grid, maps=maps))
        images = {f"grid_{kind}": png_bytes(grid_figures.grid_map(r.grid, kind, UNIT))
                  for kind in ("concentration", "attributable")}
        html = render_report(r, images=images)
        assert base64.b64encode(images["grid_attributable"]).decode("ascii") in html
    assert grid_figures.value_limits(np.array([[0.0]])) == (-0.5, 0.5)
    assert grid_figures.value_limits(np.array([[np.nan]])) is None


def test_figure_size_is_bounded():
    """Fixed width and a height within the bounds for any shape, from a
    long row to a tall column."""
    width, (lo, hi) = grid_figures.WIDTH, grid_figures.MAP_HEIGHT
    for ratio in (1e-6, 1e-2, 0.5, 1.0, 3.0, 1e3, 1e6):
        w, h = grid_figures.figure_size(ratio)
        assert w == width and lo + 1.0 <= h <= hi + 1.0
    for shape in ((1, 3000), (3000, 1), (200, 200)):
        maps = GridMaps(np.ones(shape), np.zeros(shape), step=7)
        size = grid_figures.map_figure(maps, "concentration", UNIT).get_size_inches()
        assert size[0] == width and size[1] <= hi + 1.0


def _luminance(rgb) -> float:
    """Relative luminance, Rec. 709 coefficients on linearised sRGB (common practice)."""
    c = np.asarray(rgb[:3], float)
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    return float(lin @ np.array([0.2126, 0.7152, 0.0722]))


def test_colour_scales_run_light_to_dark_with_neutral_no_data():
    """Both scales darken steadily from their low to their high end, and
    masked cells get the neutral no-data grey."""
    from matplotlib.colors import to_rgba

    for name, colours in (("c", grid_figures.CONCENTRATION_COLOURS),
                          ("b", grid_figures.BURDEN_COLOURS)):
        cmap = grid_figures.sequential_colormap(name, colours)
        lum = [_luminance(cmap(x)) for x in np.linspace(0, 1, 64)]
        assert np.all(np.diff(lum) < 0)
        assert cmap.get_bad() == pytest.approx(to_rgba(grid_figures.NO_DATA))
        assert abs(_luminance(to_rgba(grid_figures.NO_DATA)) - lum[0]) > 0.1
