"""``[limit]``: compliance of the measured samples with a limit value, and
the workers' view when the samples name their workers.

The statistics are the core's (:mod:`doseattr.core.hygiene`): the
exceedance fraction, the 95th percentile's upper tolerance limit and the
arithmetic mean with confidence limits, exact for lognormal samples without
non-detects and by profile likelihood otherwise, and the decision rule of
EN 689:2018. They are computed on the single samples (shifts), which is
what a limit value for an 8-hour TWA is about; with a ``worker`` column the
one-way random-effects model adds the probability that a worker's
long-term mean exceeds the limit and the workers whose own mean does.
"""

from __future__ import annotations

from doseattr.analysis.build import BuiltExposure, as_input_error
from doseattr.analysis.config import Analysis
from doseattr.core.exposure.base import Exposure
from doseattr.results.records import LimitSection, WorkerExceedance

#: Level of the two-sided intervals reported beside the one-sided limits.
INTERVAL_LEVEL = 0.95

#: Said whenever samples are tested against a limit without a worker column.
NO_WORKER_NOTE = ("the samples carry no worker column, so they are taken as independent "
                  "shifts of the group: day-to-day variation within a worker makes the "
                  "distribution of single samples wider than that of workers' long-term "
                  "means, which a cohort's dose-response refers to")


def limit_section(analysis: Analysis, built: BuiltExposure) -> LimitSection | None:
    """The ``limit`` results of ``analysis`` (``None`` without ``[limit]``)."""
    spec = analysis.limit
    if spec is None:
        return None
    from doseattr.core.exposure.fit import prepare
    from doseattr.core.hygiene.limits import limit_statistics

    sampled = built.sampled
    assert isinstance(sampled, Exposure) and sampled.fit is not None
    fit = sampled.fit
    assert fit.values is not None and fit.detected_mask is not None
    source = _table_source(analysis)
    with as_input_error(source, "column 'value'", "the limit cannot be tested: "):
        data = prepare(fit.values, fit.detected_mask, fit.weights)
        stats = limit_statistics(sampled.family, data, spec.value,
                                 confidence=spec.confidence, level=INTERVAL_LEVEL,
                                 exceedance=spec.exceedance)
    notes = list(spec.notes)
    model = built.worker_model
    if model is None:
        return LimitSection(stats, analysis.unit, notes=tuple(notes + [NO_WORKER_NOTE]))
    return LimitSection(stats, analysis.unit, workers=model,
                        worker_exceedance=_worker_exceedance(model, spec.value),
                        workers_above=_above(model, spec.value), notes=tuple(notes))


def limit_warnings(lim: LimitSection | None) -> list[str]:
    """Warnings for a group that does not comply or whose exceedance
    fraction may be above the tolerated share."""
    if lim is None:
        return []
    s, out = lim.stats, []
    if s.decision.verdict == "does not comply":
        out.append(f"the samples do not comply with the limit {s.limit:.4g}: {s.decision.rule}")
    if s.overexposure:
        out.append(f"the exceedance fraction's upper limit at {s.confidence:.0%} "
                   f"({s.exceedance.ucl:.3g}) is above the tolerated {s.exceedance_tolerated:g}")
    if lim.workers_above:
        out.append(f"{len(lim.workers_above)} workers have an estimated long-term mean above "
                   "the limit (limit_workers.csv)")
    return out


def _worker_exceedance(model, limit: float) -> WorkerExceedance | None:
    from doseattr.core.hygiene.workers import exceedance_of_worker_means

    method = ("1 - Phi((ln L - mu - sw^2/2) / sb), delta method on the probit scale "
              "(Rappaport & Kupper 2008, from memory)")
    if model.sigma_between == 0 or model.cov is None:
        return None
    est, lo, hi = exceedance_of_worker_means(model, limit, level=INTERVAL_LEVEL)
    return WorkerExceedance(est, lo, hi, INTERVAL_LEVEL, method)


def _above(model, limit: float):
    from doseattr.core.hygiene.workers import workers_above

    return tuple(workers_above(model, limit))


def _table_source(analysis: Analysis) -> str | None:
    measurements = getattr(analysis.exposure, "measurements", None)
    return None if measurements is None else measurements.source
