"""The README's two set-up commands and the licence stay true.

The set-up must work where the system Python refuses ``pip install`` into
itself (PEP 668 "externally managed environment", as on Debian and Ubuntu),
so both commands make and activate a virtual environment first (common
practice). CI greps the test line out of the README and runs it as written;
these tests fail when the README and ``.ci/run`` drift apart.
"""

from __future__ import annotations

import re
import subprocess
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _code_blocks(text: str) -> list[str]:
    return re.findall(r"^```\n(.*?)^```", text, flags=re.S | re.M)


def _setup_commands() -> list[str]:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    head = readme.split("\n## ", 1)[0]
    return [b.strip() for b in _code_blocks(head)]


def test_readme_has_exactly_two_one_line_setup_commands() -> None:
    commands = _setup_commands()
    assert len(commands) == 2
    assert all("\n" not in c for c in commands)


def test_each_setup_command_makes_and_uses_a_virtual_environment() -> None:
    for command in _setup_commands():
        steps = [s.strip() for s in command.split("&&")]
        assert steps[0] == "python3 -m venv .venv"
        assert steps[1] == ". .venv/bin/activate"
        assert steps[2].startswith("python3 -m pip install ")


def test_ci_finds_the_readme_test_line() -> None:
    script = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    pattern = re.search(r"grep -m1 -E '([^']+)' README.md", script)
    assert pattern is not None
    found = subprocess.run(["grep", "-m1", "-E", pattern.group(1), str(ROOT / "README.md")],
                           capture_output=True, text=True, check=False).stdout.strip()
    assert found == _setup_commands()[1]
    assert found.endswith("python3 -m pytest -q")


def test_licence_file_matches_pyproject() -> None:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]
    declared = project["license"]["text"]
    first_line = (ROOT / "LICENSE").read_text(encoding="utf-8").splitlines()[0]
    assert first_line == f"{declared} License"
