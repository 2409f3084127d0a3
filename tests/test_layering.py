"""The dependency direction of DESIGN.md §2, read from the imports with ast.

Bottom: errors; then grid, kinematics, triangles and geometry, independent of
each other; then classify, then stencils; then sizing, case, sweep; preflight
returns data; export writes files; cli on top. A new module must be added here,
which is where its place in that order gets decided.
"""

import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "ibprep"

LOW = {"errors", "files"}
BASE = LOW | {"grid", "kinematics", "triangles", "geometry"}
ALLOWED = {
    "errors": set(),
    "files": {"errors"},
    "grid": LOW,
    "kinematics": LOW,
    "triangles": LOW,
    "proximity": LOW | {"grid", "triangles"},
    "geometry": LOW | {"geometry"},
    "classify": LOW | {"grid", "triangles"},
    "kernels": LOW | {"proximity"},
    "stencils": LOW | {"grid", "triangles", "classify", "proximity", "kernels"},
    "sizing": BASE | {"classify"},
    "sweep": BASE | {"classify", "stencils"},
    "case": BASE | {"classify", "stencils", "sizing"},
    "preflight": BASE | {"classify", "stencils", "sizing", "case", "sweep", "preflight"},
    "export": BASE | {"classify", "stencils", "sizing", "case", "export"},
    "demo": BASE | {"classify", "stencils", "sizing", "case", "sweep", "preflight", "export"},
    "cli": None,  # the top: may import anything
    "__init__": None,
    "__main__": {"cli"},
}


def _unit(path: Path) -> str:
    rel = path.relative_to(PKG).with_suffix("")
    return rel.parts[0]


def _imported_units(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(), filename=str(path))
    depth = len(path.relative_to(PKG).parts) - 1  # 0 for top-level modules
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level > 0:
            up = node.level - 1 - depth
            if up > 0:
                continue
            if node.level - 1 == depth:  # relative to the package root
                if node.module:
                    found.add(node.module.split(".")[0])
                else:
                    found.update(a.name for a in node.names)
            else:  # within a subpackage
                found.add(_unit(path))
        elif isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("ibprep"):
            parts = node.module.split(".")
            found.add(parts[1] if len(parts) > 1 else "__init__")
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name.startswith("ibprep."):
                    found.add(a.name.split(".")[1])
    return found


@pytest.mark.parametrize("path", sorted(PKG.rglob("*.py")), ids=lambda p: str(p.relative_to(PKG)))
def test_imports_point_down(path):
    unit = _unit(path)
    if path.name == "__init__.py" and path.parent == PKG:
        unit = "__init__"
    assert unit in ALLOWED, f"{unit} is a new module: place it in ALLOWED in {Path(__file__).name}"
    allowed = ALLOWED[unit]
    if allowed is None:
        return
    bad = _imported_units(path) - allowed - {unit}
    assert not bad, f"{path.relative_to(PKG)} imports {sorted(bad)}, above or beside it in the dependency order"
