"""The import rules of docs/architecture.md, checked on the source with the standard library.

Every `import` and `from ... import` in service/seedbed and client/seedbed_client is an edge
(wherever it sits: module level or inside a function), except those under
`if TYPE_CHECKING:`, which never run. `from a.b import c` points at module a.b.c when that is
a module, else at a.b. A package's __init__ is a node like any other; importing a.b.c is not
counted as importing a.b (Python runs a.b's __init__ first, which is why the packages whose
leaves import each other keep that __init__ free of imports).

Rules:
- no import cycle inside seedbed or seedbed_client (a cycle is what makes a module's meaning
  depend on which one happened to be imported first);
- seedbed.core imports none of seedbed.formats, seedbed.web, seedbed.registry (the core is
  pure: no bytes written, no HTTP, no database);
- seedbed.formats imports neither seedbed.web nor seedbed.registry;
- seedbed_client never imports seedbed (it installs alone); seedbed may import seedbed_client.
"""

from __future__ import annotations

import ast
from collections.abc import Iterator
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
SOURCES = {
    "seedbed": ROOT / "service" / "seedbed",
    "seedbed_client": ROOT / "client" / "seedbed_client",
}


def _module_files() -> dict[str, Path]:
    out: dict[str, Path] = {}
    for top, folder in SOURCES.items():
        for path in sorted(folder.rglob("*.py")):
            parts = list(path.relative_to(folder).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            out[".".join([top, *parts])] = path
    return out


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _imports(tree: ast.AST) -> Iterator[ast.Import | ast.ImportFrom]:
    for node in ast.iter_child_nodes(tree):
        if isinstance(node, ast.If) and _is_type_checking(node.test):
            yield from (n for child in node.orelse for n in _imports_in(child))
            continue
        yield from _imports_in(node)


def _imports_in(node: ast.AST) -> Iterator[ast.Import | ast.ImportFrom]:
    if isinstance(node, ast.Import | ast.ImportFrom):
        yield node
        return
    yield from _imports(node)


def _graph() -> dict[str, set[str]]:
    files = _module_files()
    graph: dict[str, set[str]] = {name: set() for name in files}
    for name, path in files.items():
        package = name if path.name == "__init__.py" else name.rpartition(".")[0]
        for node in _imports(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            else:
                base = node.module or ""
                if node.level:
                    anchor = package.split(".")
                    anchor = anchor[: len(anchor) - (node.level - 1)]
                    base = ".".join([*anchor, base] if base else anchor)
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in files else base
                           for a in node.names]  # fmt: skip
            for target in targets:
                # `import a.b.c` of a module we do not have (numpy.linalg) is ignored; of ours,
                # the longest prefix that is one of our modules is the target.
                while target and target not in files:
                    target = target.rpartition(".")[0]
                if target and target != name:
                    graph[name].add(target)
    return graph


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan, iterative)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    out: list[list[str]] = []
    counter = 0
    for root in sorted(graph):
        if root in index:
            continue
        work = [(root, iter(sorted(graph[root])))]
        index[root] = low[root] = counter
        counter += 1
        stack.append(root)
        on_stack.add(root)
        while work:
            node, children = work[-1]
            child = next(children, None)
            if child is not None:
                if child not in index:
                    index[child] = low[child] = counter
                    counter += 1
                    stack.append(child)
                    on_stack.add(child)
                    work.append((child, iter(sorted(graph[child]))))
                elif child in on_stack:
                    low[node] = min(low[node], index[child])
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                component = []
                while True:
                    member = stack.pop()
                    on_stack.discard(member)
                    component.append(member)
                    if member == node:
                        break
                if len(component) > 1:
                    out.append(sorted(component))
    return out


def _violations(graph: dict[str, set[str]], source: str, forbidden: tuple[str, ...]) -> list[str]:
    def inside(module: str, package: str) -> bool:
        return module == package or module.startswith(package + ".")

    return sorted(
        f"{m} imports {t}"
        for m, targets in graph.items()
        if inside(m, source)
        for t in targets
        if any(inside(t, f) for f in forbidden)
    )


GRAPH = _graph()


def test_the_graph_sees_the_packages() -> None:
    # A walker that found nothing would pass every rule below.
    assert "seedbed.core.request.parse" in GRAPH
    assert "seedbed.core.request.network" in GRAPH["seedbed.core.request.parse"]
    assert "seedbed_client.client" in GRAPH


def test_the_cycle_finder_finds_a_cycle() -> None:
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert _cycles({"a": {"b"}, "b": set()}) == []


def test_no_import_cycles() -> None:
    assert _cycles(GRAPH) == []


def test_core_imports_no_outer_layer() -> None:
    forbidden = ("seedbed.formats", "seedbed.web", "seedbed.registry", "seedbed.cli")
    assert _violations(GRAPH, "seedbed.core", forbidden) == []


def test_formats_import_neither_web_nor_registry() -> None:
    assert _violations(GRAPH, "seedbed.formats", ("seedbed.web", "seedbed.registry")) == []


def test_client_never_imports_the_service() -> None:
    assert _violations(GRAPH, "seedbed_client", ("seedbed",)) == []
