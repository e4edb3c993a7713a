"""The package's architecture as a test: layers whose imports point down, no import cycles, no in-package
imports inside functions, and every registry member offered by the command line.

Layers (DEVELOPERS.md draws them): the ground floor (errors, units, files, version) < data < gp < dynamics
< diagnostics < products < app; ``driftwise/__init__.py`` re-exports the public API and sits on top.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from driftwise.app.cli import build_parser
from driftwise.dynamics.methods import METHODS
from driftwise.gp.kernels import KERNEL_FAMILIES

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "driftwise"
LAYERS = {"": 0, "data": 1, "gp": 2, "dynamics": 3, "diagnostics": 4, "products": 5, "app": 6}
TOP = 7   # driftwise/__init__.py


def module_name(path: Path) -> str:
    """``src/driftwise/gp/field.py`` → ``driftwise.gp.field``; a package's ``__init__`` → the package."""
    parts = ("driftwise",) + path.relative_to(PACKAGE).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def layer_of(module: str, *, is_package: bool = False) -> int:
    """The layer number of a dotted module name inside driftwise."""
    parts = module.split(".")[1:]
    if not parts:
        return TOP
    if parts[0] in LAYERS and (len(parts) > 1 or is_package):
        return LAYERS[parts[0]]
    return LAYERS[""]       # errors, units, files, version


def resolve(module: str, node: ast.ImportFrom | ast.Import, is_package: bool) -> list[str]:
    """The driftwise modules an import statement names (absolute), or [] for third-party imports."""
    if isinstance(node, ast.Import):
        return [a.name for a in node.names if a.name.split(".")[0] == "driftwise"]
    if node.level == 0:
        if not (node.module or "").startswith("driftwise"):
            return []
        base = node.module
    else:
        package = module.split(".") if is_package else module.split(".")[:-1]
        base = ".".join(package[: len(package) - node.level + 1] + ([node.module] if node.module else []))
    known = {module_name(p) for p in PACKAGE.rglob("*.py")}
    targets = [f"{base}.{a.name}" for a in node.names if f"{base}.{a.name}" in known]
    return targets or [base]


def violations(module: str, source: str, *, is_package: bool = False) -> list[str]:
    """Upward imports and in-package imports inside function bodies in one module's ``source``."""
    tree = ast.parse(source)
    own = TOP if module == "driftwise" else layer_of(module, is_package=is_package)
    top_level = {id(node) for node in tree.body}
    problems = []
    for node in ast.walk(tree):
        if not isinstance(node, (ast.Import, ast.ImportFrom)):
            continue
        for target in resolve(module, node, is_package):
            if id(node) not in top_level:
                problems.append(f"{module}:{node.lineno} imports {target} inside a function")
            if target != "driftwise" and layer_of(target) > own:
                problems.append(f"{module}:{node.lineno} imports {target} from a higher layer")
    return problems


def import_graph() -> dict[str, set[str]]:
    graph = {}
    for path in PACKAGE.rglob("*.py"):
        module, is_package = module_name(path), path.name == "__init__.py"
        tree = ast.parse(path.read_text(encoding="utf-8"))
        graph[module] = {t for node in tree.body if isinstance(node, (ast.Import, ast.ImportFrom))
                         for t in resolve(module, node, is_package) if t != module}
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle (a list of modules) by depth-first search, or None (Tarjan 1972 colouring)."""
    colour, stack = {}, []

    def visit(node: str) -> list[str] | None:
        colour[node] = "grey"
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if nxt.startswith("driftwise.") and nxt not in graph:
                continue
            if colour.get(nxt) == "grey":
                return stack[stack.index(nxt):] + [nxt]
            if nxt not in colour and (cycle := visit(nxt)):
                return cycle
        colour[node] = "black"
        stack.pop()
        return None

    for start in sorted(graph):
        if start not in colour and (cycle := visit(start)):
            return cycle
    return None


def test_every_module_imports_only_downward_and_at_module_level():
    problems = []
    for path in sorted(PACKAGE.rglob("*.py")):
        problems += violations(module_name(path), path.read_text(encoding="utf-8"),
                               is_package=path.name == "__init__.py")
    assert problems == []


def test_the_rule_catches_a_planted_upward_import_and_a_lazy_import():
    planted = "from ..gp.field import FlowField\n\ndef f():\n    from .frame import Frame\n    return Frame\n"
    problems = violations("driftwise.data.observations", planted)
    assert problems == ["driftwise.data.observations:1 imports driftwise.gp.field from a higher layer",
                        "driftwise.data.observations:4 imports driftwise.data.frame inside a function"]


def test_the_import_graph_has_no_cycle():
    graph = import_graph()
    assert len(graph) >= 30
    assert find_cycle(graph) is None
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]


def test_no_module_over_600_lines_and_no_function_over_60_lines():
    long_modules, long_functions = [], []
    for path in sorted(PACKAGE.rglob("*.py")):
        text = path.read_text(encoding="utf-8")
        if text.count("\n") > 600:
            long_modules.append(f"{module_name(path)}: {text.count(chr(10))} lines")
        for node in ast.walk(ast.parse(text)):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                length = node.end_lineno - node.lineno + 1
                if length > 60:
                    long_functions.append(f"{module_name(path)}.{node.name}: {length} lines")
    assert long_modules == [] and long_functions == []


def _choices(command: str, option: str) -> list[str]:
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    parser = sub.choices[command]
    return list(next(a for a in parser._actions if option in a.option_strings).choices)


@pytest.mark.parametrize("command", ["fit"])
def test_every_kernel_family_is_a_cli_choice(command):
    assert _choices(command, "--kernel") == list(KERNEL_FAMILIES)


def test_every_method_is_a_cli_choice():
    assert _choices("spread", "--method") == list(METHODS)
