"""Write every output of an analysis into a folder, all or nothing.

Everything (results.json, the CSV tables, the figures, report.html) is first
produced in a hidden temporary folder next to ``out_dir``. Only when all of
it exists is it moved into place: by renaming the temporary folder when
``out_dir`` does not exist or is empty, or file by file (``os.replace``,
atomic per file) into an existing folder, leaving files there that this
function did not write untouched. On any failure the temporary folder is
removed and ``out_dir`` is left as it was.
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
from pathlib import Path
from typing import Any

from doseattr.errors import InputError
from doseattr.outputs.records import workers_source
from doseattr.outputs.tables import all_tables, write_csv

FIGURE_FOLDER = "figures"


def results_json(results: Any, data: dict | None = None) -> str:
    """results.json text; ``ValueError`` if any number is NaN or infinite."""
    data = results.to_dict() if data is None else data
    return json.dumps(data, indent=2, allow_nan=False) + "\n"


def write_outputs(results: Any, out_dir: str | os.PathLike, *, figures: bool = True) -> list[Path]:
    """Write results.json, CSV tables, figures and report.html to ``out_dir``.

    Parameters
    ----------
    results
        A ``Results`` object (``to_dict()``, core objects for figures).
    out_dir
        Destination folder; created if missing (with missing parents).
    figures
        ``False`` skips the figures (faster; the report has no images).

    Returns
    -------
    list of Path
        The files written, in ``out_dir``.
    """
    out = Path(out_dir).absolute()
    if out.exists() and not out.is_dir():
        raise InputError(f"'{out}' exists and is not a folder; give another output folder",
                         location="--out")
    made_parents = _make_parents(out.parent)
    tmp = out.parent / f".{out.name}.partial-{secrets.token_hex(4)}"
    try:
        os.mkdir(tmp)
        relative = _produce(results, tmp, figures=figures)
        _move_into_place(tmp, out, relative)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        for p in reversed(made_parents):
            _try_rmdir(p)
        raise
    return [out / r for r in relative]


def _produce(results: Any, folder: Path, *, figures: bool) -> list[Path]:
    """Write every output into ``folder``; return paths relative to it."""
    from doseattr.outputs.gallery import render_figures
    from doseattr.outputs.report import render_report

    data = results.to_dict()
    written = [Path("results.json")]
    (folder / "results.json").write_text(results_json(results, data), encoding="utf-8")
    tables = all_tables(data, band_table=getattr(results, "band_table", None),
                        workers=workers_source(results, data))
    for name, table in tables.items():
        write_csv(folder / name, table)
        written.append(Path(name))
    summary = getattr(results, "summary", None)
    if callable(summary):
        (folder / "summary.txt").write_text(summary().rstrip() + "\n", encoding="utf-8")
        written.append(Path("summary.txt"))
    images = render_figures(results, data) if figures else {}
    if images:
        (folder / FIGURE_FOLDER).mkdir()
        for name, png in images.items():
            rel = Path(FIGURE_FOLDER) / f"{name}.png"
            (folder / rel).write_bytes(png)
            written.append(rel)
    html = render_report(results, images=images, data=data)
    (folder / "report.html").write_text(html, encoding="utf-8")
    written.append(Path("report.html"))
    return written


def _move_into_place(tmp: Path, out: Path, relative: list[Path]) -> None:
    if not out.exists() or (out.is_dir() and not any(out.iterdir())):
        os.replace(tmp, out)  # atomic rename; replaces an empty folder on POSIX
        return
    for rel in relative:
        target = out / rel
        if target.exists() and target.is_dir():
            raise InputError(f"'{target}' is a folder; cannot replace it with an output file",
                             location="--out")
    for rel in relative:
        (out / rel).parent.mkdir(parents=True, exist_ok=True)
        os.replace(tmp / rel, out / rel)
    shutil.rmtree(tmp, ignore_errors=True)


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
    try:
        p.rmdir()
    except OSError:
        pass
