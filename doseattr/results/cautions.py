"""The standing cautions on reading any PAF: one text each, shown in
results.json (``cautions``), the summary and the report."""

from __future__ import annotations

CAUSALITY = (
    "Causality: a PAF is the share of cases that would not occur without the exposure only if "
    "the RR curve is causal and free of confounding. With confounder-adjusted RRs the "
    "population formula used here can be biased; Miettinen's case-based formula "
    "(Miettinen 1974, Am J Epidemiol 99:325), PAF = sum of pc_i (RR_i - 1)/RR_i over the "
    "share of cases pc_i at each level, is the valid form when the cases' exposure "
    "distribution is known.")
TRANSPORTABILITY = (
    "Transportability: the study's RRs are assumed to hold in this population (same "
    "susceptibility, co-exposures, baseline risk and exposure metric).")
EXTRAPOLATION = (
    "Extrapolation: results that depend on exposures above the curve's data range rest on "
    "the assumed shape there (held flat or extended), not on data.")
DECISIONS = (
    "Decisions: exposure limits and any decision based on these numbers belong to the local "
    "regulations and to licensed professionals; this tool computes, it does not advise.")

#: Every run carries these, in this order.
CAUTIONS = (CAUSALITY, TRANSPORTABILITY, EXTRAPOLATION, DECISIONS)

COMPLIANCE = (
    "Compliance: the statement on the limit value is a statistical test of the samples given, "
    "as representative shifts of one similar exposure group; it is only as good as the "
    "sampling strategy and the measurement method, and the rule of EN 689:2018 is applied "
    "as recalled (from memory). Whether a workplace complies is decided under the "
    "regulations that apply there, by a qualified occupational hygienist.")

#: Added to :data:`CAUTIONS` when a run tests ``[limit]``.
LIMIT_CAUTIONS = (COMPLIANCE,)
