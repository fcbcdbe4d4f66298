"""``[limit]`` end to end: the analysis-file keys, the comply scenario, the
workers' long-term means in the PAF, the outputs, and bad input.

Samples are simulated here with a seeded generator from a known one-way
random-effects lognormal model (the truth the checks compare against); the
closed forms are derived in the comments.
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from doseattr.analysis.config import load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.cli import main

#: A linear curve entered directly: RR(x) = 1 + B x (ERR B per unit).
B = 0.02
CURVE = f"""
[curve]
model = "linear"
err = {B}
per = 1
ci = [{B / 2}, {B * 1.5}]
"""


def _analysis(limit: str = "value = 1.0\n", family: str = "lognormal",
              scenarios: str = "", extra: str = "") -> str:
    return (f'unit = "mg/m3"\n{CURVE}\n[exposure]\ntable = "samples.csv"\nfamily = "{family}"\n'
            f"{extra}\n" + (f"[limit]\n{limit}\n" if limit is not None else "") + scenarios)


def _samples(rng: np.random.Generator, workers: int = 12, per: int = 4, mu: float = -1.2,
             sb: float = 0.5, sw: float = 0.6, lod: float | None = 0.12) -> list[tuple[str, str]]:
    """``(worker, value)`` rows from ln x = mu + b_i + e_ij, b_i ~ N(0, sb^2),
    e_ij ~ N(0, sw^2); values below ``lod`` written as ``<lod``."""
    rows = []
    for i in range(workers):
        b = rng.normal(0.0, sb)
        for x in np.exp(mu + b + rng.normal(0.0, sw, per)):
            text = f"<{lod}" if lod is not None and x < lod else f"{x:.6g}"
            rows.append((f"W{i + 1:02d}", text))
    return rows


def _write(folder: Path, toml: str, rows, *, worker: bool = True) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    head = "worker,value" if worker else "value"
    body = "\n".join(f"{w},{v}" if worker else v for w, v in rows)
    (folder / "samples.csv").write_text(f"{head}\n{body}\n")
    (folder / "analysis.toml").write_text(toml)
    return folder / "analysis.toml"


# -- the comply scenario against a closed form --------------------------------------------
def test_comply_pif_is_the_rescaled_lognormal_closed_form(tmp_path):
    rng = np.random.default_rng(20261203)
    rows = [("", f"{x:.8g}") for x in np.exp(rng.normal(-1.0, 0.7, 40))]
    limit = 0.6
    scen = '[[scenario]]\nname = "Comply"\ncomply = true\n'
    path = _write(tmp_path, _analysis(f"value = {limit}\n", scenarios=scen), rows, worker=False)
    r = run_analysis(load_analysis(path))
    gm, gsd = r.exposure.params
    s = math.log(gsd)
    p95 = gm * math.exp(stats.norm.ppf(0.95) * s)        # lognormal quantile (closed form)
    k = min(1.0, limit / p95)
    am = gm * math.exp(s * s / 2)                        # lognormal mean (closed form)
    # Linear RR, minimum risk 0: E[RR(kX)] = 1 + B k AM, so
    # PIF = 1 - (1 + B k AM)/(1 + B AM) = B AM (1 - k)/(1 + B AM).
    expected = B * am * (1 - k) / (1 + B * am)
    (sc,) = r.scenarios
    assert k < 1
    assert sc.kind == "comply" and sc.value == pytest.approx(k, rel=1e-12)
    assert sc.pif.estimate == pytest.approx(expected, rel=1e-8)
    assert "compliance with the limit" in sc.description


def test_comply_changes_nothing_when_already_compliant(tmp_path):
    rng = np.random.default_rng(7)
    rows = [("", f"{x:.8g}") for x in np.exp(rng.normal(-3.0, 0.4, 30))]
    scen = '[[scenario]]\nname = "Comply"\ncomply = true\n'
    r = run_analysis(load_analysis(_write(tmp_path, _analysis(scenarios=scen), rows,
                                          worker=False)))
    (sc,) = r.scenarios
    # The 95th percentile is far below 1.0, so the factor is 1 and the PIF 0 (closed form).
    assert sc.value == 1.0 and sc.pif.estimate == pytest.approx(0.0, abs=1e-15)


# -- workers ------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def worker_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("workers")
    rows = _samples(np.random.default_rng(11))
    scen = '[[scenario]]\nname = "Comply"\ncomply = true\n'
    toml = (_analysis("value = 0.5\n", scenarios=scen) + "[uncertainty]\ndraws = 400\nseed = 5\n"
            '[burden]\ntable = "burden.csv"\n')
    path = _write(folder, toml, rows)
    (folder / "burden.csv").write_text("stratum,cases\nplant,30\n")  # an invented count
    out = folder / "out"
    assert main(["run", str(path), "--out", str(out), "--quiet"]) == 0
    return out, run_analysis(load_analysis(path))


def test_paf_uses_workers_long_term_means(worker_run):
    _, r = worker_run
    w = r.exposure_section.worker_model
    assert w is not None
    gm, gsd = r.exposure.params
    # Long-term mean of worker i: exp(mu + b_i + sw^2/2), lognormal with
    # GM exp(mu + sw^2/2) and GSD exp(sb) (closed form of the model).
    assert gm == pytest.approx(math.exp(w.mu + w.sigma_within ** 2 / 2), rel=1e-10)
    assert gsd == pytest.approx(math.exp(w.sigma_between), rel=1e-10)
    am = gm * math.exp(math.log(gsd) ** 2 / 2)
    # Linear RR: PAF = B E[X] / (1 + B E[X]) (closed form).
    assert r.paf.estimate == pytest.approx(B * am / (1 + B * am), rel=1e-8)
    assert any("long-term mean" in n for n in r.notes)


def test_limit_results_json_and_files(worker_run):
    out, _ = worker_run
    d = json.loads((out / "results.json").read_text())
    lim = d["limit"]
    assert lim["value"] == 0.5 and lim["confidence"] == 0.7
    assert lim["decision"]["verdict"] in ("complies", "does not comply",
                                          "no decision: more samples needed")
    assert lim["decision"]["test"] == "statistical"      # 48 samples: EN 689's statistical test
    for key in ("exceedance_fraction", "p95", "mean"):
        e = lim[key]
        assert e["lower"] <= e["estimate"] <= e["upper"]
    assert lim["p95"]["utl"] >= lim["p95"]["estimate"]
    w = lim["workers"]
    assert w["n_workers"] == 12 and 0 <= w["icc"] <= 1
    assert len(w["workers"]) == 12
    with open(out / "limit.csv", newline="") as fh:
        quantities = [row["quantity"] for row in csv.DictReader(fh)]
    assert quantities[:3] == ["exceedance_fraction", "p95", "mean"]
    assert (out / "limit_workers.csv").is_file()
    html = (out / "report.html").read_text()
    assert "Compliance with the limit value" in html and "Between-worker GSD" in html
    assert "If the group complied (scenario &#x27;Comply&#x27;" in html and "cases averted" in html


def test_cases_prevented_by_compliance(worker_run):
    _, r = worker_run
    (sc,) = r.scenarios
    # Method "paf": averted = cases x PIF at the point estimates (definition).
    assert sc.averted.estimate == pytest.approx(30 * sc.pif.estimate, rel=1e-10)


def test_worker_exceedance_is_the_closed_form(worker_run):
    _, r = worker_run
    w, e = r.limit.workers, r.limit.worker_exceedance
    # P(exp(mu + b + sw^2/2) > L) = 1 - Phi((ln L - mu - sw^2/2)/sb) (closed form).
    z = (math.log(0.5) - w.mu - w.sigma_within ** 2 / 2) / w.sigma_between
    assert e.estimate == pytest.approx(stats.norm.sf(z), rel=1e-10)
    above = {x.worker for x in r.limit.workers_above}
    assert above == {x.worker for x in w.workers if x.long_term_mean > 0.5}


def test_without_workers_a_note_says_day_to_day_variation_widens(tmp_path):
    rows = [("", f"{x:.8g}") for x in np.exp(np.random.default_rng(3).normal(-1, 0.8, 12))]
    r = run_analysis(load_analysis(_write(tmp_path, _analysis(), rows, worker=False)))
    assert r.limit is not None and r.limit.workers is None
    assert any("day-to-day variation" in n for n in r.limit.notes)


# -- bad input ----------------------------------------------------------------------------
ROWS = [("", v) for v in ("0.2", "0.3", "<0.1", "0.5", "0.25", "0.4")]
BAD = {
    "limit of zero": (_analysis("value = 0\n"), ROWS, False, "[limit] key 'value'"),
    "negative limit": (_analysis("value = -1\n"), ROWS, False, "[limit] key 'value'"),
    "confidence 0.5": (_analysis("value = 1\nconfidence = 0.5\n"), ROWS, False,
                       "[limit] key 'confidence'"),
    "confidence 1": (_analysis("value = 1\nconfidence = 1.0\n"), ROWS, False,
                     "[limit] key 'confidence'"),
    "fewer than 3 samples": (_analysis(), ROWS[:2], False, "samples.csv: column 'value'"),
    "one sample per worker": (_analysis(), [(f"W{i}", v) for i, (_, v) in enumerate(ROWS)],
                              True, "samples.csv: column 'worker'"),
    "empty worker id": (_analysis(), [("", v) for _, v in ROWS], True,
                        "samples.csv: row 2, column 'worker'"),
    "workers with gamma": (_analysis(family="gamma"), [("A", "0.2"), ("A", "0.3"),
                                                       ("B", "0.5"), ("B", "0.6")], True,
                           "[exposure] key 'family'"),
    "limit with empirical": (_analysis(family="empirical"), [("", "0.2"), ("", "0.3"),
                                                             ("", "0.5")], False,
                             "[exposure] key 'family'"),
    "comply without limit": (_analysis(None, scenarios='[[scenario]]\nname = "C"\n'
                                                       "comply = true\n"), ROWS, False,
                             "[[scenario]] 1 key 'comply'"),
    "exceedance of 0.6": (_analysis("value = 1\nexceedance = 0.6\n"), ROWS, False,
                          "[limit] key 'exceedance'"),
}


@pytest.mark.parametrize("toml, rows, worker, fragment", list(BAD.values()), ids=list(BAD))
def test_bad_limit_input_is_one_line_exit_2_nothing_written(tmp_path, capsys, toml, rows,
                                                            worker, fragment):
    case = tmp_path / "case"
    path = _write(case, toml, rows, worker=worker)
    out_dir = tmp_path / "out"
    code = main(["run", str(path), "--out", str(out_dir)])
    out, err = capsys.readouterr()
    assert code == 2, err
    assert err.startswith("doseattr: error: ") and err.count("\n") == 1
    assert fragment in err and "Traceback" not in err and out == ""
    assert not out_dir.exists()


def test_exposure_figure_and_comparison_show_samples_and_long_term_means(worker_run):
    from doseattr.outputs import figures as fig

    _, r = worker_run
    section = r.exposure_section
    ax = fig.plot_exposure(section.samples, long_term=section.exposure, unit="mg/m3")
    gids = {line.get_gid() for line in ax.get_lines()}
    assert {"fitted-density", "long-term-density"} <= gids
    names = [v.label for v in section.comparison]
    assert names[:2] == ["lognormal, workers' long-term means", "lognormal, single samples"]
    gm, gsd = section.samples.params
    am = gm * math.exp(math.log(gsd) ** 2 / 2)
    # Linear RR: the single samples' PAF is B E[X]/(1 + B E[X]) (closed form).
    assert section.comparison[1].paf == pytest.approx(B * am / (1 + B * am), rel=1e-8)


def test_check_says_what_the_limit_will_test(tmp_path, capsys):
    rows = _samples(np.random.default_rng(2), workers=3, per=2, lod=None)
    path = _write(tmp_path, _analysis("value = 0.5\n"), rows)
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "limit: 0.5 mg/m3, EN 689 statistical test" in out and "on 6 samples" in out
    assert "3 workers" in out


def test_limit_in_its_own_unit_is_converted(tmp_path):
    rows = [("", f"{x:.8g}") for x in np.exp(np.random.default_rng(4).normal(-1, 0.6, 10))]
    a = load_analysis(_write(tmp_path / "a", _analysis('value = 500\nunit = "ug/m3"\n'), rows,
                             worker=False))
    b = load_analysis(_write(tmp_path / "b", _analysis("value = 0.5\n"), rows, worker=False))
    # 1 mg/m3 = 1000 ug/m3 (definition of the units)
    assert a.limit.value == pytest.approx(0.5, rel=1e-12)
    ra, rb = run_analysis(a), run_analysis(b)
    assert ra.limit.stats.p95.ucl == pytest.approx(rb.limit.stats.p95.ucl, rel=1e-12)
    assert any("ug/m3" in n for n in ra.limit.notes)
