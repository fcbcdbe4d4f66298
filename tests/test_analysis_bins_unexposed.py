"""A binned exposure table whose first row (lower = upper = 0) counts the
people with no exposure: the unexposed share is that count over the total,
and the remaining bands are fitted as before."""

import numpy as np
import pytest
from reference_integrals import expect_over

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.errors import InputError

ERR = {"model": "linear", "err": 0.04, "per": 1.0, "max_dose": 60.0}
BANDS = "lower,upper,count\n0,5,120\n5,10,260\n10,20,180\n20,,40\n"


def run(tmp_path, text, **extra):
    (tmp_path / "b.csv").write_text(text)
    exposure = {"bins": "b.csv", "family": "lognormal", **extra}
    return run_analysis(analysis_from_dict({"unit": "ug/m3", "curve": ERR, "exposure": exposure},
                                           base_dir=tmp_path))


def test_zero_row_gives_the_unexposed_share(tmp_path):
    """u = 400 / (400 + 600); the exposed part is the fit without the row, so
    E[RR_m] = u + (1 - u) E_fit[RR] (law of total expectation), with E_fit
    from scipy.integrate.quad over the fitted lognormal (scipy.stats)."""
    with_zero = run(tmp_path, "lower,upper,count\n0,0,400\n" + BANDS.split("\n", 1)[1])
    without = run(tmp_path, BANDS)
    assert with_zero.exposure.unexposed == pytest.approx(0.4, rel=1e-15)
    np.testing.assert_allclose(with_zero.exposure.params, without.exposure.params, rtol=1e-10)
    d = with_zero.exposure.family.scipy(with_zero.exposure.params)
    e_fit = expect_over(lambda x: 1 + 0.04 * min(x, 60.0), d, (60.0,), epsrel=1e-12, limit=50)
    e = 0.4 + 0.6 * e_fit
    assert with_zero.paf.estimate == pytest.approx(1 - 1 / e, rel=1e-8)


def test_zero_row_must_come_first(tmp_path):
    text = BANDS + "0,0,400\n"
    with pytest.raises(InputError, match=r"b.csv: row 6, column 'upper': .*first row"):
        run(tmp_path, text)


def test_zero_row_and_unexposed_key_conflict(tmp_path):
    with pytest.raises(InputError, match=r"\[exposure\] key 'unexposed'"):
        run(tmp_path, "lower,upper,count\n0,0,400\n" + BANDS.split("\n", 1)[1], unexposed=0.1)
