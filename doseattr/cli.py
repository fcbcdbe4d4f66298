"""The ``doseattr`` command: a thin layer over the Python API.

::

    doseattr run ANALYSIS.toml --out DIR [--quiet]
    doseattr demo --out DIR [--quiet]

Every error this package raises on purpose is caught in :func:`main`, and
only there: it prints ``doseattr: error: <file>: <location>: <message>`` on
standard error and returns 2. The analysis is read, checked and computed in
full before anything is written, and the writer moves its files into place
only when all of them exist, so a failed run leaves ``DIR`` untouched.
"""

from __future__ import annotations

import argparse
import sys
from contextlib import ExitStack, nullcontext
from importlib import resources
from pathlib import Path
from typing import Sequence

from doseattr import __version__
from doseattr.errors import DoseattrError, InputError

EXIT_OK = 0
EXIT_ERROR = 2
DEMO_PACKAGE = "doseattr.demo"
DEMO_FILE = "analysis.toml"


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
    demo = sub.add_parser("demo", help="run the bundled demo analysis (invented numbers)",
                          description="Run the bundled demo analysis, a fictional town and "
                                      "study with invented numbers, and write its outputs.")
    _common(demo)
    return parser


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", required=True, metavar="DIR",
                   help="output folder (created if missing; nothing is written on error)")
    p.add_argument("--quiet", action="store_true", help="print nothing on success")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit status (0 ok, 2 error)."""
    args = build_parser().parse_args(argv)
    try:
        with ExitStack() as stack:
            path = (args.analysis if args.command == "run"
                    else str(stack.enter_context(_demo_file())))
            return _run(path, args.out, quiet=args.quiet)
    except DoseattrError as exc:
        print(f"doseattr: error: {_line(exc)}", file=sys.stderr)
        return EXIT_ERROR


def _run(path: str, out: str, *, quiet: bool) -> int:
    from doseattr.analysis.config import load_analysis
    from doseattr.analysis.pipeline import run_analysis
    from doseattr.outputs.write import write_outputs

    analysis = load_analysis(path)
    results = run_analysis(analysis, progress=not quiet)
    try:
        written = write_outputs(results, out)
    except OSError as exc:
        raise InputError(f"cannot write the outputs: {exc.strerror or exc}", source=out,
                         location="--out") from None
    if not quiet:
        print(results.summary(brief=True))
        print(f"\nwrote {len(written)} files to {out} (open {Path(out) / 'report.html'})")
    return EXIT_OK


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


def _line(exc: DoseattrError) -> str:
    if isinstance(exc, InputError):
        return exc.line()
    return str(exc)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
