"""results.json is written quickly whatever the number of strata (issue 15,
item 3): :func:`doseattr.outputs.write.indented_json` gives the text of
``json.dumps(obj, indent=2)`` (the standard library, the reference) for
nested data without long lists, the same data back through ``json.loads``
with long lists (one compact entry a line), and refuses NaN as json does.
The data are seeded random records."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from doseattr.outputs.write import LONG_LIST, indented_json


def _record(rng: np.random.Generator, i: int) -> dict:
    return {"stratum": f"s{i}", "cases": float(rng.uniform(1, 100)), "own": bool(i % 2),
            "group": None, "estimate": {"estimate": float(rng.normal()), "lower": None},
            "tags": [], "empty": {}, "draws": [float(v) for v in rng.normal(size=3)]}


def test_short_lists_are_laid_out_as_json_indent_2():
    rng = np.random.default_rng(1506)  # simulation, seeded
    data = {"title": "x \"quoted\" é", "n": 3, "strata": [_record(rng, i) for i in range(5)],
            "nested": {"a": [1, 2, [3, {"b": []}]], "c": {}}, "flag": True}
    assert indented_json(data) == json.dumps(data, indent=2, allow_nan=False)


def test_long_lists_come_back_unchanged_one_entry_a_line():
    rng = np.random.default_rng(1507)
    n = 3 * LONG_LIST + 7
    data = {"burden": {"strata": [_record(rng, i) for i in range(n)]}, "x": list(range(n))}
    text = indented_json(data)
    assert json.loads(text) == data
    lines = text.splitlines()
    assert len(lines) < 2 * n + 20  # one line per entry of each long list, not one per field
    assert sum(line.strip().startswith('{"stratum"') for line in lines) == n


@pytest.mark.parametrize("bad", [math.nan, math.inf])
def test_non_finite_numbers_are_refused(bad):
    with pytest.raises(ValueError):
        indented_json({"a": [bad]})
    with pytest.raises(ValueError):
        indented_json({"a": [bad] * (LONG_LIST + 1)})
