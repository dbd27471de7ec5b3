"""No import circle among the modules of sorbrank.service.

The graph is read from the source with ast: every import statement counts,
including those inside functions (a lazy import still ties the two modules
together, and hides the circle until a request takes that path)."""
from __future__ import annotations

import ast
from pathlib import Path

ROOT = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").exists())
SERVICE = ROOT / "service"
PACKAGE = "sorbrank.service"


def module_name(path: Path) -> str:
    parts = path.relative_to(SERVICE).with_suffix("").parts
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join((PACKAGE, *parts))


def service_import_graph() -> dict[str, set[str]]:
    """module -> the sorbrank.service modules it imports (anywhere in its source)."""
    modules = {module_name(p): p for p in SERVICE.rglob("*.py")}
    graph: dict[str, set[str]] = {name: set() for name in modules}
    for name, path in modules.items():
        package = name if path.name == "__init__.py" else name.rpartition(".")[0]
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            targets: list[str] = []
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                if node.level:
                    base = package.split(".")
                    base = base[:len(base) - (node.level - 1)]
                    origin = ".".join(base + ([node.module] if node.module else []))
                else:
                    origin = node.module or ""
                # "from pkg import mod" imports the submodule when there is one
                targets = [origin] + [f"{origin}.{alias.name}" for alias in node.names]
            graph[name].update(t for t in targets if t in modules and t != name)
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import circle as a path that ends where it starts; None without one."""
    state: dict[str, int] = {}   # 1: on the current path, 2: finished
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state and (found := visit(nxt)):
                return found
        path.pop()
        state[node] = 2
        return None

    for start in sorted(graph):
        if start not in state and (found := visit(start)):
            return found
    return None


def test_the_cycle_finder_finds_a_circle_and_accepts_a_tree():
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b", "c"}, "b": {"c"}, "c": set()}) is None


def test_the_graph_sees_relative_lazy_and_absolute_imports():
    graph = service_import_graph()
    assert f"{PACKAGE}.problems" in graph[f"{PACKAGE}.app"]            # from . import problems
    assert f"{PACKAGE}.web.pages" in graph[f"{PACKAGE}.app"]           # lazy, from .web import pages
    assert f"{PACKAGE}.problems" in graph[f"{PACKAGE}.api.plots"]      # from ..problems import


def test_no_import_circle_in_service():
    cycle = find_cycle(service_import_graph())
    assert cycle is None, "import circle: " + " -> ".join(cycle)


def test_problems_imports_no_other_service_module():
    # the error documents sit below every blueprint; pages hand their HTML in
    assert service_import_graph()[f"{PACKAGE}.problems"] == set()
