"""The layers of DEVELOPERS.md: imports point downward, the seam never loads sympy."""

import ast
import subprocess
import sys
from pathlib import Path

import pytest

import linz_ros

PACKAGE = Path(linz_ros.__file__).resolve().parent

# layer -> layers (and the seam) it may import; see DEVELOPERS.md
ALLOWED = {
    "errors": set(),
    "artifact": {"errors"},
    "model": {"errors", "artifact"},
    "geometry": {"errors", "artifact", "model"},
    "analysis": {"errors", "artifact", "model", "geometry"},
    "cli": {"errors", "artifact", "model", "geometry", "analysis"},
}


def _layer(path: Path) -> str:
    rel = path.relative_to(PACKAGE)
    return rel.parts[0].removesuffix(".py")


def _imported_layers(path: Path) -> set[str]:
    tree = ast.parse(path.read_text())
    found = set()
    for node in ast.walk(tree):
        names = []
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module:
            names = [node.module]
        for name in names:
            parts = name.split(".")
            if parts[0] == "linz_ros" and len(parts) > 1:
                found.add(parts[1])
    return found


@pytest.mark.parametrize("path", sorted(p for p in PACKAGE.rglob("*.py") if p.name != "__main__.py"),
                         ids=lambda p: str(p.relative_to(PACKAGE)))
def test_imports_point_downward(path):
    layer = _layer(path)
    if layer == "__init__":
        return
    assert layer in ALLOWED, f"new top-level module {layer!r}: add it to the layer table"
    illegal = _imported_layers(path) - ALLOWED[layer] - {layer}
    assert not illegal, f"{path.name} ({layer}) imports {sorted(illegal)}"


def test_the_seam_imports_without_sympy():
    code = ("import sys, linz_ros.artifact.grammar, linz_ros.errors; "
            "bad = [m for m in ('sympy', 'rclpy', 'scipy') if m in sys.modules]; "
            "print(bad); sys.exit(1 if bad else 0)")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert result.returncode == 0, result.stdout + result.stderr


def test_public_functions_have_numpy_style_docstrings():
    import linz_ros.analysis as analysis
    import linz_ros.geometry as geometry
    import linz_ros.model as model
    missing = []
    for module in (analysis, geometry, model):
        for name in module.__all__:
            obj = getattr(module, name)
            doc = obj.__doc__ or ""
            if not doc.strip():
                missing.append(f"{module.__name__}.{name}")
            elif callable(obj) and not isinstance(obj, type):
                import inspect
                params = [p for p in inspect.signature(obj).parameters if p not in ("self",)]
                if params and "Parameters" not in doc and "Returns" not in doc:
                    missing.append(f"{module.__name__}.{name} (no Parameters/Returns section)")
    assert not missing, missing
