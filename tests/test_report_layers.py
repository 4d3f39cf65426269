"""Layering: the import graph between roofgate's packages has no cycle, reporters sit above
the policy and never the other way round, and the vocabulary (``gate.units``,
``gate.metrics``) sits below both.

Read from the source with ``ast`` (imports inside functions count too), so a lazy
import cannot hide a cycle.
"""

from __future__ import annotations

import ast
from pathlib import Path

import gate

ROOT = Path(gate.__file__).parent


def _package_of(module: str) -> str:
    """'gate.report.markdown' -> 'gate.report'; 'gate.records' -> 'gate.records'."""
    parts = module.split(".")
    if len(parts) >= 2 and (ROOT / parts[1]).is_dir():
        return ".".join(parts[:2])
    return module


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("gate"):
            found.add(node.module)
            found.update(f"{node.module}.{alias.name}" for alias in node.names
                         if (ROOT.parent / node.module.replace(".", "/") / alias.name).exists()
                         or (ROOT.parent / f"{node.module.replace('.', '/')}/{alias.name}.py")
                         .exists())
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("gate"))
    return found


def package_graph() -> dict[str, set[str]]:
    """Package (or top-level module) -> the packages it imports, itself excluded."""
    graph: dict[str, set[str]] = {}
    for path in ROOT.rglob("*.py"):
        source = _package_of(_module_name(path))
        targets = {_package_of(m) for m in _imports(path)} - {source, "gate"}
        graph.setdefault(source, set()).update(targets)
    return graph


def _reaches(graph: dict[str, set[str]], start: str, goal: str) -> bool:
    seen, todo = set(), [start]
    while todo:
        node = todo.pop()
        if node == goal:
            return True
        if node not in seen:
            seen.add(node)
            todo.extend(graph.get(node, ()))
    return False


def test_no_import_cycle_between_packages() -> None:
    graph = package_graph()
    cycles = {f"{a} <-> {b}" for a in graph for b in graph[a] if a < b and _reaches(graph, b, a)}
    assert cycles == set(), sorted(cycles)


def test_loading_a_model_never_reaches_the_cost_functions() -> None:
    """The graph comes before its costs: gate.model (the loader, the contrib ops' shape rules)
    imports nothing of gate.ops, which builds on gate.model's graph types."""
    graph = package_graph()
    assert not _reaches(graph, "gate.model", "gate.ops")
    assert "gate.model" in graph["gate.ops"]


def test_policy_does_not_import_reports() -> None:
    graph = package_graph()
    assert not _reaches(graph, "gate.policy", "gate.report")


def test_the_vocabulary_sits_below_policy_and_reports() -> None:
    graph = package_graph()
    assert graph.get("gate.units", set()) == set()
    assert graph.get("gate.metrics", set()) <= {"gate.units"}
    for user in ("gate.policy", "gate.report"):
        assert "gate.metrics" in graph[user] or "gate.units" in graph[user]


def test_the_graph_sees_a_planted_cycle() -> None:
    """Negative control: the cycle finder reports a cycle when one exists."""
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}}
    assert _reaches(graph, "c", "a") and _reaches(graph, "a", "c")
