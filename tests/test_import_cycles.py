"""No import cycles between the product's modules (issue 16): the import graph of rigcast,
rigcast.runtime and rigcast.export, read from the source (every import statement, at module level
or inside a function, except ``if TYPE_CHECKING:`` blocks), has no strongly connected component
of more than one module (Tarjan 1972). A function-level import is a dependency too: it only moves
the cycle to run time."""

from __future__ import annotations

import ast
import importlib.util
import pkgutil
from pathlib import Path

import rigcast.export
import rigcast.runtime

import rigcast

# Cycles through modules that others own this session, each to be broken in those files; the
# test fails when one is gone, so that this list can only shrink. (Empty: the last one,
# protocol <-> messages <-> protocol_client, went when their shared basics moved to wire.py.)
KNOWN_CYCLES: set[frozenset[str]] = set()


def module_files() -> dict[str, Path]:
    files = {}
    for pkg in (rigcast, rigcast.runtime, rigcast.export):
        files[pkg.__name__] = Path(str(pkg.__file__))
        for info in pkgutil.walk_packages(pkg.__path__, pkg.__name__ + "."):
            spec = importlib.util.find_spec(info.name)
            assert spec is not None and spec.origin is not None
            files[info.name] = Path(spec.origin)
    return files


def _type_checking_only(tree: ast.Module) -> set[int]:
    """ids of import nodes inside ``if TYPE_CHECKING:`` blocks."""
    skip = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and getattr(node.test, "id", None) == "TYPE_CHECKING":
            skip.update(id(n) for stmt in node.body for n in ast.walk(stmt))
    return skip


def imports_of(name: str, path: Path, modules: set[str]) -> set[str]:
    """The product modules ``name`` imports; ``from pkg import x`` counts ``pkg.x`` when that is
    a module, else ``pkg``."""
    tree = ast.parse(path.read_text(), str(path))
    skip = _type_checking_only(tree)
    found = set()
    for node in ast.walk(tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name in modules)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            for alias in node.names:
                full = f"{node.module}.{alias.name}"
                if full in modules:
                    found.add(full)
                elif node.module in modules:
                    found.add(node.module)
    found.discard(name)
    return found


def cycles(graph: dict[str, set[str]]) -> list[frozenset[str]]:
    """Strongly connected components of more than one node (Tarjan's algorithm, iterative)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    out: list[frozenset[str]] = []
    for root in sorted(graph):
        if root in index:
            continue
        work = [(root, iter(sorted(graph[root])))]
        index[root] = low[root] = len(index)
        stack.append(root)
        on_stack.add(root)
        while work:
            node, edges = work[-1]
            nxt = next(edges, None)
            if nxt is not None:
                if nxt not in index:
                    index[nxt] = low[nxt] = len(index)
                    stack.append(nxt)
                    on_stack.add(nxt)
                    work.append((nxt, iter(sorted(graph[nxt]))))
                elif nxt in on_stack:
                    low[node] = min(low[node], index[nxt])
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                comp = set()
                while True:
                    member = stack.pop()
                    on_stack.discard(member)
                    comp.add(member)
                    if member == node:
                        break
                if len(comp) > 1:
                    out.append(frozenset(comp))
    return out


def test_cycle_finder_finds_a_cycle() -> None:
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}, "e": set()}
    assert cycles(graph) == [frozenset({"a", "b", "c"})]
    assert cycles({"a": {"b"}, "b": set()}) == []


def test_no_import_cycles_between_product_modules() -> None:
    files = module_files()
    assert len(files) >= 80  # the walk found the product
    graph = {name: imports_of(name, path, set(files)) for name, path in files.items()}
    assert "rigcast.readers.take_common" in graph["rigcast.readers.gltf_take"]  # the graph is real
    found = set(cycles(graph))
    assert found - KNOWN_CYCLES == set(), "new import cycles"
    assert KNOWN_CYCLES - found == set(), "these cycles are gone: drop them from KNOWN_CYCLES"
