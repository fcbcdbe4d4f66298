"""Job intensities from task samples: the 8-hour TWA sum(C_i t_i)/480
(common practice in occupational hygiene, e.g. UK HSE EH40, from memory),
computed by hand here, feeding cumulative exposure."""

from datetime import date

import numpy as np
import pytest

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

ERR = {"model": "linear", "err": 0.05, "per": 1.0, "max_dose": 50.0}
HISTORY = """\
worker,start,end,intensity
W1,2000-01-01,2005-07-01,
W1,2005-07-01,2012-01-01,0.5
W2,1995-03-15,2001-03-15,1.2
W3,2003-05-01,2008-05-01,
W4,1990-01-01,1999-12-31,0.8
"""
TASKS = """\
worker,start,concentration,minutes
W1,2000-01-01,2.0,120
W1,2000-01-01,0.5,300
W3,2003-05-01,4.0,60
"""


def run(tmp_path, history=HISTORY, tasks=TASKS):
    (tmp_path / "h.csv").write_text(history)
    (tmp_path / "t.csv").write_text(tasks)
    exposure = {"histories": "h.csv", "tasks": "t.csv", "as_of": "2020-01-01"}
    return run_analysis(analysis_from_dict({"unit": "mg/m3-years", "curve": ERR,
                                            "exposure": exposure}, base_dir=tmp_path))


def years(a: str, b: str) -> float:
    return (date.fromisoformat(b) - date.fromisoformat(a)).days / 365.25


def test_task_samples_give_the_jobs_intensity(tmp_path):
    """W1's first job: (2.0 x 120 + 0.5 x 300)/480 = 0.8125; W3's job:
    4.0 x 60/480 = 0.5 (unsampled minutes count as zero)."""
    r = run(tmp_path)
    got = {w["worker"]: w["cumulative"] for w in r.to_dict()["workers"]}
    expected = {"W1": 0.8125 * years("2000-01-01", "2005-07-01") + 0.5 * years("2005-07-01", "2012-01-01"),
                "W2": 1.2 * years("1995-03-15", "2001-03-15"),
                "W3": 0.5 * years("2003-05-01", "2008-05-01"),
                "W4": 0.8 * years("1990-01-01", "1999-12-31")}
    np.testing.assert_allclose([got[k] for k in expected], list(expected.values()), rtol=1e-12)
    assert any("task samples" in n for n in r.to_dict()["notes"])


def test_both_intensity_and_samples_are_refused(tmp_path):
    bad = HISTORY.replace("W3,2003-05-01,2008-05-01,", "W3,2003-05-01,2008-05-01,1.0")
    with pytest.raises(InputError, match=r"h.csv: row 5, column 'intensity': worker 'W3'.*both"):
        run(tmp_path, history=bad)


def test_samples_for_an_unknown_job_are_refused(tmp_path):
    bad = TASKS + "W2,1996-01-01,1.0,480\n"
    with pytest.raises(InputError, match=r"t.csv: row 5, column 'start': .*no such job"):
        run(tmp_path, tasks=bad)


def test_empty_intensity_without_samples_is_refused(tmp_path):
    bad = TASKS.replace("W3,2003-05-01,4.0,60\n", "")
    with pytest.raises(InputError, match=r"row 5, column 'intensity': empty intensity"):
        run(tmp_path, tasks=bad)


def test_negative_minutes_are_refused(tmp_path):
    bad = TASKS.replace("4.0,60", "4.0,-60")
    with pytest.raises(InputError, match=r"t.csv: row 4, column 'minutes'"):
        run(tmp_path, tasks=bad)
