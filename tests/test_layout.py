"""The package's shape: no import cycles, imports of our own modules at the top, modules of one idea.

Read from the source files themselves (every module of every subpackage), so a new module is
checked the day it is added.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from tests.common import ROOT

PACKAGE = ROOT / "harness"
MAX_LINES = 360  # "a module that passes ~350 lines is asking to be split" (the house style)
# Imports of our own modules inside functions, each with its reason.
LATE_IMPORTS = {
    ("cli", "harness"): "the verbs (and torch behind them) load only after the arguments parse",
    ("commands", "*"): "each verb imports what it uses, so `--help` and typos answer at once",
    ("config.checks", "harness.metrics.scores"): "keeps scikit-learn out of config loading",
    ("config.checks", "harness.methods.templates"): "methods import the config package",
    ("experiments.budget", "harness.experiments.forecast"): "forecasting loads checkpoints to measure this machine's "
                                                            "speed: only when a budget is given",
    ("experiments.sweep", "harness.experiments.cluster"): "the cluster machinery (and Ray) load only when asked for",
    ("experiments.cluster", "harness.experiments.cluster_task"): "what a Ray task runs loads in the worker",
    ("experiments.cluster_task", "*"): "a Ray worker imports the task module first; the run machinery loads "
                                       "inside the task",
}


def _modules() -> dict[str, Path]:
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE).with_suffix("").parts
        name = ".".join(p for p in parts if p != "__init__")
        out[name or "__init__"] = path
    return out


def _targets(node: ast.Import | ast.ImportFrom, modules: dict[str, Path]) -> list[str]:
    """The package modules an import statement loads (a `from pkg import name` may name a module)."""
    found = []
    names = [a.name for a in node.names] if isinstance(node, ast.Import) else [node.module or ""]
    for name in names:
        if name == "harness" or name.startswith("harness."):
            short = name.removeprefix("harness").lstrip(".")
            if isinstance(node, ast.ImportFrom):
                for alias in node.names:
                    sub = f"{short}.{alias.name}".lstrip(".")
                    if sub in modules:
                        found.append(sub)
            if short in modules:
                found.append(short)
    return found


def _graph() -> tuple[dict[str, set[str]], list[tuple[str, str, int]]]:
    modules = _modules()
    edges: dict[str, set[str]] = {m: set() for m in modules}
    late: list[tuple[str, str, int]] = []
    for name, path in modules.items():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in tree.body:
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                edges[name].update(t for t in _targets(node, modules) if t != name)
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                for inner in ast.walk(node):
                    if isinstance(inner, (ast.Import, ast.ImportFrom)):
                        mod = inner.module if isinstance(inner, ast.ImportFrom) else inner.names[0].name
                        if mod and (mod == "harness" or mod.startswith("harness.")):
                            late.append((name, mod, inner.lineno))
    return edges, late


def _find_cycle(edges: dict[str, set[str]]) -> list[str] | None:
    """One import cycle of the graph (as a path that returns to its start), or None."""
    state: dict[str, int] = {}  # 1: on the current path, 2: done
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for nxt in sorted(edges.get(node, ())):
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state and (found := visit(nxt)):
                return found
        path.pop()
        state[node] = 2
        return None

    for node in sorted(edges):
        if node not in state and (found := visit(node)):
            return found
    return None


def test_the_cycle_finder_finds_cycles_and_only_cycles() -> None:
    assert _find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert _find_cycle({"a": {"b", "c"}, "b": {"c"}, "c": set()}) is None


def test_the_import_graph_of_the_package_has_no_cycle() -> None:
    edges, _ = _graph()
    assert {"config.load", "methods.head", "runs.run", "experiments.sweep"} <= set(edges)  # subpackages are read
    assert "methods.batches" in edges["methods.head"]  # `from harness.methods.batches import ...` is an edge
    cycle = _find_cycle(edges)
    assert cycle is None, "import cycle: " + " -> ".join(cycle or [])


def test_own_modules_are_imported_at_the_top_except_where_a_reason_is_listed() -> None:
    _, late = _graph()
    unexplained = [f"{name} line {line}: {mod}" for name, mod, line in late
                   if (name, mod) not in LATE_IMPORTS and (name, "*") not in LATE_IMPORTS]
    assert not unexplained, "import these at the top, or list the reason in LATE_IMPORTS:\n" + "\n".join(unexplained)


@pytest.mark.parametrize("name", sorted(_modules()))
def test_every_module_stays_small(name: str) -> None:
    lines = _modules()[name].read_text(encoding="utf-8").count("\n")
    assert lines <= MAX_LINES, f"harness/{name} has {lines} lines; split it by idea"


def test_every_subpackage_says_what_it_holds() -> None:
    for folder in sorted(p for p in PACKAGE.iterdir() if p.is_dir() and p.name != "__pycache__"):
        init = folder / "__init__.py"
        assert init.is_file(), folder
        assert ast.get_docstring(ast.parse(init.read_text(encoding="utf-8"))), f"{init} has no docstring"
