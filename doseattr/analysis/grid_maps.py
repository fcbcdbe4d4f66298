r"""Maps of a ``[grid]`` run: the concentration and the attributable cases
per 1,000 people of every ``step``-th cell, at the point estimates.

A cell :math:`c` of zone :math:`z` with concentration :math:`x_c` gets the
zone's attributable cases shared out by the cell's excess risk, so that
the cells' attributable cases (per-1,000 value times population / 1,000)
add up, over all cells, to the zone's:

- ``method = "paf"``: the zone's baseline rate at the minimum-risk level
  is :math:`N_z / (P_z E_z[RR_m])`, so a cell's attributable cases per
  person are :math:`N_z (1 - PAF_z) (RR_m(x_c) - 1) / P_z`, which sum, over
  the zone's population, to :math:`N_z (1 - 1/E_z[RR_m]) = PAF_z N_z`.
- ``method = "impact-function"``: the observed rate :math:`N_z / P_z` at
  each cell's own exposure, so :math:`N_z (1 - 1/RR_m(x_c)) / P_z`.

(Derived here from the two methods' definitions.) :math:`N_z` sums the
zone's burden rows (groups) and :math:`P_z` is the zone's population in the
grid. The maps are for display: a sample of cells, not every cell.
"""

from __future__ import annotations

import numpy as np

from doseattr.analysis.grid_reduce import GridSample
from doseattr.results.records import BurdenResult, GridMaps, GridSection


def grid_maps(sample: GridSample, section: GridSection, total_population: float, curve,
              minimum_risk: float, burden: BurdenResult | None) -> GridMaps:
    """The two display maps of a grid run (``attributable_per_1000`` is all
    NaN without a burden table)."""
    x = sample.concentration
    per_1000 = np.full(x.shape, np.nan)
    if burden is not None:
        coef = _zone_coefficients(section, total_population, burden)
        index = sample.zone_index if section.zone_ids else np.zeros(x.shape, dtype=np.int64)
        inside = (index >= 0) & np.isfinite(x) & np.isfinite(sample.population)
        k = np.where(inside, index, 0)
        excess = _excess(curve, x[inside], minimum_risk, burden.method)
        per_1000[inside] = 1000.0 * coef[k[inside]] * excess
    return GridMaps(concentration=x, attributable_per_1000=per_1000, step=sample.step,
                    extent=sample.extent, crs=sample.crs)


def _zone_coefficients(section: GridSection, total_population: float,
                       burden: BurdenResult) -> np.ndarray:
    """Per zone, the factor of the cell's excess: sum over the zone's rows of
    ``N_r (1 - PAF_r)`` (PAF method) or ``N_r`` (impact function), over the
    zone's population."""
    strata = section.zone_strata or ("",)
    population = section.zone_population or (total_population,)
    out = np.zeros(len(strata))
    for k, (name, people) in enumerate(zip(strata, population, strict=True)):
        rows = [r for r in burden.strata if not section.zone_strata or r.stratum == name]
        weight = sum(r.cases * (1.0 - r.paf.estimate) if burden.method == "paf" else r.cases
                     for r in rows)
        out[k] = weight / people if people > 0 else np.nan
    return out


def _excess(curve, x: np.ndarray, m: float, method: str) -> np.ndarray:
    r"""``RR_m(x) - 1`` (PAF method) or ``1 - 1/RR_m(x)``, on the log scale:
    :math:`\Delta = \log RR(\max(x, m)) - \log RR(m)`, then ``expm1``."""
    delta = curve.log_rr(np.maximum(x, m)) - curve.log_rr(np.asarray(m, dtype=float))
    return np.expm1(delta) if method == "paf" else -np.expm1(-delta)
