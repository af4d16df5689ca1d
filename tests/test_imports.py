"""The import graph of src/adaptkit, read with ``ast`` (nothing is imported): no two modules import each other in a
circle, directly or through others, counting imports inside functions, relative and absolute; and the core never
imports the benchmark harness (only the command-line faces do). Circles are found as the strongly connected
components of the graph (Tarjan, SIAM J. Comput. 1(2), 1972)."""
import ast
import sys
from pathlib import Path
from typing import Dict, List, Set

import pytest

SRC = Path(__file__).resolve().parents[1] / "src"
HARNESS = "adaptkit.bench"
FACES = {"adaptkit.cli", "adaptkit.demo"}  # the entry points may start the harness; nothing else may


def modules(src: Path, package: str) -> Dict[str, Path]:
    """Dotted module name -> file, for every module of ``package`` under ``src`` (a package is its __init__)."""
    out = {}
    for p in sorted((src / package).rglob("*.py")):
        parts = list(p.relative_to(src).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = p
    return out


def _known(name: str, mods) -> str:
    """The deepest module of ours that ``name`` lies in ('' when none: a third-party or standard module)."""
    while name and name not in mods:
        name = name.rpartition(".")[0]
    return name


def imports_of(name: str, path: Path, mods) -> Set[str]:
    """The modules of ours that ``name`` imports anywhere in its file (top level, functions, classes)."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    out = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"), filename=str(path))):
        if isinstance(node, ast.Import):
            out.update(_known(a.name, mods) for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:  # from . import x, from ..plain import y
                base = package
                for _ in range(node.level - 1):
                    base = base.rpartition(".")[0]
                target = f"{base}.{node.module}" if node.module else base
            else:
                target = node.module or ""
            for a in node.names:  # `from pkg import mod` imports the module pkg.mod
                sub = f"{target}.{a.name}"
                out.add(sub if sub in mods else _known(target, mods))
    out.discard("")
    out.discard(name)
    return out


def graph(src: Path, package: str) -> Dict[str, Set[str]]:
    mods = modules(src, package)
    return {m: imports_of(m, p, mods) for m, p in mods.items()}


def circles(g: Dict[str, Set[str]]) -> List[List[str]]:
    """Every set of two or more modules that reach one another through imports (sorted names)."""
    index: Dict[str, int] = {}
    low: Dict[str, int] = {}
    stack: List[str] = []
    on_stack: Set[str] = set()
    found: List[List[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(g[v]):
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

    limit = sys.getrecursionlimit()
    sys.setrecursionlimit(max(limit, 10 * len(g) + 100))
    try:
        for v in sorted(g):
            if v not in index:
                visit(v)
    finally:
        sys.setrecursionlimit(limit)
    return found


def _describe(component: List[str], g) -> str:
    inside = set(component)
    edges = [f"{a} -> {b}" for a in component for b in sorted(g[a] & inside)]
    return f"{', '.join(component)} ({'; '.join(edges)})"


def test_the_checker_sees_imports_inside_functions_relative_and_absolute(tmp_path):
    pkg = tmp_path / "pkg"
    (pkg / "sub").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "sub" / "__init__.py").write_text("")
    (pkg / "a.py").write_text("def f():\n    from .sub import b\n")  # relative, inside a function
    (pkg / "sub" / "b.py").write_text("import pkg.c\n")  # absolute
    (pkg / "sub" / "d.py").write_text("from .. import a\n")  # `from package import module`, two levels
    (pkg / "c.py").write_text("import os\nclass K:\n    def m(self):\n        from pkg.sub import d\n")
    g = graph(tmp_path, "pkg")
    assert g["pkg.a"] == {"pkg.sub.b"} and g["pkg.sub.b"] == {"pkg.c"} and g["pkg.sub.d"] == {"pkg.a"}
    assert g["pkg.c"] == {"pkg.sub.d"}  # os is not ours
    assert circles(g) == [["pkg.a", "pkg.c", "pkg.sub.b", "pkg.sub.d"]]
    (pkg / "c.py").write_text("import os\n")
    assert circles(graph(tmp_path, "pkg")) == []


GRAPH = graph(SRC, "adaptkit")


def test_no_module_of_adaptkit_imports_itself_through_others():
    g = GRAPH
    assert len(g) > 40 and HARNESS in g  # the whole package was read
    found = circles(g)
    assert not found, "import circles: " + " | ".join(_describe(c, g) for c in found)


@pytest.mark.parametrize("module", sorted(m for m in GRAPH if not m.startswith(HARNESS) and m not in FACES))
def test_the_core_never_imports_the_harness(module):
    assert not {m for m in GRAPH[module] if m == HARNESS or m.startswith(HARNESS + ".")}
