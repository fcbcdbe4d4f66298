"""Goodness of fit of the exposure fit reaches results.json and the report."""

import numpy as np
from scipy import stats

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.outputs.report import render_report

ERR = {"model": "linear", "err": 0.04, "per": 1.0, "max_dose": 60.0}


def test_ks_statistic_in_results_and_report(tmp_path):
    """Uncensored, unweighted lognormal fit: the Kolmogorov-Smirnov statistic
    and p-value equal scipy.stats.kstest of the values against
    scipy.stats.lognorm with the fitted GM and GSD (reference library)."""
    x = stats.lognorm(s=0.8, scale=6.0).rvs(size=40, random_state=np.random.default_rng(5))
    (tmp_path / "m.csv").write_text("value\n" + "\n".join(repr(float(v)) for v in x) + "\n")
    r = run_analysis(analysis_from_dict({"unit": "ug/m3", "curve": ERR,
                                         "exposure": {"table": "m.csv", "family": "lognormal"}},
                                        base_dir=tmp_path))
    g = r.to_dict()["exposure"]["goodness_of_fit"]
    p = r.to_dict()["exposure"]["parameters"]
    ref = stats.kstest(x, stats.lognorm(s=np.log(p["gsd"]), scale=p["gm"]).cdf)
    assert g["test"] == "Kolmogorov-Smirnov" and g["n"] == 40
    np.testing.assert_allclose([g["statistic"], g["p_value"]], [ref.statistic, ref.pvalue],
                               rtol=1e-10)
    html = render_report(r, figures=False)
    assert "Goodness of fit (detected values)" in html and f"{ref.statistic:.3g}" in html
