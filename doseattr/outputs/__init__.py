"""Outputs: results.json, CSV tables, figures and the HTML report.

Reads ``Results`` objects from :mod:`doseattr.analysis` and the core objects
they hold; nothing below this layer imports it.
"""

from doseattr.outputs.report import render_report
from doseattr.outputs.write import write_outputs

__all__ = ["render_report", "write_outputs"]
