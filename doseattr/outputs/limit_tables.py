"""``limit.csv`` and ``limit_workers.csv``: the figures of ``[limit]``.

``limit.csv`` has one row per quantity (exceedance fraction, 95th
percentile, arithmetic mean, and with a worker column the probability that
a worker's long-term mean exceeds the limit) with its estimate, two-sided
interval at ``level``, one-sided upper limit at ``confidence`` and method,
then one row for the decision. ``limit_workers.csv`` has one row per worker.
"""

from __future__ import annotations

from typing import Any

from doseattr.results.records import LimitSection

Table = tuple[list[str], list[list[Any]]]

LIMIT_COLUMNS = ["quantity", "estimate", "lower", "upper", "level", "upper_limit", "confidence",
                 "limit", "method", "note"]


def limit_table(lim: LimitSection | None, unit: str | None) -> Table | None:
    """The rows of ``limit.csv`` (``None`` without ``[limit]``)."""
    if lim is None:
        return None
    s = lim.stats
    rows: list[list[Any]] = []
    for name, b in (("exceedance_fraction", s.exceedance), ("p95", s.p95), ("mean", s.mean)):
        rows.append([name, b.estimate, b.lower, b.upper, b.level, b.ucl, b.confidence, s.limit,
                     b.method, b.note])
    e = lim.worker_exceedance
    if e is not None:
        rows.append(["worker_mean_exceedance", e.estimate, e.lower, e.upper, e.level, None, None,
                     s.limit, e.method, ""])
    d = s.decision
    rows.append(["decision", None, None, None, None, None, s.confidence, s.limit,
                 f"{d.test}: {d.verdict}", d.rule])
    header = [c if c not in ("limit",) else f"limit ({unit})" if unit else c
              for c in LIMIT_COLUMNS]
    return header, rows


def limit_workers_table(lim: LimitSection | None, unit: str | None) -> Table | None:
    """One row per worker: samples, non-detects, the estimated mean of log
    exposure, the estimated long-term mean and whether it is above the limit."""
    if lim is None or lim.workers is None:
        return None
    above = {w.worker for w in lim.workers_above}
    mean = f"long_term_mean ({unit})" if unit else "long_term_mean"
    rows = [[w.worker, w.n, w.n_censored, w.mean_log, w.long_term_mean, w.worker in above]
            for w in lim.workers.workers]
    return ["worker", "samples", "non_detects", "mean_log", mean, "above_limit"], rows
