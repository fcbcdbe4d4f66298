"""The layering of the package (the project's DEVELOPERS.md): core ->
results -> analysis -> outputs -> command line, each importing only the
layers below it, read from the source with ``ast`` (every import,
including those inside functions)."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "doseattr"
LAYERS = {"core": 0, "results": 1, "analysis": 2, "outputs": 3, "cli": 4}
#: Modules every layer may import.
SHARED = {"doseattr", "doseattr.errors"}
#: The calls upward, made on use: ``Results.write`` hands the record to the
#: outputs layer's writer (the same rules as ``doseattr run --out``);
#: ``Results.to_frames`` reads the same CSV tables as DataFrames and
#: ``Results._repr_html_`` shows the report's key numbers in a notebook.
ALLOWED = {("doseattr.results.run", "doseattr.outputs.write"),
           ("doseattr.results.run", "doseattr.outputs.tables"),
           ("doseattr.results.run", "doseattr.outputs.report")}


def _layer(module: str) -> int | None:
    parts = module.split(".")
    return LAYERS.get(parts[1]) if len(parts) > 1 and parts[0] == "doseattr" else None


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found.add(node.module)
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
    return {m for m in found if m == "doseattr" or m.startswith("doseattr.")}


def _modules() -> dict[str, Path]:
    out = {}
    for path in PACKAGE.rglob("*.py"):
        rel = path.relative_to(PACKAGE.parent).with_suffix("")
        name = ".".join(rel.parts).removesuffix(".__init__")
        out[name] = path
    return out


def test_every_import_points_down():
    wrong = []
    for name, path in _modules().items():
        own = _layer(name)
        if own is None:
            continue
        for target in _imports(path) - SHARED:
            other = _layer(target)
            if other is not None and other > own and (name, target) not in ALLOWED:
                wrong.append(f"{name} imports {target}")
    assert wrong == []


def test_the_check_sees_an_upward_import(tmp_path):
    """The reader of imports finds one inside a function (so the layering
    test can fail)."""
    f = tmp_path / "m.py"
    f.write_text("def g():\n    from doseattr.outputs.write import write_outputs\n")
    assert _imports(f) == {"doseattr.outputs.write"}
