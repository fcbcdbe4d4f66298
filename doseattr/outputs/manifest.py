"""``manifest.json``: the list of files one run wrote, by which doseattr
recognises an output folder as its own.

Every file of the run is listed with its size in bytes and SHA-256. A
folder is doseattr's when it is missing or empty, or when every file in it
(at any depth) is listed in its manifest with the same size and hash; any
other file, and any listed file since changed, is the user's and the
folder is refused (:func:`first_foreign`).
"""

from __future__ import annotations

import datetime as _dt
import json
import os
from pathlib import Path
from typing import Any

from doseattr.analysis.provenance import sha256_file

MANIFEST = "manifest.json"
FORMAT = "doseattr-outputs"
FORMAT_VERSION = 1


def manifest_text(folder: Path, relative: list[Path]) -> str:
    """The manifest of the files ``relative`` (to ``folder``), as JSON text.

    ``written_utc`` is the only time stamp of a run (results.json has none,
    so that reruns give the same bytes).
    """
    from doseattr import __version__

    files = [{"path": rel.as_posix(), "size": (folder / rel).stat().st_size,
              "sha256": sha256_file(folder / rel)} for rel in relative]
    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0)
    data = {"format": FORMAT, "format_version": FORMAT_VERSION, "doseattr_version": __version__,
            "written_utc": now.isoformat().replace("+00:00", "Z"), "files": files}
    return json.dumps(data, indent=2) + "\n"


def read_manifest(folder: Path) -> dict[str, dict[str, Any]] | None:
    """``{relative path: {"size", "sha256"}}`` from ``folder/manifest.json``,
    or ``None`` when it is missing or not a doseattr manifest."""
    path = folder / MANIFEST
    if path.is_symlink() or not path.is_file():
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        if data.get("format") != FORMAT:
            return None
        return {str(f["path"]): {"size": int(f["size"]), "sha256": str(f["sha256"])}
                for f in data["files"]}
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return None


def first_foreign(folder: Path) -> tuple[str, str] | None:
    """The first entry of ``folder`` (sorted, at any depth) that doseattr
    did not write, as ``(relative path, why)``; ``None`` when the folder is
    empty or holds exactly a previous run's files."""
    try:
        entries = _entries(folder)
    except OSError as exc:  # an unreadable folder may hide the user's files
        where = Path(exc.filename or folder)
        rel = where.relative_to(folder).as_posix() if where != folder else "."
        return rel, f"cannot be read ({exc.strerror or exc})"
    if not entries:
        return None
    listed = read_manifest(folder)
    if listed is None:
        rel = MANIFEST if (folder / MANIFEST).exists() else entries[0]
        why = ("is not a doseattr manifest" if rel == MANIFEST
               else "was not written by doseattr (the folder has no manifest.json)")
        return rel, why
    folders = {p for rel in listed for p in _parents(rel)}
    for rel in entries:
        path = folder / rel
        if rel == MANIFEST:
            continue
        if path.is_dir() and not path.is_symlink():
            if rel not in folders:
                return rel, "is a folder doseattr did not make (not in manifest.json)"
            continue
        if rel not in listed or path.is_symlink() or not path.is_file():
            return rel, "was not written by doseattr (not in manifest.json)"
        if (path.stat().st_size != listed[rel]["size"]
                or sha256_file(path) != listed[rel]["sha256"]):
            return rel, ("was changed after doseattr wrote it (its SHA-256 differs from "
                         "manifest.json)")
    return None


def _entries(folder: Path) -> list[str]:
    """Every file and folder under ``folder`` (POSIX relative paths, sorted;
    symbolic links are listed, not followed)."""
    out = []
    for root, dirs, files in os.walk(folder, onerror=_raise):
        for name in dirs + files:
            out.append(Path(root, name).relative_to(folder).as_posix())
    return sorted(out)


def _raise(error: OSError) -> None:
    raise error


def _parents(rel: str) -> list[str]:
    parts = rel.split("/")[:-1]
    return ["/".join(parts[:i + 1]) for i in range(len(parts))]
