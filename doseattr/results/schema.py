"""The published JSON Schema of ``results.json`` (draft 2020-12), shipped
in the package as ``results.schema.json``."""

from __future__ import annotations

import json
from functools import cache
from importlib import resources
from typing import Any

SCHEMA_FILE = "results.schema.json"


@cache
def results_schema() -> dict[str, Any]:
    """The schema as a dictionary (read once from the package)."""
    text = resources.files("doseattr.results").joinpath(SCHEMA_FILE).read_text("utf-8")
    schema: dict[str, Any] = json.loads(text)
    return schema
