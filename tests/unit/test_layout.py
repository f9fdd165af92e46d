"""The layout rules of the package, read from the source with :mod:`ast`.

The rules are the project's own (DEVELOPERS.md, "Layout"; docs/architecture.md,
"Module map"):

* the import graph between bucksim modules is acyclic, counting the imports
  placed inside functions (a cycle hidden in a function is still a cycle: the
  two modules cannot be understood, tested or moved one without the other);
* no module of the package is over 500 lines, no Python function in the
  repository over 80 lines, and the numba cycle loop
  ``bucksim/engine/cycles.py:run_cycles`` at most 150;
* only the command line (``bucksim/cli/``) imports argparse or calls ``print``:
  the rest of the package returns results and raises errors.

Cycles are found as the strongly connected components of the graph with more
than one module (Tarjan, SIAM J. Comput. 1(2), 1972). The parser is checked
on small sources of its own before it is trusted with the package.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = "bucksim"

MAX_MODULE_LINES = 500
MAX_FUNCTION_LINES = 80
MAX_CYCLE_LOOP_LINES = 150
CYCLE_LOOP = "bucksim/engine/cycles.py:run_periods"
#: The Python files the function rule covers (the package, its tests, the
#: benchmarks, the tools and the docs configuration).
PYTHON_TREES = ("bucksim", "tests", "benchmarks", "tools", "docs")
#: The only part of the package that talks to the terminal.
CLI = "bucksim/cli/"

#: The cycle loop has a limit of its own (MAX_CYCLE_LOOP_LINES); a non-empty
#: reason here marks it as known to be over (a strict expected failure).
LONG_CYCLE_LOOP = ""


# --------------------------------------------------------------------------- reading the source

def module_name(path: Path, root: Path = ROOT) -> str:
    """Dotted module name of a file under ``root``: ``bucksim/io/__init__.py`` -> ``bucksim.io``."""
    parts = path.relative_to(root).with_suffix("").parts
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def package_modules(root: Path = ROOT, package: str = PACKAGE) -> dict[str, Path]:
    """``{dotted name: path}`` of every module of ``package`` under ``root``."""
    return {module_name(p, root): p for p in sorted((root / package).rglob("*.py"))}


def _absolute(module: str, is_package: bool, node: ast.ImportFrom) -> str:
    """The absolute module a ``from ... import`` names, relative levels resolved."""
    if not node.level:
        return node.module or ""
    base = module.split(".") if is_package else module.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def imports_of(module: str, is_package: bool, tree: ast.AST, known) -> set[str]:
    """The modules of ``known`` that ``module`` imports, anywhere in its source.

    ``from a.b import c`` is an edge to ``a.b.c`` when that is a module (a
    submodule imported by name), else to ``a.b``. ``import a.b.c`` is an edge
    to ``a.b.c``. Imports inside functions, methods and ``if`` blocks count
    the same as those at the top.
    """
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(alias.name for alias in node.names if alias.name in known)
        elif isinstance(node, ast.ImportFrom):
            source = _absolute(module, is_package, node)
            for alias in node.names:
                sub = f"{source}.{alias.name}"
                if sub in known:
                    out.add(sub)
                elif source in known:
                    out.add(source)
    out.discard(module)
    return out


def import_graph(modules: dict[str, Path]) -> dict[str, set[str]]:
    """``{module: modules it imports}`` over the given modules."""
    return {name: imports_of(name, path.name == "__init__.py",
                             ast.parse(path.read_text(encoding="utf-8"), str(path)), modules)
            for name, path in modules.items()}


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """The strongly connected components with more than one module, each sorted.

    Tarjan's algorithm, written with an explicit stack so that no recursion
    limit applies.
    """
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found = []
    for start in sorted(graph):
        if start in index:
            continue
        work = [(start, iter(sorted(graph[start])))]
        index[start] = low[start] = len(index)
        stack.append(start)
        on_stack.add(start)
        while work:
            node, children = work[-1]
            child = next(children, None)
            if child is not None:
                if child not in index:
                    index[child] = low[child] = len(index)
                    stack.append(child)
                    on_stack.add(child)
                    work.append((child, iter(sorted(graph.get(child, ())))))
                elif child in on_stack:
                    low[node] = min(low[node], index[child])
                continue
            work.pop()
            if work:
                parent = work[-1][0]
                low[parent] = min(low[parent], low[node])
            if low[node] == index[node]:
                component = []
                while True:
                    member = stack.pop()
                    on_stack.discard(member)
                    component.append(member)
                    if member == node:
                        break
                if len(component) > 1:
                    found.append(sorted(component))
    return sorted(found)


def functions(path: Path, root: Path = ROOT):
    """``(label, lines)`` of every function and method in a file, nested ones included.

    The label is ``relative/path.py:qualified.name``; the lines run from the
    ``def`` to the function's last line (docstring included, decorators not).
    """
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    rel = path.relative_to(root).as_posix()
    out = []

    def visit(node, prefix):
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef)):
                name = prefix + child.name
                out.append((f"{rel}:{name}", child.end_lineno - child.lineno + 1))
                visit(child, name + ".")
            elif isinstance(child, ast.ClassDef):
                visit(child, prefix + child.name + ".")
            else:
                visit(child, prefix)

    visit(tree, "")
    return out


def python_files(root: Path = ROOT):
    for tree in PYTHON_TREES:
        yield from sorted((root / tree).rglob("*.py"))


def function_lengths(root: Path = ROOT) -> dict[str, int]:
    return {label: n for path in python_files(root) for label, n in functions(path, root)}


def module_lengths(root: Path = ROOT) -> dict[str, int]:
    return {p.relative_to(root).as_posix(): len(p.read_text(encoding="utf-8").splitlines())
            for p in package_modules(root).values()}


def terminal_uses(path: Path) -> list[str]:
    """``"line: what"`` for each argparse import and each call of ``print`` in a file."""
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import) and any(a.name.split(".")[0] == "argparse"
                                                for a in node.names):
            out.append(f"{node.lineno}: import argparse")
        elif isinstance(node, ast.ImportFrom) and (node.module or "").split(".")[0] == "argparse":
            out.append(f"{node.lineno}: from argparse import ...")
        elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
              and node.func.id == "print"):
            out.append(f"{node.lineno}: print(...)")
    return out


# --------------------------------------------------------------------------- the reader itself

def _tree_of(tmp_path, files: dict[str, str]) -> Path:
    for rel, text in files.items():
        path = tmp_path / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    return tmp_path


def test_reader_resolves_relative_nested_and_submodule_imports(tmp_path):
    root = _tree_of(tmp_path, {
        "bucksim/__init__.py": "from bucksim.a import f\n",
        "bucksim/a.py": "def f():\n    from .sub import deep\n    return deep\n",
        "bucksim/sub/__init__.py": "from . import deep\nfrom .deep import g\n",
        "bucksim/sub/deep.py": "import os\nif os:\n    import bucksim.sub.leaf as leaf\n",
        "bucksim/sub/leaf.py": "from ..a import f\nfrom bucksim import sub\n",
    })
    graph = import_graph(package_modules(root))
    assert graph == {
        "bucksim": {"bucksim.a"},
        "bucksim.a": {"bucksim.sub.deep"},            # inside a function, relative
        "bucksim.sub": {"bucksim.sub.deep"},          # "from . import deep" names a module
        "bucksim.sub.deep": {"bucksim.sub.leaf"},     # inside an if block
        "bucksim.sub.leaf": {"bucksim.a", "bucksim.sub"},   # two levels up; a package
    }
    assert cycles(graph) == [["bucksim.a", "bucksim.sub", "bucksim.sub.deep", "bucksim.sub.leaf"]]


def test_cycle_finder_on_known_graphs():
    assert cycles({"a": {"b"}, "b": {"c"}, "c": set()}) == []
    assert cycles({"a": {"b"}, "b": {"a"}, "c": {"a"}}) == [["a", "b"]]
    chain = {str(i): {str(i + 1)} for i in range(5000)}   # deeper than any recursion limit
    chain["5000"] = {"0"}
    assert len(cycles(chain)) == 1 and len(cycles(chain)[0]) == 5001
    assert cycles({"a": {"b"}, "b": {"a"}, "c": {"d"}, "d": {"c"}}) == [["a", "b"], ["c", "d"]]


def test_function_reader_counts_nested_functions_and_methods(tmp_path):
    root = _tree_of(tmp_path, {"m.py": "class K:\n    def f(self):\n        def g():\n"
                                       "            pass\n        return g\n\n\n@dec\ndef h():\n"
                                       "    '''doc'''\n"})
    assert functions(root / "m.py", root) == [("m.py:K.f", 4), ("m.py:K.f.g", 2), ("m.py:h", 2)]
    (root / "t.py").write_text("import argparse\nfrom argparse import ArgumentParser\n"
                               "x = obj.print(1)\nprint(2)\n", encoding="utf-8")
    assert terminal_uses(root / "t.py") == ["1: import argparse", "2: from argparse import ...",
                                            "4: print(...)"]


# --------------------------------------------------------------------------- the package

def test_import_graph_is_acyclic():
    graph = import_graph(package_modules())
    assert len(graph) > 40 and sum(map(len, graph.values())) > 100  # the whole package read
    assert cycles(graph) == []


def test_modules_are_short():
    over = {m: n for m, n in module_lengths().items()
            if n > MAX_MODULE_LINES}
    assert over == {}, f"modules over {MAX_MODULE_LINES} lines"


def test_functions_are_short():
    over = {f: n for f, n in function_lengths().items()
            if n > MAX_FUNCTION_LINES and f != CYCLE_LOOP}
    assert over == {}, f"functions over {MAX_FUNCTION_LINES} lines"


@pytest.mark.xfail(bool(LONG_CYCLE_LOOP), strict=True,
                   reason="run_cycles over 150 lines, issue 12, in progress")
def test_cycle_loop_fits_in_150_lines():
    lengths = function_lengths()
    assert CYCLE_LOOP in lengths, "the cycle loop moved: update CYCLE_LOOP"
    assert lengths[CYCLE_LOOP] <= MAX_CYCLE_LOOP_LINES


def test_only_the_command_line_talks_to_the_terminal():
    found = {}
    for path in package_modules().values():
        rel = path.relative_to(ROOT).as_posix()
        if not rel.startswith(CLI) and (uses := terminal_uses(path)):
            found[rel] = uses
    assert found == {}
