"""The detector's modules import each other without a cycle, and every one of them imports cleanly."""

from __future__ import annotations

import ast
import importlib
from pathlib import Path

DETECTOR = Path(__file__).resolve().parent.parent / "detector"
PACKAGE = "leadline.detector"


def module_name(path: Path) -> str:
    parts = path.relative_to(DETECTOR).with_suffix("").parts
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join((PACKAGE,) + parts)


def detector_imports(path: Path) -> set[str]:
    """Every detector module that ``path`` imports, at any depth of the file (function bodies included)."""
    name = module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                stem = ".".join(base + ([node.module] if node.module else []))
            else:
                stem = node.module or ""
            targets = [stem] + [f"{stem}.{alias.name}" for alias in node.names]
        else:
            continue
        # a package is always imported before its own modules, so naming an
        # ancestor package (``from . import registry``) is no dependency on it
        found.update(t for t in targets if t.startswith(PACKAGE) and not name.startswith(t + "."))
    return found


def import_graph() -> dict[str, set[str]]:
    modules = {module_name(p): p for p in DETECTOR.rglob("*.py")}
    return {name: {t for t in detector_imports(path) if t in modules and t != name}
            for name, path in modules.items()}


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """A cycle in ``graph`` by depth-first search (white/grey/black colouring), or None."""
    colour = dict.fromkeys(graph, 0)
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        colour[node] = 1
        stack.append(node)
        for nxt in sorted(graph[node]):
            if colour[nxt] == 1:
                return stack[stack.index(nxt):] + [nxt]
            if colour[nxt] == 0 and (cycle := visit(nxt)):
                return cycle
        stack.pop()
        colour[node] = 2
        return None

    for node in sorted(graph):
        if colour[node] == 0 and (cycle := visit(node)):
            return cycle
    return None


def test_the_cycle_finder_finds_a_planted_cycle():
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": set()}) is None


def test_detector_modules_have_no_import_cycle():
    graph = import_graph()
    assert f"{PACKAGE}.fitting" in graph and f"{PACKAGE}.order_selection" in graph[f"{PACKAGE}.fitting"]
    assert find_cycle(graph) is None, " -> ".join(find_cycle(graph))


def test_every_detector_module_imports():
    for name in sorted(import_graph()):
        importlib.import_module(name)


def test_fitting_still_offers_fit_and_fitted_model():
    from leadline.detector.fitting import FittedModel, fit

    assert callable(fit) and FittedModel.__name__ == "FittedModel"
