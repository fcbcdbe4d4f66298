"""doseattr: population attributable and potential impact fractions for
continuously varying exposures.

From Python (for notebooks)::

    import doseattr
    analysis = doseattr.load_analysis("analysis.toml")
    results = doseattr.run_analysis(analysis)
    print(results.summary())

The analysis layer is imported on first use, so that ``import
doseattr.core`` stays light.
"""

from __future__ import annotations

from typing import Any

__version__ = "0.1.0"

_LAZY = {"load_analysis", "analysis_from_dict", "run_analysis", "Analysis", "Results"}

__all__ = ["__version__", *sorted(_LAZY)]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        from doseattr import analysis

        return getattr(analysis, name)
    raise AttributeError(f"module 'doseattr' has no attribute {name!r}")
