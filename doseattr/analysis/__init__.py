"""Analysis layer: reads the analysis file and its tables, checks them, wires
the numerical core and collects the results.

Public entry points: :func:`load_analysis`, :func:`analysis_from_dict`,
:func:`run_analysis`, and the :class:`Results` they produce.
"""

from doseattr.analysis.config import Analysis, analysis_from_dict, load_analysis
from doseattr.analysis.pipeline import run_analysis
from doseattr.results import Estimate, Results, ScenarioResult, SourceWidth, SubstitutionResult

__all__ = ["Analysis", "Estimate", "Results", "ScenarioResult", "SourceWidth",
           "SubstitutionResult", "analysis_from_dict", "load_analysis", "run_analysis"]
