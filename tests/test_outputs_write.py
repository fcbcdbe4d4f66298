"""write_outputs: the results.json contract, CSV tables, and all-or-nothing
writing.

The contract keys are those marked * in the project's API notes (the keys
external validation reads). Expected numbers come from the results object
itself (the files must reproduce it exactly: floats round-trip through
``repr``) or from outside references named beside each check.
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from test_outputs_cases import SCENARIO_NAMES, UNIT, make_results, quad_paf

from doseattr.errors import InputError
from doseattr.outputs import figures as figure_module
from doseattr.outputs import write as write_module
from doseattr.outputs.write import write_outputs


@pytest.fixture(scope="module")
def results():
    return make_results()


@pytest.fixture(scope="module")
def written(results, tmp_path_factory):
    out = tmp_path_factory.mktemp("run") / "out"
    paths = write_outputs(results, out)
    return out, paths


def strict_json(path: Path):
    """json.loads that refuses NaN and infinities (as allow_nan=False writes)."""
    def refuse(name):
        raise ValueError(f"non-finite constant {name} in JSON")
    return json.loads(path.read_text(encoding="utf-8"), parse_constant=refuse)


def read_csv(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_files_written(written):
    out, paths = written
    names = {p.relative_to(out).as_posix() for p in paths}
    for name in ("results.json", "report.html", "scenarios.csv", "categorical.csv",
                 "curve_fit.csv", "exposure_fits.csv", "convergence.csv",
                 "figures/curve.png", "figures/exposure.png", "figures/contribution.png",
                 "figures/categorical.png"):
        assert name in names
    assert all(p.is_file() for p in paths)
    assert not [p for p in out.parent.iterdir() if p.name.startswith(".out.partial")]


def test_results_json_contract_keys(written, results):
    """Every key marked * in the API notes is present with the stated type."""
    d = strict_json(written[0] / "results.json")
    assert d["schema_version"] == "2.3"
    for k in ("estimate", "lower", "upper"):
        assert k in d["paf"]
    assert [s["name"] for s in d["scenarios"]] == list(SCENARIO_NAMES)
    for s in d["scenarios"]:
        assert {"estimate", "lower", "upper"} <= set(s["pif"])
    c = d["curve"]
    assert c["model"] == "log-linear"
    assert isinstance(c["coefficients"], list) and len(c["coefficients"]) == 1
    assert np.shape(c["covariance"]) == (1, 1)
    assert c["max_dose"] == results.curve.max_dose
    assert "nonlinearity_p" in c
    assert len(c["fitted"]) == 3 and all({"dose", "rr_reported", "rr_fitted"} <= set(f)
                                         for f in c["fitted"])
    assert np.shape(c["log_rr_covariance"]) == (3, 3)
    e = d["exposure"]
    assert e["family"] == "lognormal" and set(e["parameters"]) == {"gm", "gsd"}
    for k in ("unexposed", "share_beyond_max_dose", "detected", "censored", "fits"):
        assert k in e
    assert e["detected"] + e["censored"] == results.exposure.fit.n
    cat = d["categorical"]
    for k in ("cutpoints", "shares", "methods", "continuous_paf"):
        assert k in cat
    assert len(cat["shares"]) == len(cat["cutpoints"]) + 1
    assert [m["method"] for m in cat["methods"]] == ["reported", "midpoint", "band-mean"]
    for m in cat["methods"]:
        assert len(m["rr"]) == len(cat["shares"]) and isinstance(m["paf"], float)


def test_results_json_round_trips_exactly(written, results):
    """json.dumps(allow_nan=False) then json.loads gives back to_dict()
    exactly (Python floats round-trip through their repr), and the PAF in
    the file agrees with scipy.integrate.quad (reference library)."""
    d = strict_json(written[0] / "results.json")
    assert d == results.to_dict()
    assert d["paf"]["estimate"] == results.paf.estimate
    assert d["paf"]["estimate"] == pytest.approx(quad_paf(results), rel=1e-8)


def test_results_json_refuses_nan(results, tmp_path, monkeypatch):
    """A NaN reaching the writer stops it (allow_nan=False) and nothing is written."""
    bad = results.to_dict()
    bad["paf"]["estimate"] = math.nan
    monkeypatch.setattr(type(results), "to_dict", lambda self: bad)
    out = tmp_path / "nan"
    with pytest.raises(ValueError):
        write_outputs(results, out, figures=False)
    assert not out.exists()
    assert list(tmp_path.iterdir()) == []


def test_scenarios_csv_full_precision(written, results):
    rows = read_csv(written[0] / "scenarios.csv")
    assert [r["name"] for r in rows] == list(SCENARIO_NAMES)
    for row, s in zip(rows, results.scenarios):
        assert float(row["pif"]) == s.pif.estimate  # exact: repr round-trips
        assert row["kind"] == s.kind and float(row["value"]) == s.value
        assert row["pif_lower"] == ""
    assert rows[0]["value_unit"] == UNIT and rows[1]["value_unit"] == ""


def test_categorical_csv_shares_match_scipy(written, results):
    """Band shares: u + (1-u) F(c1) for the first band, (1-u)(F(c_i+1) - F(c_i))
    after, (1-u)(1 - F(c_K)) for the open band; F from scipy.stats.lognorm
    (reference library)."""
    rows = read_csv(written[0] / "categorical.csv")
    ex = results.exposure
    f = stats.lognorm(s=np.log(ex.parameters["gsd"]), scale=ex.parameters["gm"])
    cuts = results.categorical.cutpoints
    cdf = np.concatenate([[0.0], f.cdf(cuts), [1.0]])
    expected = (1 - ex.unexposed) * np.diff(cdf)
    expected[0] += ex.unexposed
    np.testing.assert_allclose([float(r["share"]) for r in rows], expected, rtol=1e-10)
    assert f"lower ({UNIT})" in rows[0] and rows[-1][f"upper ({UNIT})"] == ""
    for m in results.categorical.methods:
        assert [float(r[f"rr_{m.method}"]) for r in rows] == [float(v) for v in m.rr]


def test_curve_fit_csv(written, results):
    rows = read_csv(written[0] / "curve_fit.csv")
    assert len(rows) == 4 and rows[0]["reference"] == "true"
    b, xref = float(results.curve.coef[0]), results.curve.model.reference_dose
    for r in rows[1:]:
        dose = float(r[f"dose ({UNIT})"])
        # log-linear closed form at the assigned dose (all doses <= max_dose)
        assert float(r["rr_fitted"]) == pytest.approx(math.exp(b * (dose - xref)), rel=1e-12)
    assert rows[-1][f"upper ({UNIT})"] == ""


def test_exposure_fits_and_convergence_csv(written, results):
    fits = read_csv(written[0] / "exposure_fits.csv")
    assert fits[0]["family"] == "lognormal" and fits[0]["selected"] == "true"
    assert float(fits[0]["gm"]) == results.exposure.parameters["gm"]
    assert float(fits[0]["loglik"]) == results.exposure.fit.loglik
    conv = read_csv(written[0] / "convergence.csv")
    assert [int(r["bands"]) for r in conv] == list(range(2, 21))


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _fail(*args, **kwargs):
    raise RuntimeError("simulated failure while drawing")


def test_failure_midway_leaves_nothing(results, tmp_path, monkeypatch):
    """A figure that fails after results.json and the CSVs were produced:
    out_dir is not created, its missing parents are removed again, and no
    temporary folder is left behind."""
    monkeypatch.setattr(figure_module, "plot_contribution", _fail)
    out = tmp_path / "new" / "deeper" / "out"
    with pytest.raises(RuntimeError, match="simulated"):
        write_outputs(results, out)
    assert not out.exists() and not (tmp_path / "new").exists()
    assert list(tmp_path.iterdir()) == []


def test_failure_midway_leaves_previous_run_unchanged(results, tmp_path, monkeypatch):
    """A previous run in the folder stays byte for byte when the next run
    fails while drawing; no temporary or backup folder is left."""
    out = tmp_path / "out"
    write_outputs(results, out, figures=False)
    before = _snapshot(out)
    monkeypatch.setattr(figure_module, "plot_categorical", _fail)
    with pytest.raises(RuntimeError):
        write_outputs(results, out)
    assert _snapshot(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_failure_in_report_leaves_nothing(results, tmp_path, monkeypatch):
    """The report is the last file produced; failing there still writes nothing."""
    from doseattr.outputs import report

    monkeypatch.setattr(report, "categorical_section", _fail)
    out = tmp_path / "out"
    with pytest.raises(RuntimeError):
        write_outputs(results, out, figures=False)
    assert not out.exists() and list(tmp_path.iterdir()) == []


def test_existing_folder_with_user_files_is_refused(results, tmp_path):
    """A folder holding files doseattr did not write is refused, naming the
    first such file, and nothing in it changes (issue 8: no overwriting a
    user's results.json)."""
    out = tmp_path / "out"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    (out / "results.json").write_text("{\"old\": true}")
    before = _snapshot(out)
    with pytest.raises(InputError, match=r"'notes\.txt' was not written by doseattr"):
        write_outputs(results, out, figures=False)
    assert _snapshot(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_empty_existing_folder_is_filled(results, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    write_outputs(results, out, figures=False)
    assert (out / "report.html").is_file() and not (out / "figures").exists()


def test_out_is_a_file(results, tmp_path):
    target = tmp_path / "taken"
    target.write_text("x")
    with pytest.raises(InputError, match="not a folder"):
        write_outputs(results, target, figures=False)
    assert target.read_text() == "x"


def test_results_json_text_is_strict(results):
    text = write_module.results_json(results)
    assert "NaN" not in text and "Infinity" not in text
    assert json.loads(text) == results.to_dict()


def test_demo_analysis_through_the_pipeline(tmp_path):
    """The bundled demo run by the analysis layer and written: the contract
    keys are there and every CSV parses."""
    from doseattr.analysis.config import load_analysis
    from doseattr.analysis.pipeline import run_analysis

    demo = Path(__file__).resolve().parents[1] / "data_demo" / "analysis.toml"
    results = run_analysis(load_analysis(demo))
    paths = write_outputs(results, tmp_path / "demo")
    d = strict_json(tmp_path / "demo" / "results.json")
    assert d == results.to_dict()
    assert d["exposure"]["family"] == "lognormal" and len(d["scenarios"]) == 3
    for p in paths:
        if p.suffix == ".csv":
            assert read_csv(p), p
    html = (tmp_path / "demo" / "report.html").read_text(encoding="utf-8")
    for s in d["scenarios"]:
        assert s["name"] in html
