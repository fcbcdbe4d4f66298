"""Extreme but well-formed inputs, from the command line: each either gives
finite results that match an outside reference, or one refusal line that
names the file and the key or row and says what to change (issue 8, item 6).

References: closed forms derived beside each test (gamma moment generating
function, lognormal MLE on the log scale), scipy.special's incomplete gamma
function, scipy.integrate.quad, and hand-computed cumulative exposure. All
inputs are invented.
"""

from __future__ import annotations

import json
import math
import textwrap
from pathlib import Path

import numpy as np
import pytest
from reference_integrals import expect_over, expect_over_log_dose
from scipy import stats
from scipy.special import gammainc, gammaincc

from doseattr.cli import main

B_PER_10 = 1.2  # RR per 10 units of the entered log-linear curves (invented)
B = math.log(B_PER_10) / 10


def run(tmp_path: Path, toml: str, tables: dict[str, str] | None = None,
        raw: bytes | None = None):
    """``doseattr run`` in-process: (exit code, stderr lines, results or None)."""
    for name, text in (tables or {}).items():
        (tmp_path / name).write_text(textwrap.dedent(text))
    path = tmp_path / "analysis.toml"
    path.write_bytes(raw if raw is not None else textwrap.dedent(toml).encode())
    out = tmp_path / "out"
    code = main(["run", str(path), "--out", str(out), "--quiet"])
    return code, out


def outcome(capsys, tmp_path, toml, tables=None, raw=None):
    code, out = run(tmp_path, toml, tables, raw)
    err = capsys.readouterr().err.strip().splitlines()
    results = json.loads((out / "results.json").read_text()) if code == 0 else None
    if code == 2:
        assert not out.exists(), "a refused run wrote its output folder"
    return code, err, results


def refused(capsys, tmp_path, toml, tables=None, *, file: str, where: str, says: str):
    """Exit 2 with exactly one line naming ``file`` and ``where``."""
    code, err, _ = outcome(capsys, tmp_path, toml, tables)
    assert code == 2, err
    assert len(err) == 1, err
    line = err[0]
    assert file in line and where in line and says in line, line
    assert len(line) < 500, line
    return line


def entered(exposure: str, curve: str = f'rr = {B_PER_10}\nper = 10', extra: str = "") -> str:
    return (f'unit = "mg/m3"\n[curve]\nmodel = "log-linear"\n{curve}\n'
            f'[exposure]\n{exposure}\n[attribution]\nminimum_risk = 0\n{extra}')


def paf_flat_gamma(k: float, theta: float, b: float, c: float) -> float:
    r"""PAF for RR = exp(b min(x, c)) over Gamma(k, theta), closed form:
    E[e^{bX}; X <= c] = (1 - b theta)^{-k} P(k, c (1/theta - b)) (the tilted
    density is Gamma(k, theta / (1 - b theta))) and E[RR; X > c] = e^{bc}
    Q(k, c / theta); written as excess over 1 to keep precision for tiny k."""
    c1 = c * (1 / theta - b)
    excess = (math.expm1(-k * math.log1p(-b * theta)) * gammainc(k, c1) - gammaincc(k, c1)
              + math.exp(b * c) * gammaincc(k, c / theta))
    return excess / (1 + excess)


# -- a gamma shape near zero ------------------------------------------------------
@pytest.mark.parametrize("shape", [1e-3, 1e-8])
def test_gamma_shape_near_zero_matches_the_tilted_gamma_closed_form(capsys, tmp_path, shape):
    toml = entered(f'family = "gamma"\nshape = {shape}\nscale = 10',
                   f'rr = {B_PER_10}\nper = 10\nmax_dose = 100\nbeyond = "flat"')
    code, err, res = outcome(capsys, tmp_path, toml)
    assert code == 0, err
    expect = paf_flat_gamma(shape, 10.0, B, 100.0)  # closed form above, scipy.special
    assert res["paf"]["estimate"] == pytest.approx(expect, rel=1e-6)


# -- measurement outliers near 1e50 ---------------------------------------------------
def test_outlier_near_1e50_gives_the_closed_form_lognormal_mle(capsys, tmp_path):
    values = [round(2.0 + 0.37 * i, 2) for i in range(40)] + [1e50]
    table = "value\n" + "".join(f"{v!r}\n" for v in values)
    toml = entered('table = "m.csv"\nfamily = "lognormal"',
                   f'rr = {B_PER_10}\nper = 10\nmax_dose = 50\nbeyond = "flat"')
    code, err, res = outcome(capsys, tmp_path, toml, {"m.csv": table})
    assert code == 0, err
    # Normal MLE on the log scale (divisor n), common practice.
    y = np.log(values)
    gm, gsd = math.exp(y.mean()), math.exp(y.std())
    p = res["exposure"]["parameters"]
    assert p["gm"] == pytest.approx(gm, rel=1e-6) and p["gsd"] == pytest.approx(gsd, rel=1e-6)
    dist = stats.lognorm(s=math.log(gsd), scale=gm)
    # E[RR] - 1 by scipy.integrate.quad on the log scale, flat above 50.
    body = expect_over_log_dose(lambda x: math.expm1(B * x), dist, (), epsrel=1e-11, limit=400,
                                t_lower=-400, t_upper=math.log(50))
    excess = body + math.expm1(B * 50) * dist.sf(50)
    assert res["paf"]["estimate"] == pytest.approx(excess / (1 + excess), rel=1e-6)


def test_outlier_that_makes_the_fitted_mean_overflow_is_refused(capsys, tmp_path):
    # Six values, one 1e50: the log-scale SD is about 43, so the lognormal's
    # mean gm exp(s^2 / 2) is past 1.8e308; the fit is refused at the column.
    table = "value\n2\n3.5\n5\n8\n12\n1e50\n"
    toml = entered('table = "m.csv"\nfamily = "lognormal"',
                   f'rr = {B_PER_10}\nper = 10\nmax_dose = 50\nbeyond = "flat"')
    refused(capsys, tmp_path, toml, {"m.csv": table}, file="m.csv", where="column 'value'",
            says="mean beyond the float range")


def test_measurement_whose_square_overflows_is_refused_at_its_row(capsys, tmp_path):
    table = "value\n2\n3.5\n5\n1e300\n"
    toml = entered('table = "m.csv"\nfamily = "gamma"')
    refused(capsys, tmp_path, toml, {"m.csv": table}, file="m.csv",
            where="row 5, column 'value'", says="overflow beyond 1.34e+154")


# -- case counts near 1e19 ---------------------------------------------------------------
def test_case_counts_near_1e19_give_cases_times_the_gamma_closed_form(capsys, tmp_path):
    toml = entered('family = "gamma"\nshape = 2.0\nscale = 3.0', extra='[burden]\ntable = "b.csv"')
    code, err, res = outcome(capsys, tmp_path, toml,
                             {"b.csv": "stratum,cases\nA,1e19\nB,10000000000000000000\nC,5\n"})
    assert code == 0, err
    paf = 1 - (1 - B * 3.0) ** 2.0  # gamma MGF: E[e^{bX}] = (1 - b theta)^-k (from memory)
    strata = {s["stratum"]: s for s in res["burden"]["strata"]}
    assert strata["A"]["attributable"]["estimate"] == pytest.approx(1e19 * paf, rel=1e-12)
    assert strata["C"]["attributable"]["estimate"] == pytest.approx(5 * paf, rel=1e-12)
    assert res["burden"]["total"]["attributable"]["estimate"] == pytest.approx(
        (2e19 + 5) * paf, rel=1e-12)


def test_cases_whose_squares_overflow_are_refused_at_their_row(capsys, tmp_path):
    toml = entered('family = "gamma"\nshape = 2.0\nscale = 3.0', extra='[burden]\ntable = "b.csv"')
    refused(capsys, tmp_path, toml, {"b.csv": "stratum,cases\nA,5\nB,1e308\n"},
            file="b.csv", where="row 3, column 'cases'", says="1.34e+154")


def test_poisson_variation_of_1e19_cases_is_drawn(capsys, tmp_path):
    # numpy's Poisson sampler stops near 9.2e18; above 1e12 the normal approximation is used.
    toml = entered('family = "gamma"\nshape = 2.0\nscale = 3.0',
                   extra='[burden]\ntable = "b.csv"\n[uncertainty]\ndraws = 200\nseed = 1\n'
                         'poisson_cases = true\n')
    code, err, res = outcome(capsys, tmp_path, toml, {"b.csv": "stratum,cases\nA,1e19\nB,5\n"})
    assert code == 0, err
    paf = 1 - (1 - B * 3.0) ** 2.0  # gamma MGF (from memory); the curve has no CI here
    a = {s["stratum"]: s for s in res["burden"]["strata"]}["A"]["attributable"]
    assert a["estimate"] == pytest.approx(1e19 * paf, rel=1e-12)
    # Poisson SD sqrt(1e19) = 3.2e9 is 3e-10 of the count: the interval hugs the estimate.
    assert a["lower"] == pytest.approx(1e19 * paf, rel=1e-8)
    assert a["upper"] == pytest.approx(1e19 * paf, rel=1e-8)


# -- a standard error or SD near 1e300 ------------------------------------------------
def test_sd_near_1e300_lognormal_uses_the_moment_closed_form(capsys, tmp_path):
    toml = entered('family = "lognormal"\nmean = 10\nsd = 1e300',
                   f'rr = {B_PER_10}\nper = 10\nmax_dose = 50\nbeyond = "flat"')
    code, err, res = outcome(capsys, tmp_path, toml)
    assert code == 0, err
    # s^2 = ln(1 + CV^2) = 2 ln CV + ln(1 + CV^-2), gm = mean e^{-s^2/2} (from memory).
    s2 = 2 * math.log(1e299)
    p = res["exposure"]["parameters"]
    assert p["gsd"] == pytest.approx(math.exp(math.sqrt(s2)), rel=1e-9)
    assert p["gm"] == pytest.approx(10 * math.exp(-s2 / 2), rel=1e-9)
    # Almost all mass sits far below the curve's doses: quad in z for E[RR] - 1.
    mu, s = math.log(p["gm"]), math.sqrt(s2)
    zc = (math.log(50) - mu) / s
    excess = expect_over(lambda z: math.expm1(B * math.exp(mu + s * z)), stats.norm, (),
                         epsrel=1e-10, limit=200, lower=-40, upper=zc)
    excess += math.expm1(B * 50) * stats.norm.sf(zc)
    assert res["paf"]["estimate"] == pytest.approx(excess / (1 + excess), rel=1e-6)


def test_sd_near_1e300_gamma_is_refused_at_key_sd(capsys, tmp_path):
    # The gamma shape (mean/sd)^2 = 1e-598 is not a float.
    refused(capsys, tmp_path, entered('family = "gamma"\nmean = 10\nsd = 1e300'),
            file="analysis.toml", where="[exposure] key 'sd'", says="sd nearer the mean")


def test_standard_error_whose_square_overflows_is_refused(capsys, tmp_path):
    toml = entered('family = "gamma"\nshape = 2.0\nscale = 3.0',
                   'rr = 1.2\nper = 10\nci = [1e-300, 1e300]').replace('"log-linear"', '"linear"')
    refused(capsys, tmp_path, toml, file="analysis.toml", where="[curve]",
            says="standard error")


# -- a GSD a hair above 1 ------------------------------------------------------------------
def test_gsd_a_hair_above_1_is_refused_with_the_usable_bound(capsys, tmp_path):
    line = refused(capsys, tmp_path, entered("gm = 10\ngsd = 1.0000000001"),
                   file="analysis.toml", where="[exposure] key 'gsd'", says="gsd >= ")
    bound = float(line.rsplit("gsd >= ", 1)[1])
    assert bound == pytest.approx(math.exp(1e-6 * math.log(10)), rel=1e-9)


def test_gsd_just_above_the_bound_matches_quad(capsys, tmp_path):
    gsd = 1.00001
    code, err, res = outcome(capsys, tmp_path, entered(
        f"gm = 10\ngsd = {gsd}", f'rr = {B_PER_10}\nper = 10\nmax_dose = 100\nbeyond = "flat"'))
    assert code == 0, err
    s = math.log(gsd)
    # E[e^{bX}] = e^{b gm e^{s^2/2}} approximately; exactly by quad over z.
    e = expect_over(lambda z: math.exp(B * 10 * math.exp(s * z)), stats.norm, (),
                    epsrel=1e-13, limit=50, lower=-12, upper=12)
    assert res["paf"]["estimate"] == pytest.approx(1 - 1 / e, rel=1e-8)


# -- max_dose = 0 ------------------------------------------------------------------------
def test_max_dose_0_holds_the_curve_flat_so_every_fraction_is_0(capsys, tmp_path):
    toml = entered("gm = 10\ngsd = 2", f'rr = {B_PER_10}\nper = 10\nmax_dose = 0\n'
                   'beyond = "flat"', '[[scenario]]\nname = "half"\nscale = 0.5\n')
    code, err, res = outcome(capsys, tmp_path, toml)
    assert code == 0, err
    # RR(x) = RR(0) for every x >= 0: no exposure raises the risk (closed form).
    assert res["paf"]["estimate"] == 0.0
    assert res["scenarios"][0]["pif"]["estimate"] == 0.0


# -- a very steep linear excess risk ---------------------------------------------------
@pytest.mark.parametrize("err", [1e6, 1e300])
def test_steep_linear_excess_risk_matches_the_closed_form(capsys, tmp_path, err):
    toml = entered('family = "gamma"\nshape = 2.0\nscale = 3.0', f"err = {err}\nper = 1"
                   ).replace('"log-linear"', '"linear"')
    code, errs, res = outcome(capsys, tmp_path, toml)
    assert code == 0, errs
    b_mean = err * 6.0  # RR = 1 + b x, E[X] = k theta = 6: PAF = b E[X] / (1 + b E[X])
    assert res["paf"]["estimate"] == pytest.approx(b_mean / (1 + b_mean), rel=1e-12)


def test_linear_excess_risk_past_the_float_range_is_refused(capsys, tmp_path):
    toml = entered('family = "gamma"\nshape = 2.0\nscale = 3.0', "err = 1e308\nper = 1"
                   ).replace('"log-linear"', '"linear"')
    refused(capsys, tmp_path, toml, file="analysis.toml", where="[curve]",
            says="overflows the float range")


def test_expected_rr_that_underflows_to_0_is_refused(capsys, tmp_path):
    # RR = 5e-324 per unit over Gamma(2000, 1): E[RR] = (1 + 744.4)^-2000 (gamma MGF) = 0 in
    # double precision, so 1 - 1/E[RR] has no value (found by the fuzzer).
    toml = entered('family = "gamma"\nshape = 2000\nscale = 1', "rr = 5e-324\nper = 1")
    refused(capsys, tmp_path, toml, file="analysis.toml", where="[curve]",
            says="underflows to 0")


# -- a CSV cell longer than 128k characters ------------------------------------------------
def test_a_label_cell_longer_than_128k_characters_is_read(capsys, tmp_path):
    values = [2.0, 3.5, 5.0, 8.0, 12.0]
    rows = [f"{'x' * 200_000 if i == 2 else 'site'},{v}\n" for i, v in enumerate(values)]
    toml = entered('table = "m.csv"\nfamily = "lognormal"',
                   f'rr = {B_PER_10}\nper = 10\nmax_dose = 50\nbeyond = "flat"')
    code, err, res = outcome(capsys, tmp_path, toml, {"m.csv": "label,value\n" + "".join(rows)})
    assert code == 0, err
    y = np.log(values)  # lognormal MLE on the log scale (divisor n), common practice
    assert res["exposure"]["parameters"]["gm"] == pytest.approx(math.exp(y.mean()), rel=1e-9)


def test_a_number_cell_longer_than_128k_characters_is_refused_briefly(capsys, tmp_path):
    table = "value\n2\n3\n" + "1" * 200_000 + "\n"
    refused(capsys, tmp_path, entered('table = "m.csv"\nfamily = "lognormal"'), {"m.csv": table},
            file="m.csv", where="row 4, column 'value'", says="200000 characters")


# -- a TOML file that starts with a byte-order mark ------------------------------------------
def test_toml_with_a_byte_order_mark_is_read(capsys, tmp_path):
    toml = entered('family = "gamma"\nshape = 2.0\nscale = 3.0')
    code, err, res = outcome(capsys, tmp_path, "", raw=b"\xef\xbb\xbf" + toml.encode())
    assert code == 0, err
    assert res["paf"]["estimate"] == pytest.approx(1 - (1 - B * 3.0) ** 2, rel=1e-10)  # MGF


def test_integer_beyond_the_float_range_is_refused_at_its_key(capsys, tmp_path):
    toml = entered('family = "gamma"\nshape = 2.0\nscale = ' + "9" * 400)
    refused(capsys, tmp_path, toml, file="analysis.toml", where="[exposure] key 'scale'",
            says="beyond the float range")


# -- empirical work histories with one or two exposed workers --------------------------------
@pytest.mark.parametrize("jobs", [
    [("w1", "2010-01-01", "2015-01-01", 0.2), ("w2", "2005-01-01", "2012-01-01", 0.5),
     ("w3", "2021-01-01", "2023-01-01", 0.8)],
    [("w1", "2010-01-01", "2015-01-01", 0.2), ("w3", "2021-01-01", "2023-01-01", 0.8)],
])
def test_empirical_histories_accept_one_or_two_exposed_workers(capsys, tmp_path, jobs):
    from datetime import date

    table = "worker,start,end,intensity\n" + "".join(f"{w},{s},{e},{c}\n" for w, s, e, c in jobs)
    toml = ('unit = "mg/m3-years"\n[curve]\nmodel = "log-linear"\nrr = 1.5\nper = 1\n'
            '[exposure]\nhistories = "jobs.csv"\nas_of = "2024-01-01"\nlag_years = 4\n'
            'family = "empirical"\n[attribution]\nminimum_risk = 0\n')
    code, err, res = outcome(capsys, tmp_path, toml, {"jobs.csv": table})
    assert code == 0, err
    # Hand computation: cumulative = intensity x days before the cutoff 2020-01-01 / 365.25;
    # the empirical PAF is 1 - 1 / (mean over workers of RR), RR = 1.5^cumulative.
    cut = date(2020, 1, 1)
    cum = {}
    for w, s, e, c in jobs:
        days = max(0, (min(date.fromisoformat(e), cut) - date.fromisoformat(s)).days)
        cum[w] = cum.get(w, 0.0) + c * days / 365.25
    mean_rr = np.mean([1.5 ** v for v in cum.values()])
    assert res["paf"]["estimate"] == pytest.approx(1 - 1 / mean_rr, rel=1e-9)


def test_empirical_histories_with_no_exposed_worker_are_refused(capsys, tmp_path):
    toml = ('unit = "mg/m3-years"\n[curve]\nmodel = "log-linear"\nrr = 1.5\nper = 1\n'
            '[exposure]\nhistories = "jobs.csv"\nas_of = "2024-01-01"\nlag_years = 4\n'
            'family = "empirical"\n')
    refused(capsys, tmp_path, toml, {"jobs.csv": "worker,start,end,intensity\n"
                                                 "w3,2021-01-01,2023-01-01,0.8\n"},
            file="jobs.csv", where="column", says="at least 1 is needed")


# -- a gamma so narrow that double precision cannot resolve it (found by the fuzzer) ----------
def test_gamma_too_narrow_to_resolve_is_refused_at_key_sd(capsys, tmp_path):
    toml = entered('family = "gamma"\nmean = 5.5e16\nsd = 3.0', "err = 0.05\nper = 1"
                   ).replace('"log-linear"', '"linear"')
    refused(capsys, tmp_path, toml, file="analysis.toml", where="[exposure] key 'sd'",
            says="too narrow")


def test_narrow_gamma_within_the_bound_matches_the_closed_form(capsys, tmp_path):
    # CV 1e-4 at mean 1e6: the SD of ln X (about 1e-4) is above 1e-6 x ln(1e6) = 1.4e-5.
    toml = entered('family = "gamma"\nmean = 1e6\nsd = 100', "err = 1e-6\nper = 1"
                   ).replace('"log-linear"', '"linear"')
    code, err, res = outcome(capsys, tmp_path, toml)
    assert code == 0, err
    b_mean = 1e-6 * 1e6  # RR = 1 + b x: PAF = b E[X] / (1 + b E[X]) (closed form)
    assert res["paf"]["estimate"] == pytest.approx(b_mean / (1 + b_mean), rel=1e-9)


# -- found while probing beyond the listed cases ---------------------------------------------
def test_percentiles_too_far_apart_are_refused_at_their_key(capsys, tmp_path):
    # A lognormal through 1e-300 (median) and 1e300 (95th) has s = ln(1e600) / 1.645, so its
    # mean gm exp(s^2 / 2) is far beyond 1.8e308 (closed form).
    refused(capsys, tmp_path, entered('percentiles = {50 = 1e-300, 95 = 1e300}\n'
                                      'family = "lognormal"'),
            file="analysis.toml", where="[exposure] key 'percentiles'", says="too far apart")


def test_spline_knots_whose_cubes_overflow_are_refused(capsys, tmp_path):
    bands = ("lower,upper,rr,ci_lower,ci_upper\n0,10,1,,\n10,20,1.2,1.0,1.4\n"
             "20,1e300,1.5,1.2,1.9\n1e300,,2.0,1.5,2.7\n")
    toml = ('unit = "mg/m3"\n[curve]\ntable = "bands.csv"\nmodel = "spline"\n'
            '[exposure]\ngm = 10\ngsd = 2\n')
    refused(capsys, tmp_path, toml, {"bands.csv": bands}, file="analysis.toml",
            where="[curve] key 'model'", says="cubes")


def test_counts_near_0_are_refused_in_one_line(capsys, tmp_path):
    bands = ("lower,upper,rr,ci_lower,ci_upper,cases,controls\n0,10,1,,,5e-324,5e-324\n"
             "10,20,1.2,1.0,1.4,50,100\n20,,1.5,1.2,1.9,40,60\n")
    toml = ('unit = "mg/m3"\n[curve]\ntable = "bands.csv"\ndesign = "case-control"\n'
            '[exposure]\ngm = 10\ngsd = 2\n')
    refused(capsys, tmp_path, toml, {"bands.csv": bands}, file="bands.csv",
            where="columns 'cases', 'controls'", says="not positive definite")
