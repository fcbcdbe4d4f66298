"""Results layer: typed records of a finished run (filled by the analysis
layer, read by the outputs), ``results.json`` generated from them in one
place (:mod:`doseattr.results.serialize`) and its published JSON Schema.

Imports only the numerical core.
"""

from doseattr.results.estimate import Estimate
from doseattr.results.records import (
                                      AttributionSection,
                                      BandTable,
                                      BurdenResult,
                                      CurveSection,
                                      CurveVariant,
                                      ExposureSection,
                                      ExposureVariant,
                                      ScenarioResult,
                                      SourceWidth,
                                      StratumExposure,
                                      StratumResult,
                                      SubstitutionResult,
                                      UncertaintySection,
)
from doseattr.results.run import Results

__all__ = ["AttributionSection", "BandTable", "BurdenResult", "CurveSection", "CurveVariant",
           "Estimate", "ExposureSection", "ExposureVariant", "Results", "ScenarioResult",
           "SourceWidth", "StratumExposure", "StratumResult", "SubstitutionResult",
           "UncertaintySection"]
