"""Every key the issues say external validation reads, as written there:
the analysis-file keys of issue 2 item 4 and of the "Keys that external
validation reads" sections of issues 3, 4 and 5, and the results.json keys
they name. These are shape and presence checks (the numbers behind them are
checked against outside references in the other test_analysis_* files);
each run goes through the command line so that results.json itself is read.
"""

from __future__ import annotations

import csv
import json
import textwrap
from pathlib import Path

import numpy as np
import pytest

from doseattr.analysis.config import load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.cli import main

BANDS = """\
lower,upper,dose,rr,ci_lower,ci_upper,cases,controls
0,5,2,1,,,120,480
5,10,7,1.30,1.05,1.61,95,310
10,20,14,1.55,1.20,2.00,88,220
20,40,28,1.80,1.30,2.49,60,140
40,,55,2.10,1.40,3.15,40,80
"""
MEASUREMENTS = """\
value,detected,weight
12.0,true,1
9.5,true,2
<3,false,1
3.0,false,1
17.3,true,3
11.0,true,1
8.2,true,2
26.4,true,1
5.1,true,1
"""
STRATA = "stratum,cases,population\nNorth,120,5000\nSouth,80,3000\n"
POINTS = "dose,rr,ci_lower,ci_upper\n0,1,,\n10,1.2,1.05,1.37\n40,1.6,1.25,2.05\n"
DRAWS = "dose,d1,d2,d3\n0,1,1,1\n20,1.1,1.3,1.2\n50,1.3,1.7,1.5\n"
BINS = "lower,upper,count\n0,5,120\n5,10,260\n10,20,310\n20,,90\n"
HISTORY = ("worker,start,end,intensity\nW1,2000-01-01,2006-01-01,1.0\n"
           "W2,2001-01-01,2011-01-01,0.5\nW3,1995-01-01,2003-06-30,2.0\n"
           "W4,2005-01-01,2015-01-01,1.5\n")
BANDS_IR = BANDS.replace("controls", "person_time").replace(",480\n", ",48000\n")
BANDS_CUM = BANDS.replace("controls", "persons").replace(",480\n", ",4800\n")
FILES = {"bands.csv": BANDS, "ir.csv": BANDS_IR, "cum.csv": BANDS_CUM, "m.csv": MEASUREMENTS,
         "strata.csv": STRATA, "points.csv": POINTS, "draws.csv": DRAWS, "bins.csv": BINS,
         "h.csv": HISTORY}

FULL = """\
unit = "ug/m3"
[curve]
table = "bands.csv"
design = "case-control"
model = "log-linear"
beyond = "flat"
dose = "given"
covariance = "counts"
[exposure]
table = "m.csv"
family = "lognormal"
unexposed = 0.1
[attribution]
minimum_risk = [1, 3]
cutpoints = [5, 10, 20]
[[scenario]]
name = "cap"
cap = 15
[[scenario]]
name = "scale"
scale = 0.8
[[scenario]]
name = "minus"
reduce_by = 2
[uncertainty]
draws = 200
seed = 7
poisson_cases = true
[burden]
table = "strata.csv"
"""


OUTCOMES = """\
unit = "ug/m3"
[exposure]
gm = 9.0
gsd = 2.0
[uncertainty]
draws = 200
[[outcome]]
name = "A"
[outcome.curve]
model = "linear"
err = 0.03
ci = [0.01, 0.05]
[outcome.burden]
table = "strata.csv"
[[outcome]]
name = "B"
[outcome.curve]
model = "log-linear"
rr = 1.1
per = 10
max_dose = 50
[outcome.burden]
table = "strata.csv"
"""


def _results(tmp_path: Path, text: str, cli: bool = True) -> tuple[dict, Path]:
    """results.json as written by the command line (``cli``), or the same
    dictionary through a JSON round trip (quicker: no report)."""
    for name, body in FILES.items():
        (tmp_path / name).write_text(body)
    (tmp_path / "a.toml").write_text(textwrap.dedent(text))
    out = tmp_path / "out"
    if not cli:
        results = run_analysis(load_analysis(tmp_path / "a.toml"))
        return json.loads(json.dumps(results.to_dict(), allow_nan=False)), out
    assert main(["run", str(tmp_path / "a.toml"), "--out", str(out), "--quiet"]) == 0
    return json.loads((out / "results.json").read_text()), out


def _interval(v) -> bool:
    return {"estimate", "lower", "upper"} <= set(v) and v["lower"] <= v["upper"]


def _check_burden(b: dict, n: int) -> None:
    assert len(b["strata"]) == n
    for row in b["strata"] + [b["total"]]:
        assert isinstance(row["paf"]["estimate"], float) and _interval(row["paf"])
        assert isinstance(row["cases"], float) and _interval(row["attributable"])
    assert [r["stratum"] for r in b["strata"]] == ["North", "South"]
    assert {s["name"] for s in b["total"]["scenarios"]} >= {"cap"}
    assert all(_interval(s["averted"]) for s in b["total"]["scenarios"])


def test_issue_2_3_4_5_keys_on_a_full_analysis(tmp_path):
    d, _ = _results(tmp_path, FULL)
    assert d["schema_version"] and _interval(d["paf"])
    assert [s["name"] for s in d["scenarios"]] == ["cap", "scale", "minus"]
    assert all(_interval(s["pif"]) and _interval(s["averted"]) for s in d["scenarios"])
    c = d["curve"]
    assert c["model"] == "log-linear" and isinstance(c["coefficients"], list)
    assert np.shape(c["covariance"]) == (1, 1) and c["max_dose"] == 55.0
    assert [f["dose"] for f in c["fitted"]] == [7.0, 14.0, 28.0, 55.0]
    assert all({"rr_reported", "rr_fitted"} <= set(f) for f in c["fitted"])
    assert np.shape(c["log_rr_covariance"]) == (4, 4)
    e = d["exposure"]
    assert e["family"] == "lognormal" and set(e["parameters"]) == {"gm", "gsd"}
    assert e["unexposed"] == 0.1 and 0 <= e["share_beyond_max_dose"] <= 1
    assert e["detected"] == 7 and e["censored"] == 2
    assert [set(f) >= {"family", "parameters", "loglik", "aic"} for f in e["fits"]] == [True]
    cat = d["categorical"]
    assert cat["cutpoints"] == [5.0, 10.0, 20.0] and len(cat["shares"]) == 4
    assert [m["method"] for m in cat["methods"]] == ["midpoint", "band-mean"]
    assert all(len(m["rr"]) == 4 and isinstance(m["paf"], float) for m in cat["methods"])
    assert isinstance(cat["continuous_paf"], float)
    _check_burden(d["burden"], 2)
    widths = d["uncertainty"]["width_by_source"]
    assert [w["source"] for w in widths] == ["curve", "exposure", "minimum_risk", "cases"]
    assert all(w["width"] == pytest.approx(w["upper"] - w["lower"]) for w in widths)


def test_reported_method_with_the_study_bands(tmp_path):
    d, _ = _results(tmp_path, FULL.replace("cutpoints = [5, 10, 20]\n", ""), cli=False)
    methods = d["categorical"]["methods"]
    assert [m["method"] for m in methods] == ["reported", "midpoint", "band-mean"]
    assert methods[0]["rr"] == [1.0, 1.3, 1.55, 1.8, 2.1]


@pytest.mark.parametrize("curve, check", [
    ('table = "bands.csv"\nmodel = "spline"\nknots = [2, 14, 55]',
     lambda c: np.shape(c["covariance"]) == (2, 2) and 0 <= c["nonlinearity_p"] <= 1),
    ('table = "bands.csv"\nmodel = "spline"\nknot_count = 4',
     lambda c: np.shape(c["covariance"]) == (3, 3) and c["nonlinearity_p"] is not None),
    ('table = "bands.csv"\ndose = "band-median"\ncovariance = "independent"',
     lambda c: c["covariance_method"] == "independent"),
    ('table = "bands.csv"\ndose = "midpoint"\ncovariance = "effective-counts"',
     lambda c: c["covariance_method"] == "effective-counts"),
    ('table = "bands.csv"\ndose = "band-mean"\nmodel = "linear"', lambda c: c["model"] == "linear"),
    ('table = "bands.csv"\nmodel = "power"\noffset = 1', lambda c: c["model"] == "power"),
    ('table = "ir.csv"\ndesign = "incidence-rate"',
     lambda c: c["covariance_method"] == "counts"),
    ('table = "cum.csv"\ndesign = "cumulative-incidence"',
     lambda c: c["covariance_method"] == "counts"),
    ('points = "points.csv"', lambda c: c["max_dose"] == 40.0),
    ('draws = "draws.csv"', lambda c: c["max_dose"] == 50.0),
    ('model = "log-linear"\nrr = 1.2\nper = 10\nci = [1.1, 1.3]\nmax_dose = 60',
     lambda c: c["max_dose"] == 60.0),
    ('model = "linear"\nerr = 0.1\nper = 10\nreference_dose = 1', lambda c: c["max_dose"] is None),
    ('model = "power"\nexponent = 0.3\nci = [0.1, 0.5]\noffset = 1\nbeyond = "extend"',
     lambda c: c["model"] == "power"),
])
def test_curve_keys(tmp_path, curve, check):
    text = f'unit = "ug/m3"\n[curve]\n{curve}\n[exposure]\ngm = 9.0\ngsd = 2.0\n'
    d, _ = _results(tmp_path, text, cli=False)
    assert check(d["curve"])


@pytest.mark.parametrize("exposure, family, names", [
    ('table = "m.csv"\nfamily = "gamma"', "gamma", {"shape", "scale"}),
    ('table = "m.csv"\nfamily = "weibull"', "weibull", {"shape", "scale"}),
    ('table = "m.csv"\nfamily = "best"', None, None),
    ('family = "gamma"\nshape = 2.0\nscale = 4.0', "gamma", {"shape", "scale"}),
    ('family = "lognormal"\nmean = 8.0\nsd = 6.0', "lognormal", {"gm", "gsd"}),
    ('percentiles = {50 = 8.0, 95 = 20.0}', "lognormal", {"gm", "gsd"}),
    ('bins = "bins.csv"\nfamily = "gamma"', "gamma", {"shape", "scale"}),
    ('table = "m.csv"\nfamily = "lognormal"\nsubstitution = [0.5]', "lognormal", {"gm", "gsd"}),
])
def test_exposure_keys(tmp_path, exposure, family, names):
    text = (f'unit = "ug/m3"\n[curve]\nmodel = "linear"\nerr = 0.02\n'
            f'[exposure]\n{exposure}\n')
    d, _ = _results(tmp_path, text, cli=False)
    e = d["exposure"]
    if family is None:  # best: every family tried, the chosen one first
        assert sorted(f["family"] for f in e["fits"]) == ["gamma", "lognormal", "weibull"]
        assert e["fits"][0]["family"] == e["family"]
    else:
        assert e["family"] == family and set(e["parameters"]) == names
    if "substitution" in exposure:
        assert set(e["substitution"][0]) >= {"fraction", "parameters", "paf", "difference"}


def test_histories_keys_and_workers_csv(tmp_path):
    text = ('unit = "mg/m3-years"\n[curve]\nmodel = "linear"\nerr = 0.02\n'
            '[exposure]\nhistories = "h.csv"\nas_of = "2020-01-01"\nlag_years = 5\n')
    d, out = _results(tmp_path, text)
    with open(out / "workers.csv", newline="") as fh:
        rows = list(csv.DictReader(row for row in fh if not row.startswith("#")))
    assert len(rows) == 4
    assert {"worker", "cumulative", "duration_years", "mean_intensity"} <= set(rows[0])
    assert d["exposure"]["family"] == "lognormal"


def test_outcomes_hold_the_same_keys(tmp_path):
    text = OUTCOMES
    d, _ = _results(tmp_path, text)
    assert [o["name"] for o in d["outcomes"]] == ["A", "B"]
    for o in d["outcomes"]:
        assert _interval(o["paf"]) and o["curve"]["model"] in ("linear", "log-linear")
        b = o["burden"]
        assert len(b["strata"]) == 2 and isinstance(b["total"]["paf"]["estimate"], float)
        assert _interval(b["total"]["attributable"]) and _interval(b["total"]["paf"])
