"""The shape of kernel_side/: no import cycles, no private names across rooms.

The layer order itself is an import-linter contract (pyproject.toml, run by `make test`);
these checks cover what a layers contract cannot see: cycles inside one room, and a
room reaching into another room's private helpers.
"""
from __future__ import annotations

import ast
from pathlib import Path

import grimp
import pytest

KERNEL = Path(__file__).resolve().parents[1] / "kernel_side"


def _strongly_connected(graph: dict[str, set[str]]) -> list[list[str]]:
    """Tarjan's algorithm (Tarjan 1972, SIAM J. Comput. 1:146): components of mutual reachability."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(node: str) -> None:
        index[node] = low[node] = len(index)
        stack.append(node)
        on_stack.add(node)
        for other in graph.get(node, ()):
            if other not in index:
                visit(other)
                low[node] = min(low[node], low[other])
            elif other in on_stack:
                low[node] = min(low[node], index[other])
        if low[node] == index[node]:
            component = []
            while True:
                top = stack.pop()
                on_stack.discard(top)
                component.append(top)
                if top == node:
                    break
            found.append(component)

    for node in sorted(graph):
        if node not in index:
            visit(node)
    return found


def test_tarjan_finds_a_planted_cycle():
    # the checker itself must be able to fail
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}
    cycles = [sorted(c) for c in _strongly_connected(graph) if len(c) > 1]
    assert cycles == [["a", "b", "c"]]


def test_kernel_side_has_no_import_cycles():
    graph = grimp.build_graph("jostle")
    # package __init__ files re-export their room; an edge into a package is an edge into its re-exports
    modules = {m for m in graph.modules if m.startswith("jostle.") and not _is_package(m)}
    edges = {m: {o for o in graph.find_modules_directly_imported_by(m) if o in modules} for m in modules}
    cycles = [sorted(c) for c in _strongly_connected(edges) if len(c) > 1]
    assert cycles == [], f"import cycles: {cycles}"


def _is_package(module: str) -> bool:
    return KERNEL.joinpath(*module.split(".")[1:], "__init__.py").exists()


def _room(path: Path) -> str:
    parts = path.relative_to(KERNEL).with_suffix("").parts
    return parts[0] if len(parts) > 1 else parts[0]


@pytest.mark.parametrize("path", sorted(KERNEL.rglob("*.py")), ids=lambda p: str(p.relative_to(KERNEL)))
def test_no_private_name_is_imported_across_rooms(path):
    tree = ast.parse(path.read_text())
    own = _room(path)
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("jostle."):
            room = node.module.split(".")[1]
            if room == own:
                continue
            private = [a.name for a in node.names if a.name.startswith("_") and a.name != "__version__"]
            assert not private, f"{path.name} imports private {private} from {node.module}"
            assert not any(part.startswith("_") for part in node.module.split(".")[1:]), (
                f"{path.name} imports the private module {node.module}")


def test_every_package_is_listed_for_the_wheel():
    # The wheel ships only the packages pyproject.toml lists (setuptools with package-dir remaps
    # cannot discover them); a package left out imports in an editable install and fails in a wheel.
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib

    root = KERNEL.parent
    listed = set(tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    found = {"jostle." + ".".join(p.parent.relative_to(KERNEL).parts) if p.parent != KERNEL else "jostle"
             for p in KERNEL.rglob("__init__.py") if "__pycache__" not in p.parts}
    found |= {"jostle.widgets." + ".".join(p.parent.relative_to(root / "widgets").parts)
              for p in (root / "widgets").rglob("__init__.py") if p.parent != root / "widgets"}
    assert found - listed == set(), f"packages missing from pyproject.toml: {sorted(found - listed)}"
