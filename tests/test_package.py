"""Package structure: imports flow one way, and the core needs no Lightning."""

from __future__ import annotations

import ast
from pathlib import Path

import rvqlayer

PACKAGE = Path(rvqlayer.__file__).parent


def _internal_imports(path: Path) -> set[str]:
    """Modules of the package that ``path`` imports at load time (``TYPE_CHECKING`` blocks included)."""
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.level == 1:
            if node.module:
                found.add(node.module.split(".")[0])
            else:
                found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and (node.module or "").startswith("rvqlayer."):
            found.add(node.module.split(".")[1])
    return found


def test_no_import_cycle_inside_the_package():
    modules = {p.stem: p for p in PACKAGE.glob("*.py")}
    graph = {name: _internal_imports(path) & set(modules) for name, path in modules.items()}
    graph["__init__"] = set()  # the package face imports everything by design
    state: dict[str, int] = {}

    def visit(name: str, trail: list[str]) -> None:
        state[name] = 1
        for dep in sorted(graph[name]):
            if state.get(dep) == 1:
                raise AssertionError("import cycle: " + " -> ".join(trail + [name, dep]))
            if dep not in state:
                visit(dep, trail + [name])
        state[name] = 2

    for name in sorted(graph):
        if name not in state:
            visit(name, [])
