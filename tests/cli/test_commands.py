"""The command line: every command added in one place, shared options in one module, no import
cycle, and the same typed errors as the Python interface mapped to exit codes."""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import click
import networkx as nx
from click.testing import CliRunner

import gridflow
from gridflow.cli import main as cli_main
from gridflow.cli.guard import exit_code_for

PKG = Path(gridflow.__file__).resolve().parent


def _module_name(path: Path) -> str:
    rel = path.relative_to(PKG.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _import_graph() -> nx.DiGraph:
    """gridflow's modules and every import between them (top level and inside functions)."""
    modules = {_module_name(p): p for p in PKG.rglob("*.py")}
    g = nx.DiGraph()
    g.add_nodes_from(modules)
    for name, path in modules.items():
        pkg = name if path.name == "__init__.py" else name.rpartition(".")[0]
        for node in _runtime_nodes(ast.parse(path.read_text())):
            targets = []
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    up = pkg.split(".")[: len(pkg.split(".")) - node.level + 1]
                    base = ".".join([*up, base] if base else up)
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in modules else base
                           for a in node.names]
            for t in targets:
                # the root package runs before any of its modules anyway; its own imports
                # (the error classes) are followed like any other module's
                if t in modules and t != name and t != "gridflow":
                    g.add_edge(name, t)
    return g


def _runtime_nodes(tree: ast.AST):
    """Every node except those under ``if TYPE_CHECKING:`` (never run)."""
    stack = [tree]
    while stack:
        node = stack.pop()
        yield node
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.If) and "TYPE_CHECKING" in ast.unparse(child.test):
                stack.extend(child.orelse)
                continue
            stack.append(child)


def test_cli_has_no_import_cycle():
    g = _import_graph()
    cli_mods = [m for m in g if m.startswith("gridflow.cli")]
    assert "gridflow.cli.main" in cli_mods and "gridflow.cli.options" in cli_mods
    for scc in nx.strongly_connected_components(g):
        if len(scc) > 1:
            assert not scc & (set(cli_mods) | {"gridflow._model", "gridflow.config.draft",
                                               "gridflow.jobs.stages"}), sorted(scc)
    # command modules never import the group: they are added to it, they do not add themselves
    for m in cli_mods:
        if m not in ("gridflow.cli", "gridflow.cli.main"):
            assert "gridflow.cli.main" not in g.successors(m), m


def test_the_import_graph_sees_function_level_imports():
    # the cycle check can fail: imports inside functions count (the commands import their
    # jobs lazily), so a command importing the group back would be an edge here
    g = _import_graph()
    assert g.has_edge("gridflow.cli.run", "gridflow.jobs.run")
    assert g.has_edge("gridflow._model", "gridflow.jobs.stages")


def test_commands_are_listed_in_one_place():
    names = [c.name for c in cli_main.COMMANDS]
    assert names[:3] == ["run", "check", "init"]
    assert set(cli_main.cli.commands) == set(names)
    assert all(isinstance(c, click.Command) for c in cli_main.COMMANDS)
    res = CliRunner().invoke(cli_main.cli, ["--help"])
    assert res.exit_code == 0
    for name in names:
        assert name in res.output


def test_shared_options_are_one_object():
    from gridflow.cli import options

    run_opts = {p.name for p in cli_main.cli.commands["run"].params}
    check_opts = {p.name for p in cli_main.cli.commands["check"].params}
    assert {"config", "out", "previous", "workers", "scheduler"} <= run_opts
    assert {"config", "out"} <= check_opts
    assert callable(options.config_arg) and callable(options.out_opt)


def test_program_entry_point_runs_in_a_fresh_interpreter():
    res = subprocess.run([sys.executable, "-m", "gridflow", "init", "--help"],
                         capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert "never overwritten" in res.stdout


def test_exit_codes_come_from_the_error_classes():
    assert exit_code_for(gridflow.ConfigError("x")) == 2
    assert exit_code_for(gridflow.InputError("x")) == 2
    assert exit_code_for(gridflow.OutputError("x")) == 2
    assert exit_code_for(gridflow.ConvergenceError("x")) == 3
    assert exit_code_for(gridflow.SolverError("x")) == 1
    assert exit_code_for(RuntimeError("x")) == 1
