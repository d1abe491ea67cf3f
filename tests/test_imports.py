"""The package's import graph is acyclic, and its rooms import only down the flow model → Net →
plan → tiles → kernel → analysis → report (DEVELOPERS.md, `RANK`).

The graph is read from the source with `ast`, so it is fast and sees imports deferred into
function bodies as well as those at module level: a deferred import that points back up the flow
is still a cycle in the design, only hidden from the interpreter. An edge goes to the module
imported (``from . import _checks`` → ``_analysis._checks``), or to the package's ``__init__``
when a name of the package itself is imported (``from .. import ntk`` → ``ntkcalc``). A parent
package run before its child is Python's import order, not an edge.
"""

from __future__ import annotations

import ast
import pathlib

ROOT = pathlib.Path(__file__).resolve().parents[1]

# Back edges that remain, each with where it is. Empty this list, never grow it.
KNOWN = {
    # RunAnalysis.write renders its report; report.py reads RunAnalysis. Owned by study.py.
    ("ntkcalc._workflows.study", "ntkcalc._workflows.report"),
}


#: The rooms in the order of the flow, lowest first: a module imports from its own room and
#: from rooms ranked below it, never from one above. Rooms in one tuple share a rank. A module
#: belongs to the longest room that names it or a package above it; the root package's room
#: holds its ``__init__`` alone, so a new room must be ranked here.
RANK = (
    ("ntkcalc._version", "ntkcalc._words", "ntkcalc._subprocess"),  # shared by every room
    ("ntkcalc._adapters",),  # model → Net
    ("ntkcalc._engine",),  # validation, pricing, compiled steps: no store, no devices
    ("ntkcalc._tiles",),  # the whole request's plan, then tiles, store, devices
    ("ntkcalc._kind",),
    ("ntkcalc._kernel",),  # the public kernel
    ("ntkcalc._analysis",),
    ("ntkcalc._sketch",),
    ("ntkcalc._workflows",),
    ("ntkcalc",),  # the curated namespace (what `from .. import x` reaches)
    ("ntkcalc._bench",),  # the benchmark's rows (scale, sketch) run the public namespace
    ("ntkcalc.bench",),
    ("ntkcalc._workflows.cli", "ntkcalc.__main__"),  # the command line, benchmark included
)


def _modules(package: pathlib.Path) -> dict[str, pathlib.Path]:
    found = {}
    for path in package.rglob("*.py"):
        parts = list(path.relative_to(package.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        found[".".join(parts)] = path
    return found


def import_graph(package: pathlib.Path) -> dict[str, set[str]]:
    """Module → the package's modules it imports, anywhere in its source."""
    modules = _modules(package)
    graph = {}
    for name, path in modules.items():
        here = name if path.name == "__init__.py" else name.rpartition(".")[0]
        edges = set()
        for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
            if isinstance(node, ast.Import):
                edges.update(a.name for a in node.names if a.name in modules)
            elif isinstance(node, ast.ImportFrom):
                if node.level:
                    base = ".".join(here.split(".")[: len(here.split(".")) - node.level + 1])
                    source = f"{base}.{node.module}" if node.module else base
                else:
                    source = node.module
                for alias in node.names:
                    if f"{source}.{alias.name}" in modules:
                        edges.add(f"{source}.{alias.name}")
                    elif source in modules:
                        edges.add(source)
        edges.discard(name)
        graph[name] = edges
    return graph


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """The strongly connected components with more than one module (Tarjan, 1972, SIAM J.
    Comput. 1(2)), each sorted; a self-import is not reported."""
    index, low, stack, on_stack, found = {}, {}, [], set(), []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
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

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def room_of(module: str, rank=RANK) -> tuple[int, str] | None:
    """(rank, room) of ``module``: the longest room that is the module or a package above it
    (the root package only for itself), or None."""
    found = [(len(room), i, room) for i, rooms in enumerate(rank) for room in rooms
             if module == room or ("." in room and module.startswith(room + "."))]
    return max(found)[1:] if found else None


def against_the_flow(graph: dict[str, set[str]], rank=RANK) -> list[str]:
    """Every import of a room ranked above the importer's, as "importer → imported (rooms)",
    and every module in no room."""
    found = [f"{m} is in no room of RANK: add its room at its place in the flow"
             for m in sorted(graph) if room_of(m, rank) is None]
    for source in sorted(graph):
        if room_of(source, rank) is None:
            continue
        (low, here) = room_of(source, rank)
        for target in sorted(graph[source]):
            there = room_of(target, rank)
            if there is not None and there[0] > low:
                found.append(f"{source} imports {target}: {there[1]} comes after {here} in "
                             "the flow")
    return found


def _package_graph() -> dict[str, set[str]]:
    """The package's import graph without the `KNOWN` back edges (each checked still there)."""
    graph = import_graph(ROOT / "ntkcalc")
    for source, target in KNOWN:
        assert target in graph[source], f"{source} no longer imports {target}: drop it from KNOWN"
        graph[source] = graph[source] - {target}
    return graph


def test_rooms_import_only_down_the_flow():
    found = against_the_flow(_package_graph())
    assert found == [], "imports against the flow (DEVELOPERS.md):\n" + "\n".join(found)


def test_package_import_graph_is_acyclic():
    assert cycles(_package_graph()) == [], (
        "import cycles (a module imports one that imports it back)")


def test_cycle_finder_sees_deferred_and_package_imports(tmp_path):
    # The finder itself, on a made-up package: a deferred import back (a ↔ b), a submodule
    # importing a name of its package's __init__ (c → pkg → c), and a clean one-way chain.
    pkg = tmp_path / "pkg"
    (pkg / "sub").mkdir(parents=True)
    (pkg / "__init__.py").write_text("from .c import thing as thing\n")
    (pkg / "a.py").write_text("from .b import g\n")
    (pkg / "b.py").write_text("def g():\n    from . import a\n    return a\n")
    (pkg / "c.py").write_text("def thing():\n    from . import d\n    return d\n")
    (pkg / "d.py").write_text("from . import thing\n")
    (pkg / "sub" / "__init__.py").write_text("")
    (pkg / "sub" / "e.py").write_text("from . import f\nfrom ..a import g\n")
    (pkg / "sub" / "f.py").write_text("import json\n")
    graph = import_graph(pkg)
    assert graph["pkg.sub.e"] == {"pkg.sub.f", "pkg.a"}
    assert graph["pkg.d"] == {"pkg"}
    assert cycles(graph) == [["pkg", "pkg.c", "pkg.d"], ["pkg.a", "pkg.b"]]


def test_flow_check_names_both_modules(tmp_path):
    # The rank check itself, on a made-up package: a deferred import up the flow (low → high),
    # a module placed by its longest room (high.top ranks above high), and a room not in the rank.
    pkg = tmp_path / "pkg"
    for room in ("low", "high", "stray"):
        (pkg / room).mkdir(parents=True)
        (pkg / room / "__init__.py").write_text("")
    (pkg / "__init__.py").write_text("")
    (pkg / "low" / "a.py").write_text("def f():\n    from ..high import b\n    return b\n")
    (pkg / "high" / "b.py").write_text("from ..low import a\n")
    (pkg / "high" / "top.py").write_text("from . import b\n")
    (pkg / "low" / "c.py").write_text("from ..high import top\n")
    (pkg / "stray" / "d.py").write_text("")
    rank = (("pkg.low",), ("pkg.high",), ("pkg.high.top",), ("pkg",))
    assert room_of("pkg.high.top", rank) == (2, "pkg.high.top")
    assert room_of("pkg.high", rank) == (1, "pkg.high")
    assert room_of("pkg.stray", rank) is None  # the root's room is its __init__ alone
    assert against_the_flow(import_graph(pkg), rank) == [
        "pkg.stray is in no room of RANK: add its room at its place in the flow",
        "pkg.stray.d is in no room of RANK: add its room at its place in the flow",
        "pkg.low.a imports pkg.high.b: pkg.high comes after pkg.low in the flow",
        "pkg.low.c imports pkg.high.top: pkg.high.top comes after pkg.low in the flow",
    ]
