"""The shape of the house: imports run one way, top to bottom, with no cycle and nothing hidden in a
function; the command-line libraries stay in the command line; no module grows past about 450 lines.

The layers are those of DEVELOPERS.md ("Layout"): cli -> app -> report -> {compare, sim} -> store ->
logs -> features -> scenario -> base modules. These tests read the source with :mod:`ast`; they import
nothing, so a cycle cannot hide behind import order.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "gapgauge"
MAX_LINES = 460  # "no module over about 450 lines" (issue 12); a little slack for a docstring

# rank of each first-level part of the package; an import may go to a lower rank, or stay inside the
# same part; compare/ and sim/ share a rank and must not import each other
RANKS = {
    "errors": 0, "units": 0, "trajectory": 0, "records": 0, "results": 0, "progress": 0, "safety": 0,
    "version": 0, "quantities": 0,
    "scenario": 1,
    "features": 2, "observe": 2,
    "logs": 3,
    "store": 4,
    "compare": 5, "sim": 5,
    "report": 6,
    "app": 7,
    "cli": 8,
    "__init__": 9,  # the package's own API map (lazy: names to modules)
}
# a function-level import is allowed only to defer one of these optional extras
OPTIONAL = {"distributed", "dask", "rosbags"}
COMMAND_LINE_LIBRARIES = {"click", "rich"}


def modules() -> dict[str, Path]:
    found = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        found[".".join(parts)] = path
    return found


def part_of(module: str) -> str:
    pieces = module.split(".")
    return "__init__" if len(pieces) == 1 else pieces[1]


def _resolve(module: str, path: Path, node: ast.ImportFrom) -> list[str]:
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    if node.level:
        base = package.split(".")
        base = base[: len(base) - node.level + 1]
        prefix = ".".join(base)
        target = f"{prefix}.{node.module}" if node.module else prefix
    else:
        target = node.module or ""
    names = [f"{target}.{alias.name}" for alias in node.names]
    return [target, *names]


def imports(module: str, path: Path) -> list[tuple[str, bool, int]]:
    """``(imported module or name, at module level, line)`` for every import statement, leaving out
    those under ``if TYPE_CHECKING:`` (never run)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found: list[tuple[str, bool, int]] = []

    def visit(node: ast.AST, top: bool) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.If) and "TYPE_CHECKING" in ast.unparse(child.test):
                for orelse in child.orelse:
                    visit(ast.Module(body=[orelse], type_ignores=[]), top)
                continue
            if isinstance(child, ast.Import):
                found.extend((alias.name, top, child.lineno) for alias in child.names)
            elif isinstance(child, ast.ImportFrom):
                found.extend((name, top, child.lineno) for name in _resolve(module, path, child))
            inner = top and not isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda))
            visit(child, inner)

    visit(tree, True)
    return found


def internal_graph() -> dict[str, set[str]]:
    known = modules()
    graph: dict[str, set[str]] = {name: set() for name in known}
    for name, path in known.items():
        for target, _top, _line in imports(name, path):
            if target in known and target != name:
                graph[name].add(target)
    return graph


def test_every_part_of_the_package_has_a_layer():
    parts = {part_of(name) for name in modules()}
    assert parts <= set(RANKS), f"give these a layer in RANKS (and DEVELOPERS.md): {sorted(parts - set(RANKS))}"


def test_no_function_level_import_except_optional_extras():
    hidden = [
        f"{path.relative_to(PACKAGE.parent)}:{line} imports {target}"
        for name, path in modules().items()
        for target, top, line in imports(name, path)
        if not top and target.split(".")[0] not in OPTIONAL
    ]
    assert hidden == []


def test_imports_run_top_to_bottom():
    wrong = []
    for name, targets in internal_graph().items():
        for target in targets:
            here, there = part_of(name), part_of(target)
            if here == there or there == "__init__" and target == "gapgauge":
                if there == "__init__" and here != "__init__":
                    wrong.append(f"{name} -> {target} (the package root is the API, not a base module)")
                continue
            if RANKS[there] == RANKS[here] == 0:  # base modules may use one another (the cycle test guards them)
                continue
            if RANKS[there] >= RANKS[here]:
                wrong.append(f"{name} ({here}, layer {RANKS[here]}) -> {target} ({there}, layer {RANKS[there]})")
    assert wrong == []


def test_the_import_graph_has_no_cycle():
    graph = internal_graph()
    # a package's __init__ re-exporting its own submodules is not a cycle of design: leave out the
    # edge from a package to its own children
    edges = {m: {t for t in ts if not t.startswith(m + ".")} for m, ts in graph.items()}
    state: dict[str, int] = {}
    stack: list[str] = []
    cycles: list[list[str]] = []

    def dfs(node: str) -> None:
        state[node] = 1
        stack.append(node)
        for nxt in sorted(edges[node]):
            if state.get(nxt) == 1:
                cycles.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                dfs(nxt)
        stack.pop()
        state[node] = 2

    for node in sorted(edges):
        if node not in state:
            dfs(node)
    assert cycles == []


def test_click_and_rich_live_in_the_command_line_only():
    outside = [
        f"{path.relative_to(PACKAGE.parent)}:{line} imports {target}"
        for name, path in modules().items()
        if part_of(name) != "cli"
        for target, _top, line in imports(name, path)
        if target.split(".")[0] in COMMAND_LINE_LIBRARIES
    ]
    assert outside == []


@pytest.mark.parametrize("name", sorted(modules()))
def test_no_module_is_over_about_450_lines(name):
    lines = modules()[name].read_text(encoding="utf-8").count("\n")
    assert lines <= MAX_LINES, f"{name} has {lines} lines; split it along its seams"


def test_the_checker_sees_a_function_level_import(tmp_path):
    # the checker itself must be able to fail: a module with an import inside a function is caught
    path = tmp_path / "gapgauge" / "sample.py"
    path.parent.mkdir()
    path.write_text("import os\n\ndef f():\n    from .store import Store\n    return Store\n", encoding="utf-8")
    found = imports("gapgauge.sample", path)
    assert ("os", True, 1) in found
    assert ("gapgauge.store", False, 4) in found
