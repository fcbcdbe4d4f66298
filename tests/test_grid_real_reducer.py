"""The grid input module with the real core reducer (not the stand-in of
tests/grid_standin.py): a cell table reduced through ``reduce_grid`` gives
each zone's population and population-weighted mean concentration as numpy
computes them from the cells, and each zone's PAF equals the exact per-cell
PAF (linear ERR: the bin means make it exact; closed form derived in
doseattr/core/exposure/grid.py)."""

from __future__ import annotations

import numpy as np

from doseattr.analysis.grid_inputs import GridSpec
from doseattr.analysis.grid_reduce import reduce_grid
from doseattr.core.attribution.fractions import paf
from doseattr.core.curves.published import published_curve
from doseattr.core.exposure.empirical import empirical


def test_cell_table_through_the_real_reducer(tmp_path):
    rng = np.random.default_rng(1)
    n = 5000
    x = rng.lognormal(2.0, 0.6, n)
    pop = rng.uniform(1.0, 100.0, n)
    zone = rng.integers(1, 4, n)
    path = tmp_path / "cells.csv"
    path.write_text("value,population,zone\n" + "\n".join(
        f"{float(a)!r},{float(b)!r},{int(c)}" for a, b, c in zip(x, pop, zone, strict=True)))
    sums, notes = reduce_grid(GridSpec(cells=str(path)), [1, 2, 3])
    summary = sums.summary()
    curve = published_curve("linear", err=0.01)
    for k, zid in enumerate((1, 2, 3)):
        m = zone == zid
        np.testing.assert_allclose(summary.zone_population(k), pop[m].sum(), rtol=1e-12)
        np.testing.assert_allclose(summary.zone_mean(k), np.average(x[m], weights=pop[m]),
                                   rtol=1e-12)
        exact = paf(curve, empirical(x[m], pop[m]), minimum_risk=0.0)
        reduced = paf(curve, summary.zone_exposure(k), minimum_risk=0.0)
        np.testing.assert_allclose(reduced, exact, rtol=1e-10)
    assert notes.cells == n and notes.skipped == 0
