"""``doseattr init KIND DIR``: a commented starting analysis with small
example tables (invented numbers, which say so) for each main case.

The templates are the package data ``doseattr.templates`` (the folder
``data_templates/`` of a source checkout), one sub-folder per kind. ``DIR``
follows the rules of ``--out`` (:mod:`doseattr.outputs.write`) and more
strictly: it must be new or empty, as doseattr never writes over a file it
did not write. The files are written into a hidden sibling folder and
moved in at the end, so a failure leaves nothing behind.
"""

from __future__ import annotations

import os
import secrets
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from importlib import resources
from importlib.resources.abc import Traversable
from pathlib import Path

from doseattr.errors import DoseattrError, InputError

TEMPLATE_PACKAGE = "doseattr.templates"
#: What each kind holds, for ``doseattr init --help``.
KINDS = {
    "concentration": "monitor data with non-detects and weights, and a study's band table",
    "workplace": "personal samples by worker with non-detects, an OEL ([limit]) and a "
                 "comply scenario; work histories as a commented alternative",
    "districts": "strata with population, rate and their own GM and GSD ([burden])",
    "grid": "a small table of grid cells ([grid] cells, CSV) with zones; rasters in the "
            "comments",
}
SUFFIXES = (".toml", ".csv", ".txt")


def write_template(kind: str, folder: str | os.PathLike) -> list[Path]:
    """Write the template ``kind`` into ``folder``; return the files written.

    Raises
    ------
    InputError
        For an unknown kind, or a ``folder`` that exists and is not empty
        (or that ``--out`` would refuse).
    """
    if kind not in KINDS:
        raise InputError(f"unknown template '{kind}'; choose one of {', '.join(KINDS)}",
                         location="KIND")
    text = os.fspath(folder)
    where = f"DIR '{text}'"
    if not text.strip():
        raise InputError("the folder name is empty; give a new folder, for example "
                         "my-analysis", location="DIR")
    out = Path(text).absolute()
    if out.exists() and not out.is_dir():
        raise InputError("exists and is not a folder; give a new folder", location=where)
    if out.is_dir() and any(out.iterdir()):
        raise InputError("is not empty; doseattr init writes only into a new or empty folder, "
                         "so that it never replaces your files: give a new folder",
                         location=where)
    with _template_files(kind) as files:
        return _write_all(files, out)


def _write_all(files: list[Traversable], out: Path) -> list[Path]:
    """Write ``files`` into ``out`` all or nothing."""
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.parent / f".{out.name}.partial-{secrets.token_hex(4)}"
    try:
        os.mkdir(tmp)
        for f in files:
            (tmp / f.name).write_bytes(f.read_bytes())
        if out.exists():
            for f in files:
                os.rename(tmp / f.name, out / f.name)
            os.rmdir(tmp)
        else:
            os.rename(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return [out / f.name for f in files]


@contextmanager
def _template_files(kind: str) -> Iterator[list[Traversable]]:
    """The files of template ``kind``: the installed package data, or
    ``data_templates/`` of a source checkout that is not installed."""
    try:
        root: Traversable = resources.files(TEMPLATE_PACKAGE)
    except ModuleNotFoundError:
        checkout = Path(__file__).resolve().parent.parent.parent / "data_templates"
        if not checkout.is_dir():
            raise DoseattrError("the templates are not installed (package doseattr.templates "
                                "is missing); reinstall doseattr") from None
        root = checkout
    folder = root / kind
    yield sorted((f for f in folder.iterdir() if f.is_file() and f.name.endswith(SUFFIXES)),
                 key=lambda f: f.name)
