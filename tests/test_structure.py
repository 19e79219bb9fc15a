"""The shape of the code base: imports flow one way through the stages of a cycle, and modules and
functions stay small enough to read in one go."""

from __future__ import annotations

import ast
from pathlib import Path

PIPELINE = Path(__file__).resolve().parents[1] / "pipeline"

# Each group of modules and the groups it may import from (besides itself). The cycle reads
# top-down: inputs -> case-mix -> shrinkage -> results -> site; the pages see results, never the
# fitting code.
BASE = {"pipeline", "errors", "progress", "formulas", "families", "external", "cache"}
GROUPS = {
    "base": set(),
    "config": {"base"},
    "inputs": {"base", "config"},
    "casemix": {"base", "config"},
    "shrinkage": {"base", "config"},
    "results": {"base", "config", "inputs", "casemix", "shrinkage"},
    "fitting": {"base", "config", "inputs", "casemix", "shrinkage", "results"},
    "website": {"base", "config", "results"},
    "top": {"base", "config", "inputs", "casemix", "shrinkage", "results", "fitting", "website"},
}
TOP = {"cycle", "cli", "demo", "invented", "staging"}
FITTING = {"fitting", "fit_steps"}
RESULTS = {"results", "disclosure", "history", "downloads", "grouping"}
MODULE_LINES, FUNCTION_LINES = 400, 60
# Imports inside a function, each for its import cost, never to dodge a loop (test_no_import_cycles
# holds with them at the top).
LAZY = {
    "cli": "the command line answers --help and reports bad configs without loading the fitting "
    "libraries (about 2.5 s)",
    "shrinkage.model": "numba, which unit curves need, is loaded only by a fit that uses them",
}


def _modules() -> dict[str, Path]:
    out = {}
    for path in sorted(PIPELINE.rglob("*.py")):
        parts = path.relative_to(PIPELINE).with_suffix("").parts
        name = ".".join(p for p in parts if p != "__init__")
        out[name or "pipeline"] = path
    return out


def _group(module: str) -> str:
    first = module.split(".")[0]
    if first in BASE:
        return "base"
    if first in RESULTS:
        return "results"
    if first in TOP:
        return "top"
    if first in FITTING:
        return "fitting"
    return first


def _imports(path: Path) -> list[tuple[str, int, bool]]:
    """(imported pipeline module, line, inside a function) for every import of fairgauge code."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    inner = {
        id(node)
        for f in ast.walk(tree)
        if isinstance(f, ast.FunctionDef | ast.AsyncFunctionDef)
        for node in ast.walk(f)
    }
    out = []
    for node in ast.walk(tree):
        names = []
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            if node.module == "pipeline" or node.module.startswith("pipeline."):
                base = node.module.removeprefix("pipeline").lstrip(".")
                names = [f"{base}.{a.name}".lstrip(".") for a in node.names]
                names = [n if _is_module(n) else base or "pipeline" for n in names]
        elif isinstance(node, ast.ImportFrom) and node.level:
            names = ["(relative import)"]
        elif isinstance(node, ast.Import):
            names = [a.name.removeprefix("pipeline.") for a in node.names]
            names = [n for n in names if _is_module(n)]
        out += [(n, node.lineno, id(node) in inner) for n in names]
    return out


def _is_module(name: str) -> bool:
    return name in _modules()


def test_imports_flow_one_way():
    wrong = []
    for module, path in _modules().items():
        mine = _group(module)
        for imported, line, in_function in _imports(path):
            where = f"{path.relative_to(PIPELINE.parent)}:{line}"
            if imported == "(relative import)":
                wrong.append(f"{where}: relative import (use the full pipeline.… name)")
                continue
            theirs = _group(imported)
            if theirs != mine and theirs not in GROUPS[mine]:
                wrong.append(f"{where}: {mine} module {module} imports {theirs} module {imported}")
            if in_function and module not in LAZY:
                wrong.append(f"{where}: {module} imports {imported} inside a function")
    assert not wrong, "\n".join(wrong)


def test_no_import_cycles():
    graph = {
        m: {i for i, _, _ in _imports(p) if i in _modules() and i != m}
        for m, p in _modules().items()
    }
    done: set[str] = set()

    def visit(node: str, trail: list[str]) -> None:
        if node in trail:
            raise AssertionError("import cycle: " + " -> ".join([*trail, node]))
        if node in done:
            return
        for nxt in graph[node]:
            visit(nxt, [*trail, node])
        done.add(node)

    for m in graph:
        visit(m, [])


def _function_lengths() -> list[tuple[int, str]]:
    out = []
    for module, path in _modules().items():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
                out.append((node.end_lineno - node.lineno + 1, f"{module}.{node.name}"))
    return out


def test_modules_and_functions_are_small():
    long_modules = [
        f"{m}: {n} lines"
        for m, p in _modules().items()
        if (n := len(p.read_text(encoding="utf-8").splitlines())) > MODULE_LINES
    ]
    long_functions = [f"{name}: {n} lines" for n, name in _function_lengths() if n > FUNCTION_LINES]
    assert not long_modules, f"modules over {MODULE_LINES} lines: {long_modules}"
    assert not long_functions, f"functions over {FUNCTION_LINES} lines: {long_functions}"
