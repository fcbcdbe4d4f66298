"""Health impact for a population: burden tables with population and rates,
group-specific curves, both ways from fractions to cases, years of life lost
and totals across groups, strata and outcomes.

Every expected value comes from a closed form derived in the docstrings
(the lognormal mean), from scipy.integrate.quad, or from independent numpy
sums of the same draws. The tables are invented test inputs.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from doseattr.analysis.burden_sums import Quantity, RowDraws, sum_result
from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

#: districts x age groups with population, deaths per 100,000 per year,
#: remaining life expectancy and each district's own exposure (GM, GSD)
TABLE = """\
stratum,group,population,rate,life_expectancy,gm,gsd
North,65-74,20000,1500,15.2,8,2
North,75+,12000,5200,7.9,8,2
South,65-74,18000,1400,15.5,14,2.5
South,75+,9000,5000,8.1,14,2.5
"""

ERR = {"65-74": 0.004, "75+": 0.002}     # excess RR per ug/m3, by age (test inputs)
ERR_CV = {"65-74": 0.006, "75+": 0.003}


def _paf(gm, gsd, b):
    """Linear ERR RR = 1 + b x over LN(ln GM, ln^2 GSD), m = 0:
    E[RR] = 1 + b GM exp(ln^2 GSD / 2) (the lognormal mean; closed form)."""
    e = b * gm * math.exp(math.log(gsd) ** 2 / 2)
    return e / (1 + e)


def _hif(gm, gsd, b):
    """E[1 - 1/(1 + b X)] over the lognormal, by scipy.integrate.quad."""
    dist = stats.lognorm(s=math.log(gsd), scale=gm)
    val, _ = integrate.quad(lambda x: (1 - 1 / (1 + b * x)) * dist.pdf(x), 0, np.inf,
                            limit=200)
    return val


def _outcome(name, group, err, ci=False):
    curve = {"model": "linear", "err": err, "beyond": "extend"}
    if ci:
        curve["ci"] = [0.5 * err, 1.5 * err]
    return {"name": name, "groups": [group], "curve": curve}


def _with_ci():
    return ([_outcome("deaths", g, e, ci=True) for g, e in ERR.items()]
            + [_outcome("cardio deaths", g, e, ci=True) for g, e in ERR_CV.items()])


def _analysis(tmp_path, table=TABLE, method=None, uncertainty=None, outcomes=None, **burden):
    (tmp_path / "rows.csv").write_text(table)
    b = {"table": "rows.csv", **burden}
    if method:
        b["method"] = method
    if outcomes is None:
        outcomes = [_outcome("deaths", g, e) for g, e in ERR.items()]
        outcomes += [_outcome("cardio deaths", g, e) for g, e in ERR_CV.items()]
    d = {"unit": "ug/m3", "exposure": {"gm": 10.0, "gsd": 2.0}, "burden": b,
         "outcome": outcomes, "scenario": [{"name": "half", "scale": 0.5}]}
    if uncertainty:
        d["uncertainty"] = uncertainty
    return analysis_from_dict(d, base_dir=tmp_path)


def _rows():
    out = []
    for line in TABLE.splitlines()[1:]:
        s, g, pop, rate, le, gm, gsd = line.split(",")
        out.append((s, g, float(pop), float(rate), float(le), float(gm), float(gsd)))
    return out


def _outcomes(res):
    return {o["name"]: o for o in res.to_dict()["outcomes"]}


def test_rows_with_rates_groups_and_yll(tmp_path):
    """Per row: cases = population x rate / 100000; attributable = cases x
    PAF with the group's curve over the row's own lognormal (closed form);
    rate = attributable / population x 100000; YLL = attributable x life
    expectancy (hand products)."""
    out = _outcomes(run_analysis(_analysis(tmp_path)))
    for name, errs in (("deaths", ERR), ("cardio deaths", ERR_CV)):
        burden = out[name]["burden"]
        assert burden["method"] == "paf" and burden["rate_per"] == 100000
        for row, (s, g, pop, rate, le, gm, gsd) in zip(burden["strata"], _rows(), strict=True):
            assert (row["stratum"], row["group"]) == (s, g)
            cases = pop * rate / 1e5
            attributable = cases * _paf(gm, gsd, errs[g])
            np.testing.assert_allclose(row["cases"], cases, rtol=1e-12)
            np.testing.assert_allclose(row["attributable"]["estimate"], attributable, rtol=1e-8)
            np.testing.assert_allclose(row["attributable_rate"]["estimate"],
                                       attributable / pop * 1e5, rtol=1e-8)
            np.testing.assert_allclose(row["yll"]["estimate"], attributable * le, rtol=1e-8)
            assert row["rate"] == rate and row["population"] == pop
        assert any("deaths-based" in n for n in out[name]["notes"])


def test_sums_over_groups_strata_outcomes(tmp_path):
    """Point estimates of every sum are sums of the rows (hand sums); the
    grand total adds the two outcomes; its rate is per the table's
    population (the same people in both outcomes, not counted twice)."""
    res = run_analysis(_analysis(tmp_path))
    out = _outcomes(res)
    grand_att = grand_yll = 0.0
    for name in ("deaths", "cardio deaths"):
        b = out[name]["burden"]
        att = [r["attributable"]["estimate"] for r in b["strata"]]
        yll = [r["yll"]["estimate"] for r in b["strata"]]
        np.testing.assert_allclose(b["total"]["attributable"]["estimate"], sum(att), rtol=1e-12)
        np.testing.assert_allclose(b["total"]["yll"]["estimate"], sum(yll), rtol=1e-12)
        by_group = {g["group"]: g for g in b["groups"]}
        np.testing.assert_allclose(by_group["75+"]["attributable"]["estimate"],
                                   att[1] + att[3], rtol=1e-12)
        np.testing.assert_allclose(by_group["75+"]["attributable_rate"]["estimate"],
                                   (att[1] + att[3]) / 21000 * 1e5, rtol=1e-12)
        by_stratum = {g["stratum"]: g for g in b["stratum_totals"]}
        np.testing.assert_allclose(by_stratum["South"]["yll"]["estimate"], yll[2] + yll[3],
                                   rtol=1e-12)
        grand_att += sum(att)
        grand_yll += sum(yll)
    g = res.to_dict()["burden"]["grand_total"]
    np.testing.assert_allclose(g["attributable"]["estimate"], grand_att, rtol=1e-12)
    np.testing.assert_allclose(g["yll"]["estimate"], grand_yll, rtol=1e-12)
    np.testing.assert_allclose(g["population"], 59000.0)
    np.testing.assert_allclose(g["attributable_rate"]["estimate"], grand_att / 59000 * 1e5,
                               rtol=1e-12)
    np.testing.assert_allclose(g["cases"], 2 * sum(p * r / 1e5 for _, _, p, r, *_ in _rows()))


def test_intervals_of_sums_with_uncertainty(tmp_path):
    """With curve uncertainty every sum has an interval around its point
    estimate, the grand total's is wider than each outcome's, and the
    outcome totals' limits are consistent with the rows (the upper limit of
    a sum is at most the sum of the rows' upper limits, for rows that move
    together or not; a property of percentiles of sums of co-monotone or
    independent draws)."""
    res = run_analysis(_analysis(tmp_path, uncertainty={"draws": 400, "seed": 3},
                                 outcomes=_with_ci()))
    out = _outcomes(res)
    b = out["deaths"]["burden"]
    t = b["total"]["attributable"]
    assert t["lower"] < t["estimate"] < t["upper"]
    assert t["upper"] <= sum(r["attributable"]["upper"] for r in b["strata"]) * (1 + 1e-9)
    g = res.to_dict()["burden"]["grand_total"]["attributable"]
    assert g["upper"] - g["lower"] > t["upper"] - t["lower"]
    assert g["lower"] < g["estimate"] < g["upper"]


def test_group_curves_match_separate_runs(tmp_path):
    """A row's result with group-specific curves equals a separate run of
    that group's curve over the same row alone (point estimates)."""
    res = _outcomes(run_analysis(_analysis(tmp_path)))
    for g, err in ERR.items():
        rows = [line for line in TABLE.splitlines()[1:] if f",{g}," in line]
        sub = tmp_path / g.replace("+", "plus")
        sub.mkdir()
        one = run_analysis(_analysis(sub, table=TABLE.splitlines()[0] + "\n" + "\n".join(rows),
                                     outcomes=[{"name": "x", "curve": {
                                         "model": "linear", "err": err, "beyond": "extend"}}]))
        alone = one.to_dict()["outcomes"][0]["burden"]["strata"]
        grouped = [r for r in res["deaths"]["burden"]["strata"] if r["group"] == g]
        for a, b in zip(alone, grouped, strict=True):
            np.testing.assert_allclose(b["attributable"]["estimate"],
                                       a["attributable"]["estimate"], rtol=1e-12)


def test_impact_function_method(tmp_path):
    """method = "impact-function": attributable = cases x E[1 - 1/RR(X)]
    (scipy.integrate.quad), below cases x PAF (Jensen: E[1/RR] >= 1/E[RR])."""
    out = _outcomes(run_analysis(_analysis(tmp_path, method="impact-function")))
    b = out["deaths"]["burden"]
    assert b["method"] == "impact-function"
    for row, (_, g, pop, rate, _, gm, gsd) in zip(b["strata"], _rows(), strict=True):
        cases = pop * rate / 1e5
        np.testing.assert_allclose(row["attributable"]["estimate"],
                                   cases * _hif(gm, gsd, ERR[g]), rtol=1e-7)
        assert row["attributable"]["estimate"] < cases * _paf(gm, gsd, ERR[g])


def test_rate_per_changes_rates_only(tmp_path):
    """rate_per = 1000: the rates in the table are per 1000 (cases = pop x
    rate / 1000) and the attributable rates are per 1000 (hand products)."""
    table = TABLE.replace(",1500,", ",15,").replace(",5200,", ",52,").replace(
        ",1400,", ",14,").replace(",5000,", ",50,")
    out = _outcomes(run_analysis(_analysis(tmp_path, table=table, rate_per=1000)))
    row = out["deaths"]["burden"]["strata"][0]
    attributable = 20000 * 15 / 1000 * _paf(8, 2, ERR["65-74"])
    np.testing.assert_allclose(row["attributable"]["estimate"], attributable, rtol=1e-8)
    np.testing.assert_allclose(row["attributable_rate"]["estimate"],
                               attributable / 20000 * 1000, rtol=1e-8)


def test_sum_result_is_the_sum_of_the_draws():
    """A sum's interval is the 2.5th and 97.5th percentiles of the rows'
    draws added draw by draw (numpy, independently), and its PAF is the
    summed attributable over the summed cases per draw."""
    rng = np.random.default_rng(0)
    s, d = 3, 2000
    cases = np.array([50.0, 80.0, 20.0])
    frac = rng.uniform(0.05, 0.2, size=(s, d))
    att = frac * cases[:, None]
    rows = RowDraws(("a", "b", "c"), ("x", "x", "y"), np.array([1e4, 2e4, 5e3]),
                    np.array([10.0, 12.0, 8.0]), Quantity(cases, np.repeat(cases[:, None], d, 1)),
                    Quantity(frac.mean(axis=1), frac), Quantity(att.mean(axis=1), att), {}, {})
    total = sum_result(rows, "total", None, 1e5)
    sums = att.sum(axis=0)
    lo, hi = np.percentile(sums, [2.5, 97.5])
    np.testing.assert_allclose([total.attributable.lower, total.attributable.upper], [lo, hi],
                               rtol=1e-6)
    yll = (att * np.array([10.0, 12.0, 8.0])[:, None]).sum(axis=0)
    np.testing.assert_allclose([total.yll.lower, total.yll.upper],
                               np.percentile(yll, [2.5, 97.5]), rtol=1e-6)
    paf = sums / cases.sum()
    np.testing.assert_allclose([total.paf.lower, total.paf.upper],
                               np.percentile(paf, [2.5, 97.5]), rtol=1e-6)
    np.testing.assert_allclose(total.attributable_rate.upper, hi / 3.5e4 * 1e5, rtol=1e-6)


@pytest.mark.parametrize("outcomes, expected", [
    ([_outcome("deaths", "65-74", 0.004), _outcome("deaths", "65-74", 0.002)],
     "group '65-74' of outcome 'deaths' is in two blocks"),
    ([_outcome("deaths", "65-74", 0.004)], "no curve of outcome 'deaths' covers group '75+'"),
    ([{**_outcome("deaths", "65-74", 0.004), "groups": ["65-74", "85+"]},
      _outcome("deaths", "75+", 0.002)], "group '85+' has no row"),
    ([_outcome("deaths", "65-74", 0.004),
      {"name": "deaths", "curve": {"model": "linear", "err": 0.002}}],
     "outcome name 'deaths' is used twice"),
])
def test_bad_groups(tmp_path, outcomes, expected):
    with pytest.raises(InputError) as err:
        _analysis(tmp_path, outcomes=outcomes)
    assert expected in str(err.value)
    assert "\n" not in str(err.value)


def test_without_exposure_section(tmp_path):
    """Every row has its own exposure, so [exposure] may be left out: the
    rows' results are unchanged (each uses its own lognormal, closed form)
    and the population's PAF is over the population-weighted mixture of the
    rows' lognormals: E[RR] = 1 + b sum_k w_k GM_k exp(ln^2 GSD_k / 2)
    (closed form; the Gauss-Hermite points integrate a linear RR exactly
    up to rounding)."""
    a = _analysis(tmp_path)
    d = dict(a.settings)
    d.pop("exposure")
    res = run_analysis(analysis_from_dict(d, base_dir=tmp_path))
    out = _outcomes(res)
    for row, (_, g, pop, rate, _, gm, gsd) in zip(out["deaths"]["burden"]["strata"], _rows(),
                                                   strict=True):
        np.testing.assert_allclose(row["attributable"]["estimate"],
                                   pop * rate / 1e5 * _paf(gm, gsd, ERR[g]), rtol=1e-8)
    rows = _rows()
    w = np.array([r[2] for r in rows]) / sum(r[2] for r in rows)
    mean = sum(wk * r[5] * math.exp(math.log(r[6]) ** 2 / 2) for wk, r in zip(w, rows))
    b = ERR["65-74"]   # the first block's curve stands for the outcome's population PAF
    np.testing.assert_allclose(out["deaths"]["paf"]["estimate"], b * mean / (1 + b * mean),
                               rtol=1e-10)
    assert any("no [exposure]" in n for n in res.notes)


def test_without_exposure_needs_every_row(tmp_path):
    """A row without its own exposure cannot stand in for [exposure]."""
    table = TABLE.replace("North,75+,12000,5200,7.9,8,2", "North,75+,12000,5200,7.9,,")
    a = _analysis(tmp_path, table=table)
    d = dict(a.settings)
    d.pop("exposure")
    with pytest.raises(InputError) as err:
        run_analysis(analysis_from_dict(d, base_dir=tmp_path))
    assert "rows.csv: row 3" in str(err.value) and "without [exposure]" in str(err.value)


GROUP_FILE = """\
unit = "ug/m3"
[burden]
table = "rows.csv"
{blocks}
"""

BLOCK = """
[[outcome]]
name = "deaths"
groups = {groups}
[outcome.curve]
model = "linear"
err = 0.004
"""


@pytest.mark.parametrize("groups, where", [
    ((["65-74", "75+"], ["75+"]), "[[outcome]] 2 key 'groups'"),        # overlap
    ((["65-74"],), "rows.csv: row 3, column 'group'"),                   # row not covered
    ((["65-74", "75+", "85+"],), "[[outcome]] 1 key 'groups'"),          # group with no row
])
def test_bad_groups_from_the_command_line(tmp_path, capsys, groups, where):
    """Exit status 2, one line on standard error naming the file and the
    key or row, nothing written (the project's rule for input errors)."""
    from doseattr.cli import main

    (tmp_path / "rows.csv").write_text(TABLE)
    blocks = "".join(BLOCK.format(groups="[" + ", ".join(f'"{g}"' for g in gs) + "]")
                     for gs in groups)
    (tmp_path / "a.toml").write_text(GROUP_FILE.format(blocks=blocks))
    out = tmp_path / "out"
    assert main(["run", str(tmp_path / "a.toml"), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and where in err[0], err
    assert not out.exists()


def test_precision_gives_every_block_the_same_draws(tmp_path):
    """[uncertainty] precision may raise the draws of one block more than of
    another; the blocks are summed draw by draw, so every block ends with
    the same number of draws (and the sums exist)."""
    res = run_analysis(_analysis(tmp_path, uncertainty={"draws": 200, "seed": 5,
                                                         "precision": 0.004},
                                 outcomes=_with_ci()))
    counts = {r.uncertainty.draws for _, o in res.outcomes for _, r in o.group_runs}
    assert len(counts) == 1 and counts.pop() >= 200
    assert res.grand_total is not None and res.grand_total.attributable.lower is not None


def test_scenario_table_gives_averted_rates_and_yll(tmp_path):
    """burden_scenarios.csv with rates and life expectancy: per row of the
    burden table, the averted rate is averted / population x 100000 and
    the averted YLL averted x life expectancy (hand products), and the
    averted cases are PIF x cases."""
    from doseattr.outputs import tables

    res = run_analysis(_analysis(tmp_path))
    header, rows = tables.burden_scenarios_blocks_table(res.burden_blocks)
    col = {h: i for i, h in enumerate(header)}
    assert {"group", "averted_rate_estimate", "averted_yll_upper"} <= set(col)
    given = {(s, g): (pop, rate, le) for s, g, pop, rate, le, _, _ in _rows()}
    checked = 0
    for r in rows:
        key = (r[col["stratum"]], r[col["group"]])
        if key not in given:
            continue  # the sums: checked in the results' own tests
        pop, rate, le = given[key]
        averted = r[col["averted_estimate"]]
        np.testing.assert_allclose(averted, r[col["pif_estimate"]] * pop * rate / 1e5, rtol=1e-12)
        np.testing.assert_allclose(r[col["averted_rate_estimate"]], averted / pop * 1e5,
                                   rtol=1e-12)
        np.testing.assert_allclose(r[col["averted_yll_estimate"]], averted * le, rtol=1e-12)
        checked += 1
    assert checked == 2 * len(given)  # each row in both outcomes
