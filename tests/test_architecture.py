"""The import structure: no cycles, layers import downwards only, imports at module top.

Every module of ``predictor``, ``alerts`` and ``monitor`` is read with :mod:`ast` (nothing is
imported), so the test sees what the source says, not what happened to be loaded.

Layers, from the bottom (a module may import its own layer or any layer below it):

- ``predictor``: pure tide science; imports neither of the others.
- ``alerts``: rules, mail, reports; may import ``predictor``.
- ``monitor``: may import both. Inside it, rooms are layered too:
  ``errors`` < ``feeds``, ``store``, ``quality``, ``surge`` < ``service`` < ``cli``, ``demo``,
  ``__main__``.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGES = ("predictor", "alerts", "monitor")

#: Imports allowed inside a function: optional dependencies only, each named here with why.
#: (None today: every dependency the library imports is a declared install requirement.)
OPTIONAL_INNER: dict[str, str] = {}

#: Rank of each part; a module may import modules of the same or a lower rank only.
_RANK = {
    "predictor": 0,
    "alerts": 10,
    "monitor.errors": 20,
    "monitor.feeds": 21, "monitor.store": 21, "monitor.quality": 21, "monitor.surge": 21,
    "monitor.service": 30,
    "monitor.cli": 40, "monitor.demo": 40, "monitor.__main__": 40, "monitor": 40,
}


def _rank(module: str) -> int:
    parts = module.split(".")
    for n in range(len(parts), 0, -1):
        key = ".".join(parts[:n])
        if key in _RANK:
            return _RANK[key]
    raise KeyError(f"{module}: no layer assigned in tests/test_architecture.py")


def _modules() -> dict[str, Path]:
    out = {}
    for pkg in PACKAGES:
        for path in sorted((ROOT / pkg).rglob("*.py")):
            rel = path.relative_to(ROOT).with_suffix("")
            parts = list(rel.parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            out[".".join(parts)] = path
    return out


MODULES = _modules()


def _resolve(node: ast.ImportFrom, module: str, is_package: bool) -> str:
    if node.level == 0:
        return node.module or ""
    base = module.split(".") if is_package else module.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _targets(node: ast.AST, module: str, is_package: bool) -> list[str]:
    """Project modules named by one import statement (``from pkg import mod`` names ``pkg.mod``)."""
    if isinstance(node, ast.Import):
        names = [a.name for a in node.names]
    else:
        base = _resolve(node, module, is_package)
        names = [f"{base}.{a.name}" if f"{base}.{a.name}" in MODULES else base for a in node.names]
    return [n for n in names if n.split(".")[0] in PACKAGES]


def _imports(module: str) -> tuple[set[str], list[tuple[int, str]]]:
    """(project modules imported at module level, [(line, text)] of imports inside functions)."""
    path = MODULES[module]
    return _scan(path.read_text(encoding="utf-8"), module, path.name == "__init__.py")


def _scan(source: str, module: str, is_package: bool) -> tuple[set[str], list[tuple[int, str]]]:
    tree = ast.parse(source)
    top: set[str] = set()
    inner: list[tuple[int, str]] = []

    def visit(node: ast.AST, in_function: bool) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.Import, ast.ImportFrom)):
                if in_function:
                    named = [a.name for a in child.names] if isinstance(child, ast.Import) else [child.module or ""]
                    if not any(n.split(".")[0] in OPTIONAL_INNER for n in named):
                        inner.append((child.lineno, ast.unparse(child)))
                else:
                    top.update(t for t in _targets(child, module, is_package) if t in MODULES)
            visit(child, in_function or isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda)))

    visit(tree, False)
    top.discard(module)
    return top, inner


GRAPH = {m: _imports(m)[0] for m in MODULES}


def test_every_module_has_a_layer():
    for module in MODULES:
        _rank(module)


@pytest.mark.parametrize("module", sorted(MODULES))
def test_no_import_inside_a_function(module):
    _, inner = _imports(module)
    assert not inner, f"{module}: imports inside functions (move them to the top): {inner}"


@pytest.mark.parametrize("module", sorted(MODULES))
def test_imports_go_downwards(module):
    upward = sorted(t for t in GRAPH[module] if _rank(t) > _rank(module))
    assert not upward, f"{module} (layer {_rank(module)}) imports higher layers: {upward}"


def test_predictor_imports_neither_alerts_nor_monitor():
    bad = {m: sorted(t for t in ts if not t.startswith("predictor")) for m, ts in GRAPH.items()
           if m.startswith("predictor")}
    assert not any(bad.values()), bad


def test_alerts_never_imports_monitor():
    bad = {m: sorted(t for t in ts if t.startswith("monitor")) for m, ts in GRAPH.items()
           if m.startswith("alerts")}
    assert not any(bad.values()), bad


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle of the graph as a path [a, b, ..., a], or None (iterative DFS)."""
    colour = dict.fromkeys(graph, 0)  # 0 new, 1 on the stack, 2 done
    for start in sorted(graph):
        if colour[start]:
            continue
        stack = [(start, iter(sorted(graph[start])))]
        colour[start] = 1
        while stack:
            node, children = stack[-1]
            for child in children:
                if colour.get(child, 2) == 1:
                    path = [n for n, _ in stack]
                    return path[path.index(child):] + [child]
                if colour.get(child, 2) == 0:
                    colour[child] = 1
                    stack.append((child, iter(sorted(graph[child]))))
                    break
            else:
                colour[node] = 2
                stack.pop()
    return None


def test_no_import_cycles():
    assert _cycle(GRAPH) is None, " -> ".join(_cycle(GRAPH))


def test_the_cycle_finder_finds_a_cycle():
    # The checker itself must be able to fail: a made-up graph with a three-module loop.
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": set()}) == ["a", "b", "c", "a"]
    assert _cycle({"a": {"b"}, "b": set()}) is None


def test_the_scanner_tells_top_imports_from_imports_inside_functions():
    # The scanner itself must be able to fail: a made-up module with one of each.
    source = ("from monitor.store import database\n"
              "def f():\n    if True:\n        from alerts import rules\n    return rules\n")
    top, inner = _scan(source, "monitor.quality.checks", False)
    assert top == {"monitor.store.database"}
    assert inner == [(4, "from alerts import rules")]
