"""The project's import graph: no cycle between files, and the layers solver <- stream <- replay.

Imports are read from the source with the standard library's :mod:`ast`
(every ``import`` and ``from ... import`` statement, at module level or inside
functions alike), so nothing is executed. Rules checked:

* no cycle between the project's files (Tarjan's strongly connected
  components, computed here and cross-checked with NetworkX's
  ``simple_cycles`` on the same graph);
* ``solver`` imports nothing from ``stream`` or ``replay``;
* ``stream`` imports nothing from ``replay``, except the command line
  ``stream/cli.py``: it is the program's entry point (``ranktide = ranktide.stream.cli:main``)
  that dispatches to every command, nothing imports it, and it imports the
  commands of ``replay`` only inside the function that runs each one.
"""

from __future__ import annotations

import ast
from pathlib import Path

import networkx as nx
import pytest

ROOT = Path(__file__).resolve().parent.parent
LAYERS = ("solver", "stream", "replay")
#: The entry point: may import upward, inside functions only; no file may import it.
ENTRY_POINT = "ranktide.stream.cli"


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = [p for p in rel.parts if p != "__init__"]
    return ".".join(["ranktide", *parts])


def _project_files() -> dict[str, Path]:
    files = {_module_name(ROOT / "__init__.py"): ROOT / "__init__.py"}
    for layer in LAYERS:
        for path in sorted((ROOT / layer).glob("*.py")):
            files[_module_name(path)] = path
    return files


def _imports(path: Path, module: str, files: dict[str, Path]) -> list[tuple[str, bool]]:
    """(imported module, at module level) for each import in ``path``; relative imports resolved.

    ``from pkg import name`` counts as an import of the file ``pkg/name.py``
    when there is one (a submodule), else of ``pkg`` itself.
    """
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    top_level = {id(node) for node in tree.body}
    found = []
    for node in ast.walk(tree):
        at_top = id(node) in top_level
        if isinstance(node, ast.Import):
            found += [(alias.name, at_top) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[: len(anchor) - (node.level - 1)]
                base = ".".join(anchor + ([base] if base else []))
            for alias in node.names:
                sub = f"{base}.{alias.name}"
                found.append((sub if sub in files else base, at_top))
    return found


def _graph() -> dict[str, set[str]]:
    files = _project_files()
    edges: dict[str, set[str]] = {m: set() for m in files}
    for module, path in files.items():
        for target, _ in _imports(path, module, files):
            if target in files and target != module:
                edges[module].add(target)
    return edges


def _strongly_connected(edges: dict[str, set[str]]) -> list[list[str]]:
    """Tarjan (1972), iterative: the components of the graph with more than one file."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    on_stack: set[str] = set()
    stack: list[str] = []
    out: list[list[str]] = []
    counter = 0
    for root in edges:
        if root in index:
            continue
        work = [(root, iter(sorted(edges[root])))]
        index[root] = low[root] = counter
        counter += 1
        stack.append(root)
        on_stack.add(root)
        while work:
            node, it = work[-1]
            nxt = next(it, None)
            if nxt is not None:
                if nxt not in index:
                    index[nxt] = low[nxt] = counter
                    counter += 1
                    stack.append(nxt)
                    on_stack.add(nxt)
                    work.append((nxt, iter(sorted(edges[nxt]))))
                elif nxt in on_stack:
                    low[node] = min(low[node], index[nxt])
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                comp = []
                while True:
                    top = stack.pop()
                    on_stack.discard(top)
                    comp.append(top)
                    if top == node:
                        break
                if len(comp) > 1:
                    out.append(sorted(comp))
    return out


def _layer(module: str) -> str | None:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 and parts[1] in LAYERS else None


def test_the_graph_is_read() -> None:
    edges = _graph()
    # known edges, so that an empty graph (a parsing slip) cannot pass the checks below
    assert "ranktide.solver.kernels" in edges["ranktide.solver.engine"]
    assert "ranktide.stream.events" in edges["ranktide.stream.logs"]
    assert "ranktide.stream.logs" in edges["ranktide.replay.replay"]
    assert sum(len(v) for v in edges.values()) > 40


def test_no_import_cycle_between_files() -> None:
    edges = _graph()
    assert _strongly_connected(edges) == []
    reference = nx.DiGraph([(a, b) for a, targets in edges.items() for b in targets])
    assert next(nx.simple_cycles(reference), None) is None  # NetworkX agrees


def test_cycle_detection_finds_a_cycle() -> None:
    """The detector on a graph with a known cycle (the check above must be able to fail)."""
    edges = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}
    assert _strongly_connected(edges) == [["a", "b", "c"]]


@pytest.mark.parametrize("layer,forbidden", [("solver", ("stream", "replay")), ("stream", ("replay",))])
def test_layers_import_only_downward(layer: str, forbidden: tuple[str, ...]) -> None:
    offences = []
    files = _project_files()
    for module, path in files.items():
        if _layer(module) != layer:
            continue
        for target, at_top in _imports(path, module, files):
            if _layer(target) not in forbidden:
                continue
            if module == ENTRY_POINT and not at_top:
                continue  # the command line runs replay's commands (see the module docstring)
            offences.append(f"{module} imports {target}" + ("" if at_top else " (in a function)"))
    assert offences == []


def test_nothing_imports_the_entry_point() -> None:
    importers = [m for m, targets in _graph().items() if ENTRY_POINT in targets]
    assert importers == []
