"""Exposure given as a binned table or as work histories, read and checked."""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from doseattr.analysis.csvfile import (
    FloatArray,
    RawTable,
    Row,
    cell_error,
    check_band_order,
    check_units,
    number,
    read_raw,
    require_columns,
    shown,
)
from doseattr.errors import InputError


@dataclass(frozen=True, eq=False)
class BinsTable:
    """Exposure bands with counts (or shares summing to 1)."""

    source: str
    lower: FloatArray
    upper: FloatArray
    counts: FloatArray
    shares: bool
    notes: tuple[str, ...] = ()
    zero: float = 0.0


@dataclass(frozen=True, eq=False)
class HistoriesTable:
    """Work histories: one row per job (dates as numpy datetime64[D])."""

    source: str
    worker: NDArray[np.str_]
    start: NDArray[np.datetime64]
    end: NDArray[np.datetime64]
    intensity: FloatArray
    lines: tuple[int, ...] = ()


def read_bins(path: str | Path, source: str | None = None) -> BinsTable:
    """Read exposure bands: columns ``lower``, ``upper`` (empty for an open
    top band) and ``count`` or ``share``; bands in order without overlap;
    counts 0 or more; shares summing to 1 within 1e-6. A row with lower and
    upper both 0 counts the people with no exposure at all (the unexposed
    share); it must come first."""
    raw = read_raw(path, source)
    require_columns(raw, ("lower", "upper"), "a binned exposure table")
    check_units(raw, ("lower", "upper"))
    kind = next((c for c in ("count", "share") if c in raw.columns), None)
    if kind is None:
        raise InputError("missing column 'count' or 'share' (a binned exposure table needs one "
                         "of them)", source=raw.source, location="column 'count'")
    lower, upper, n = [], [], []
    zero = 0.0
    for i, row in enumerate(raw.rows):
        lo = number(raw, row, "lower")
        if lo < 0:
            raise cell_error(raw, row, "lower",
                             f"negative exposure {lo:g}; limits must be 0 or more")
        up = number(raw, row, "upper", required=False)
        up = math.inf if up is None else up
        if lo == 0 and up == 0:
            if i > 0:
                raise cell_error(raw, row, "upper", "the row of people with no exposure "
                                 "(lower and upper 0) must be the first row")
            zero = number(raw, row, kind)
            if zero < 0:
                raise cell_error(raw, row, kind, f"{kind} must be 0 or more, got {zero:g}")
            continue
        if up <= lo:
            raise cell_error(raw, row, "upper", f"upper limit {up:g} is not above the lower limit "
                        f"{lo:g}")
        v = number(raw, row, kind)
        if v < 0:
            raise cell_error(raw, row, kind, f"{kind} must be 0 or more, got {v:g}")
        lower.append(lo)
        upper.append(up)
        n.append(v)
    lo_a, up_a, n_a = np.array(lower), np.array(upper), np.array(n)
    check_band_order(raw, lo_a, up_a)
    if kind == "share" and abs(n_a.sum() + zero - 1.0) > 1e-6:
        raise InputError(f"shares sum to {n_a.sum() + zero:.8g}, not 1 (within 1e-6); give shares as "
                         "fractions that add up to 1, or counts in a 'count' column",
                         source=raw.source, location="column 'share'")
    if np.sum(n_a > 0) < 3:
        raise InputError(f"only {int(np.sum(n_a > 0))} bands hold anyone; at least 3 are needed "
                         "to fit a distribution", source=raw.source, location=f"column '{kind}'")
    if zero >= zero + n_a.sum():
        raise InputError("everyone is in the no-exposure row; nothing to fit", source=raw.source,
                         location=f"column '{kind}'")
    return BinsTable(raw.source, lo_a, up_a, n_a, kind == "share", zero=zero)


def read_histories(path: str | Path, source: str | None = None, *,
                   tasks: TasksTable | None = None) -> HistoriesTable:
    """Read work histories: columns ``worker``, ``start``, ``end`` (ISO dates;
    ``end`` is the first day no longer in the job) and ``intensity`` (an
    8-hour TWA, 0 or more). Refuses an end before its start and two jobs of
    one worker that overlap. With ``tasks``, a job whose intensity cell is
    empty takes the 8-hour TWA of its task samples."""
    raw = read_raw(path, source)
    require_columns(raw, ("worker", "start", "end", "intensity"), "a work-history table")
    check_units(raw, ("intensity",))
    workers, starts, ends, levels = [], [], [], []
    for row in raw.rows:
        worker = row.cells["worker"]
        if not worker:
            raise cell_error(raw, row, "worker", "empty worker id")
        start, end = _date(raw, row, "start"), _date(raw, row, "end")
        if end < start:
            raise cell_error(raw, row, "end", f"the job ends ({end}) before it starts ({start}); "
                        "dates are out of order")
        c = _intensity(raw, row, worker, start, tasks)
        if c < 0:
            raise cell_error(raw, row, "intensity", f"negative exposure {c:g}")
        workers.append(worker)
        starts.append(start)
        ends.append(end)
        levels.append(c)
    _check_overlaps(raw, workers, starts, ends)
    if tasks is not None:
        _check_tasks_used(tasks, set(zip(workers, starts)))
    return HistoriesTable(raw.source, np.array(workers), np.array(starts, dtype="datetime64[D]"),
                          np.array(ends, dtype="datetime64[D]"), np.array(levels),
                          tuple(r.line for r in raw.rows))


@dataclass(frozen=True, eq=False)
class TasksTable:
    """Task samples per job: the 8-hour TWA of each (worker, job start)
    and the line of the first sample of each job."""

    source: str
    twa: dict
    lines: dict


def read_tasks(path: str | Path, source: str | None = None) -> TasksTable:
    r"""Read task samples: columns ``worker``, ``start`` (the start date of
    the job the samples describe), ``concentration`` and ``minutes`` (both
    0 or more). Each job's intensity is the 8-hour TWA
    :math:`\sum_i C_i t_i / 480` (core ``twa_8h``; common practice in
    occupational hygiene, e.g. HSE EH40, from memory)."""
    from doseattr.core.exposure.histories import twa_8h

    raw = read_raw(path, source)
    require_columns(raw, ("worker", "start", "concentration", "minutes"), "a task-sample table")
    check_units(raw, ("concentration",))
    samples: dict = {}
    lines: dict = {}
    for row in raw.rows:
        worker = row.cells["worker"]
        if not worker:
            raise cell_error(raw, row, "worker", "empty worker id")
        key = (worker, _date(raw, row, "start"))
        values = [number(raw, row, c) for c in ("concentration", "minutes")]
        for column, v in zip(("concentration", "minutes"), values):
            if v < 0:
                raise cell_error(raw, row, column, f"{column} must be 0 or more, got {v:g}")
        samples.setdefault(key, []).append(values)
        lines.setdefault(key, row.line)
    twa = {k: twa_8h([c for c, _ in v], [t for _, t in v]) for k, v in samples.items()}
    return TasksTable(raw.source, twa, lines)


def _intensity(raw: RawTable, row: Row, worker: str, start, tasks: TasksTable | None) -> float:
    """The job's intensity: its cell, or the TWA of its task samples."""
    given = number(raw, row, "intensity", required=tasks is None)
    from_tasks = None if tasks is None else tasks.twa.get((worker, start))
    if given is not None and tasks is not None and from_tasks is not None:
        raise cell_error(raw, row, "intensity", f"worker '{worker}', job from {start}: both an "
                         f"intensity and task samples ({tasks.source}) are given; leave the "
                         "cell empty to use the samples, or remove the samples")
    if given is not None:
        return given
    if from_tasks is None:
        raise cell_error(raw, row, "intensity", f"empty intensity and no task samples for "
                         f"worker '{worker}', job from {start}")
    return from_tasks


def _check_tasks_used(tasks: TasksTable, jobs: set) -> None:
    for key, line in tasks.lines.items():
        if key not in jobs:
            raise InputError(f"task samples for worker '{key[0]}' and a job starting {key[1]}, "
                             "but the work histories have no such job", source=tasks.source,
                             location=f"row {line}, column 'start'")


def _date(raw: RawTable, row: Row, column: str):
    from datetime import date

    text = row.cells[column]
    try:
        return date.fromisoformat(text)
    except ValueError:
        raise cell_error(raw, row, column, f"'{shown(text)}' is not an ISO date like 2019-03-31") from None


def _check_overlaps(raw: RawTable, workers, starts, ends) -> None:
    jobs: dict[str, list[int]] = {}
    for i, w in enumerate(workers):
        jobs.setdefault(w, []).append(i)
    for w, idx in jobs.items():
        idx = sorted(idx, key=lambda i: starts[i])
        for a, b in zip(idx, idx[1:]):
            if starts[b] < ends[a]:
                first, second = sorted((raw.rows[a].line, raw.rows[b].line))
                raise InputError(f"worker '{w}': the jobs in rows {first} and {second} overlap; "
                                 "a worker holds one job at a time", source=raw.source,
                                 location=f"row {second}, column 'start'")
