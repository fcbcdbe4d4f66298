"""The study's band table as plain arrays for plots.

The run keeps the study's bands as a
:class:`~doseattr.results.records.BandTable` (``CurveSection.bands``);
:func:`band_arrays` returns one float array per column (``nan`` where
empty, ``inf`` for an open upper limit) and a boolean ``reference`` array.
It also accepts the mapping it returns itself (a figure that redraws the
bands at other doses passes that mapping on with ``dose`` replaced).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from doseattr.results.records import BandTable

COLUMNS = ("lower", "upper", "dose", "rr", "ci_lower", "ci_upper")


def band_arrays(table: BandTable | Mapping[str, np.ndarray] | None
                ) -> dict[str, np.ndarray] | None:
    """Columns of ``table`` as arrays, or ``None`` when there is no table."""
    if table is None:
        return None
    if isinstance(table, BandTable):
        columns = {"lower": table.lower, "upper": table.upper, "dose": table.dose,
                   "rr": table.rr, "ci_lower": table.ci_lower, "ci_upper": table.ci_upper}
        reference = np.asarray(table.reference, bool)
    else:
        columns = {name: np.asarray(table[name], float) for name in COLUMNS}
        reference = np.asarray(table["reference"], bool)
    out = {name: np.array(values, float) for name, values in columns.items()}
    out["upper"] = np.where(np.isnan(out["upper"]), np.inf, out["upper"])
    out["reference"] = reference
    return out

