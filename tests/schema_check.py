"""A small validator for the part of JSON Schema (draft 2020-12) that
doseattr's results schema uses: ``type``, ``required``, ``properties``,
``additionalProperties``, ``items``, ``enum``, ``const``, ``anyOf``,
``pattern`` and local ``$ref``. Semantics as in the JSON Schema Validation
specification (json-schema.org, draft 2020-12, sections 6.1-6.5); written
here because no validator is among the project's dependencies.

``strict=True`` also reports properties the schema does not declare, so a
test can require the schema to describe every key doseattr writes.
"""

from __future__ import annotations

import re
from typing import Any

TYPES = {
    "object": lambda v: isinstance(v, dict),
    "array": lambda v: isinstance(v, list),
    "string": lambda v: isinstance(v, str),
    "integer": lambda v: isinstance(v, int) and not isinstance(v, bool),
    "number": lambda v: isinstance(v, (int, float)) and not isinstance(v, bool),
    "boolean": lambda v: isinstance(v, bool),
    "null": lambda v: v is None,
}


def problems(value: Any, schema: dict, root: dict | None = None, path: str = "$",
             strict: bool = False) -> list[str]:
    """Every way ``value`` breaks ``schema``, as ``"path: reason"`` lines."""
    root = schema if root is None else root
    if "$ref" in schema:
        name = schema["$ref"].removeprefix("#/$defs/")
        return problems(value, root["$defs"][name], root, path, strict)
    if "anyOf" in schema:
        tries = [problems(value, s, root, path, strict) for s in schema["anyOf"]]
        return [] if any(not t for t in tries) else min(tries, key=len)
    out: list[str] = []
    types = schema.get("type")
    if types is not None:
        names = [types] if isinstance(types, str) else types
        if not any(TYPES[t](value) for t in names):
            return [f"{path}: {type(value).__name__} is not {'/'.join(names)}"]
    if "const" in schema and value != schema["const"]:
        out.append(f"{path}: {value!r} is not {schema['const']!r}")
    if "enum" in schema and value not in schema["enum"]:
        out.append(f"{path}: {value!r} is not one of {schema['enum']}")
    if "pattern" in schema and isinstance(value, str) and not re.search(schema["pattern"], value):
        out.append(f"{path}: {value!r} does not match {schema['pattern']}")
    if isinstance(value, dict):
        out += _object(value, schema, root, path, strict)
    if isinstance(value, list) and "items" in schema:
        for i, item in enumerate(value):
            out += problems(item, schema["items"], root, f"{path}[{i}]", strict)
    return out


def _object(value: dict, schema: dict, root: dict, path: str, strict: bool) -> list[str]:
    out = [f"{path}: missing {k!r}" for k in schema.get("required", []) if k not in value]
    props = schema.get("properties", {})
    extra = schema.get("additionalProperties")
    for k, v in value.items():
        if k in props:
            out += problems(v, props[k], root, f"{path}.{k}", strict)
        elif isinstance(extra, dict):
            out += problems(v, extra, root, f"{path}.{k}", strict)
        elif extra is False or (strict and props):
            out.append(f"{path}: {k!r} is not declared in the schema")
    return out
