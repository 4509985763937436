"""The package structure: no module of monitor, layouts or callbacks imports itself back.

The layer contracts (imports go downwards only) are import-linter's, run by CI from
pyproject.toml; they say nothing about modules of one layer importing each other in a
circle, which this test forbids. The import graph is grimp's (the library import-linter reads
it with; part of the ``checks`` extra), imports inside functions included.
"""

from __future__ import annotations

import pytest

grimp = pytest.importorskip("grimp")


def _loops(graph) -> list[list[str]]:
    """Strongly connected components of more than one module (Tarjan 1972, iteratively)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    loops = []
    for root in sorted(graph.modules):
        if root in index:
            continue
        work = [(root, iter(sorted(graph.find_modules_directly_imported_by(root))))]
        index[root] = low[root] = len(index)
        stack.append(root)
        on_stack.add(root)
        while work:
            v, children = work[-1]
            for w in children:
                if w not in index:
                    index[w] = low[w] = len(index)
                    stack.append(w)
                    on_stack.add(w)
                    work.append((w, iter(sorted(graph.find_modules_directly_imported_by(w)))))
                    break
                if w in on_stack:
                    low[v] = min(low[v], index[w])
            else:
                work.pop()
                if work:
                    low[work[-1][0]] = min(low[work[-1][0]], low[v])
                if low[v] == index[v]:
                    comp = []
                    while True:
                        w = stack.pop()
                        on_stack.discard(w)
                        comp.append(w)
                        if w == v:
                            break
                    if len(comp) > 1:
                        loops.append(sorted(comp))
    return loops


def test_the_loop_finder_finds_a_planted_loop():
    graph = grimp.ImportGraph()
    for name in ("pkg", "pkg.a", "pkg.b", "pkg.c", "pkg.d"):
        graph.add_module(name)
    for importer, imported in (("pkg.a", "pkg.b"), ("pkg.b", "pkg.c"), ("pkg.c", "pkg.a"),
                               ("pkg.d", "pkg.a")):
        graph.add_import(importer=importer, imported=imported)
    assert _loops(graph) == [["pkg.a", "pkg.b", "pkg.c"]]


def test_no_import_loop():
    graph = grimp.build_graph("monitor", "layouts", "callbacks")
    assert len(graph.modules) > 60
    assert _loops(graph) == []
