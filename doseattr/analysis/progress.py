"""What the terminal shows while a run computes: the stage (fitting, draws,
figures, report) and a bar counting Monte Carlo draws.

The core reports work in units of ``draws x exposures x (1 + scenarios)``
(one unit per fraction drawn); :func:`progress_bar` rescales them so that
the bar counts draws, the number the analysis file asked for. Both are
shown only on a terminal (tqdm's ``disable=None``) and the bar only after a
second (``delay``), on standard error. :func:`stage_listener` lets a caller
(``doseattr run --profile``) hear each bar begin and end, shown or not.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager

STAGES = ("fitting", "draws", "figures", "report")
_LISTENERS: list[Callable[[str], None]] = []


@contextmanager
def stage_listener(callback: Callable[[str], None]) -> Iterator[None]:
    """Call ``callback(stage)`` as each progress bar begins and
    ``callback("")`` as it ends, for the block's duration."""
    _LISTENERS.append(callback)
    try:
        yield
    finally:
        _LISTENERS.remove(callback)


def _notify(stage: str) -> None:
    for callback in list(_LISTENERS):
        callback(stage)


@contextmanager
def progress_bar(units: int, enabled: bool, *, draws: int | None = None,
                 stage: str = "draws") -> Iterator[Callable[[int], None] | None]:
    """A tqdm bar of ``draws`` steps (default ``units``) labelled ``stage``;
    yields the callback the core calls with units of work done (or ``None``
    when disabled)."""
    _notify(stage)
    try:
        with _bar(units, enabled, draws, stage) as tick:
            yield tick
    finally:
        _notify("")


@contextmanager
def _bar(units: int, enabled: bool, draws: int | None,
         stage: str) -> Iterator[Callable[[int], None] | None]:
    if not enabled:
        yield None
        return
    from tqdm import tqdm

    steps = units if draws is None else draws
    show_stage(stage, True)  # at once; the bar replaces it after a second
    try:
        with tqdm(total=steps, unit="draw", disable=None, delay=1.0, leave=False,
                  file=sys.stderr, desc=stage) as bar:
            yield _rescaled(bar, units, steps)
    finally:
        show_stage("", True)


def _rescaled(bar, units: int, steps: int) -> Callable[[int], None]:
    """``tick(k)``: ``k`` more units done, shown as the whole draws they make."""
    done = [0]

    def tick(k: int) -> None:
        before = done[0] * steps // max(units, 1)
        done[0] = min(done[0] + int(k), units)
        after = done[0] * steps // max(units, 1)
        if after > before:
            bar.update(after - before)

    return tick


def show_stage(stage: str, enabled: bool) -> None:
    """One status line ``doseattr: STAGE ...`` on standard error when it is
    a terminal (rewritten in place by the next stage, cleared by ``""``)."""
    stream = sys.stderr
    if not enabled or not stream.isatty():
        return
    text = f"doseattr: {stage} ..." if stage else ""
    stream.write("\r" + text + "\x1b[K")
    stream.flush()
