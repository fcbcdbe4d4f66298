"""Shared steps of the end-to-end tests: write an analysis, run it through
the command line or the Python API, and reference integrals by quad."""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

from reference_integrals import expect_over

from doseattr.cli import main


def write_analysis(folder: Path, toml: str, tables: dict[str, str] | None) -> Path:
    """Write ``analysis.toml`` and the tables (dedented) into ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    for name, text in (tables or {}).items():
        (folder / name).write_text(textwrap.dedent(text))
    path = folder / "analysis.toml"
    path.write_text(textwrap.dedent(toml))
    return path


def run_cli(folder: Path, toml: str, tables: dict[str, str] | None = None) -> dict:
    """Run ``doseattr run ... --out folder/out --quiet``; return results.json."""
    path = write_analysis(folder, toml, tables)
    out = folder / "out"
    code = main(["run", str(path), "--out", str(out), "--quiet"])
    assert code == 0, f"doseattr run exited {code}"
    return json.loads((out / "results.json").read_text())


def run_api(folder: Path, toml: str, tables: dict[str, str] | None = None) -> dict:
    """The same analysis through the Python API the command line wraps
    (load_analysis -> run_analysis -> to_dict, JSON round trip), without
    rendering figures: test_e2e_determinism.py checks that results.json
    written by ``doseattr run`` equals this dictionary, and this keeps the
    suite's run time down."""
    from doseattr.analysis.config import load_analysis
    from doseattr.analysis.pipeline import run_analysis

    path = write_analysis(folder, toml, tables)
    return json.loads(json.dumps(run_analysis(load_analysis(path)).to_dict()))


def expect_excess(excess, dist, kinks) -> float:
    """E[excess(X)] by scipy.integrate.quad, split at the kinks."""
    return expect_over(excess, dist, kinks, epsrel=1e-12, limit=400)
