"""Cumulative exposure from work histories, and the 8-hour TWA."""

from datetime import date

import numpy as np
import pytest

from doseattr.core.exposure import cumulative_exposure, twa_8h
from doseattr.errors import ModelError


def d(*texts):
    return np.array(texts, dtype="datetime64[D]")


def test_cumulative_exposure_with_lag():
    """Source: definition, cumulative = sum intensity x days / 365.25 before
    the cutoff as_of - lag; day counts from Python's datetime.date arithmetic.
    Worker A: 2000-01-01..2004-01-01 at 1.0 and 2005-01-01..2010-01-01 at 2.0;
    worker B: 2001-01-01..2003-01-01 at 0.5. as_of 2012-01-01, lag 5 years:
    cutoff = 2012-01-01 minus 1826.25 days, inside A's second job."""
    w = cumulative_exposure(["A", "A", "B"], d("2000-01-01", "2005-01-01", "2001-01-01"),
                            d("2004-01-01", "2010-01-01", "2003-01-01"), [1.0, 2.0, 0.5],
                            as_of=np.datetime64("2012-01-01"), lag_years=5)
    cutoff = (date(2012, 1, 1) - date(2005, 1, 1)).days - 5 * 365.25  # days after 2005-01-01
    a_days = [(date(2004, 1, 1) - date(2000, 1, 1)).days, cutoff]
    b_days = (date(2003, 1, 1) - date(2001, 1, 1)).days
    np.testing.assert_array_equal(w.workers, ["A", "B"])
    np.testing.assert_allclose(w.cumulative, [(1.0 * a_days[0] + 2.0 * a_days[1]) / 365.25, 0.5 * b_days / 365.25],
                               rtol=1e-14)
    np.testing.assert_allclose(w.duration_years, [sum(a_days) / 365.25, b_days / 365.25], rtol=1e-14)
    np.testing.assert_allclose(w.mean_intensity, [(a_days[0] + 2 * a_days[1]) / sum(a_days), 0.5], rtol=1e-14)


def test_jobs_after_the_cutoff_count_nothing_and_inclusive_ends():
    """Source: definition (no time before the cutoff -> 0 exposure, mean
    intensity reported as 0); an inclusive end date adds one day."""
    w = cumulative_exposure([7], d("2020-01-01"), d("2021-01-01"), [3.0], as_of=np.datetime64("2019-06-01"))
    assert w.cumulative[0] == 0.0 and w.mean_intensity[0] == 0.0
    incl = cumulative_exposure([7], d("2020-01-01"), d("2020-12-31"), [3.0], as_of=np.datetime64("2030-01-01"),
                               end_inclusive=True)
    np.testing.assert_allclose(incl.duration_years, [366 / 365.25], rtol=1e-14)


def test_history_refusals_name_worker_and_rows():
    """Source: contract (ModelError naming the worker and rows)."""
    with pytest.raises(ModelError, match=r"row 2 \(worker 'B'\): the job ends before it starts"):
        cumulative_exposure(["A", "B"], d("2000-01-01", "2001-01-01"), d("2000-06-01", "2000-06-01"), [1, 1],
                            as_of=np.datetime64("2010-01-01"))
    with pytest.raises(ModelError, match="worker 'A': jobs in rows 1 and 3 overlap"):
        cumulative_exposure(["A", "B", "A"], d("2000-01-01", "2000-01-01", "2000-06-01"),
                            d("2001-01-01", "2001-01-01", "2002-01-01"), [1, 1, 1],
                            as_of=np.datetime64("2010-01-01"))
    with pytest.raises(ModelError, match="intensity must be a number >= 0"):
        cumulative_exposure(["A"], d("2000-01-01"), d("2001-01-01"), [-1.0], as_of=np.datetime64("2010-01-01"))
    with pytest.raises(ModelError, match="has no date"):
        cumulative_exposure(["A"], np.array(["NaT"], dtype="datetime64[D]"), d("2001-01-01"), [1.0],
                            as_of=np.datetime64("2010-01-01"))
    with pytest.raises(ModelError, match="numpy datetime64"):
        cumulative_exposure(["A"], ["2000-01-01"], d("2001-01-01"), [1.0], as_of=np.datetime64("2010-01-01"))


def test_back_to_back_jobs_do_not_overlap():
    """Source: half-open periods [start, end): a job ending the day the next starts."""
    w = cumulative_exposure(["A", "A"], d("2000-01-01", "2001-01-01"), d("2001-01-01", "2002-01-01"), [1.0, 1.0],
                            as_of=np.datetime64("2010-01-01"))
    np.testing.assert_allclose(w.duration_years, [731 / 365.25], rtol=1e-14)


def test_twa_8h():
    """Source: 8-hour TWA = sum C_i t_i / 480 min (common practice). Derived
    by hand: 2 h at 0.12 and 6 h at 0.04 mg/m3 give (14.4 + 14.4)/480 = 0.06;
    a 4 h sample at 0.2 with the rest unexposed gives 0.1."""
    np.testing.assert_allclose(twa_8h([0.12, 0.04], [120, 360]), 0.06, rtol=1e-14)
    np.testing.assert_allclose(twa_8h([0.2], [240]), 0.1, rtol=1e-14)
    with pytest.raises(ModelError, match="equal length"):
        twa_8h([0.1, 0.2], [60])
    with pytest.raises(ModelError, match=">= 0"):
        twa_8h([0.1], [-5])
