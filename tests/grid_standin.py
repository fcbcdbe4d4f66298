"""A stand-in for the core's grid reducer (``doseattr.core.exposure.grid``,
written separately), with its interface, for testing the input side on its
own: per zone, the population and population x concentration on a few
log-spaced concentration bins (``np.bincount`` of zone x bin), the
population at zero concentration, the cells used, and the cells skipped
(NaN or negative concentration or population, zone index below 0) with
their population."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Upper edges of the positive bins (the last bin is open above).
EDGES = np.geomspace(0.5, 50.0, 7)
N_BINS = len(EDGES) + 1


@dataclass(frozen=True)
class BlockSums:
    weight: np.ndarray
    moment: np.ndarray
    zero: np.ndarray
    cells: np.ndarray
    skipped: int
    skipped_population: float

    def __add__(self, other: BlockSums) -> BlockSums:
        return BlockSums(self.weight + other.weight, self.moment + other.moment,
                         self.zero + other.zero, self.cells + other.cells,
                         self.skipped + other.skipped,
                         self.skipped_population + other.skipped_population)


def reduce_block(conc, pop, zone_index, n_zones):
    c, p, z = (np.asarray(a).ravel() for a in (conc, pop, zone_index))
    good_pop = np.isfinite(p) & (p >= 0)
    ok = np.isfinite(c) & (c >= 0) & good_pop & (z >= 0) & (z < n_zones)
    zero = ok & (c == 0)
    pos = ok & (c > 0)
    flat = z[pos] * N_BINS + np.searchsorted(EDGES, c[pos])
    size = n_zones * N_BINS
    weight = np.bincount(flat, weights=p[pos], minlength=size).reshape(n_zones, N_BINS)
    moment = np.bincount(flat, weights=p[pos] * c[pos], minlength=size).reshape(n_zones, N_BINS)
    return BlockSums(weight, moment, np.bincount(z[zero], weights=p[zero], minlength=n_zones),
                     np.bincount(z[ok], minlength=n_zones), int((~ok).sum()),
                     float(p[~ok & good_pop].sum()))
