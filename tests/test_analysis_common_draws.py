"""Common random numbers (issue 10 item 3): the same quantity has one set of
draws and one interval in a run, and each headline PAF says what it is.

The check is identity, not closeness: a stratum with the shared exposure is
the same quantity as the population (a PAF does not depend on the number of
cases), so its draws must equal the population's draw by draw (derived from
the definition PAF_s = 1 - 1/E_s[RR_m(X)], which has no stratum-specific
term when the exposure is shared).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from doseattr.analysis.burden_run import POPULATION
from doseattr.analysis.config import load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.results.records import CASE_WEIGHTED_PAF, POPULATION_PAF

DEMO = Path(__file__).resolve().parent.parent / "data_demo" / "analysis.toml"


@pytest.fixture(scope="module")
def demo():
    return run_analysis(load_analysis(DEMO))


def test_shared_strata_have_the_population_draws(demo):
    """Old Town, Riverside and Hillcrest share the town's exposure
    (data_demo/districts.csv): their PAF and PIF draws are the population's,
    exactly, and so are their intervals; Quarryside has its own."""
    prop = demo.propagation
    assert prop.strata[0] == POPULATION  # the whole population, at index 0
    shared = [i for i, s in enumerate(demo.burden.strata, start=1)
              if not s.exposure.own]
    own = [i for i, s in enumerate(demo.burden.strata, start=1) if s.exposure.own]
    assert shared and own
    for i in shared:
        np.testing.assert_array_equal(prop.paf[i], prop.paf[0])
        for name in prop.pif:
            np.testing.assert_array_equal(prop.pif[name][i], prop.pif[name][0])
        s = demo.burden.strata[i - 1]
        assert (s.paf.lower, s.paf.upper) == (demo.paf.lower, demo.paf.upper)
    for i in own:
        assert not np.array_equal(prop.paf[i], prop.paf[0])


def test_totals_are_the_strata_alone(demo):
    """The population rides along with 0 cases: the total attributable
    cases are the sum over the districts draw by draw, and the total PAF is
    that over the districts' cases (the definitions of the burden's totals)."""
    prop = demo.propagation
    np.testing.assert_allclose(prop.total_attributable, prop.attributable[1:].sum(axis=0),
                               rtol=1e-12)
    cases = sum(s.cases for s in demo.burden.strata)
    assert demo.burden.total.cases == cases
    np.testing.assert_allclose(prop.total_paf, prop.total_attributable / cases, rtol=1e-12)


def test_each_headline_paf_says_what_it_is(demo):
    d = demo.to_dict()
    assert d["paf_label"] == POPULATION_PAF
    assert d["burden"]["total_label"] == CASE_WEIGHTED_PAF
    assert d["uncertainty"]["width_by_source_explains"] == CASE_WEIGHTED_PAF
    text = demo.summary()
    assert POPULATION_PAF in " ".join(text.split())
    assert f"(the {CASE_WEIGHTED_PAF})" in " ".join(text.split())
