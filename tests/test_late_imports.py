"""Imports sit at the top of their file: a function-level import needs a `# late:` reason on its line, and the
package import graph has no cycles (a cycle is what late imports were hiding)."""

from __future__ import annotations

import ast
from pathlib import Path

import grimp

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("coreach", "coreach_plugins")


def _late_imports(path: Path) -> list[tuple[int, str]]:
    """(line, source line) of every import inside a function of `path`, nested ones included."""
    lines = path.read_text().splitlines()
    found: list[tuple[int, str]] = []

    def walk(node: ast.AST, in_function: bool) -> None:
        for child in ast.iter_child_nodes(node):
            if in_function and isinstance(child, (ast.Import, ast.ImportFrom)):
                found.append((child.lineno, lines[child.lineno - 1]))
            walk(child, in_function or isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda)))

    walk(ast.parse(path.read_text(), filename=str(path)), False)
    return found


def test_every_function_level_import_says_why_it_is_late():
    files = sorted((ROOT / "pipeline").rglob("*.py")) + sorted((ROOT / "plugins").rglob("*.py"))
    assert files
    unexplained = [f"{path.relative_to(ROOT)}:{line}: {text.strip()}"
                   for path in files for line, text in _late_imports(path) if "# late:" not in text]  # fmt: skip
    assert not unexplained, ("imports inside functions without a '# late: <reason>' comment on their line; move "
                             "them to the top of the file, or say why they must stay late:\n" + "\n".join(unexplained))


def _cycles(graph) -> list[list[str]]:
    """Strongly connected components of more than one module (Tarjan, iterative), each sorted."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []
    counter = 0
    for start in sorted(graph.modules):
        if start in index:
            continue
        work = [(start, iter(sorted(graph.find_modules_directly_imported_by(start))))]
        index[start] = low[start] = counter
        counter += 1
        stack.append(start)
        on_stack.add(start)
        while work:
            node, children = work[-1]
            child = next(children, None)
            if child is not None:
                if child not in graph.modules:
                    continue
                if child not in index:
                    index[child] = low[child] = counter
                    counter += 1
                    stack.append(child)
                    on_stack.add(child)
                    work.append((child, iter(sorted(graph.find_modules_directly_imported_by(child)))))
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
                    found.append(sorted(component))
    return found


def _describe(graph, component: list[str]) -> str:
    """One cycle as a chain of imports with their lines, e.g. a -> b (b.py:12) -> a."""
    first = component[0]
    members = set(component)
    for second in sorted(graph.find_modules_directly_imported_by(first) & members):
        back = graph.find_shortest_chain(importer=second, imported=first)
        if back:
            chain = (first, *back)
            steps = []
            for a, b in zip(chain, chain[1:]):
                lines = sorted(d["line_number"] for d in graph.get_import_details(importer=a, imported=b))
                steps.append(f"{a} -> {b} (line {', '.join(map(str, lines))})")
            return f"{', '.join(component)}:\n    " + "\n    ".join(steps)
    return ", ".join(component)


def test_the_package_import_graph_has_no_cycles():
    # every import counts, late or under TYPE_CHECKING: a cycle only hidden from the interpreter is still one
    graph = grimp.build_graph(*PACKAGES, cache_dir=None)
    assert "coreach.cli" in graph.modules
    cycles = _cycles(graph)
    assert not cycles, "import cycles between modules:\n" + "\n".join(_describe(graph, c) for c in cycles)
