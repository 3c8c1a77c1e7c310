"""The core's module graph: every module imports, none imports grpc or protobuf, no cycles.

Imports are read from the source with ``ast``: module-level and function-level
imports count alike (a function-level import is still a dependency; only the
``if TYPE_CHECKING:`` blocks, which never run, are left out). ``from pkg import
name`` depends on ``pkg.name`` when that is a module, else on ``pkg``.
"""

from __future__ import annotations

import ast
import importlib
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CORE = ROOT / "repair"


def _modules() -> dict[str, Path]:
    out = {}
    for path in sorted(CORE.rglob("*.py")):
        parts = ["flipfix", "repair", *path.relative_to(CORE).with_suffix("").parts]
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = path
    return out


def _is_type_checking(node: ast.AST) -> bool:
    test = getattr(node, "test", None)
    return isinstance(node, ast.If) and (
        (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING")
        or (isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"))


def _imports(tree: ast.AST, modules: set) -> set:
    """Modules of ``modules`` that ``tree`` imports (outside ``if TYPE_CHECKING:``)."""
    found: set = set()

    def visit(node: ast.AST) -> None:
        if _is_type_checking(node):
            return
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name in modules)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            for a in node.names:
                sub = f"{node.module}.{a.name}"
                found.add(sub if sub in modules else node.module)
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(tree)
    return found & modules


def _graph() -> dict[str, set]:
    mods = _modules()
    return {name: _imports(ast.parse(path.read_text(encoding="utf-8")), set(mods)) - {name}
            for name, path in mods.items()}


def _cycles(graph: dict[str, set]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan), and self-loops."""
    index: dict = {}
    low: dict = {}
    stack: list = []
    on_stack: set = set()
    out: list = []

    def strongconnect(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                strongconnect(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1 or v in graph[v]:
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            strongconnect(v)
    return out


def test_the_core_has_no_import_cycles():
    graph = _graph()
    assert len(graph) > 40 and sum(len(e) for e in graph.values()) > 100  # the graph was read
    assert _cycles(graph) == []


def test_the_cycle_finder_finds_a_cycle():
    """The check above can fail: a two-module loop and a longer one are both reported."""
    graph = {"a": {"b"}, "b": {"a"}, "c": {"d"}, "d": {"e"}, "e": {"c"}, "f": {"a"}}
    assert _cycles(graph) == [["a", "b"], ["c", "d", "e"]]


def test_function_level_imports_count():
    tree = ast.parse("def f():\n    from x.y import z\nif TYPE_CHECKING:\n    import x.w\n")
    assert _imports(tree, {"x.y", "x.y.z", "x.w"}) == {"x.y.z"}


def test_every_core_module_imports():
    for name in _modules():
        importlib.import_module(name)


def test_the_core_never_imports_grpc_or_protobuf():
    names = sorted(_modules())
    code = ("import importlib, sys\n"
            f"for name in {names!r}:\n"
            "    importlib.import_module(name)\n"
            "bad = [m for m in sys.modules if m.split('.')[0] in ('grpc', 'grpc_tools')\n"
            "       or m.startswith('google.protobuf')]\n"
            "assert not bad, bad\n")
    subprocess.run([sys.executable, "-c", code], check=True, cwd=ROOT / "tests")


def test_every_package_folder_is_installed():
    """pyproject.toml lists every package folder of repair/ and service/ (else a non-editable
    install leaves it out)."""
    import tomllib

    listed = set(tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    found = set()
    for top, name in (("repair", "flipfix.repair"), ("service", "flipfix.service")):
        for init in (ROOT / top).rglob("__init__.py"):
            found.add(".".join([name, *init.parent.relative_to(ROOT / top).parts]))
    assert found == listed
