"""Output folders doseattr owns (issue 8 item 1 and 4): the cases of the
issue's Why list, from the command line (``doseattr.cli.main`` in process)
and through ``Results.write``.

The rules checked are the project's own (a folder is doseattr's when new,
empty, or holding exactly the files its manifest.json lists); hashes are
recomputed here with :mod:`hashlib` (FIPS 180-4 SHA-256), not taken from
the package.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import pytest
from analysis_helpers import ANALYSIS, BANDS, write_case

from doseattr.cli import main
from doseattr.errors import InputError
from doseattr.outputs import figures as figure_module
from doseattr.outputs import tables as tables_module

BURDEN = "stratum,cases\nNorth,120\nSouth,80\n"
WITH_BURDEN = ANALYSIS + '\n[burden]\ntable = "burden.csv"\n'


def _run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _files(folder: Path) -> set[str]:
    return {p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file()}


def _case_with_burden(folder: Path) -> Path:
    path = write_case(folder, WITH_BURDEN)
    (folder / "burden.csv").write_text(BURDEN)
    return path


def _one_error_line(err: str) -> str:
    assert err.startswith("doseattr: error: ") and err.count("\n") == 1, err
    assert "Traceback" not in err
    return err


def _no_hidden_siblings(folder: Path) -> None:
    assert not [p.name for p in folder.parent.iterdir() if p.name.startswith(".")]


# -- the manifest ----------------------------------------------------------
def test_manifest_lists_every_file_with_size_and_sha256(tmp_path, capsys):
    path = write_case(tmp_path / "case")
    out = tmp_path / "out"
    code, _, err = _run(["run", path, "--out", out, "--quiet"], capsys)
    assert code == 0, err
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["format"] == "doseattr-outputs" and manifest["format_version"] == 1
    listed = {f["path"]: f for f in manifest["files"]}
    assert set(listed) == _files(out) - {"manifest.json"}
    for rel, entry in listed.items():
        data = (out / rel).read_bytes()
        assert entry["size"] == len(data)
        assert entry["sha256"] == hashlib.sha256(data).hexdigest()
    assert {"results.json", "report.html", "analysis.toml"} <= set(listed)
    _no_hidden_siblings(out)


# -- --out holding the inputs (the first case) -----------------------
def test_out_dot_with_the_inputs_is_refused(tmp_path, capsys, monkeypatch):
    """``--out .`` in the folder of the inputs: refused before computing,
    one line, every input byte for byte as before (a burden.csv input is
    named like an output)."""
    case = tmp_path / "case"
    _case_with_burden(case)
    before = _snapshot(case)
    monkeypatch.chdir(case)
    code, out, err = _run(["run", "analysis.toml", "--out", "."], capsys)
    assert code == 2 and out == ""
    assert "holds the input" in _one_error_line(err) and "--out" in err
    assert _snapshot(case) == before
    _no_hidden_siblings(case)


def test_out_above_the_inputs_is_refused(tmp_path, capsys):
    """A folder holding an input table at any depth is refused too."""
    path = write_case(tmp_path / "project" / "inputs" / "deep")
    before = _snapshot(tmp_path / "project")
    code, _, err = _run(["run", path, "--out", tmp_path / "project"], capsys)
    assert code == 2 and "holds the input" in _one_error_line(err)
    assert _snapshot(tmp_path / "project") == before


def test_link_to_the_input_folder_is_refused(tmp_path, capsys):
    """A symbolic link to the inputs' folder is the same folder."""
    case = tmp_path / "case"
    path = write_case(case)
    link = tmp_path / "link"
    link.symlink_to(case, target_is_directory=True)
    before = _snapshot(case)
    code, _, err = _run(["run", path, "--out", link], capsys)
    assert code == 2 and "holds the input" in _one_error_line(err)
    assert _snapshot(case) == before


def test_table_elsewhere_in_the_out_folder_is_refused(tmp_path, capsys):
    """An input table outside the analysis file's folder, inside --out."""
    out = tmp_path / "out"
    out.mkdir()
    (out / "bands.csv").write_text(BANDS)
    path = write_case(tmp_path / "case",
                      ANALYSIS.replace('"bands.csv"', json.dumps(str(out / "bands.csv"))),
                      bands=None)
    code, _, err = _run(["run", path, "--out", out], capsys)
    assert code == 2 and "holds the input" in _one_error_line(err)
    assert _files(out) == {"bands.csv"}


# -- stale files of an earlier run -----------------------------------------------
def test_second_run_replaces_the_first_with_no_stale_files(tmp_path, capsys):
    """First run with [burden] writes burden.csv; the second without it
    leaves no burden.csv: the folder holds exactly the second run."""
    case = tmp_path / "case"
    path = _case_with_burden(case)
    out = tmp_path / "out"
    assert _run(["run", path, "--out", out, "--quiet"], capsys)[0] == 0
    assert "burden.csv" in _files(out)
    path.write_text(ANALYSIS)
    code, _, err = _run(["run", path, "--out", out, "--quiet"], capsys)
    assert code == 0, err
    files = _files(out)
    assert "burden.csv" not in files
    manifest = json.loads((out / "manifest.json").read_text())
    assert {f["path"] for f in manifest["files"]} == files - {"manifest.json"}
    assert (out / "analysis.toml").read_text() == ANALYSIS
    _no_hidden_siblings(out)


# -- the user's own files ------------------------------------------------------------
@pytest.mark.parametrize("name", ["report.html", "results.json"])
def test_users_own_file_is_refused_and_kept(tmp_path, capsys, name):
    out = tmp_path / "out"
    out.mkdir()
    (out / name).write_text("my own")
    path = write_case(tmp_path / "case")
    code, _, err = _run(["run", path, "--out", out], capsys)
    assert code == 2
    line = _one_error_line(err)
    assert f"'{name}'" in line and "choose a new output folder or remove that file" in line
    assert _snapshot(out) == {name: b"my own"}


def test_file_added_to_a_previous_run_is_refused(tmp_path, capsys):
    path = write_case(tmp_path / "case")
    out = tmp_path / "out"
    assert _run(["run", path, "--out", out, "--quiet"], capsys)[0] == 0
    (out / "figures" / "my_notes.txt").write_text("mine")
    before = _snapshot(out)
    code, _, err = _run(["run", path, "--out", out, "--quiet"], capsys)
    assert code == 2 and "'figures/my_notes.txt'" in _one_error_line(err)
    assert _snapshot(out) == before


def test_edited_output_counts_as_the_users(tmp_path, capsys):
    """A listed file whose bytes changed is the user's edit: refused."""
    path = write_case(tmp_path / "case")
    out = tmp_path / "out"
    assert _run(["run", path, "--out", out, "--quiet"], capsys)[0] == 0
    with open(out / "report.html", "a", encoding="utf-8") as fh:
        fh.write("<!-- my note -->")
    before = _snapshot(out)
    code, _, err = _run(["run", path, "--out", out, "--quiet"], capsys)
    assert code == 2 and "'report.html' was changed" in _one_error_line(err)
    assert _snapshot(out) == before


def test_damaged_manifest_is_refused(tmp_path, capsys):
    path = write_case(tmp_path / "case")
    out = tmp_path / "out"
    assert _run(["run", path, "--out", out, "--quiet"], capsys)[0] == 0
    (out / "manifest.json").write_text("{}")
    code, _, err = _run(["run", path, "--out", out, "--quiet"], capsys)
    assert code == 2 and "'manifest.json'" in _one_error_line(err)


# -- folders that are never an output folder --------------------------------------------
@pytest.mark.parametrize("target", ["", "   ", "/"])
def test_empty_and_root_are_refused(tmp_path, capsys, target):
    path = write_case(tmp_path / "case")
    code, out, err = _run(["run", path, "--out", target], capsys)
    assert code == 2 and out == ""
    line = _one_error_line(err)
    assert "--out" in line and ("empty" in line or "root" in line)


def test_home_folder_is_refused(tmp_path, capsys, monkeypatch):
    home = tmp_path / "home"
    home.mkdir()
    monkeypatch.setenv("HOME", str(home))
    path = write_case(tmp_path / "case")
    code, _, err = _run(["run", path, "--out", home], capsys)
    assert code == 2 and "home folder" in _one_error_line(err)
    assert list(home.iterdir()) == []


def test_existing_file_is_refused(tmp_path, capsys):
    target = tmp_path / "taken.txt"
    target.write_text("x")
    code, _, err = _run(["run", write_case(tmp_path / "case"), "--out", target], capsys)
    assert code == 2 and "not a folder" in _one_error_line(err)
    assert target.read_text() == "x"


def test_demo_into_empty_string_is_refused(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    code, _, err = _run(["demo", "--out", ""], capsys)
    assert code == 2 and "empty" in _one_error_line(err)
    assert list(tmp_path.iterdir()) == []


# -- a failure part-way ----------------------------------------------------------------
def _fail(*args, **kwargs):
    raise RuntimeError("simulated failure")


@pytest.mark.parametrize("where", ["figure", "csv"])
def test_failure_part_way_leaves_previous_run_intact(tmp_path, capsys, monkeypatch, where):
    """A writer that raises after some files exist: the previous run is
    byte for byte intact, no temporary folder; the command line reports a
    bug in one line, status 1."""
    path = write_case(tmp_path / "case")
    out = tmp_path / "out"
    assert _run(["run", path, "--out", out, "--quiet"], capsys)[0] == 0
    before = _snapshot(out)
    if where == "figure":
        monkeypatch.setattr(figure_module, "plot_categorical", _fail)
    else:
        real = tables_module.write_csv
        calls = []

        def second_fails(*args, **kwargs):
            calls.append(1)
            if len(calls) == 2:
                raise RuntimeError("simulated failure")
            return real(*args, **kwargs)

        monkeypatch.setattr("doseattr.outputs.write.write_csv", second_fails)
    code, _, err = _run(["run", path, "--out", out, "--quiet"], capsys)
    assert code == 1
    assert err == "doseattr: internal error: RuntimeError: simulated failure (please report this)\n"
    assert _snapshot(out) == before
    _no_hidden_siblings(out)


def test_failure_during_the_swap_puts_the_previous_run_back(tmp_path, capsys, monkeypatch):
    """os.rename failing while the new run is moved in: everything moved
    so far goes back, the previous run is intact, no hidden folder."""
    from doseattr.outputs import write as write_module

    path = write_case(tmp_path / "case")
    out = tmp_path / "out"
    assert _run(["run", path, "--out", out, "--quiet"], capsys)[0] == 0
    before = _snapshot(out)
    real = os.rename
    count = {"n": 0}

    def flaky(src, dst):
        if ".partial-" in str(src):
            count["n"] += 1
            if count["n"] == 3:
                raise OSError(28, "No space left on device")
        return real(src, dst)

    monkeypatch.setattr(write_module.os, "rename", flaky)
    code, _, err = _run(["run", path, "--out", out, "--quiet"], capsys)
    assert code == 2 and "cannot write the outputs: No space left" in _one_error_line(err)
    assert count["n"] == 3
    assert _snapshot(out) == before
    _no_hidden_siblings(out)


def test_interrupt_while_writing_leaves_previous_run(tmp_path, capsys, monkeypatch):
    """SIGTERM arriving while figures are drawn (sent to this process; the
    handler main installs turns it into an exception): one line, 143, the
    previous run intact and no temporary folder."""
    import signal

    path = write_case(tmp_path / "case")
    out = tmp_path / "out"
    assert _run(["run", path, "--out", out, "--quiet"], capsys)[0] == 0
    before = _snapshot(out)
    real = figure_module.plot_categorical

    def killed(*args, **kwargs):
        os.kill(os.getpid(), signal.SIGTERM)
        return real(*args, **kwargs)

    monkeypatch.setattr(figure_module, "plot_categorical", killed)
    code, _, err = _run(["run", path, "--out", out, "--quiet"], capsys)
    assert code == 128 + signal.SIGTERM == 143
    assert err == "doseattr: stopped by SIGTERM; no partial outputs were left\n"
    assert _snapshot(out) == before
    _no_hidden_siblings(out)
    assert signal.getsignal(signal.SIGTERM) == signal.SIG_DFL  # main put it back


def test_table_changed_during_the_run_is_refused(tmp_path, capsys, monkeypatch):
    """A table edited while computing: its hash would not describe the data
    used, so nothing is written and the line names the table's key."""
    import doseattr.analysis.pipeline as pipeline

    path = write_case(tmp_path / "case")
    real = pipeline.run_analysis

    def edits_a_table(analysis, **kwargs):
        results = real(analysis, **kwargs)
        with open(tmp_path / "case" / "measurements.csv", "a") as fh:
            fh.write("30.0,1\n")
        return results

    monkeypatch.setattr(pipeline, "run_analysis", edits_a_table)
    code, _, err = _run(["run", path, "--out", tmp_path / "out"], capsys)
    assert code == 2
    assert "[exposure] key 'table': measurements.csv changed" in _one_error_line(err)
    assert not (tmp_path / "out").exists()


# -- internal errors ---------------------------------------------------------------------
def test_unexpected_exception_is_one_line(tmp_path, capsys, monkeypatch):
    import doseattr.analysis.pipeline as pipeline

    def broken(*args, **kwargs):
        raise ZeroDivisionError("float division\nby zero")

    monkeypatch.setattr(pipeline, "run_analysis", broken)
    code, out, err = _run(["run", write_case(tmp_path / "case"), "--out", tmp_path / "o"],
                          capsys)
    assert code == 1 and out == ""
    assert err == ("doseattr: internal error: ZeroDivisionError: float division by zero "
                   "(please report this)\n")
    assert not (tmp_path / "o").exists()


# -- the Python API ---------------------------------------------------------------------
def test_results_write_follows_the_same_rules(tmp_path):
    from doseattr.analysis.config import load_analysis
    from doseattr.analysis.pipeline import run_analysis

    path = _case_with_burden(tmp_path / "case")
    results = run_analysis(load_analysis(path))
    out = tmp_path / "out"
    written = results.write(out, figures=False)
    assert {p.relative_to(out).as_posix() for p in written} == _files(out)
    provenance = json.loads((out / "results.json").read_text())["provenance"]
    assert provenance["command"] == "python-api"
    results.write(out, figures=False)  # a previous run is replaced
    with pytest.raises(InputError, match="holds the input"):
        results.write(tmp_path / "case", figures=False)
    (out / "mine.txt").write_text("x")
    with pytest.raises(InputError, match=r"'mine\.txt' was not written by doseattr"):
        results.write(out, figures=False)
    assert (out / "mine.txt").read_text() == "x"
    _no_hidden_siblings(out)


# -- doseattr check ----------------------------------------------------------------------
def test_check_prints_lines_and_writes_nothing(tmp_path, capsys):
    """``doseattr check``: the lines of check_analysis, status 0, no file
    written anywhere in the case folder."""
    from doseattr.analysis.check import check_analysis
    from doseattr.analysis.config import load_analysis

    path = write_case(tmp_path / "case")
    before = _snapshot(tmp_path)
    expected = check_analysis(load_analysis(path))
    code, out, err = _run(["check", path], capsys)
    assert code == 0 and err == ""
    assert out.splitlines() == list(expected) and expected
    assert _snapshot(tmp_path) == before


def test_check_refuses_invalid_input_in_one_line(tmp_path, capsys):
    path = write_case(tmp_path / "case", ANALYSIS.replace("model =", "modle ="))
    before = _snapshot(tmp_path)
    code, out, err = _run(["check", path], capsys)
    assert code == 2 and out == ""
    assert "analysis.toml: [curve] key 'modle'" in _one_error_line(err)
    assert _snapshot(tmp_path) == before


def test_unreadable_folder_is_refused(tmp_path, monkeypatch):
    """A subfolder that cannot be listed might hide the user's files: the
    folder is refused rather than treated as doseattr's (os.walk's error
    simulated, since tests may run as root)."""
    from doseattr.outputs import manifest

    out = tmp_path / "out"
    (out / "locked").mkdir(parents=True)

    def walk(top, onerror=None):
        onerror(PermissionError(13, "Permission denied", str(out / "locked")))
        yield from ()

    monkeypatch.setattr(manifest.os, "walk", walk)
    assert manifest.first_foreign(out) == ("locked", "cannot be read (Permission denied)")
