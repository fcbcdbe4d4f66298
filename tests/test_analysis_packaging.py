"""Packaging: the demo files ship as the package ``doseattr.demo`` and every
package under doseattr/ is listed in pyproject.toml (packages are listed,
not found, so that data_demo/ can be mapped to ``doseattr.demo``)."""

from __future__ import annotations

import fnmatch
import tomllib
from pathlib import Path

import doseattr

ROOT = Path(__file__).resolve().parent.parent


def _setuptools_config() -> dict:
    return tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]


def test_every_package_is_listed():
    listed = set(_setuptools_config()["packages"])
    found = {".".join(p.parent.relative_to(ROOT).parts)
             for p in (ROOT / "doseattr").rglob("__init__.py")}
    assert found - listed == set(), "add these to [tool.setuptools] packages in pyproject.toml"
    assert listed - found == {"doseattr.demo", "doseattr.templates"}  # mapped data folders


def test_demo_files_are_package_data():
    cfg = _setuptools_config()
    assert cfg["package-dir"]["doseattr.demo"] == "data_demo"
    patterns = cfg["package-data"]["doseattr.demo"]
    files = [p.name for p in (ROOT / "data_demo").iterdir()
             if p.is_file() and p.suffix != ".py"]
    assert {"analysis.toml", "study_bands.csv", "measurements.csv", "README.md"} <= set(files)
    for name in files:
        assert any(fnmatch.fnmatch(name, pat) for pat in patterns), name


def test_version_matches_pyproject():
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    assert doseattr.__version__ == project["version"]


def test_demo_files_say_the_numbers_are_invented():
    for name in sorted(p.name for p in (ROOT / "data_demo").iterdir()
                       if p.suffix in (".toml", ".csv", ".md")):
        assert "invented" in (ROOT / "data_demo" / name).read_text().lower(), name
