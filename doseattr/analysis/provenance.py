"""Where a run's numbers came from: software versions, the command, the
seed, and the SHA-256 of the analysis file and of every table it read.

The record holds no time stamps, so that the same inputs and seed give a
byte-identical ``results.json``. Paths of tables are given relative to the
analysis file's folder (POSIX separators) so the record does not depend on
where the project folder sits.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import threading
from collections.abc import Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

from doseattr.analysis.schema import SECTIONS, key_location
from doseattr.analysis.tablefile import frame_sha256, in_memory_name, is_in_memory

#: ``command`` when the run did not come from the command line.
PYTHON_API = "python-api"
#: Sections whose "path" keys name tables (``[[outcome]]`` holds curve and burden).
TABLE_SECTIONS = ("curve", "exposure", "burden", "grid")


@dataclass(frozen=True)
class InputTable:
    """One table the analysis read: where it was named, its path as
    resolved (relative to the analysis file's folder, or absolute as
    given) and its bytes' SHA-256."""

    key: str
    path: str
    relative: str
    sha256: str


def sha256_bytes(data: bytes) -> str:
    """Hex SHA-256 of ``data`` (FIPS 180-4, via :mod:`hashlib`)."""
    return hashlib.sha256(data).hexdigest()


#: Files at least this large are hashed once per process while their size,
#: modification and change times and inode stay the same (git's index and
#: rsync's quick check use the same stat signature; common practice): a run
#: checks its inputs three times, and a 1e8-cell grid is gigabytes.
HASH_ONCE_BYTES = 64 << 20
#: stat signature -> the digest being computed (or done) in the hashing threads
_HASHED: dict[tuple[str, int, int, int, int], Future[str]] = {}
_LOCK = threading.Lock()
_POOL: list[ThreadPoolExecutor] = []


def sha256_file(path: str | os.PathLike[str]) -> str:
    """Hex SHA-256 of a file's bytes, read in :data:`HASH_BLOCK` blocks (large files:
    see :data:`HASH_ONCE_BYTES`)."""
    if os.stat(path).st_size < HASH_ONCE_BYTES:
        return _sha256(path)
    return _digest(path).result()


def stat_signature(path: str | os.PathLike[str]) -> tuple[str, int, int, int, int]:
    """Real path, size, modification and change times (ns) and inode."""
    st = os.stat(path)
    return (os.path.realpath(path), st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_ino)


def _digest(path: str | os.PathLike[str]) -> Future[str]:
    """The hashing threads' digest of a large file under its current stat
    signature, started now if no thread has it yet."""
    key = stat_signature(path)
    with _LOCK:
        if key not in _HASHED:
            if not _POOL:
                _POOL.append(ThreadPoolExecutor(max_workers=min(HASH_THREADS, os.cpu_count() or 1),
                                                thread_name_prefix="doseattr-hash"))
            _HASHED[key] = _POOL[0].submit(_sha256, path)
        return _HASHED[key]


def _sha256(path: str | os.PathLike[str]) -> str:
    h = hashlib.sha256()
    buffer = bytearray(HASH_BLOCK)
    view = memoryview(buffer)
    with open(path, "rb", buffering=0) as fh:
        while n := fh.readinto(buffer):
            h.update(view[:n])
    return h.hexdigest()


#: Bytes read at a time when hashing, into one reused buffer.
HASH_BLOCK = 4 << 20
#: Threads that hash large files at once (hashlib releases the GIL while
#: it digests, so the files of a grid are hashed on every core).
HASH_THREADS = 4


def start_hashing(paths: list[str]) -> list[str]:
    """Start hashing, in background threads, every file of ``paths`` that
    :func:`sha256_file` would hash once and has not yet; returns those
    files (their digests are then ready, or awaited, when asked for)."""
    large = []
    for path in dict.fromkeys(paths):
        try:
            if os.stat(path).st_size >= HASH_ONCE_BYTES:
                _digest(path)
                large.append(path)
        except OSError:
            continue  # sha256_file raises it where the path is used
    return large


def hash_large_files(paths: list[str]) -> None:
    """Hash at once, in threads, every large file of ``paths`` (the same
    digests, computed side by side on every core), and wait for them."""
    for path in start_hashing(paths):
        _digest(path).result()


def input_signatures(analysis: Any) -> dict[tuple[str, str], tuple | None]:
    """``{(key, path as in provenance): stat signature}`` of the analysis
    file (key ``""``)
    and of every table it names (``None`` where the file cannot be read),
    and the large tables' hashing started in the background: what the
    command line compares after the run to refuse outputs whose inputs
    changed while it computed (the stat signature is git's and rsync's
    quick check; common practice)."""
    source = getattr(analysis, "source", None)
    base = getattr(analysis, "base_dir", None) or "."
    named = [("", source, source)] if source else []
    for key, value in _path_keys(getattr(analysis, "settings", None) or {}):
        if not is_in_memory(value):
            path = value if os.path.isabs(value) else os.path.join(base, value)
            shown = value if os.path.isabs(value) else os.path.relpath(path, base)
            named.append((key, shown.replace(os.sep, "/"), path))
    start_hashing([path for _, _, path in named])
    out: dict[tuple[str, str], tuple | None] = {}
    for key, shown, path in named:
        try:
            out[key, shown] = stat_signature(path)
        except OSError:
            out[key, shown] = None
    return out


def input_paths(analysis: Any) -> list[str]:
    """The paths of the tables named in the analysis (not in-memory ones)."""
    base = getattr(analysis, "base_dir", None) or "."
    return [value if os.path.isabs(value) else os.path.join(base, value)
            for _, value in _path_keys(getattr(analysis, "settings", None) or {})
            if not is_in_memory(value)]


def canonical_json(settings: Mapping[str, Any]) -> bytes:
    """The analysis dictionary as canonical JSON (sorted keys, no spaces,
    UTF-8): what is hashed, and copied, for an analysis built from a dict.
    A table given in memory is written as its name and content hash
    (``{"table": "<DataFrame for [exposure] table>", "sha256": ...}``)."""
    text = json.dumps(_plain(settings), sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      default=str)
    return text.encode("utf-8")


def _plain(value: Any) -> Any:
    """``value`` with every table in memory replaced by its name and hash."""
    if isinstance(value, Mapping):
        return {k: _in_memory_record(v) if is_in_memory(v) else _plain(v)
                for k, v in value.items()}
    if isinstance(value, list):
        return [_plain(v) for v in value]
    return value


def _in_memory_record(value: Any) -> dict[str, str]:
    return {"table": f"<{type(value).__name__}>", "sha256": frame_sha256(value)}


def analysis_bytes(analysis: Any) -> tuple[str, bytes]:
    """``("file", bytes of the analysis file)`` or, for an analysis built
    by ``analysis_from_dict``, ``("python-dict", canonical JSON)``."""
    source = getattr(analysis, "source", None)
    if source:
        with open(source, "rb") as fh:
            return "file", fh.read()
    return "python-dict", canonical_json(getattr(analysis, "settings", None) or {})


def input_tables(analysis: Any) -> list[InputTable]:
    """Every table named in the analysis, in file order, with its hash."""
    base = getattr(analysis, "base_dir", None) or "."
    tables = []
    hash_large_files(input_paths(analysis))
    for key, value in _path_keys(getattr(analysis, "settings", None) or {}):
        if is_in_memory(value):
            name = in_memory_name(key, value)
            tables.append(InputTable(key, name, name, frame_sha256(value)))
            continue
        path = value if os.path.isabs(value) else os.path.join(base, value)
        relative = os.path.relpath(path, base) if not os.path.isabs(value) else value
        tables.append(InputTable(key, path, relative.replace(os.sep, "/"), sha256_file(path)))
    return tables


def protected_paths(analysis: Any) -> list[str]:
    """The analysis file and every table it reads (what an output folder
    must never hold)."""
    source = getattr(analysis, "source", None)
    base = getattr(analysis, "base_dir", None) or "."
    paths = [source] if source else []
    for _, value in _path_keys(getattr(analysis, "settings", None) or {}):
        if is_in_memory(value):
            continue
        paths.append(value if os.path.isabs(value) else os.path.join(base, value))
    return paths


def provenance(analysis: Any, command: list[str] | str | None = None, *,
               source: tuple[str, bytes] | None = None) -> dict[str, Any]:
    """The ``provenance`` record of ``results.json``.

    Keys: ``doseattr_version``, ``python``, ``numpy``, ``scipy``,
    ``command`` (argv as run, or ``"python-api"``), ``seed`` (``None``
    without ``[uncertainty]``), ``analysis_source`` (``"file"`` or
    ``"python-dict"``), ``analysis_file`` (its name, or ``None``),
    ``analysis_sha256`` (of the file's bytes, or of the dictionary's
    canonical JSON) and ``input_tables`` (key, path relative to the analysis
    file, SHA-256). ``source`` is :func:`analysis_bytes` when the caller
    already read it.
    """
    import numpy
    import scipy

    from doseattr import __version__

    kind, data = analysis_bytes(analysis) if source is None else source
    source = getattr(analysis, "source", None)
    uncertainty = getattr(analysis, "uncertainty", None)
    return {
        "doseattr_version": __version__,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "command": PYTHON_API if command is None else command,
        "seed": None if uncertainty is None else int(uncertainty.seed),
        "analysis_source": kind,
        "analysis_file": os.path.basename(source) if source else None,
        "analysis_sha256": sha256_bytes(data),
        "input_tables": [{"key": t.key, "path": t.relative, "sha256": t.sha256}
                         for t in input_tables(analysis)],
    }


def _path_keys(settings: Mapping[str, Any]) -> Iterator[tuple[str, Any]]:
    """``(key location, value)`` of every key of kind "path", in file order
    (inside an outcome: ``"[[outcome]] 1 [outcome.burden] key 'table'"``);
    the value is the path (also of ``{path = ...}`` with options) or a
    table in memory."""
    for section in TABLE_SECTIONS:
        for key, value in _section_paths(settings.get(section), section):
            yield key_location(section, key), value
        if section == "curve":
            yield from _study_paths(settings.get("curve"), "")
    outcomes = settings.get("outcome")
    for i, block in enumerate(outcomes if isinstance(outcomes, list) else []):
        for section in ("curve", "burden"):
            values = block.get(section) if isinstance(block, Mapping) else None
            for key, value in _section_paths(values, section):
                yield f"[[outcome]] {i + 1} [outcome.{section}] key '{key}'", value
            if section == "curve":
                yield from _study_paths(values, f"[[outcome]] {i + 1} ")


def _study_paths(curve: Any, prefix: str) -> Iterator[tuple[str, str]]:
    """The tables of a pooled curve's ``[[curve.study]]`` blocks."""
    blocks = curve.get("study") if isinstance(curve, Mapping) else None
    for j, block in enumerate(blocks if isinstance(blocks, list) else []):
        for key, value in _section_paths(block, "curve.study"):
            yield f"{prefix}{key_location('curve.study', key, j)}", value


def _section_paths(values: Any, section: str) -> Iterator[tuple[str, Any]]:
    """``(key, value)`` of the "path" keys of one section's values."""
    if not isinstance(values, Mapping):
        return
    for key, value in values.items():
        spec = SECTIONS[section].get(key)
        if spec is None or spec.kind != "path":
            continue
        if isinstance(value, Mapping) and isinstance(value.get("path"), str):
            value = value["path"]
        if isinstance(value, str) or is_in_memory(value):
            yield key, value
