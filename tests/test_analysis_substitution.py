r"""Substitution of non-detects as an explicitly named comparison (issue 4
item 1): ``[exposure] substitution = [0.5, 0.7071]`` refits the same family
with every non-detect set to that fraction of its detection limit and
reports the PAF beside the main (left-censored likelihood) one; it never
becomes the main result.

References: closed-form lognormal maximum likelihood (mean and divisor-n SD
of ln x) for the substituted fits; scipy.stats' censored-data fit
(``CensoredData`` with ``lognorm.fit``) for the main fit; the lognormal
mean for the PAF with a linear curve. Inputs are invented.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

DETECTED = np.array([2.0, 3.5, 4.1, 6.0, 8.8, 15.2, 5.5, 2.7, 11.0])
LIMITS = np.array([1.0, 1.0, 2.0])
B = 0.05  # RR = 1 + B x


def _table() -> str:
    rows = [f"{v:g}" for v in DETECTED] + [f"<{v:g}" for v in LIMITS]
    return "value\n" + "\n".join(rows) + "\n"


def _run(tmp_path, fractions, text=None, family="lognormal"):
    (tmp_path / "m.csv").write_text(text or _table())
    d = {"unit": "ug/m3", "curve": {"model": "linear", "err": B, "beyond": "extend"},
         "exposure": {"table": "m.csv", "family": family, "substitution": fractions}}
    return run_analysis(analysis_from_dict(d, base_dir=tmp_path))


def _paf(gm, gsd):
    """1 - 1/(1 + b E[X]) with the lognormal mean GM exp(ln^2 GSD / 2)."""
    return 1 - 1 / (1 + B * gm * math.exp(math.log(gsd) ** 2 / 2))


def test_substituted_fits_and_their_difference(tmp_path):
    fractions = [0.5, 1 / math.sqrt(2)]
    r = _run(tmp_path, fractions)
    rows = r.to_dict()["exposure"]["substitution"]
    assert [row["fraction"] for row in rows] == fractions
    for row, k in zip(rows, fractions):
        lx = np.log(np.concatenate([DETECTED, k * LIMITS]))
        gm, gsd = math.exp(lx.mean()), math.exp(lx.std())
        np.testing.assert_allclose([row["parameters"]["gm"], row["parameters"]["gsd"]],
                                   [gm, gsd], rtol=1e-6)
        np.testing.assert_allclose(row["paf"], _paf(gm, gsd), rtol=1e-6)
        np.testing.assert_allclose(row["difference"], row["paf"] - r.paf.estimate, rtol=1e-12)


def test_main_result_stays_the_censored_fit(tmp_path):
    """The main parameters are scipy's left-censored maximum likelihood
    (location fixed at 0), not any substituted fit."""
    r = _run(tmp_path, [0.5])
    data = stats.CensoredData(uncensored=DETECTED, left=LIMITS)
    s, _, scale = stats.lognorm.fit(data, floc=0)
    p = r.to_dict()["exposure"]["parameters"]
    np.testing.assert_allclose([p["gm"], p["gsd"]], [scale, math.exp(s)], rtol=1e-4)
    np.testing.assert_allclose(r.paf.estimate, _paf(p["gm"], p["gsd"]), rtol=1e-8)


@pytest.mark.parametrize("fractions, message", [
    ([0], r"above 0 and at most 1"), ([1.5], r"above 0 and at most 1"),
    ([0.5, 0.5], r"listed twice"), ([], r"a list of numbers"),
])
def test_bad_fractions(tmp_path, fractions, message):
    with pytest.raises(InputError, match=rf"\[exposure\] key 'substitution'.*{message}"):
        _run(tmp_path, fractions)


def test_nothing_to_substitute(tmp_path):
    text = "value\n" + "\n".join(f"{v:g}" for v in DETECTED) + "\n"
    with pytest.raises(InputError, match=r"\[exposure\] key 'substitution'.*no values below a "
                                         r"detection limit"):
        _run(tmp_path, [0.5], text=text)


def test_needs_a_measurement_table():
    with pytest.raises(InputError, match=r"\[exposure\] key 'substitution'"):
        analysis_from_dict({"unit": "ug/m3", "curve": {"model": "linear", "err": B},
                            "exposure": {"gm": 5.0, "gsd": 2.0, "substitution": [0.5]}})
