"""The package's layers: no module imports one of a higher layer.

Order, lowest first: errors; io; tracks; roles and groups (side by side, neither
imports the other); stats; pipeline; cli; __main__ (``python -m comove``, which
runs the command line). The presentation layer (present)
reads results only through the results-folder module, and imports nothing
else of comove but io's plain helpers and errors.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "comove"

#: Layer of each part of the package; a module may import its own layer and lower ones.
LAYERS = {
    "errors": 0, "io": 1, "tracks": 2, "roles": 3, "groups": 3, "stats": 4, "present": 2,
    "pipeline": 5, "cli": 6, "__main__": 7,
}  # fmt: skip

#: Parts of one layer that must not import each other.
APART = {("roles", "groups"), ("groups", "roles")}

#: What the presentation layer may import.
PRESENT_MAY_IMPORT = {"comove.io.results", "comove.io.times", "comove.errors"}


def part_of(module: str) -> str | None:
    """Return the part of ``comove.x.y`` (``x``), or None for the package itself."""
    names = module.split(".")
    return names[1] if len(names) > 1 else None


def modules() -> list[tuple[str, Path]]:
    out = []
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE.parent).with_suffix("")
        name = ".".join(rel.parts).removesuffix(".__init__")
        out.append((name, path))
    return out


def comove_imports(path: Path) -> set[str]:
    """Return every comove module ``path`` imports (at any depth of its code)."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("comove"):
            found.add(node.module)
            found |= {f"{node.module}.{a.name}" for a in node.names}  # from comove.io import x
        elif isinstance(node, ast.Import):
            found |= {a.name for a in node.names if a.name.startswith("comove")}
    return found


@pytest.mark.parametrize(("name", "path"), modules(), ids=[m for m, _ in modules()])
def test_no_module_imports_a_higher_layer(name, path):
    mine = part_of(name)
    if mine is None:  # the package's face hands names on from every layer
        return
    for imported in comove_imports(path):
        theirs = part_of(imported)
        if theirs is None or theirs not in LAYERS:
            continue  # the package itself (its version), or a name imported from it
        assert LAYERS[theirs] <= LAYERS[mine], f"{name} imports {imported} of a higher layer"
        assert (mine, theirs) not in APART, f"{name} imports {imported}: roles and groups apart"
        if mine == "present" and theirs != "present":
            assert any(imported.startswith(ok) for ok in PRESENT_MAY_IMPORT), (
                f"{name} imports {imported}; the presentation layer reads only the results folder"
            )


def test_every_part_has_a_layer():
    parts = {part_of(name) for name, _ in modules()} - {None}
    assert parts == set(LAYERS)


def test_the_check_finds_an_upward_import(tmp_path):
    # the test itself must be able to fail: an io module importing the pipeline
    bad = tmp_path / "bad.py"
    bad.write_text("from comove.pipeline.core import mine\n")
    imported = comove_imports(bad)
    assert "comove.pipeline.core" in imported
    assert LAYERS[part_of("comove.pipeline.core")] > LAYERS[part_of("comove.io.bad")]
