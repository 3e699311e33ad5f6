"""The package's layout: no import circles and no private names imported across modules.

Every module under python/treewise is parsed with ``ast`` (nothing is imported). An edge A -> B
is any ``import`` of B in A, at the top or inside a function; imports under
``if TYPE_CHECKING:`` are for annotations only, never run, and are left out. A module that
imports from a package imports the package's ``__init__`` unless the name is a submodule.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "python" / "treewise"


def module_name(path: Path, root: Path = PACKAGE) -> str:
    parts = ["treewise", *path.relative_to(root).with_suffix("").parts]
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def modules(root: Path = PACKAGE) -> dict[str, Path]:
    """Every module's source; an extension module is known by its stub (``_core.pyi``)."""
    found = {module_name(p, root): p for p in sorted(root.rglob("*.pyi"))}
    found.update({module_name(p, root): p for p in sorted(root.rglob("*.py"))})
    return found


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _imports(tree: ast.AST) -> list[ast.Import | ast.ImportFrom]:
    """Every import statement, at any depth, except those under ``if TYPE_CHECKING:``."""
    found: list[ast.Import | ast.ImportFrom] = []

    def walk(node: ast.AST) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.If) and _is_type_checking(child.test):
                for other in child.orelse:
                    walk(other)
                continue
            if isinstance(child, (ast.Import, ast.ImportFrom)):
                found.append(child)
            walk(child)

    walk(tree)
    return found


def _absolute(node: ast.ImportFrom, name: str, is_package: bool) -> str:
    """The absolute module of a ``from ... import`` (relative imports resolved)."""
    if not node.level:
        return node.module or ""
    base = name.split(".") if is_package else name.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def import_graph(
    root: Path = PACKAGE,
) -> tuple[dict[str, set[str]], list[str]]:
    """The import edges between treewise modules, and each private name imported across them."""
    known = modules(root)
    graph: dict[str, set[str]] = {name: set() for name in known}
    private: list[str] = []
    for name, path in known.items():
        if path.suffix != ".py":
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        for node in _imports(tree):
            if isinstance(node, ast.Import):
                for alias in node.names:
                    if alias.name in known:
                        graph[name].add(alias.name)
                continue
            source = _absolute(node, name, path.name == "__init__.py")
            for alias in node.names:
                submodule = f"{source}.{alias.name}"
                if submodule in known:
                    graph[name].add(submodule)
                    continue
                if source in known:
                    graph[name].add(source)
                if source.split(".")[0] == "treewise" and alias.name.startswith("_"):
                    # Dunders (__version__) are public by convention.
                    if not (alias.name.startswith("__") and alias.name.endswith("__")):
                        private.append(f"{name}: from {source} import {alias.name}")
        graph[name].discard(name)
    return graph, private


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Each strongly connected component with more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(node: str) -> None:
        index[node] = low[node] = len(index)
        stack.append(node)
        on_stack.add(node)
        for other in sorted(graph[node]):
            if other not in index:
                visit(other)
                low[node] = min(low[node], low[other])
            elif other in on_stack:
                low[node] = min(low[node], index[other])
        if low[node] == index[node]:
            component = []
            while True:
                member = stack.pop()
                on_stack.discard(member)
                component.append(member)
                if member == node:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for node in sorted(graph):
        if node not in index:
            visit(node)
    return found


def test_the_package_has_no_import_circles() -> None:
    graph, _ = import_graph()
    assert cycles(graph) == []


def test_no_module_imports_a_private_name_of_another() -> None:
    _, private = import_graph()
    assert private == []


# -- the checks themselves catch what they are for --------------------------------------------


def _write(root: Path, files: dict[str, str]) -> Path:
    package = root / "treewise"
    for relative, text in files.items():
        path = package / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    return package


def test_a_circle_through_a_function_level_import_is_found(tmp_path: Path) -> None:
    package = _write(
        tmp_path,
        {
            "__init__.py": "",
            "a.py": "from treewise import b\n",
            "b.py": "def f():\n    from treewise.a import g\n",
            "c.py": (
                "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from treewise import a\n"
            ),
            "views/__init__.py": "",
            "views/d.py": "from . import e\n",
            "views/e.py": "from .d import x\n",
        },
    )
    graph, _ = import_graph(package)
    # c imports a for annotations only; the other two pairs import each other.
    assert cycles(graph) == [["treewise.a", "treewise.b"], ["treewise.views.d", "treewise.views.e"]]


@pytest.mark.parametrize(
    ("line", "expected"),
    [
        ("from treewise.a import _hidden\n", ["treewise.b: from treewise.a import _hidden"]),
        ("def f():\n    from .a import _hidden\n", ["treewise.b: from treewise.a import _hidden"]),
        ("from treewise import __version__\n", []),
        ("from treewise import _core\n", []),
        ("from treewise.a import visible\n", []),
    ],
)
def test_a_private_import_is_found(tmp_path: Path, line: str, expected: list[str]) -> None:
    # _core is the extension module (known by its stub): a module, not a name in another one.
    package = _write(tmp_path, {"__init__.py": "", "a.py": "", "_core.pyi": "", "b.py": line})
    _, private = import_graph(package)
    assert private == expected
