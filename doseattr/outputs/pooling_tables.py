"""``studies.csv``: one row per study of a pooled curve ([[curve.study]]).

Columns: the study's name, design, unit, covariance method of its log RRs,
number of bands, reference dose and highest assigned dose (analysis unit),
its weight in the pooled estimate, then each coefficient with its standard
error from the study's own fit, and the fit's Q, df and p-value.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from doseattr.results.records import CurveSection

Table = tuple[list[str], list[list[Any]]]


def studies_table(section: CurveSection, unit: str | None) -> Table | None:
    """The rows of ``studies.csv`` (``None`` for a curve not pooled)."""
    p = section.pooling
    if p is None:
        return None
    names = list(p.mean.model.param_names)
    u = f" ({unit})" if unit else ""
    header = ["study", "design", "unit_given", "covariance_method", "bands",
              f"reference_dose{u}", f"data_max{u}", "weight",
              *[c for n in names for c in (n, f"{n}_se")], "q", "df", "p_value"]
    rows = []
    for s in p.studies:
        c, fit = s.curve, s.curve.fit
        se = np.sqrt(np.maximum(np.diag(c.cov), 0.0))
        coef = [float(v) for b, e in zip(c.coef, se) for v in (b, e)]
        rows.append([s.name, s.design, s.unit, s.covariance_method, len(s.bands.rr),
                     float(c.model.reference_dose), c.data_max, float(s.weight), *coef,
                     None if fit is None else float(fit.q),
                     None if fit is None else int(fit.df),
                     None if fit is None else fit.p_value])
    return header, rows
