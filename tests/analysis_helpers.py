"""Shared helpers for the analysis and command-line tests: write an analysis
file and its tables into a temporary folder.

The tables below are test inputs only (invented numbers are fine as inputs;
every expected value in the tests comes from an outside reference).
"""

from __future__ import annotations

import textwrap
from pathlib import Path

BANDS = """\
lower,upper,rr,ci_lower,ci_upper,cases,controls
0,10,1,,,120,480
10,20,1.18,0.85,1.64,95,310
20,40,1.42,1.01,2.00,88,220
40,,1.85,1.22,2.80,54,105
"""

MEASUREMENTS = """\
value,weight
12.0,1
9.5,2
15.6,1
3.7,1
17.3,3
11.0,1
8.2,2
26.4,1
"""

ANALYSIS = """\
unit = "ug/m3"

[curve]
table = "bands.csv"
model = "log-linear"

[exposure]
table = "measurements.csv"
family = "lognormal"

[[scenario]]
name = "cap"
cap = 20
"""


def write_case(folder: Path, analysis: str = ANALYSIS, *, bands: str | None = BANDS,
               measurements: str | None = MEASUREMENTS) -> Path:
    """Write ``analysis.toml`` (dedented) and the tables; return its path."""
    folder.mkdir(parents=True, exist_ok=True)
    if bands is not None:
        (folder / "bands.csv").write_text(bands)
    if measurements is not None:
        (folder / "measurements.csv").write_text(measurements)
    path = folder / "analysis.toml"
    path.write_text(textwrap.dedent(analysis))
    return path


def replace_section(analysis: str, section: str, body: str) -> str:
    """``analysis`` with the body of ``[section]`` replaced by ``body``."""
    lines = analysis.splitlines()
    out, skipping = [], False
    for line in lines:
        if line.strip().startswith("["):
            skipping = line.strip() == f"[{section}]"
            if skipping:
                out.append(line)
                out.extend(textwrap.dedent(body).strip().splitlines())
                continue
        if not skipping:
            out.append(line)
    return "\n".join(out) + "\n"
