"""Write every output of an analysis into a folder doseattr owns, all or
nothing.

A folder is doseattr's when it does not exist, is empty, or holds exactly
the files of a previous run as listed in its ``manifest.json``
(:mod:`doseattr.outputs.manifest`). Any other folder is refused with one
line naming the first file doseattr did not write; no option overrides
this. Also refused: an empty name, the file system's root, the home
folder, an existing file, and a folder holding (at any depth) the analysis
file or one of its tables.

The run is produced in full in a hidden sibling folder
``.NAME.partial-XXXXXXXX`` (results.json, CSV tables, figures, report.html,
a copy of the analysis, and last the manifest). Only then is it swapped
in: the previous run's entries are moved to a sibling backup, the new ones
moved into the folder, and the backup removed; SIGINT and SIGTERM are held
back during the swap, and a failure in it moves everything back. So the
folder always holds exactly one complete run, and any failure or
interruption leaves the previous run as it was and no temporary folder.
"""

from __future__ import annotations

import dataclasses
import json
import os
import secrets
import shutil
import signal
import tomllib
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager, suppress
from pathlib import Path
from typing import Any

from doseattr.analysis.report_section import ReportSettings, report_settings_of
from doseattr.errors import InputError
from doseattr.outputs.manifest import MANIFEST, first_foreign, manifest_text
from doseattr.outputs.tables import all_tables, contribution_table, write_csv
from doseattr.results.run import Results

FIGURE_FOLDER = "figures"
INPUT_FOLDER = "inputs"
HINT = "give a folder of its own, for example --out results"


#: A list longer than this is written one compact entry a line (strata records).
LONG_LIST = 40


def results_json(results: Results) -> str:
    """results.json text; ``ValueError`` if any number is NaN or infinite."""
    return indented_json(results.to_dict()) + "\n"


def indented_json(obj: Any, level: int = 0) -> str:
    """JSON text laid out as ``json.dumps(obj, indent=2)`` would, except
    that each entry of a list longer than :data:`LONG_LIST` is written
    compact on a line of its own: the same data (``json.loads`` gives it
    back), and the long lists go through the json module's C encoder
    instead of its much slower indenting one. ``ValueError`` on NaN or
    infinity."""
    pad, inner = "  " * level, "  " * (level + 1)
    if isinstance(obj, dict) and obj:
        items = [f"{inner}{json.dumps(str(k))}: {indented_json(v, level + 1)}"
                 for k, v in obj.items()]
        return "{\n" + ",\n".join(items) + "\n" + pad + "}"
    if isinstance(obj, (list, tuple)) and obj:
        if len(obj) > LONG_LIST:
            items = [inner + json.dumps(v, allow_nan=False, separators=(", ", ": "))
                     for v in obj]
        else:
            items = [inner + indented_json(v, level + 1) for v in obj]
        return "[\n" + ",\n".join(items) + "\n" + pad + "]"
    return json.dumps(obj, allow_nan=False)


def with_command(results: Results, command: Sequence[str]) -> Results:
    """The same results with ``provenance.command`` set to the command line."""
    if results.inputs is None:
        return results
    provenance = {**results.inputs.provenance, "command": [str(a) for a in command]}
    return dataclasses.replace(results,
                               inputs=dataclasses.replace(results.inputs, provenance=provenance))


def write_outputs(results: Results, out_dir: str | os.PathLike, *, figures: bool = True,
                  command: Sequence[str] | None = None,
                  report: ReportSettings | None = None,
                  inputs: Sequence[tuple[str, str | os.PathLike]] = (),
                  stage: Callable[[str], None] | None = None) -> list[Path]:
    """Write results.json, CSV tables, figures, report.html, the analysis
    copy and manifest.json to ``out_dir`` (see the module notes for which
    folders are accepted).

    Parameters
    ----------
    results
        The record of a finished run (:class:`~doseattr.results.run.Results`).
    out_dir
        Destination folder; created if missing (with missing parents).
    figures
        ``False`` skips the figures (faster; the report has no images).
    command
        The command line as run, recorded in ``provenance.command``
        (default: ``"python-api"``).
    report
        Figure formats and PNG resolution (default: the analysis's
        ``[report]`` section, read from the copy the results hold).
    inputs
        ``(name, path)`` of input files to copy into ``inputs/`` (the demo's
        tables), listed in the manifest like every other file.
    stage
        Called with ``"figures"`` and ``"report"`` as each begins (the
        terminal's status line).

    Returns
    -------
    list of Path
        The files written, in ``out_dir``.

    Raises
    ------
    InputError
        When ``out_dir`` is not a folder doseattr may write into.
    """
    if results.inputs is None:
        raise InputError("these results record no inputs (built by hand?), so they cannot be "
                         "written with their provenance; run the analysis with run_analysis",
                         location="results")
    out = check_destination(out_dir, results.inputs.protected)
    made_parents = _make_parents(out.parent)
    tmp = out.parent / f".{out.name}.partial-{secrets.token_hex(4)}"
    try:
        os.mkdir(tmp)
        settings = report if report is not None else settings_of(results)
        relative = _produce(results, tmp, figures=figures, command=command, report=settings,
                            stage=stage or (lambda _name: None))
        relative += _copy_inputs(inputs, tmp)
        (tmp / MANIFEST).write_text(manifest_text(tmp, relative), encoding="utf-8")
        relative.append(Path(MANIFEST))
        with _signals_held():
            _swap_in(tmp, out, os.fspath(out_dir))
    except BaseException:
        with _signals_held():  # a second Ctrl-C must not stop the clean-up
            shutil.rmtree(tmp, ignore_errors=True)
            for p in reversed(made_parents):
                _try_rmdir(p)
        raise
    return [out / r for r in relative]


def check_destination(out_dir: str | os.PathLike, protected: Iterable[str] = ()) -> Path:
    """Refuse an output folder doseattr must not write into; return it
    (absolute). ``protected`` are the input files the folder must not hold.

    Raises
    ------
    InputError
        One line, naming ``--out`` and what to do instead.
    """
    text = os.fspath(out_dir)
    if not text.strip():
        raise InputError(f"the output folder name is empty; {HINT}", location="--out")
    out = Path(text).absolute()
    real = Path(os.path.realpath(out))

    def refuse(message: str) -> InputError:
        return InputError(message, location=out_location(text))

    if real == Path(real.anchor):
        raise refuse(f"is the file system's root; {HINT}")
    if real == Path(os.path.realpath(Path.home())):
        raise refuse(f"is your home folder; {HINT}")
    if out.exists() and not out.is_dir():
        raise refuse("exists and is not a folder; give another output folder")
    for p in protected:
        inside = Path(os.path.realpath(p))
        if inside == real or real in inside.parents:
            raise refuse(f"holds the input {p}, which outputs must never replace; {HINT}")
    if out.is_dir():
        _refuse_foreign(out, text)
    return out


def out_location(text: str) -> str:
    """``"--out 'DIR'"``: where an output-folder error is, for its one line."""
    return f"--out '{text}'"


def _refuse_foreign(out: Path, text: str) -> None:
    foreign = first_foreign(out)
    if foreign is not None:
        rel, why = foreign
        raise InputError(f"'{rel}' {why}; doseattr writes only into a new folder or one "
                         "holding its previous run: choose a new output folder or remove that "
                         "file", location=out_location(text))


def _produce(results: Results, folder: Path, *, figures: bool,
             command: Sequence[str] | None, report: ReportSettings,
             stage: Callable[[str], None]) -> list[Path]:
    """Write every output into ``folder``; return paths relative to it."""
    from doseattr.outputs.gallery import render_figure_files
    from doseattr.outputs.report import render_report

    if command is not None:
        results = with_command(results, command)
    written = [Path("results.json")]
    (folder / "results.json").write_text(results_json(results), encoding="utf-8")
    tables = all_tables(results)
    if report.contribution_table:
        tables["contribution.csv"] = contribution_table(
            results.attribution, results.unit, results.exposure_section.is_empirical)
    for name, table in tables.items():
        write_csv(folder / name, table)
        written.append(Path(name))
    (folder / "summary.txt").write_text(results.summary().rstrip() + "\n", encoding="utf-8")
    written.append(Path("summary.txt"))
    stage("figures")
    files = render_figure_files(results, report.figures, report.dpi) if figures else {}
    if files:
        (folder / FIGURE_FOLDER).mkdir()
        for name, by_format in files.items():
            for fmt in report.figures:
                rel = Path(FIGURE_FOLDER) / f"{name}.{fmt}"
                (folder / rel).write_bytes(by_format[fmt])
                written.append(rel)
    images = {name: by_format["png"] for name, by_format in files.items()}
    stage("report")
    html = render_report(results, images=images)
    (folder / "report.html").write_text(html, encoding="utf-8")
    written.append(Path("report.html"))
    written.append(_analysis_copy(results, folder))
    return written


def settings_of(results: Results) -> ReportSettings:
    """The ``[report]`` settings of the analysis the results were run from
    (its copy: TOML for a file, canonical JSON for a dictionary)."""
    if results.inputs is None:
        return ReportSettings()
    text = results.inputs.copy_bytes.decode("utf-8", errors="replace")
    try:
        data = tomllib.loads(text) if results.inputs.copy_kind == "file" else json.loads(text)
    except (tomllib.TOMLDecodeError, ValueError):
        return ReportSettings()
    return report_settings_of(data if isinstance(data, dict) else None)


def _copy_inputs(inputs: Sequence[tuple[str, str | os.PathLike]], folder: Path) -> list[Path]:
    """Copy each ``(name, path)`` to ``folder/inputs/name``; the paths written."""
    if not inputs:
        return []
    (folder / INPUT_FOLDER).mkdir()
    out = []
    for name, path in inputs:
        rel = Path(INPUT_FOLDER) / name
        shutil.copyfile(path, folder / rel)
        out.append(rel)
    return out


def _analysis_copy(results: Results, folder: Path) -> Path:
    """The analysis as read: ``analysis.toml`` (the file's bytes) or, for
    an analysis given as a dictionary, ``analysis.json`` (the canonical
    JSON whose SHA-256 is ``provenance.analysis_sha256``)."""
    if results.inputs is None:  # refused by write_outputs before anything is written
        raise InputError("these results record no inputs", location="results")
    kind, data = results.inputs.copy_kind, results.inputs.copy_bytes
    rel = Path("analysis.toml" if kind == "file" else "analysis.json")
    (folder / rel).write_bytes(data)
    return rel


def _swap_in(tmp: Path, out: Path, text: str) -> None:
    """Replace the contents of ``out`` by those of ``tmp``; on failure put
    the previous contents back."""
    if not out.exists():
        os.rename(tmp, out)
        return
    _refuse_foreign(out, text)  # again: the folder may have changed while computing
    backup = out.parent / f".{out.name}.previous-{secrets.token_hex(4)}"
    os.mkdir(backup)
    old, new = [], []
    try:
        for name in sorted(os.listdir(out)):
            os.rename(out / name, backup / name)
            old.append(name)
        for name in sorted(os.listdir(tmp)):
            os.rename(tmp / name, out / name)
            new.append(name)
    except BaseException:
        for name in new:
            os.rename(out / name, tmp / name)
        for name in old:
            os.rename(backup / name, out / name)
        os.rmdir(backup)
        raise
    shutil.rmtree(backup, ignore_errors=True)
    os.rmdir(tmp)


@contextmanager
def _signals_held() -> Iterator[None]:
    """Hold SIGINT and SIGTERM back (they arrive after the block)."""
    if not hasattr(signal, "pthread_sigmask"):
        yield
        return
    previous = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)


def _make_parents(folder: Path) -> list[Path]:
    """Create ``folder`` and its missing parents; return those created, outermost first."""
    missing = []
    p = folder
    while not p.exists():
        missing.append(p)
        p = p.parent
    missing.reverse()
    for p in missing:
        p.mkdir()
    return missing


def _try_rmdir(p: Path) -> None:
    with suppress(OSError):
        p.rmdir()
