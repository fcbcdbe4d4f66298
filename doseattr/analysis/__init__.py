"""Analysis layer: reads the analysis file and its tables, checks them, wires
the numerical core and collects the results.

Public entry points: :func:`load_analysis`, :func:`analysis_from_dict`,
:func:`run_analysis`, and the :class:`Results` they produce.

The names are loaded on first use (PEP 562 module ``__getattr__``), so that
importing a submodule, as ``doseattr check`` does, does not load the whole
run pipeline and its result records.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from doseattr.analysis.config import Analysis, analysis_from_dict, load_analysis
    from doseattr.analysis.pipeline import run_analysis
    from doseattr.results import Estimate, Results, ScenarioResult, SourceWidth, SubstitutionResult

__all__ = ["Analysis", "Estimate", "Results", "ScenarioResult", "SourceWidth",
           "SubstitutionResult", "analysis_from_dict", "load_analysis", "run_analysis"]

#: Where each public name lives.
_HOME = {"Analysis": "doseattr.analysis.config", "analysis_from_dict": "doseattr.analysis.config",
         "load_analysis": "doseattr.analysis.config", "run_analysis": "doseattr.analysis.pipeline",
         "Estimate": "doseattr.results", "Results": "doseattr.results",
         "ScenarioResult": "doseattr.results", "SourceWidth": "doseattr.results",
         "SubstitutionResult": "doseattr.results"}


def __getattr__(name: str) -> Any:
    if name not in _HOME:
        raise AttributeError(f"module 'doseattr.analysis' has no attribute {name!r}")
    value = getattr(import_module(_HOME[name]), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
