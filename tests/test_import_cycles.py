"""The modules of gridflow import each other without cycles (a graph built with ast).

Every import counts, at module level and inside functions (a lazy import that dodges a
cycle is still a cycle); imports under ``if TYPE_CHECKING:`` do not run and do not count.
"""

from __future__ import annotations

import ast
from pathlib import Path

import networkx as nx

ROOT = Path(__file__).resolve().parents[1] / "gridflow"

#: import edges allowed to close a cycle: none
ALLOWED: set[tuple[str, str]] = set()


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _type_checking_nodes(tree: ast.AST) -> set[int]:
    skip: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            for sub in node.body:
                skip.update(id(n) for n in ast.walk(sub))
    return skip


def import_graph() -> nx.DiGraph:
    files = sorted(ROOT.rglob("*.py"))
    modules = {_module_name(p): p for p in files}
    g = nx.DiGraph()
    g.add_nodes_from(modules)
    for name, path in modules.items():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        skip = _type_checking_nodes(tree)
        is_pkg = path.name == "__init__.py"
        for node in ast.walk(tree):
            if id(node) in skip:
                continue
            targets: list[str] = []
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    pkg = name.split(".") if is_pkg else name.split(".")[:-1]
                    pkg = pkg[: len(pkg) - node.level + 1]
                    base = ".".join(pkg + ([base] if base else []))
                for a in node.names:
                    sub = f"{base}.{a.name}"
                    targets.append(sub if sub in modules else base)
            for t in targets:
                if t in modules and t != name:
                    g.add_edge(name, t)
    return g


def test_graph_sees_the_package():
    g = import_graph()
    assert g.has_edge("gridflow.topology.build", "gridflow.topology.attach")
    assert g.number_of_nodes() > 40


def test_no_import_cycles():
    g = import_graph()
    g.remove_edges_from(ALLOWED)
    cycles = list(nx.simple_cycles(g))
    assert cycles == [], "import cycles: " + "; ".join(" -> ".join(c + [c[0]])
                                                       for c in cycles[:5])
