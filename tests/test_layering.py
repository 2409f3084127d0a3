"""The dependency direction of DESIGN.md §2, read from the imports with ast.

The package is one subpackage per stage. Bottom: errors and files; then grid,
geometry and motion, independent of each other; then tagging, then stencils;
then the case file (io.case); then the case-level checks (sizing, sweeps, the
pre-flight); then the writers (io.export, io.demo); the cli on top. A module may
import its own unit and the layers below it, never one above or beside it. A new
module or subpackage must be placed in LAYERS, which is where its place in that
order gets decided.
"""

import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "ibprep"

# Each layer is a set of units; units in one layer are independent of each other.
LAYERS = [
    {"errors", "_version"},
    {"files"},
    {"grid", "geometry", "motion"},
    {"tagging"},
    {"stencils"},
    {"io.case"},
    {"checks"},
    {"io.export", "io.demo", "io"},  # io/__init__ may name both halves of io
    {"cli"},
    {"__main__", "__init__"},
]
RANK = {unit: k for k, layer in enumerate(LAYERS) for unit in layer}


def _module_of(path: Path) -> list[str]:
    """Dotted parts of the module under ibprep (a package's __init__ is the package)."""
    parts = list(path.relative_to(PKG).with_suffix("").parts)
    return parts[:-1] if parts[-1] == "__init__" else parts


def _unit(parts: list[str]) -> str:
    """The layering unit of a module: the top-level module or subpackage; io splits by module."""
    if not parts:
        return "__init__"
    if parts[0] == "io" and len(parts) > 1:
        return "io." + parts[1]
    return parts[0]


def _imported_units(path: Path, source: str | None = None) -> set[str]:
    tree = ast.parse(path.read_text() if source is None else source, filename=str(path))
    here = _module_of(path)
    package = here if path.name == "__init__.py" else here[:-1]
    found = set()
    for node in ast.walk(tree):
        targets = []
        if isinstance(node, ast.ImportFrom) and node.level > 0:
            base = package[: len(package) - (node.level - 1)]
            if node.module:
                targets.append(base + node.module.split("."))
            else:
                targets.extend(base + [a.name] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.module.split(".")[0] == "ibprep":
            targets.append(node.module.split(".")[1:])
        elif isinstance(node, ast.Import):
            targets.extend(a.name.split(".")[1:] for a in node.names if a.name.split(".")[0] == "ibprep")
        for t in targets:
            found.add(_unit(t))
    return found


@pytest.mark.parametrize("path", sorted(PKG.rglob("*.py")), ids=lambda p: str(p.relative_to(PKG)))
def test_imports_point_down(path):
    unit = _unit(_module_of(path))
    assert unit in RANK, f"{unit} is a new module or subpackage: place it in LAYERS in {Path(__file__).name}"
    bad = sorted(u for u in _imported_units(path) - {unit} if u not in RANK or RANK[u] >= RANK[unit])
    assert not bad, f"{path.relative_to(PKG)} imports {bad}, above or beside it in the dependency order"


def test_an_upward_import_is_caught():
    # The check itself can fail: grid importing the tagging stage, or a geometry module importing motion
    # (beside it), is seen as such.
    assert _imported_units(PKG / "grid.py", "from .tagging.classify import CellTag\n") == {"tagging"}
    assert _imported_units(PKG / "geometry" / "wing.py", "from ..motion import kinematics\n") == {"motion"}
    assert _imported_units(PKG / "io" / "export.py", "from .case import load_case\n") == {"io.case"}
    assert RANK["tagging"] > RANK["grid"] and RANK["motion"] == RANK["geometry"]
