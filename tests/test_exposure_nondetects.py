"""Non-detects: ROS plotting positions (against statsmodels), substitution,
goodness of fit (against scipy.stats.kstest) and Q-Q points."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.imputation import ros

from doseattr.core.exposure import (
    fit_measurements,
    from_gm_gsd,
    goodness_of_fit,
    qq_points,
    ros_plotting_positions,
    substitute_nondetects,
)
from doseattr.errors import ModelError


def statsmodels_positions(values, censored):
    """Plotting positions from statsmodels.imputation.ros, following the
    steps of its ``_do_ros`` (cohn numbers, sort, limit index, group rank,
    plotting positions); returns (value, censored, position) rows sorted."""
    df = pd.DataFrame({"obs": values, "cen": censored})
    cohn = ros.cohn_numbers(df, "obs", "cen")
    m = ros._ros_sort(df, "obs", "cen")
    m["det_limit_index"] = m["obs"].apply(ros._detection_limit_index, args=(cohn,))
    m["rank"] = ros._ros_group_rank(m, "det_limit_index", "cen")
    m["plot_pos"] = ros.plotting_positions(m, "cen", cohn)
    return np.array(sorted(zip(m["obs"], m["cen"], m["plot_pos"])))


# (values, detected); the 1s in the arrays below mark non-detects
DATASETS = [
    # two limits, detects between and above them, one detect below the lowest limit
    (np.array([0.8, 1.0, 1.0, 1.5, 2.0, 2.0, 2.0, 2.5, 3.1, 4.0, 5.2, 6.0, 7.7, 9.4, 12.0]),
     ~np.array([0, 1, 1, 0, 1, 1, 0, 0, 0, 0, 0, 0, 0, 0, 0], bool)),
    # three limits, several non-detects at each
    (np.array([0.5, 0.5, 0.5, 0.7, 1.0, 1.0, 1.2, 2.0, 2.0, 2.2, 3.0, 4.5, 4.0, 8.0, 0.9, 1.8]),
     ~np.array([1, 1, 1, 0, 1, 1, 0, 1, 1, 0, 0, 0, 0, 0, 0, 0], bool)),
]


@pytest.mark.parametrize("values,detected", DATASETS)
def test_ros_positions_match_statsmodels(values, detected):
    """Source: statsmodels.imputation.ros (Hirsch & Stedinger 1987 positions
    as used for ROS by Helsel)."""
    pos = ros_plotting_positions(values, detected)
    ours = np.array(sorted(zip(values, ~detected, pos)))
    np.testing.assert_allclose(ours, statsmodels_positions(values, ~detected), rtol=1e-12)


def test_ros_positions_match_statsmodels_on_random_data():
    """Source: statsmodels.imputation.ros on seeded random datasets with ties
    and several detection limits (none above the largest detect, which
    statsmodels drops)."""
    rng = np.random.default_rng(12)
    for _ in range(20):
        values = np.round(rng.lognormal(0.0, 1.0, 30), 1) + 0.1
        detected = rng.uniform(size=30) < 0.7
        detected[np.argmax(values)] = True
        pos = ros_plotting_positions(values, detected)
        ours = np.array(sorted(zip(values, ~detected, pos)))
        np.testing.assert_allclose(ours, statsmodels_positions(values, ~detected), rtol=1e-12)


def test_ros_positions_without_non_detects_are_weibull_positions():
    """Source: Weibull plotting positions r / (n + 1) (common practice)."""
    x = np.array([3.0, 1.0, 2.0, 5.0])
    np.testing.assert_allclose(ros_plotting_positions(x, np.ones(4, bool)), [0.6, 0.2, 0.4, 0.8], rtol=1e-15)


def test_substitution_is_explicit_and_checked():
    """Source: definition of substitution (non-detect -> fraction x limit)."""
    x = np.array([1.0, 2.0, 4.0])
    d = np.array([True, False, True])
    np.testing.assert_array_equal(substitute_nondetects(x, d, 0.5), [1.0, 1.0, 4.0])
    with pytest.raises(ModelError, match="fraction must be between 0 and 1"):
        substitute_nondetects(x, d, 2.0)


def test_ks_on_uncensored_fit_matches_scipy():
    """Source: scipy.stats.kstest against scipy.stats.lognorm with the fitted
    parameters (taken from scipy.stats.lognorm.fit)."""
    x = stats.lognorm(0.7, scale=2.0).rvs(80, random_state=np.random.default_rng(1))
    e = fit_measurements("lognormal", x)
    s, _, scale = stats.lognorm.fit(x, floc=0)
    ref = stats.kstest(x, stats.lognorm(s, scale=scale).cdf)
    gof = goodness_of_fit(e)
    np.testing.assert_allclose([gof["statistic"], gof["p_value"]], [ref.statistic, ref.pvalue], rtol=1e-6)
    assert "approximate" in gof["note"]


def test_ks_with_one_detection_limit_uses_the_conditional_distribution():
    """Source: scipy.stats.kstest of the detects against
    (F(x) - F(L)) / (1 - F(L)), F the fitted scipy.stats.lognorm."""
    x = stats.lognorm(0.7, scale=2.0).rvs(100, random_state=np.random.default_rng(2))
    limit = np.quantile(x, 0.25)
    d = x >= limit
    v = np.where(d, x, limit)
    e = fit_measurements("lognormal", v, detected=d)
    ref = e.family.scipy(e.params)
    expected = stats.kstest(v[d], lambda y: (ref.cdf(y) - ref.cdf(limit)) / ref.sf(limit))
    gof = goodness_of_fit(e)
    np.testing.assert_allclose(gof["statistic"], expected.statistic, rtol=1e-10)
    assert gof["n"] == int(d.sum())


def test_gof_falls_back_to_ppcc_with_several_limits_or_weights():
    """No standard KS test applies with several limits or unequal weights
    (documented); the PPCC is reported instead, without a p-value; for
    weights it equals numpy.corrcoef of ln x with ln scipy ppf at the
    Weibull positions rank/(n + 1) (no censoring)."""
    values, detected = DATASETS[1]
    several = goodness_of_fit(fit_measurements("lognormal", values, detected=detected))
    assert several["test"] == "probability plot correlation" and several["p_value"] is None
    x = np.array([1.0, 2.0, 3.5, 5.0, 8.0])
    weighted = fit_measurements("lognormal", x, weights=[1, 2, 1, 2, 1])
    res = goodness_of_fit(weighted)
    assert "weighted" in res["note"]
    q = weighted.family.scipy(weighted.params).ppf(np.arange(1, 6) / 6)
    np.testing.assert_allclose(res["statistic"], np.corrcoef(np.log(q), np.log(x))[0, 1],
                               rtol=1e-10)
    with pytest.raises(ModelError, match="not fitted to measurements"):
        goodness_of_fit(from_gm_gsd(2.0, 2.0))


def test_qq_points():
    """Source: theoretical quantiles are scipy.stats ppf at the ROS plotting
    positions (statsmodels, as above), observed values sorted with them."""
    values, detected = DATASETS[0]
    e = fit_measurements("lognormal", values, detected=detected)
    theo, obs, mask = qq_points(e)
    ref = statsmodels_positions(values, ~detected)
    order = np.argsort(ref[:, 2], kind="stable")
    np.testing.assert_allclose(theo, e.family.scipy(e.params).ppf(ref[order, 2]), rtol=1e-10)
    np.testing.assert_allclose(np.sort(obs[mask]), np.sort(values[detected]))
    assert np.all(np.diff(theo) >= 0) and mask.sum() == detected.sum()


def test_ppcc_with_several_limits_matches_statsmodels_positions():
    """With several detection limits the goodness of fit is the probability
    plot correlation coefficient (Filliben 1975, from memory): the Pearson
    correlation (numpy.corrcoef) of ln(detected values) with ln of the
    fitted quantiles (scipy.stats ppf) at their ROS plotting positions,
    the positions here from statsmodels.imputation.ros."""
    from doseattr.core.exposure.fit import fit_measurements
    from doseattr.core.exposure.gof import goodness_of_fit
    from doseattr.core.exposure.registry import FAMILIES

    values, detected = DATASETS[1]
    ex = fit_measurements(FAMILIES["lognormal"], values, detected=detected)
    res = goodness_of_fit(ex)
    rows = statsmodels_positions(values, ~detected)
    det = rows[:, 1] == 0
    q = ex.family.scipy(ex.params).ppf(rows[det, 2])
    expected = np.corrcoef(np.log(q), np.log(rows[det, 0]))[0, 1]
    assert res["test"] == "probability plot correlation" and res["p_value"] is None
    np.testing.assert_allclose(res["statistic"], expected, rtol=1e-10)
