"""The package's layers: folders name them and lower layers never import higher ones.

Common practice (layered architecture): each folder under ``loopcheck/`` is a
layer and may import only the layers listed for it below. The check reads every
import statement in the source, including imports inside functions (the lazy
ones), so a lazy import cannot hide a dependency that points upwards.
"""
from __future__ import annotations

import ast
import pathlib

import pytest

PACKAGE = pathlib.Path(__file__).resolve().parents[1] / "loopcheck"

# layer -> the layers it may import (besides itself)
ALLOWED = {
    "engine": set(),
    "harmonics": {"engine"},
    "design": {"engine", "harmonics"},
    "timedomain": {"engine", "harmonics"},
    "io": {"engine", "harmonics", "design", "timedomain"},
    "figures": {"engine", "harmonics", "design", "timedomain", "io"},
    "cli": {"engine", "harmonics", "design", "timedomain", "io", "figures"},
}
# third-party packages that only some parts may import
ONLY_IN = {
    "matplotlib": ("figures",),
    "sympy": ("engine/symbolic.py",),
    "typer": ("cli",),
    "click": ("cli",),
}


def _imports(rel: str, source: str) -> list[tuple[int, str]]:
    """(line, absolute dotted name) of every import in ``source``, the file at
    ``rel`` (a path relative to loopcheck/); relative imports are resolved."""
    package = ["loopcheck"] + rel.split("/")[:-1]
    out = []
    for node in ast.walk(ast.parse(source, rel)):
        if isinstance(node, ast.Import):
            out += [(node.lineno, a.name) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = package[: len(package) - node.level + 1] if node.level else []
            mod = ".".join(base + ([node.module] if node.module else []))
            out.append((node.lineno, mod))
            out += [(node.lineno, f"{mod}.{a.name}") for a in node.names]
    return out


def _layer_of(dotted: str) -> str | None:
    parts = dotted.split(".")
    return parts[1] if parts[0] == "loopcheck" and len(parts) > 1 and parts[1] in ALLOWED else None


def violations(files: dict[str, str]) -> list[str]:
    """Every import in ``files`` (relative path -> source) that breaks the layering."""
    bad = []
    for rel, source in sorted(files.items()):
        layer = rel.split("/")[0] if "/" in rel else None
        for line, mod in _imports(rel, source):
            target = _layer_of(mod)
            if layer and target and target != layer and target not in ALLOWED[layer]:
                bad.append(f"{rel}:{line} ({layer}) imports {mod} ({target})")
            if layer and mod.startswith("loopcheck.api"):
                bad.append(f"{rel}:{line} ({layer}) imports the public API module")
            top = mod.split(".")[0]
            if top in ONLY_IN and not any(rel == w or rel.startswith(w + "/") for w in ONLY_IN[top]):
                bad.append(f"{rel}:{line} imports {top}, allowed only in {', '.join(ONLY_IN[top])}")
    return bad


def _package_files() -> dict[str, str]:
    return {p.relative_to(PACKAGE).as_posix(): p.read_text()
            for p in PACKAGE.rglob("*.py") if "__pycache__" not in p.parts}


def test_every_module_lives_in_a_layer():
    loose = sorted(p.name for p in PACKAGE.glob("*.py")) 
    assert loose == ["__init__.py", "__main__.py", "api.py"], f"modules outside the layer folders: {loose}"
    folders = {p.name for p in PACKAGE.iterdir() if p.is_dir() and p.name != "__pycache__"}
    assert folders == set(ALLOWED)


def test_lower_layers_never_import_higher_ones():
    bad = violations(_package_files())
    assert bad == [], "\n".join(bad)


@pytest.mark.parametrize("layer", sorted(ALLOWED))
def test_the_checker_catches_upward_imports(layer):
    """The checker can fail: an absolute, a relative and a lazy upward import are each caught."""
    higher = [h for h in ALLOWED if h != layer and h not in ALLOWED[layer]]
    if not higher:
        assert layer == "cli"
        return
    h = higher[0]
    cases = {
        f"{layer}/a.py": f"from loopcheck.{h} import thing\n",
        f"{layer}/b.py": f"from ..{h}.module import thing\n",
        f"{layer}/c.py": f"def f():\n    import loopcheck.{h}.module\n",
        f"{layer}/d.py": f"from loopcheck import {h}\n",
    }
    found = violations(cases)
    assert len([b for b in found if f"({h})" in b]) >= 4, found
    assert violations({f"{layer}/ok.py": f"from loopcheck.{layer} import x\n"}) == []


HEAVY = {"numpy", "scipy", "matplotlib", "control", "sympy", "numba"}


def test_command_modules_import_nothing_heavy_at_module_level():
    """`loopcheck --help` stays fast: the cli layer imports numerical
    packages only inside the functions that need them."""
    bad = []
    for rel, source in _package_files().items():
        if not rel.startswith("cli/"):
            continue
        for node in ast.parse(source).body:
            names = ([a.name for a in node.names] if isinstance(node, ast.Import)
                     else [node.module or ""] if isinstance(node, ast.ImportFrom) and not node.level else [])
            bad += [f"{rel}:{node.lineno} {n}" for n in names if n.split(".")[0] in HEAVY]
    assert bad == [], bad


def test_the_checker_catches_a_plot_library_outside_figures():
    assert violations({"design/x.py": "def f():\n    import matplotlib.pyplot as plt\n"})
    assert violations({"engine/x.py": "import sympy\n"})
    assert violations({"engine/symbolic.py": "import sympy\n"}) == []
