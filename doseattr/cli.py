"""The ``doseattr`` command: a thin layer over the Python API.

::

    doseattr run ANALYSIS.toml --out DIR [--quiet] [--profile]
    doseattr check ANALYSIS.toml
    doseattr demo --out DIR [--quiet] [--profile]
    doseattr init KIND DIR

Every error this package raises on purpose is caught in :func:`main`, and
only there: it prints ``doseattr: error: <file>: <location>: <message>`` on
standard error and returns 2. ``DIR`` is checked before anything is
computed (it must be new, empty or hold a previous doseattr run; see
:mod:`doseattr.outputs.write`), and the writer swaps a complete run in only
at the end, so a failed or interrupted run leaves ``DIR`` as it was.
SIGINT and SIGTERM print one line and return 130 and 143 (128 + signal
number, the shell convention); any other exception is a bug and prints one
``internal error`` line, status 1. ``--profile`` prints wall and CPU seconds
per stage (:class:`StageClock`) on standard error after a run; it changes no
output but the command line recorded in ``provenance.command``.
"""

from __future__ import annotations

import argparse
import signal
import sys
import threading
import time
import warnings
from collections.abc import Iterator, Sequence
from contextlib import ExitStack, contextmanager, nullcontext
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

from doseattr import __version__
from doseattr.errors import DoseattrError, DoseattrWarning, InputError

EXIT_OK = 0
EXIT_BUG = 1
EXIT_ERROR = 2
DEMO_PACKAGE = "doseattr.demo"
DEMO_FILE = "analysis.toml"
DEMO_SUFFIXES = (".toml", ".csv", ".md")
#: ``doseattr init`` kinds (those of :data:`doseattr.outputs.templates.KINDS`,
#: named here so that the parser imports nothing heavy).
TEMPLATE_KINDS = ("concentration", "workplace", "districts", "grid")
STOP_SIGNALS = ("SIGINT", "SIGTERM")
_PYTHON_SHOWWARNING = warnings.showwarning
PROFILE_READING = "reading and checks"
PROFILE_FITTING = "fitting and other computing"
PROFILE_DRAWS = "Monte Carlo draws"
PROFILE_FIGURES = "figures"
PROFILE_FILES = "report and files"
#: The names the progress callbacks use, as the stages ``--profile`` shows.
PROFILE_STAGES = {"fitting": PROFILE_FITTING, "": PROFILE_FITTING,
                  "figures": PROFILE_FIGURES, "report": PROFILE_FILES}


class Stopped(BaseException):
    """Raised by the signal handlers: a BaseException so that no ``except
    Exception`` on the way swallows it, and every writer cleans up."""

    def __init__(self, signum: int) -> None:
        self.signum = signum
        super().__init__(signal.Signals(signum).name)


@dataclass
class StageClock:
    """Wall and CPU seconds per stage for ``--profile``, in the order the
    stages were first entered. The time since the last :meth:`enter` goes to
    the stage then open; a stage entered twice adds up. CPU seconds are the
    process's (``time.process_time``, every thread: they may exceed the wall
    seconds when the numerics run in parallel)."""

    wall: dict[str, float] = field(default_factory=dict)
    cpu: dict[str, float] = field(default_factory=dict)
    _open: str | None = None
    _since: tuple[float, float] = (0.0, 0.0)

    def enter(self, stage: str) -> None:
        """Close the open stage (if any) and open ``stage``."""
        now = (time.perf_counter(), time.process_time())
        if self._open is not None:
            self.wall[self._open] = self.wall.get(self._open, 0.0) + now[0] - self._since[0]
            self.cpu[self._open] = self.cpu.get(self._open, 0.0) + now[1] - self._since[1]
        self._open, self._since = stage, now

    def callback(self, name: str) -> None:
        """:meth:`enter` for a progress callback's stage name (a progress
        bar's label, such as ``draws``, counts as Monte Carlo draws)."""
        self.enter(PROFILE_STAGES.get(name, PROFILE_DRAWS))

    def stop(self) -> None:
        """Close the open stage."""
        self.enter("")
        self._open = None

    def lines(self) -> list[str]:
        """``doseattr: profile: STAGE  WALL s wall  CPU s CPU`` per stage,
        then the total."""
        width = max([len(s) for s in self.wall] + [len("total")])
        rows = [(s, self.wall[s], self.cpu[s]) for s in self.wall]
        rows.append(("total", sum(self.wall.values()), sum(self.cpu.values())))
        return [f"doseattr: profile: {s:<{width}}  {w:8.3f} s wall  {c:8.3f} s CPU"
                for s, w, c in rows]


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="doseattr",
        description="Attributable fractions (PAF) and scenario impact fractions (PIF) for a "
                    "continuously varying exposure, from a study's category-level relative "
                    "risks and the population's exposure data.")
    parser.add_argument("--version", action="version", version=f"doseattr {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    run = sub.add_parser("run", help="run an analysis file",
                         description="Run ANALYSIS (a TOML file) and write results.json, CSV "
                                     "tables and report.html into the folder --out.")
    run.add_argument("analysis", metavar="ANALYSIS.toml", help="the analysis file")
    _common(run)
    _scheduler(run)
    check = sub.add_parser("check", help="check an analysis file without computing",
                           description="Read and check ANALYSIS and its tables as run would, "
                                       "print what each section will compute, write nothing.")
    check.add_argument("analysis", metavar="ANALYSIS.toml", help="the analysis file")
    _scheduler(check)
    demo = sub.add_parser("demo", help="run the bundled demo analysis (invented numbers)",
                          description="Run the bundled demo analysis, a fictional town and "
                                      "study with invented numbers, and write its outputs.")
    _common(demo)
    init = sub.add_parser("init", help="write a starting analysis and example tables",
                          description="Write a commented starting analysis and small example "
                                      "tables (invented numbers) into DIR, a new or empty "
                                      "folder: concentration (monitor data and a study's "
                                      "bands), workplace (personal samples by worker, an OEL, "
                                      "work histories), districts (strata with population and "
                                      "rates), grid (grid cells with zones).")
    init.add_argument("kind", metavar="KIND", choices=TEMPLATE_KINDS,
                      help="one of " + ", ".join(TEMPLATE_KINDS))
    init.add_argument("dir", metavar="DIR", help="a new or empty folder")
    return parser


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", required=True, metavar="DIR",
                   help="output folder: new, empty, or holding a previous doseattr run "
                        "(replaced as a whole); nothing is written on error")
    p.add_argument("--quiet", action="store_true", help="print nothing on success")
    p.add_argument("--profile", action="store_true",
                   help="print wall and CPU seconds per stage on standard error at the end")


def _scheduler(p: argparse.ArgumentParser) -> None:
    p.add_argument("--scheduler", metavar="tcp://HOST:PORT",
                   help="compute a [grid] analysis on this running dask.distributed "
                        "scheduler (overrides [compute] scheduler)")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit status (0 ok, 2 error, 1 bug,
    130/143 stopped by SIGINT/SIGTERM)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    args = build_parser().parse_args(argv)
    try:
        with _stop_on_signals(), ExitStack() as stack:
            if args.command == "check":
                return _check(args.analysis, args.scheduler)
            if args.command == "init":
                return _init(args.kind, args.dir)
            path = (args.analysis if args.command == "run"
                    else str(stack.enter_context(_demo_file())))
            inputs = _demo_inputs(Path(path)) if args.command == "demo" else ()
            return _run(path, args.out, quiet=args.quiet, command=["doseattr", *argv],
                        scheduler=getattr(args, "scheduler", None), inputs=inputs,
                        profile=args.profile)
    except DoseattrError as exc:
        print(f"doseattr: error: {_line(exc)}", file=sys.stderr)
        return EXIT_ERROR
    except (Stopped, KeyboardInterrupt) as exc:
        signum = exc.signum if isinstance(exc, Stopped) else signal.SIGINT
        name = signal.Signals(signum).name
        print(f"doseattr: stopped by {name}; no partial outputs were left", file=sys.stderr)
        return 128 + int(signum)
    except Exception as exc:  # a bug: one line instead of a traceback
        message = " ".join(str(exc).split())
        print(f"doseattr: internal error: {type(exc).__name__}: {message} (please report "
              "this)", file=sys.stderr)
        return EXIT_BUG


def _load(path: str, scheduler: str | None):
    """The analysis file, on the scheduler given on the command line."""
    from doseattr.analysis.config import load_analysis, with_scheduler

    analysis = load_analysis(path)
    return analysis if scheduler is None else with_scheduler(analysis, scheduler)


def _run(path: str, out: str, *, quiet: bool, command: list[str],
         scheduler: str | None = None, inputs: Sequence[tuple[str, Path]] = (),
         profile: bool = False) -> int:
    clock = StageClock()
    clock.enter("start-up (imports)")
    from doseattr.analysis.pipeline import run_analysis
    from doseattr.analysis.progress import show_stage, stage_listener
    from doseattr.analysis.provenance import input_signatures, protected_paths
    from doseattr.outputs.write import check_destination, out_location, write_outputs

    def listen(name: str) -> None:
        _check_stopped()
        clock.callback(name)

    def stage(name: str) -> None:
        show_stage(name, not quiet)
        listen(name)

    clock.enter(PROFILE_READING)
    analysis = _load(path, scheduler)
    check_destination(out, protected_paths(analysis))  # before minutes of computing
    read = provenance_now(analysis, input_signatures(analysis))  # large files hash meanwhile
    with warnings.catch_warnings(record=True) as caught, stage_listener(listen):
        # our own lines rather than Python's: as they arise, and again at the
        # end with --quiet (they may change a decision)
        warnings.simplefilter("always", DoseattrWarning)
        if not quiet:
            warnings.showwarning = _show_now
        stage("fitting")
        results = run_analysis(analysis, progress=not quiet)
    clock.enter(PROFILE_FILES)
    _check_stopped()
    _same_inputs(read, provenance_now(analysis, input_signatures(analysis)), path)
    _same_inputs(read, (results.provenance.get("analysis_sha256", read[0]), {}), path)
    try:
        written = write_outputs(results, out, command=command, inputs=inputs, stage=stage)
    except OSError as exc:
        raise InputError(f"cannot write the outputs: {exc.strerror or exc}",
                         location=out_location(out)) from None
    finally:
        show_stage("", not quiet)
    clock.stop()
    for w in caught:
        _show_now(w.message, w.category, w.filename, w.lineno)
    if not quiet:
        print(results.summary(brief=True))
        print(f"\nwrote {len(written)} files to {out} (open {Path(out) / 'report.html'})")
    if profile:
        print("\n".join(clock.lines()), file=sys.stderr)
    return EXIT_OK


def _show_now(message, category, filename, lineno, file=None, line=None) -> None:
    """A warning as one line on standard error: ours as ``doseattr:
    warning: ...``, any other as Python would have shown it."""
    if issubclass(category, DoseattrWarning):
        from doseattr.analysis.progress import show_stage

        show_stage("", True)  # off the status line
        print(f"doseattr: warning: {message}", file=sys.stderr)
    else:
        _PYTHON_SHOWWARNING(message, category, filename, lineno, file, line)


def provenance_now(analysis, signatures: dict) -> tuple[str, dict]:
    """The analysis file's SHA-256 and the inputs' stat signatures
    (:func:`~doseattr.analysis.provenance.input_signatures`)."""
    from doseattr.analysis.provenance import analysis_bytes, sha256_bytes

    return sha256_bytes(analysis_bytes(analysis)[1]), signatures


def _same_inputs(read: tuple[str, dict], now: tuple[str, dict], path: str) -> None:
    """Refuse to write when the analysis file or a table changed while the
    run was computing (the hashes would not describe the data used): the
    analysis file's SHA-256, and every file's stat signature."""
    if read[0] != now[0]:
        raise InputError("changed while the run was computing; run again", source=path)
    for (key, file), signature in read[1].items():
        if now[1] and now[1].get((key, file)) != signature:
            if not key:
                raise InputError("changed while the run was computing; run again", source=path)
            raise InputError(f"{file} changed while the run was computing; run again",
                             source=path, location=key)


def _init(kind: str, folder: str) -> int:
    from doseattr.outputs.templates import write_template

    try:
        written = write_template(kind, folder)
    except OSError as exc:
        raise InputError(f"cannot write the template: {exc.strerror or exc}",
                         location=f"DIR '{folder}'") from None
    print(f"wrote {len(written)} files to {folder}: {', '.join(p.name for p in written)} "
          "(invented numbers; replace them with your own)")
    print(f"next: doseattr check {Path(folder) / 'analysis.toml'}")
    return EXIT_OK


def _check(path: str, scheduler: str | None = None) -> int:
    from doseattr.analysis.check import check_analysis

    for line in check_analysis(_load(path, scheduler)):
        print(line)
    return EXIT_OK


@contextmanager
def _stop_on_signals() -> Iterator[None]:
    """SIGINT and SIGTERM raise :class:`Stopped` for the block's duration
    (only in the main thread, where Python runs handlers)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {}
    _STOPPED.clear()
    for name in STOP_SIGNALS:
        signum = getattr(signal, name)
        previous[signum] = signal.signal(signum, _raise_stopped)
    try:
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)


#: The signals whose handler has run inside :func:`_stop_on_signals`. Python
#: ignores an exception raised where it cannot propagate (a weakref callback
#: or ``__del__`` running when the signal arrives, which a run with a Dask
#: scheduler does often), so the stop is raised again at the next stage
#: (:func:`_check_stopped`).
_STOPPED: list[int] = []


def _raise_stopped(signum: int, frame: object) -> None:
    _STOPPED.append(signum)
    raise Stopped(signum)


def _check_stopped() -> None:
    """Raise :class:`Stopped` if a signal's handler has run (its own
    exception may have been ignored)."""
    if _STOPPED:
        raise Stopped(_STOPPED[0])


def _demo_file():
    """The demo analysis as a real file, for the duration of a ``with``
    block: the installed package ``doseattr.demo``, or ``data_demo/`` of a
    source checkout that is not installed."""
    try:
        ref = resources.files(DEMO_PACKAGE) / DEMO_FILE
    except ModuleNotFoundError:
        checkout = Path(__file__).resolve().parent.parent / "data_demo" / DEMO_FILE
        if not checkout.is_file():
            raise DoseattrError("the demo files are not installed (package doseattr.demo "
                                "is missing); reinstall doseattr") from None
        return nullcontext(checkout)
    return resources.as_file(ref)


def _demo_inputs(analysis: Path) -> list[tuple[str, Path]]:
    """The demo's files (analysis, tables, README), to copy into
    ``DIR/inputs/`` so that a user can start from them."""
    return [(p.name, p) for p in sorted(analysis.parent.iterdir())
            if p.is_file() and p.suffix in DEMO_SUFFIXES]


def _line(exc: DoseattrError) -> str:
    if isinstance(exc, InputError):
        return exc.line()
    return str(exc)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
