"""Python users get the results' warnings as real warnings
(``DoseattrWarning``), while the command line keeps standard error for
errors only (the summary and report list the warnings)."""

from __future__ import annotations

import sys
import warnings
from pathlib import Path

import pytest

from doseattr.analysis.config import analysis_from_dict
from doseattr.analysis.pipeline import run_analysis
from doseattr.cli import main
from doseattr.errors import DoseattrWarning


def _extrapolating(tmp_path: Path) -> Path:
    """An entered linear curve with max_dose 20 extended over a lognormal
    whose median (40) lies above it: the results carry an extrapolation
    warning (the share of the population beyond max_dose, P(X > 20) of
    lognormal(40, 2) = 0.84 by its CDF)."""
    path = tmp_path / "analysis.toml"
    path.write_text('unit = "ug/m3"\n[curve]\nmodel = "linear"\nerr = 0.01\nper = 1.0\n'
                    'max_dose = 20.0\nbeyond = "extend"\n[exposure]\ngm = 40.0\ngsd = 2.0\n',
                    encoding="utf-8")
    return path


def test_run_analysis_issues_each_listed_warning(tmp_path: Path) -> None:
    from doseattr.analysis.config import load_analysis

    analysis = load_analysis(_extrapolating(tmp_path))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        results = run_analysis(analysis)
    assert results.warnings, "this analysis must produce at least one warning"
    issued = [str(w.message) for w in caught if issubclass(w.category, DoseattrWarning)]
    assert issued == list(results.warnings)


def test_no_warning_without_listed_warnings(tmp_path: Path) -> None:
    """A curve held flat well above the whole exposure range (lognormal(5, 1.5)
    has P(X > 500) below 1e-30 by its CDF) and no fit: nothing to warn about."""
    a = analysis_from_dict({"unit": "ug/m3",
                            "curve": {"model": "linear", "err": 0.01, "per": 1.0,
                                      "max_dose": 500.0},
                            "exposure": {"gm": 5.0, "gsd": 1.5}}, base_dir=tmp_path)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        results = run_analysis(a)
    assert results.warnings == ()
    assert not [w for w in caught if issubclass(w.category, DoseattrWarning)]


def test_command_line_prints_no_python_warning_lines(tmp_path: Path, capsys) -> None:
    path = _extrapolating(tmp_path)
    def to_stderr(message, category, filename, lineno, file=None, line=None):
        sys.stderr.write(warnings.formatwarning(message, category, filename, lineno, line))

    with warnings.catch_warnings():
        warnings.simplefilter("always")
        warnings.showwarning = to_stderr  # as outside pytest, which records warnings
        assert main(["run", str(path), "--out", str(tmp_path / "out"), "--quiet"]) == 0
    assert "DoseattrWarning" not in capsys.readouterr().err


if __name__ == "__main__":  # pragma: no cover
    pytest.main([__file__])
