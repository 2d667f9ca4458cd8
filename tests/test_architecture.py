"""The package's shape: no import cycles, data flowing one way, training free of the reporting stack."""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "fcnkit"


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _type_checking_only(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _imports(tree: ast.AST, modules: set[str], here: str) -> set[str]:
    """The fcnkit modules ``tree`` imports, at any depth (functions included: a late import is still a
    dependency), except under ``if TYPE_CHECKING:``. Importing a.b.c also runs the packages a and a.b, except
    the packages that contain ``here`` (already running when ``here`` is imported)."""
    found: set[str] = set()
    own = {".".join(here.split(".")[:i]) for i in range(1, here.count(".") + 1)}

    def add(name: str) -> None:
        parts = name.split(".")
        for i in range(1, len(parts) + 1):
            prefix = ".".join(parts[:i])
            if prefix in modules and prefix not in own:
                found.add(prefix)

    def visit(node: ast.AST) -> None:
        if isinstance(node, ast.If) and _type_checking_only(node):
            for child in node.orelse:
                visit(child)
            return
        if isinstance(node, ast.Import):
            for alias in node.names:
                add(alias.name)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            add(node.module)
            for alias in node.names:  # `from fcnkit.data import raster` imports the submodule raster
                add(f"{node.module}.{alias.name}")
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(tree)
    found.discard(here)
    return found


def import_graph() -> dict[str, set[str]]:
    files = {_module_name(p): p for p in PACKAGE.rglob("*.py")}
    modules = set(files)
    return {name: _imports(ast.parse(path.read_text(encoding="utf-8")), modules, name)
            for name, path in files.items()}


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components of more than one module, or a module importing itself (Tarjan 1972)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    found: list[list[str]] = []

    def strong(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                strong(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                found.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            strong(v)
    return found


def test_the_cycle_finder_finds_cycles() -> None:
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": set()}) == []


def test_the_package_has_no_import_cycles() -> None:
    graph = import_graph()
    assert {"fcnkit.model", "fcnkit.inference.scan", "fcnkit.train"} <= set(graph)
    assert cycles(graph) == []


def _reaches(graph: dict[str, set[str]], start: str) -> set[str]:
    seen, todo = set(), [start]
    while todo:
        for m in graph[todo.pop()]:
            if m not in seen:
                seen.add(m)
                todo.append(m)
    return seen


def test_data_flows_one_way() -> None:
    """Pure arithmetic imports nothing of fcnkit's; nets and the model file know nothing of training or
    inference; training never reaches evaluation's reporting stack; nothing below the CLI imports it."""
    graph = import_graph()
    for pure in ("fcnkit.geometry", "fcnkit.windows", "fcnkit.metrics"):
        assert graph[pure] <= {"fcnkit", "fcnkit.errors"}, pure
    for low in ("fcnkit.nets", "fcnkit.modelfile", "fcnkit.convert", "fcnkit.config"):
        reach = _reaches(graph, low)
        assert not reach & {"fcnkit.train", "fcnkit.model", "fcnkit.inference.scan", "fcnkit.evaluate"}, low
    assert not _reaches(graph, "fcnkit.train") & {"fcnkit.evaluate", "fcnkit.report", "fcnkit.model", "matplotlib"}
    assert all("fcnkit.cli" not in deps for name, deps in graph.items() if name != "fcnkit.__main__")


def test_training_does_not_load_the_reporting_stack() -> None:
    """A process that trains never imports matplotlib (the report's) or evaluation."""
    code = ("import sys, fcnkit.train, fcnkit.model; "
            "print(sorted(m for m in ('matplotlib', 'fcnkit.report', 'fcnkit.evaluate') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"
