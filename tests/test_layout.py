"""The shape of the package: the design library stands alone, no module imports
itself back through others, and no module grows past what one reader can hold.

The import graph is read from the source with ``ast`` (module-level imports
only: an import inside a function runs when called, and one under
``if TYPE_CHECKING:`` never runs), so the check needs no import of streamq.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
PACKAGE = REPO / "streamq"
#: Most lines a module of streamq may have (common practice: a module a
#: newcomer can read in one sitting).
MAX_MODULE_LINES = 600


def _modules() -> dict[str, Path]:
    """Dotted name -> file, for every module of streamq (packages by their
    ``__init__``)."""
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = list(path.relative_to(REPO).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        out[".".join(parts)] = path
    return out


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or \
        (isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _top_level_imports(tree: ast.Module):
    """Import statements that run when the module is imported: those in the
    module body and in its top-level ``if``/``try``/``with`` blocks."""
    todo = list(tree.body)
    while todo:
        node = todo.pop()
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            yield node
        elif isinstance(node, ast.If):
            if not _is_type_checking(node.test):
                todo += node.body
            todo += node.orelse
        elif isinstance(node, ast.Try):
            todo += node.body + node.orelse + node.finalbody
            for handler in node.handlers:
                todo += handler.body
        elif isinstance(node, ast.With):
            todo += node.body


def import_graph() -> dict[str, set[str]]:
    """Module -> the streamq modules it imports at module level."""
    modules = _modules()
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        package = name if path.name == "__init__.py" else name.rpartition(".")[0]
        deps: set[str] = set()
        for node in _top_level_imports(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            else:
                base = node.module or ""
                if node.level:
                    anchor = package.split(".")
                    anchor = anchor[:len(anchor) - (node.level - 1)]
                    base = ".".join(anchor + ([base] if base else []))
                # ``from pkg import sub`` imports the submodule, else the package
                targets = [f"{base}.{alias.name}" if f"{base}.{alias.name}" in modules else base
                           for alias in node.names]
            deps |= {t for t in targets if t in modules and t != name}
        graph[name] = deps
    return graph


def import_cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """The strongly connected components of more than one module (Tarjan)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []
    counter = [0]

    def visit(v: str) -> None:
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph.get(v, ())):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    sys.setrecursionlimit(max(sys.getrecursionlimit(), 10_000))
    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def test_cycle_finder_finds_a_planted_cycle():
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}, "e": set()}
    assert import_cycles(graph) == [["a", "b", "c"]]


def test_no_import_cycles_among_streamq_modules():
    cycles = import_cycles(import_graph())
    assert cycles == [], "modules that import each other: " + "; ".join(
        " <-> ".join(c) for c in cycles)


def test_design_library_imports_nothing_from_engine_or_nodes():
    """``streamq.design`` (every module of it) loads and designs with neither
    ``streamq.engine`` nor ``streamq.nodes`` imported, in a fresh interpreter."""
    code = (
        "import importlib, pkgutil, sys\n"
        "import streamq.design as d\n"
        "for m in pkgutil.iter_modules(d.__path__):\n"
        "    importlib.import_module('streamq.design.' + m.name)\n"
        "cb, rep = d.design('lloyd-max', 8, pdf='gaussian')\n"
        "assert abs(rep.mse - 0.03455) < 1e-4, rep.mse\n"     # Max 1960, Table I, from memory
        "import numpy as np\n"
        "x = np.random.default_rng(1).standard_normal(4000)\n"
        "d.design('lloyd-max', 16, samples=x)\n"
        "d.lloyd_max_histogram(*d.sample_histogram(x, 512), 16)\n"
        "bad = sorted(n for n in sys.modules\n"
        "             if n.startswith(('streamq.engine', 'streamq.nodes')))\n"
        "print(' '.join(bad))\n"
    )
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=REPO, timeout=300)
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == "", f"streamq.design loaded: {run.stdout.strip()}"


def test_no_module_over_600_lines():
    long = {str(path.relative_to(REPO)): n for path in _modules().values()
            if (n := len(path.read_text().splitlines())) > MAX_MODULE_LINES}
    assert long == {}, f"modules over {MAX_MODULE_LINES} lines: {long}"
