"""Checking an analysis without computing it (issue 8 item 3).

Every refusal that a run makes is made by ``check_analysis`` too, and by
``run_analysis`` before its first Monte Carlo draw: the core's ``propagate``
is replaced by one that fails the test if called. The expected facts come
from outside the code under test: the counts in the lines are read from the
demo's CSV files with the standard library's csv module; the divergences are
closed forms (the lognormal has no moment generating function, so
E[exp(bX)] is infinite for every b > 0; the gamma's is finite for
b < 1/scale; Johnson, Kotz & Balakrishnan, Continuous Univariate
Distributions, from memory); the 5-SE bound is the shape's own lower limit
(alpha > -1, gamma > 0, delta > 0 for RR = 1 + alpha(1 - exp(-gamma z^delta))
to rise from 1 and stay positive, from the formula).
"""

from __future__ import annotations

import csv
import hashlib
import shutil
import tomllib
from pathlib import Path

import pytest

import doseattr.analysis.pipeline as pipeline_module
import doseattr.core.attribution.categorical as categorical_module
import doseattr.core.uncertainty.propagate as propagate_module
from doseattr.analysis.check import check_analysis
from doseattr.analysis.config import analysis_from_dict, load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError
from tests.analysis_helpers import BANDS, MEASUREMENTS

DEMO = Path(__file__).resolve().parent.parent / "data_demo"
SAT = {"model": "saturating-exponential", "alpha": 1.5, "gamma": 0.08, "delta": 1.3,
       "threshold": 2.4}


@pytest.fixture
def no_draws(monkeypatch):
    """Make any Monte Carlo propagation, and the results computed after
    the point PAF (categorical comparison, model comparisons), fail the
    test."""
    def refuse(*args, **kwargs):
        raise AssertionError("computing started before the input was refused")

    monkeypatch.setattr(propagate_module, "propagate", refuse)
    monkeypatch.setattr(categorical_module, "categorical_comparison", refuse)
    monkeypatch.setattr(pipeline_module, "curve_variants", refuse)


def _tables(tmp_path: Path) -> Path:
    (tmp_path / "bands.csv").write_text(BANDS)
    (tmp_path / "measurements.csv").write_text(MEASUREMENTS)
    return tmp_path


def _refused_alike(analysis, pattern: str) -> str:
    """check_analysis and run_analysis refuse ``analysis`` with the same
    one line, matching ``pattern``."""
    with pytest.raises(InputError, match=pattern) as checked:
        check_analysis(analysis)
    with pytest.raises(InputError) as ran:
        run_analysis(analysis)
    assert ran.value.line() == checked.value.line()
    assert "\n" not in checked.value.line()
    return checked.value.line()


def _valid_outcome() -> dict:
    """A first outcome that is valid and would be propagated (it has a
    standard error and [uncertainty] is on)."""
    return {"name": "A", "curve": {"model": "linear", "err": 0.05, "ci": [0.02, 0.08],
                                   "beyond": "extend"}}


# -- late checks, one by one ----------------------------------------------------------
def test_knots_outside_the_doses(tmp_path, no_draws):
    """Spline knots below the lowest assigned dose (the bands' doses are
    at least 0, so a knot at -5 is outside them)."""
    d = {"unit": "ug/m3",
         "curve": {"table": "bands.csv", "model": "spline", "knots": [-5.0, 15.0, 30.0]},
         "exposure": {"table": "measurements.csv", "family": "lognormal"},
         "uncertainty": {"draws": 200, "seed": 3}}
    line = _refused_alike(analysis_from_dict(d, base_dir=_tables(tmp_path)),
                          r"\[curve\] key 'knots'")
    assert "got -5 to 30" in line


def test_knots_in_a_later_outcome_stop_the_run_before_the_first(tmp_path, no_draws):
    """Before, the first outcome's Monte Carlo ran before the second
    outcome's knots were looked at."""
    d = {"unit": "ug/m3", "exposure": {"table": "measurements.csv", "family": "lognormal"},
         "uncertainty": {"draws": 200, "seed": 3},
         "outcome": [_valid_outcome(),
                     {"name": "B", "curve": {"table": "bands.csv", "model": "spline",
                                             "knots": [-5.0, 15.0, 30.0]}}]}
    _refused_alike(analysis_from_dict(d, base_dir=_tables(tmp_path)),
                   r"\[\[outcome\]\] 2 \('B'\) \[outcome.curve\] key 'knots'")


def test_stratum_columns_that_do_not_fit_the_family(tmp_path, no_draws):
    """shape and scale describe a gamma or Weibull, not the shared
    lognormal; the row and column are named."""
    (tmp_path / "strata.csv").write_text("stratum,cases,shape,scale\nnorth,40,,\n"
                                         "south,25,2.0,4.0\n")
    d = {"unit": "ug/m3", "curve": {"model": "linear", "err": 0.05, "ci": [0.02, 0.08]},
         "exposure": {"gm": 8.0, "gsd": 2.0}, "burden": {"table": "strata.csv"},
         "uncertainty": {"draws": 200, "seed": 3}}
    line = _refused_alike(analysis_from_dict(d, base_dir=tmp_path), r"row 3, column 'scale'")
    assert "strata.csv" in line


def test_stratum_mean_sd_with_an_empirical_exposure(tmp_path, no_draws):
    (tmp_path / "strata.csv").write_text("stratum,cases,mean,sd\nnorth,40,,\nsouth,25,9,4\n")
    (tmp_path / "measurements.csv").write_text(MEASUREMENTS)
    d = {"unit": "ug/m3", "curve": {"model": "linear", "err": 0.05, "ci": [0.02, 0.08]},
         "exposure": {"table": "measurements.csv", "family": "empirical"},
         "burden": {"table": "strata.csv"}, "uncertainty": {"draws": 200, "seed": 3}}
    line = _refused_alike(analysis_from_dict(d, base_dir=tmp_path), r"row 3, column 'sd'")
    assert "empirical" in line


def test_stratum_exposure_with_an_infinite_expected_rr(tmp_path, no_draws):
    """Log-linear RR extended without limit: finite over the shared gamma
    (b = ln 1.1 / 10 is below 1/scale = 0.5) but infinite over the
    stratum's own lognormal, so the stratum's row is named."""
    (tmp_path / "strata.csv").write_text("stratum,cases,gm,gsd\nnorth,40,,\nsouth,25,8,2\n")
    d = {"unit": "ug/m3",
         "curve": {"model": "log-linear", "rr": 1.1, "per": 10, "beyond": "extend"},
         "exposure": {"mean": 8.0, "sd": 4.0, "family": "gamma"},
         "burden": {"table": "strata.csv"}, "uncertainty": {"draws": 200, "seed": 3}}
    line = _refused_alike(analysis_from_dict(d, base_dir=tmp_path), r"strata.csv: row 3: ")
    assert "infinite" in line


def test_log_linear_extended_over_a_lognormal(no_draws):
    d = {"unit": "ug/m3",
         "curve": {"model": "log-linear", "rr": 1.1, "per": 10, "beyond": "extend"},
         "exposure": {"gm": 8.0, "gsd": 2.0}, "uncertainty": {"draws": 200, "seed": 3}}
    _refused_alike(analysis_from_dict(d), r"\[curve\] key 'beyond'.*infinite")


def test_shape_standard_error_past_the_bound(no_draws):
    """alpha - 5 SE = 1.5 - 5 x 0.6 = -1.5 is not above -1."""
    d = {"unit": "ug/m3", "curve": dict(SAT, alpha_se=0.6),
         "exposure": {"gm": 10.0, "gsd": 2.0}, "uncertainty": {"draws": 200, "seed": 3}}
    line = _refused_alike(analysis_from_dict(d), r"\[curve\] key 'alpha_se'")
    assert "-1.5" in line


def test_shape_standard_error_in_a_later_outcome(no_draws):
    d = {"unit": "ug/m3", "exposure": {"gm": 10.0, "gsd": 2.0},
         "uncertainty": {"draws": 200, "seed": 3},
         "outcome": [_valid_outcome(), {"name": "B", "curve": dict(SAT, gamma_se=0.02)}]}
    # gamma - 5 SE = 0.08 - 0.10 = -0.02 is not above 0
    _refused_alike(analysis_from_dict(d),
                   r"\[\[outcome\]\] 2 \('B'\) \[outcome.curve\] key 'gamma_se'")


def test_minimum_risk_where_a_later_outcome_has_no_valid_rr(no_draws):
    """RR = 1 - 0.05 x is 1 - 0.05 x 30 = -0.5 at the minimum-risk level 30
    (the formula); the second outcome is refused before the first's draws."""
    d = {"unit": "ug/m3", "exposure": {"gm": 8.0, "gsd": 2.0},
         "attribution": {"minimum_risk": 30.0}, "uncertainty": {"draws": 200, "seed": 3},
         "outcome": [_valid_outcome(),
                     {"name": "B", "curve": {"model": "linear", "err": -0.05,
                                             "max_dose": 10.0}}]}
    line = _refused_alike(analysis_from_dict(d), r"\[attribution\] key 'minimum_risk'")
    assert "reaches 0 at 20" in line


def test_band_mean_doses_need_a_fitted_exposure(tmp_path, no_draws):
    d = {"unit": "ug/m3",
         "curve": {"table": "bands.csv", "model": "log-linear", "dose": "band-mean"},
         "exposure": {"table": "measurements.csv", "family": "empirical"},
         "uncertainty": {"draws": 200, "seed": 3}}
    path = tmp_path / "analysis.toml"
    _tables(tmp_path)
    path.write_text('unit = "ug/m3"\n[curve]\ntable = "bands.csv"\nmodel = "log-linear"\n'
                    'dose = "band-mean"\n[exposure]\ntable = "measurements.csv"\n'
                    'family = "empirical"\n[uncertainty]\ndraws = 200\nseed = 3\n')
    line = _refused_alike(load_analysis(path), r"\[curve\] key 'dose'")
    assert line.split(": ")[0] == str(path)
    _refused_alike(analysis_from_dict(d, base_dir=tmp_path), r"\[curve\] key 'dose'")


# -- a valid analysis ------------------------------------------------------------------
def _data_rows(path: Path) -> list[dict]:
    with path.open(newline="") as f:
        return list(csv.DictReader(line for line in f if not line.startswith("#")))


def test_demo_has_one_line_per_section():
    lines = check_analysis(load_analysis(DEMO / "analysis.toml"))
    assert [line.split(":")[0] for line in lines] == ["curve", "exposure", "attribution",
                                                      "uncertainty", "burden"]
    meas = _data_rows(DEMO / "measurements.csv")
    non_detects = sum(r["value"].strip().startswith("<") for r in meas)
    assert f"{len(meas)} measurements" in lines[1] and f"({non_detects} non-detects)" in lines[1]
    bands = _data_rows(DEMO / "study_bands.csv")
    assert f"{len(bands)} bands" in lines[0]
    strata = _data_rows(DEMO / "districts.csv")
    own = sum(bool(r["gm"].strip()) for r in strata)
    cases = sum(float(r["cases"]) for r in strata)
    assert f"{len(strata)} strata" in lines[4] and f"{cases:g} observed cases" in lines[4]
    assert f"({own} with their own exposure)" in lines[4]
    settings = tomllib.loads((DEMO / "analysis.toml").read_text())
    u = settings["uncertainty"]
    assert f"{u['draws']} Monte Carlo draws, seed {u['seed']}" in lines[3]
    assert f"{len(settings['scenario'])} scenarios" in lines[2]
    assert f"minimum-risk level {settings['attribution']['minimum_risk']:g} ug/m3" in lines[2]


def test_outcomes_name_each_outcome(tmp_path):
    (tmp_path / "strata.csv").write_text("stratum,cases\nnorth,40\nsouth,25\n")
    d = {"unit": "ug/m3", "exposure": {"gm": 8.0, "gsd": 2.0},
         "outcome": [dict(_valid_outcome(), burden={"table": "strata.csv"}),
                     {"name": "B", "curve": {"model": "linear", "err": 0.02}}]}
    lines = check_analysis(analysis_from_dict(d, base_dir=tmp_path))
    assert [line.split(":")[0] for line in lines] == [
        "exposure", "uncertainty", "outcome 'A'", "outcome 'A'", "outcome 'A'",
        "outcome 'B'", "outcome 'B'"]
    assert "burden: 2 strata" in lines[4] and "65 observed cases" in lines[4]


def _snapshot(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def test_check_writes_nothing(tmp_path, monkeypatch, no_draws):
    inputs = tmp_path / "inputs"
    shutil.copytree(DEMO, inputs, ignore=shutil.ignore_patterns("__pycache__", "*.py"))
    before = _snapshot(inputs)
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    assert len(check_analysis(load_analysis(inputs / "analysis.toml"))) == 5
    assert list(work.iterdir()) == []
    assert _snapshot(inputs) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["inputs", "work"]


def _cli_check():
    from doseattr import cli

    if "check" not in (cli.__doc__ or ""):
        pytest.skip("no check subcommand yet")
    return cli.main


def test_cli_check_prints_the_lines(tmp_path, monkeypatch, capsys, no_draws):
    main = _cli_check()
    monkeypatch.chdir(tmp_path)
    assert main(["check", str(DEMO / "analysis.toml")]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out == check_analysis(load_analysis(DEMO / "analysis.toml"))
    assert list(tmp_path.iterdir()) == []


def test_cli_check_refuses_with_one_line(tmp_path, monkeypatch, capsys, no_draws):
    main = _cli_check()
    _tables(tmp_path)
    path = tmp_path / "analysis.toml"
    path.write_text('unit = "ug/m3"\n[curve]\ntable = "bands.csv"\nmodel = "spline"\n'
                    'knots = [-5.0, 15.0, 30.0]\n[exposure]\ntable = "measurements.csv"\n'
                    'family = "lognormal"\n[uncertainty]\ndraws = 200\n')
    monkeypatch.chdir(tmp_path)
    before = _snapshot(tmp_path)
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "analysis.toml" in err[0] and "[curve] key 'knots'" in err[0]
    assert _snapshot(tmp_path) == before


def test_quadrature_failure_at_the_point_fit_names_the_exposure_section(monkeypatch) -> None:
    """The engine's probability check (a ConvergenceError, raised when the
    fixed rule cannot resolve a distribution) is reported as one line at
    ``[exposure]`` of the analysis file, not as an error naming nothing."""
    import doseattr.core.attribution.fractions as fractions_module
    from doseattr.errors import ConvergenceError

    def unresolved(*args, **kwargs):
        raise ConvergenceError("quadrature recovered the lognormal distribution's probability "
                               "only to 1.0e-03")

    monkeypatch.setattr(fractions_module, "paf", unresolved)
    with pytest.raises(InputError) as err:
        check_analysis(load_analysis(DEMO / "analysis.toml"))
    assert err.value.location == "[exposure]"
    assert err.value.source is not None and err.value.source.endswith("analysis.toml")
    assert "\n" not in err.value.line()


def test_outcomes_share_one_exposure_fit(tmp_path, monkeypatch):
    """Two [[outcome]] blocks over the same [exposure]: the exposure is
    fitted once and both outcomes use that one fit (before, each outcome
    refitted it)."""
    import doseattr.analysis.check as check_module

    calls = []
    real = check_module.build_exposure

    def counted(analysis):
        calls.append(1)
        return real(analysis)

    monkeypatch.setattr(check_module, "build_exposure", counted)
    d = {"unit": "ug/m3", "exposure": {"table": "measurements.csv", "family": "lognormal"},
         "outcome": [_valid_outcome(), dict(_valid_outcome(), name="B")]}
    done = check_module.prepare_all(analysis_from_dict(d, base_dir=_tables(tmp_path)))
    assert len(calls) == 1
    first, second = (p.built_exposure for _, p in done.outcomes)
    assert first is second
