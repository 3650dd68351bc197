"""The shape of the package: one-way imports, no circles, modules and functions of a readable size.

Every ``import`` and ``from ... import`` of every module is parsed, including
those inside functions (an import moved into a function still ties two
modules).  The library layer (everything but ``mvkde.pipeline`` and the
command-line modules) must never import the pipeline.
"""

from __future__ import annotations

import ast
import pathlib

import pytest

PACKAGE = pathlib.Path(__file__).resolve().parent.parent / "mvkde"
#: modules above the library: the command line and what only it uses
TOP = {"mvkde.cli", "mvkde.__main__", "mvkde.demo", "mvkde.plot", "mvkde.inspect"}
MAX_MODULE_LINES = 700
MAX_FUNCTION_LINES = 100
#: a long module or function says why at its top with this phrase (common practice: a stated exception)
REASON = "Long because"


def _modules() -> dict[str, pathlib.Path]:
    out = {}
    for f in PACKAGE.rglob("*.py"):
        parts = f.relative_to(PACKAGE.parent).with_suffix("").parts
        name = ".".join(parts)
        out[name[: -len(".__init__")] if name.endswith(".__init__") else name] = f
    return out


def _imports(name: str, path: pathlib.Path, modules) -> set[str]:
    """Modules of the package that ``name`` imports anywhere in its source."""
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                stem = ".".join(base + ([node.module] if node.module else []))
            else:
                stem = node.module or ""
            targets = [f"{stem}.{a.name}" for a in node.names if f"{stem}.{a.name}" in modules]
            if len(targets) < len(node.names):
                targets.append(stem)
        elif isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        else:
            continue
        for t in targets:
            # "import mvkde.a.b" ties to the deepest module of the package it names
            while t and t not in modules:
                t = t.rsplit(".", 1)[0] if "." in t else ""
            if t and t != name and not name.startswith(t + "."):
                found.add(t)
    return found


def _graph():
    modules = _modules()
    return {m: _imports(m, f, modules) for m, f in modules.items()}


def _circles(graph) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan's algorithm)."""
    index, low, stack, on, out = {}, {}, [], set(), []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in graph[v]:
            if w not in index:
                visit(w)
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
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def test_the_parser_sees_imports_inside_functions(tmp_path):
    """The check itself can fail: an import inside a function is an edge."""
    mods = {"pkg.a": tmp_path / "a.py", "pkg.b": tmp_path / "b.py"}
    mods["pkg.a"].write_text("def f():\n    from . import b\n")
    mods["pkg.b"].write_text("from .a import f\n")
    graph = {m: _imports(m, f, mods) for m, f in mods.items()}
    assert graph == {"pkg.a": {"pkg.b"}, "pkg.b": {"pkg.a"}}
    assert _circles(graph) == [["pkg.a", "pkg.b"]]


def test_no_import_circles():
    assert _circles(_graph()) == []


def test_library_never_imports_the_pipeline():
    graph = _graph()
    def top(m):
        return m.startswith("mvkde.pipeline") or any(m == t or m.startswith(t + ".") for t in TOP)

    library = [m for m in graph if not top(m) and m != "mvkde"]
    offenders = {m: sorted(t for t in graph[m] if top(t)) for m in library}
    assert {m: t for m, t in offenders.items() if t} == {}


def test_pipeline_calls_one_library_door_for_the_cells():
    """Block tasks reach the estimator only through the batch door ``mvkde.cells``."""
    graph = _graph()
    assert "mvkde.cells" in graph["mvkde.pipeline.blocks"]
    internals = {"mvkde.bandwidth", "mvkde.engines", "mvkde.kernels", "mvkde.boundary", "mvkde.directional_fit"}
    reach = {m: sorted(t for t in graph[m] if any(t == i or t.startswith(i + ".") for i in internals))
             for m in graph if m.startswith("mvkde.pipeline")}
    # the workflow keys validate option names against the library's registries (and a given matrix with the
    # bandwidth-matrix object); nothing else reaches inside
    allowed = {"mvkde.pipeline.keys", "mvkde.pipeline.workflow"}
    assert {m: t for m, t in reach.items() if t and m not in allowed} == {}


def _long_functions(tree, lines):
    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            length = node.end_lineno - node.lineno + 1
            doc = ast.get_docstring(node) or ""
            if length > MAX_FUNCTION_LINES and REASON not in doc:
                yield f"{node.name} ({length} lines)"


@pytest.mark.parametrize("name", sorted(_modules()))
def test_module_and_function_sizes(name):
    path = _modules()[name]
    text = path.read_text()
    tree = ast.parse(text)
    n = text.count("\n")
    doc = ast.get_docstring(tree) or ""
    assert n <= MAX_MODULE_LINES or REASON in doc, f"{name}: {n} lines and no reason at its top"
    assert list(_long_functions(tree, text.splitlines())) == []
