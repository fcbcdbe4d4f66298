"""Provenance in results.json, the analysis copy and the report header
(issue 8 item 2).

Every hash is recomputed here with :mod:`hashlib` (SHA-256, FIPS 180-4) from
the bytes the test wrote; versions come from the libraries themselves
(``numpy.__version__``, ``scipy.__version__``,
``platform.python_version()``).
"""

from __future__ import annotations

import hashlib
import json
import platform
import textwrap
from pathlib import Path

import numpy
import pytest
import scipy
from analysis_helpers import ANALYSIS, BANDS, MEASUREMENTS

import doseattr
from doseattr.cli import main

STRATA = "stratum,cases\nNorth,120\nSouth,80\n"
SUBFOLDER = ANALYSIS.replace('"bands.csv"', '"tables/bands.csv"') + textwrap.dedent("""
    [uncertainty]
    draws = 200
    seed = 77

    [burden]
    table = "tables/strata.csv"
    """)


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _case(folder: Path) -> Path:
    (folder / "tables").mkdir(parents=True)
    (folder / "tables" / "bands.csv").write_text(BANDS)
    (folder / "tables" / "strata.csv").write_text(STRATA)
    (folder / "measurements.csv").write_text(MEASUREMENTS)
    path = folder / "analysis.toml"
    path.write_text(SUBFOLDER)
    return path


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    base = tmp_path_factory.mktemp("prov")
    path = _case(base / "case")
    out = base / "out"
    argv = ["run", str(path), "--out", str(out), "--quiet"]
    assert main(argv) == 0
    return path, out, argv, json.loads((out / "results.json").read_text())


def test_versions_command_and_seed(run):
    _, _, argv, d = run
    p = d["provenance"]
    assert p["doseattr_version"] == doseattr.__version__ == d["doseattr_version"]
    assert p["python"] == platform.python_version()
    assert p["numpy"] == numpy.__version__ and p["scipy"] == scipy.__version__
    assert p["command"] == ["doseattr", *argv]
    assert p["seed"] == 77 == d["uncertainty"]["seed"]
    assert not [k for k in p if any(w in k for w in ("time", "date", "utc"))]


def test_analysis_and_table_hashes(run):
    path, _, _, d = run
    p = d["provenance"]
    assert p["analysis_source"] == "file" and p["analysis_file"] == "analysis.toml"
    assert p["analysis_sha256"] == _sha(path.read_bytes())
    folder = path.parent
    expected = [("[curve] key 'table'", "tables/bands.csv"),
                ("[exposure] key 'table'", "measurements.csv"),
                ("[burden] key 'table'", "tables/strata.csv")]
    assert [(t["key"], t["path"]) for t in p["input_tables"]] == expected
    for t in p["input_tables"]:
        assert t["sha256"] == _sha((folder / t["path"]).read_bytes())


def test_analysis_copy_and_manifest(run):
    path, out, _, d = run
    copy = (out / "analysis.toml").read_bytes()
    assert copy == path.read_bytes()
    assert _sha(copy) == d["provenance"]["analysis_sha256"]
    listed = {f["path"]: f["sha256"] for f in
              json.loads((out / "manifest.json").read_text())["files"]}
    assert listed["analysis.toml"] == _sha(copy)
    assert "written_utc" in json.loads((out / "manifest.json").read_text())


def test_report_header_shows_version_and_hash(run):
    _, out, _, d = run
    html = (out / "report.html").read_text(encoding="utf-8")
    header = html[html.index("<header>"):html.index("</header>")]
    sha = d["provenance"]["analysis_sha256"]
    assert f"doseattr {doseattr.__version__}" in header
    assert f"<code title='{sha}'>{sha[:12]}</code>" in header


def test_same_command_gives_identical_results_json(run):
    """The provenance holds no time stamp: rerunning the same command into
    the same folder gives the same bytes."""
    _, out, argv, _ = run
    first = (out / "results.json").read_bytes()
    assert main(argv) == 0
    assert (out / "results.json").read_bytes() == first


def test_changed_table_changes_its_hash(tmp_path):
    path = _case(tmp_path / "case")
    from doseattr.analysis.config import load_analysis
    from doseattr.analysis.provenance import provenance

    before = provenance(load_analysis(path))
    (path.parent / "measurements.csv").write_text(MEASUREMENTS + "30.0,1\n")
    after = provenance(load_analysis(path))
    assert before["input_tables"][0] == after["input_tables"][0]
    assert before["input_tables"][1]["sha256"] != after["input_tables"][1]["sha256"]
    assert after["input_tables"][1]["sha256"] == _sha((path.parent / "measurements.csv")
                                                       .read_bytes())
    assert before["command"] == "python-api" and before["analysis_sha256"] == after[
        "analysis_sha256"]


def test_outcome_tables_are_listed(tmp_path):
    from doseattr.analysis.config import load_analysis
    from doseattr.analysis.provenance import provenance

    (tmp_path / "a.csv").write_text(STRATA)
    (tmp_path / "b.csv").write_text(STRATA.replace("120", "121"))
    path = tmp_path / "analysis.toml"
    path.write_text(textwrap.dedent("""\
        unit = "ug/m3"
        [exposure]
        gm = 9.0
        gsd = 2.0
        [[outcome]]
        name = "A"
        [outcome.curve]
        model = "linear"
        err = 0.03
        [outcome.burden]
        table = "a.csv"
        [[outcome]]
        name = "B"
        [outcome.curve]
        model = "log-linear"
        rr = 1.1
        per = 10
        [outcome.burden]
        table = "b.csv"
        """))
    p = provenance(load_analysis(path))
    assert [(t["key"], t["path"], t["sha256"]) for t in p["input_tables"]] == [
        (f"[[outcome]] {i} [outcome.burden] key 'table'", name,
         _sha((tmp_path / name).read_bytes())) for i, name in ((1, "a.csv"), (2, "b.csv"))]
    assert p["seed"] is None


def test_dictionary_analysis(tmp_path):
    """analysis_from_dict: the hash is of the dictionary's canonical JSON
    (sorted keys, no spaces, UTF-8), which is also what is copied, as
    analysis.json."""
    from doseattr.analysis.config import analysis_from_dict
    from doseattr.analysis.pipeline import run_analysis

    (tmp_path / "bands.csv").write_text(BANDS)
    d = {"unit": "ug/m3", "title": "Dictionary µ",
         "curve": {"table": "bands.csv", "model": "log-linear"},
         "exposure": {"family": "lognormal", "gm": 9.0, "gsd": 2.0}}
    canonical = json.dumps(d, sort_keys=True, separators=(",", ":"),
                           ensure_ascii=False).encode("utf-8")
    results = run_analysis(analysis_from_dict(d, base_dir=tmp_path))
    p = results.to_dict()["provenance"]
    assert p["analysis_source"] == "python-dict" and p["analysis_file"] is None
    assert p["analysis_sha256"] == _sha(canonical)
    assert p["command"] == "python-api" and p["seed"] is None
    assert p["input_tables"] == [{"key": "[curve] key 'table'", "path": "bands.csv",
                                  "sha256": _sha(BANDS.encode())}]
    out = tmp_path / "out"
    results.write(out, figures=False)
    assert (out / "analysis.json").read_bytes() == canonical
    assert not (out / "analysis.toml").exists()


def test_large_files_hashed_side_by_side_give_the_same_digests(tmp_path, monkeypatch):
    """Source: hashlib.sha256 of each file's whole bytes. Files above the
    hash-once size are hashed in threads at once (hash_large_files), in
    reused 4 MiB buffers: the digests are those of the bytes, an uneven
    length included, and a changed file (new stat signature) is hashed
    again."""
    from doseattr.analysis import provenance as prov

    monkeypatch.setattr(prov, "HASH_ONCE_BYTES", 1 << 10)
    monkeypatch.setattr(prov, "_HASHED", {})
    rng = numpy.random.default_rng(12)
    paths = []
    for k, size in enumerate((5 << 20, (4 << 20) + 3, 2000, 100)):
        path = tmp_path / f"f{k}.bin"
        path.write_bytes(rng.integers(0, 256, size, dtype=numpy.uint8).tobytes())
        paths.append(str(path))
    prov.hash_large_files(paths)
    assert len(prov._HASHED) == 3  # the three files above the (patched) size
    for path in paths:
        assert prov.sha256_file(path) == hashlib.sha256(Path(path).read_bytes()).hexdigest()
    Path(paths[0]).write_bytes(b"changed" * 300)
    prov.hash_large_files(paths)
    assert prov.sha256_file(paths[0]) == hashlib.sha256(b"changed" * 300).hexdigest()
